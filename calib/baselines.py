"""Stage 3b: frequentist baselines beside the hierarchical model (``--method ratio`` / ``glm``).

Both read :class:`calib.cells.Cells` and return a :class:`BaselineResult` holding draws of
theta = log(q_gear / q_reference) labelled like the model's posterior, so that the factor
set, ``convert`` and the report treat every method alike. The factor is exp(-theta):
cpue_reference ~ factor x cpue_gear.

``fit_ratio``
    Ratio of mean catch per unit effort over the groups where the gear and the reference
    both fished, with a percentile bootstrap over those groups (Efron & Tibshirani 1993,
    "An Introduction to the Bootstrap", ch. 13). Only directly paired groups count: a gear
    linked to the reference only through a third gear has no ratio.

``fit_glm``
    Conditional multinomial logit maximum likelihood: in each group x species cell the
    counts of the gears present, given their total, are multinomial with
    p_g = w_g exp(theta_g) / sum_present w exp(theta). This is the likelihood of the Poisson
    GLM with group x species fixed effects, gear x species effects and a log-effort offset,
    profiled over the fixed effects (Palmgren 1981, "The Fisher information matrix for
    log linear models arguing conditionally on observed explanatory variables"; Baker 1994,
    "The multinomial-Poisson transformation", The Statistician 43), without building that
    dense design. Wald intervals from the inverse observed information; draws from the
    normal approximation. The multinomial ignores patchiness between tows (overdispersion),
    so with patchy catches its intervals are too narrow.
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass, field

import numpy as np
import pandas as pd
import xarray as xr
from scipy import optimize, sparse, stats
from scipy.sparse import csgraph

from calib.cells import Cells

POINT_COLUMNS = ["gear", "species", "theta", "theta_lower", "theta_upper", "theta_se", "note"]


@dataclass
class BaselineResult:
    """Result of a frequentist baseline fit.

    theta_draws : DataArray (chain=1, draw, gear, species) of theta = log(q_gear / q_ref);
        the reference gear is row 0 and is 0 in every draw. Bootstrap replicates for
        ``ratio``, normal-approximation draws for ``glm``. NaN for non-estimable factors.
    point : one row per non-reference gear x species: gear, species, theta (point estimate),
        theta_lower, theta_upper (interval at ``settings['interval']``, theta scale),
        theta_se (bootstrap sd or Wald standard error) and note (empty when estimable,
        otherwise why not). factor = exp(-theta), factor_lower = exp(-theta_upper).
    settings : what the fit ran with (method, interval, seed, replicates, ...).
    """

    theta_draws: xr.DataArray
    point: pd.DataFrame
    settings: dict = field(default_factory=dict)

    def factor_table(self) -> pd.DataFrame:
        """The point table on the factor scale: factor, factor_lower, factor_upper (exp(-theta))."""
        t = self.point[["gear", "species", "note"]].copy()
        t["factor"] = np.exp(-self.point["theta"].to_numpy())
        t["factor_lower"] = np.exp(-self.point["theta_upper"].to_numpy())
        t["factor_upper"] = np.exp(-self.point["theta_lower"].to_numpy())
        return t[["gear", "species", "factor", "factor_lower", "factor_upper", "note"]]

    def summary(self) -> str:
        """Short text summary (one line per factor)."""
        lines = [f"{self.settings.get('method', 'baseline')} baseline, interval {self.settings.get('interval')}"]
        for row in self.factor_table().itertuples():
            if np.isfinite(row.factor):
                lines.append(f"  {row.species:<28} {row.gear:<16} factor {row.factor:8.3g} "
                             f"[{row.factor_lower:.3g}, {row.factor_upper:.3g}]")
            else:
                lines.append(f"  {row.species:<28} {row.gear:<16} not estimable: {row.note}")
        return "\n".join(lines)


def _draws_array(values: np.ndarray, cells: Cells) -> xr.DataArray:
    """(draw, gear, species) -> labelled DataArray with a single chain."""
    return xr.DataArray(
        values[None],
        dims=("chain", "draw", "gear", "species"),
        coords={"chain": [0], "draw": np.arange(values.shape[0]), "gear": list(cells.gears),
                "species": list(cells.species)},
        name="theta",
    )


def _point_frame(cells: Cells, theta, lower, upper, se, notes) -> pd.DataFrame:
    """Assemble the point table from (gear, species) arrays, skipping the reference row."""
    rows = []
    for g in range(1, cells.n_gears):
        for s in range(cells.n_species):
            rows.append((cells.gears[g], cells.species[s], theta[g, s], lower[g, s], upper[g, s],
                         se[g, s], notes[g][s]))
    return pd.DataFrame(rows, columns=POINT_COLUMNS)


def _check_interval(interval: float) -> None:
    if not 0 < interval < 1:
        raise ValueError(f"interval must be between 0 and 1 (e.g. 0.9), got {interval}")


# --------------------------------------------------------------------------- ratio of means


def group_design(cells: Cells) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Per-group gear presence, effort and the cpue of every species.

    Cells hold only group x species with a non-zero total; the gears present in a group and
    their effort are the same for every species, so they are read from any cell of the group,
    and a species with no cell in a group caught zero there (cpue 0 for every gear present).
    Groups in which nothing at all was caught have no cell and cannot be seen here; they do not
    change a ratio of means (zeros on both sides).

    Returns (seen, present, cpue): seen (n_groups,) bool, present (n_groups, n_gears) bool,
    cpue (n_groups, n_species, n_gears) in fish per unit of each gear's own effort.
    """
    n_groups = len(cells.groups)
    present = np.zeros((n_groups, cells.n_gears), dtype=bool)
    effort = np.zeros((n_groups, cells.n_gears))
    np.logical_or.at(present, cells.cell_group, cells.present)
    np.maximum.at(effort, cells.cell_group, cells.effort)
    seen = np.zeros(n_groups, dtype=bool)
    seen[cells.cell_group] = True
    cpue = np.zeros((n_groups, cells.n_species, cells.n_gears))
    with np.errstate(divide="ignore", invalid="ignore"):
        cell_cpue = np.where(cells.present, cells.counts / cells.effort, 0.0)
    cpue[cells.cell_group, cells.cell_species] = cell_cpue
    return seen, present, cpue


def _quantiles(draws: np.ndarray, probs: np.ndarray) -> np.ndarray:
    """Percentiles along axis 0 that tolerate +-inf draws (NaN draws are left out).

    Linear interpolation between two equal infinities gives NaN in numpy; those entries take
    the nearest order statistic instead.
    """
    with np.errstate(invalid="ignore"), warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)  # all-NaN columns (species not estimable)
        q = np.nanquantile(draws, probs, axis=0)
        near = np.nanquantile(draws, probs, axis=0, method="nearest")
    return np.where(np.isnan(q), near, q)


def fit_ratio(cells: Cells, *, n_boot: int = 1000, interval: float = 0.9, seed: int = 0) -> BaselineResult:
    """Ratio of mean cpue per species and gear, with a percentile bootstrap over groups.

    For gear g and species s, over the groups where g and the reference both fished
    (directly paired groups; zeros included):

        factor = mean_i(cpue_ref,is) / mean_i(cpue_g,is),   theta = -log(factor)

    cpue is count / effort in each gear's own effort unit, so the factor converts gear-unit
    cpue into reference-unit cpue. The bootstrap resamples those groups with replacement
    (the same resampled groups for every species of a gear); theta_draws holds
    -log(ratio) of each resample and the interval is their percentiles (Efron & Tibshirani
    1993, "An Introduction to the Bootstrap", ch. 13). A resample in which the gear (or the
    reference) caught none of the species gives theta -inf (+inf) - an unbounded factor,
    kept as such; a resample in which neither caught it is undefined (NaN) and left out of
    the percentiles (counted in the note).

    Not estimable (NaN, with a note): no group shared with the reference (a gear linked to
    it only through another gear), or the gear or the reference never caught the species
    in their shared groups.
    """
    _check_interval(interval)
    if n_boot < 1:
        raise ValueError(f"n_boot must be at least 1, got {n_boot}")
    rng = np.random.default_rng(seed)
    seen, present, cpue = group_design(cells)
    n_g, n_s = cells.n_gears, cells.n_species
    probs = np.array([(1 - interval) / 2, (1 + interval) / 2])

    draws = np.full((n_boot, n_g, n_s), np.nan)
    draws[:, 0, :] = 0.0
    theta = np.full((n_g, n_s), np.nan)
    lower, upper, se = theta.copy(), theta.copy(), theta.copy()
    theta[0], lower[0], upper[0], se[0] = 0.0, 0.0, 0.0, 0.0
    notes = [[""] * n_s for _ in range(n_g)]
    n_shared = {}

    for g in range(1, n_g):
        gear = cells.gears[g]
        shared = np.flatnonzero(seen & present[:, 0] & present[:, g])
        n_shared[gear] = int(len(shared))
        if len(shared) == 0:
            for s in range(n_s):
                notes[g][s] = (f"no calibration group where {gear} and the reference "
                               f"{cells.reference} both fished; the ratio needs directly paired groups")
            continue
        ref_cpue = cpue[shared, :, 0]                      # (n_shared, n_species)
        gear_cpue = cpue[shared, :, g]
        # Resampling with replacement = multinomial counts of each group per replicate.
        times = rng.multinomial(len(shared), np.full(len(shared), 1 / len(shared)), size=n_boot)
        boot_ref = times @ ref_cpue                          # (n_boot, n_species), sums
        boot_gear = times @ gear_cpue
        with np.errstate(divide="ignore", invalid="ignore"):
            boot_theta = np.log(boot_gear) - np.log(boot_ref)
        boot_theta[(boot_gear == 0) & (boot_ref == 0)] = np.nan
        sum_ref, sum_gear = ref_cpue.sum(axis=0), gear_cpue.sum(axis=0)
        ok = (sum_ref > 0) & (sum_gear > 0)
        for s in np.flatnonzero(~ok):
            if sum_ref[s] == 0 and sum_gear[s] == 0:
                why = f"neither {gear} nor the reference caught this species"
            elif sum_gear[s] == 0:
                why = f"{gear} never caught this species"
            else:
                why = "the reference never caught this species"
            notes[g][s] = f"{why} in the {len(shared)} groups where both fished"
        with np.errstate(divide="ignore", invalid="ignore"):
            theta[g] = np.where(ok, np.log(sum_gear) - np.log(sum_ref), np.nan)
        draws[:, g, :] = np.where(ok, boot_theta, np.nan)
        q = _quantiles(boot_theta, probs)
        lower[g] = np.where(ok, q[0], np.nan)
        upper[g] = np.where(ok, q[1], np.nan)
        finite = np.isfinite(boot_theta)
        with np.errstate(invalid="ignore"):
            sd = np.array([np.std(boot_theta[finite[:, s], s], ddof=1) if finite[:, s].sum() > 1 else np.nan
                           for s in range(n_s)])
        se[g] = np.where(ok, sd, np.nan)
        for s in np.flatnonzero(ok):
            n_inf = int(np.isinf(boot_theta[:, s]).sum())
            n_nan = int(np.isnan(boot_theta[:, s]).sum())
            parts = []
            if n_inf:
                parts.append(f"{n_inf} of {n_boot} bootstrap resamples had no catch by one of the "
                             "two gears (factor 0 or unbounded there)")
            if n_nan:
                parts.append(f"{n_nan} resamples had no catch by either gear and were left out")
            notes[g][s] = "; ".join(parts)

    settings = {
        "method": "ratio",
        "interval": interval,
        "n_boot": n_boot,
        "seed": seed,
        "bootstrap": "percentile, groups resampled with replacement",
        "groups_shared_with_reference": n_shared,
        "groups_without_any_catch": int((~seen).sum()),
    }
    return BaselineResult(_draws_array(draws, cells), _point_frame(cells, theta, lower, upper, se, notes),
                          settings)


# --------------------------------------------------------------------------- conditional logit


def _estimable_gears(y: np.ndarray, present: np.ndarray) -> np.ndarray:
    """Gears whose theta (relative to gear 0) has a finite maximum likelihood estimate.

    Directed graph: g -> h when g caught a fish in a cell where h also fished (that fish
    "chose" g over h). The conditional likelihood has a finite maximum, unique once theta_0 = 0,
    exactly on the strongly connected component of the reference (Ford 1957, "Solution of a
    ranking problem from binary comparisons", American Mathematical Monthly 64; extended to
    choice sets in Hunter 2004, "MM algorithms for generalized Bradley-Terry models",
    Annals of Statistics 32). Gears outside it go to +-inf or are not identified.
    """
    n_g = present.shape[1]
    beats = ((y > 0).T.astype(np.int64) @ present.astype(np.int64)) > 0
    np.fill_diagonal(beats, False)
    _, label = csgraph.connected_components(sparse.csr_matrix(beats), directed=True, connection="strong")
    return label == label[0] if n_g else np.zeros(0, dtype=bool)


def _non_estimable_note(g: int, gear: str, y, present, estimable) -> str:
    here = present[:, g]
    if not here.any():
        return f"no calibration group with a catch of this species where {gear} fished"
    if y[here, g].sum() == 0:
        return (f"{gear} never caught this species in its {int(here.sum())} groups with a catch "
                "(maximum likelihood estimate of the factor is infinite)")
    with_est = here & (present[:, estimable].any(axis=1))
    if not with_est.any():
        return (f"{gear} shares no group with a catch of this species with the reference or a gear "
                "estimable against it")
    if y[with_est][:, estimable].sum() == 0:
        return (f"the reference (and gears estimable against it) never caught this species in the "
                f"groups shared with {gear} (maximum likelihood estimate of the factor is 0)")
    return (f"{gear} is not linked to the reference by catches in both directions "
            "(maximum likelihood estimate infinite or not identified)")


def _conditional_logit(y: np.ndarray, log_w: np.ndarray, present: np.ndarray, free: np.ndarray):
    """Maximise sum_c sum_present y log p with theta_0 = 0; ``free`` are the gear columns estimated.

    Returns (theta_free, covariance, converged, message).
    """
    n_tot = y.sum(axis=1)
    n_g = present.shape[1]

    def parts(beta):
        theta = np.zeros(n_g)
        theta[free] = beta
        eta = np.where(present, log_w + theta, -np.inf)
        eta = eta - eta.max(axis=1, keepdims=True)
        e = np.exp(eta)
        p = e / e.sum(axis=1, keepdims=True)
        with np.errstate(divide="ignore", invalid="ignore"):
            loglik = np.where(present & (y > 0), y * np.log(p), 0.0).sum()
        pf = p[:, free]
        grad = (y[:, free] - n_tot[:, None] * pf).sum(axis=0)
        info = np.diag(n_tot @ pf) - np.einsum("c,ci,cj->ij", n_tot, pf, pf)
        return loglik, grad, info

    res = optimize.minimize(
        lambda b: -parts(b)[0], np.zeros(len(free)), jac=lambda b: -parts(b)[1],
        hess=lambda b: parts(b)[2], method="trust-exact", options={"gtol": 1e-10, "maxiter": 500},
    )
    beta = res.x
    _, grad, info = parts(beta)
    try:
        cov = np.linalg.inv(info)
        step = cov @ grad                                  # remaining Newton step
        converged = bool(np.all(np.isfinite(step)) and np.max(np.abs(step), initial=0.0) < 1e-7)
        beta = beta + step                                 # polish: one Newton step at the optimum
    except np.linalg.LinAlgError:
        cov = np.full((len(free), len(free)), np.nan)
        converged = False
    return beta, cov, converged, str(res.message)


def fit_glm(cells: Cells, *, interval: float = 0.9, n_draws: int = 1000, seed: int = 0) -> BaselineResult:
    """Conditional multinomial logit maximum likelihood per species, Wald intervals.

    For species s, maximises over theta (theta_ref = 0)

        sum_cells sum_{g present} y_g log p_g,   p_g = w_g exp(theta_g) / sum_{h present} w_h exp(theta_h)

    (w = relative effort, dimensionless), which equals the Poisson GLM with group x species
    fixed effects, gear x species effects and a log-effort offset (Baker 1994, "The
    multinomial-Poisson transformation", The Statistician 43). Species are independent and
    fitted one by one (scipy trust-exact with analytic gradient and Hessian, vectorised over
    cells). Interval: theta_hat +- z * se from the inverse observed information; theta_draws
    are ``n_draws`` draws from the multivariate normal at the MLE (seeded), for ``convert``.

    Gears whose estimate would be infinite or not identified (never caught the species, the
    reference never caught it against them, or not linked by catches) are detected before
    fitting, get NaN and a note; the rest are fitted on the cells restricted to them (the
    limit of the likelihood as the others go to +-inf). Gears in two-gear, three-gear and
    network designs (A-B and B-C groups, A and C never together) are all handled.
    """
    _check_interval(interval)
    if n_draws < 1:
        raise ValueError(f"n_draws must be at least 1, got {n_draws}")
    rng = np.random.default_rng(seed)
    z = stats.norm.ppf(0.5 + interval / 2)
    n_g, n_s = cells.n_gears, cells.n_species

    draws = np.full((n_draws, n_g, n_s), np.nan)
    draws[:, 0, :] = 0.0
    theta = np.full((n_g, n_s), np.nan)
    se = theta.copy()
    theta[0], se[0] = 0.0, 0.0
    notes = [[""] * n_s for _ in range(n_g)]
    not_converged = []

    with np.errstate(divide="ignore"):
        log_w_all = np.where(cells.present, np.log(np.where(cells.present, cells.weight, 1.0)), -np.inf)

    for s in range(n_s):
        rows = cells.cell_species == s
        y, present, log_w = cells.counts[rows], cells.present[rows], log_w_all[rows]
        estimable = _estimable_gears(y, present) if rows.any() else np.eye(1, n_g, 0, dtype=bool)[0]
        for g in np.flatnonzero(~estimable):
            notes[g][s] = _non_estimable_note(g, cells.gears[g], y, present, estimable)
        free = np.flatnonzero(estimable)[1:]
        if len(free) == 0:
            continue
        # Restrict to the estimable gears; cells left with no catch carry no information.
        present_r = present & estimable[None, :]
        y_r = np.where(present_r, y, 0)
        keep = (y_r.sum(axis=1) > 0) & (present_r.sum(axis=1) > 1)
        beta, cov, converged, message = _conditional_logit(y_r[keep], log_w[keep], present_r[keep], free)
        if not converged:
            not_converged.append(cells.species[s])
            for g in free:
                notes[g][s] = f"optimizer did not converge ({message})"
            continue
        theta[free, s] = beta
        se[free, s] = np.sqrt(np.diag(cov))
        chol = np.linalg.cholesky(cov)
        draws[:, free, s] = beta + rng.standard_normal((n_draws, len(free))) @ chol.T

    lower, upper = theta - z * se, theta + z * se
    settings = {
        "method": "glm",
        "interval": interval,
        "n_draws": n_draws,
        "seed": seed,
        "likelihood": "conditional multinomial logit (Poisson GLM with group x species fixed effects)",
        "interval_type": "Wald, inverse observed information",
        "optimizer": "scipy.optimize.minimize trust-exact, analytic gradient and Hessian",
        "not_converged": not_converged,
    }
    return BaselineResult(_draws_array(draws, cells), _point_frame(cells, theta, lower, upper, se, notes),
                          settings)


BASELINES = {"ratio": fit_ratio, "glm": fit_glm}
