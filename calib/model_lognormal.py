"""Stage 3 (variant): lognormal tow patchiness, the unconditional count model (design section 5).

Selected with ``calib fit --patchiness lognormal``; the default (``gamma``) is the
Dirichlet-multinomial split of :mod:`calib.model`.

For calibration group i, species s and gear g present in the group (w_ig the relative effort):

    y_igs | b_is, eps_igs ~ Poisson(exp(b_is + theta_gs + log w_ig + eps_igs))
    eps_igs ~ Normal(0, sigma_cs)                 tow effect (c = the group's gear combination)
    b_is    = m_s + d_s * z_is,  z_is ~ Normal(0, 1)   pair x species density (non-centred)

theta_gs = log(q_gs / q_ref,s) (theta_ref,s = 0), factor = exp(-theta_gs). Every tow carries the
same lognormal noise whatever its gear (a common coefficient of variation), so the total of a
group depends on the tow effects and no split given the total is exact: the model is fitted to
the counts themselves, zero-total group x species included (leaving them out would select on
the total).

What is integrated and what is sampled: each eps_igs enters one count only, so it is integrated
out count by count. The marginal of one count is the Poisson-lognormal probability

    p(y | eta, sigma) = integral Poisson(y | exp(eta + e)) Normal(e | 0, sigma) de,

computed by adaptive Gauss-Hermite quadrature (Pinheiro & Bates 1995, J. Comput. Graph. Stat. 4,
"Approximations to the log-likelihood function in the nonlinear mixed-effects model"): the
nodes are centred at the mode of the integrand and scaled by its curvature there, so a peaked
integrand (a large count pins the tow effect down) is integrated as accurately as a flat one.
The mode has a closed form, e_hat = sigma^2 y - W(sigma^2 exp(eta + sigma^2 y)) with W the
Lambert W function, computed on the log scale by five Newton steps (exact to 1e-14 relative
over the range used; see tests/test_patchiness.py). When differentiating, the nodes' centre and
scale are held fixed (the value depends on them only through the quadrature error), which keeps
the gradient cheap and agrees with the exact one to the quadrature's accuracy; NUTS stays exact
because its accept step uses the log-density itself. The density b_is is shared by the gears of a group,
so it is sampled (non-centred), as are theta (non-centred hierarchy as in :mod:`calib.model`),
the density mean m_s and sd d_s per species, and the tow sd sigma pooled across species per
gear combination.

Several hauls of one gear in one group are summed before fitting (as for every model); a sum
of lognormal tows is only approximately lognormal, so with many such groups the tow sd is an
average of the summed and single tows.

Public: :class:`LognormalPriors`, :class:`LognormalSpec`, :class:`CountTable`,
:func:`count_table`, :func:`poisson_lognormal_logpmf` (numpy), :func:`build_model`,
:func:`set_cells`, :func:`sample`, :func:`split_log_likelihood`, :func:`reference_count_pmf`.

Names in the InferenceData: posterior ``theta`` (gear, species; reference row 0), ``log_tow_sd``
(combo, species), ``density_mean`` and ``density_sd`` (species), ``z_density`` (row),
hyper-parameters ``mu``, ``tau``, ``log_tow_sd_mean`` (combo), ``log_tow_sd_spread``;
log_likelihood ``tow_counts`` (row: every group x species, the unconditional unit); group
``split_log_likelihood`` with ``split`` (chain, draw, cell): the split of each non-zero cell
given its total, the unit shared with the default model for LOO comparison
(:func:`split_log_likelihood`; possibly on thinned draws).
"""

from __future__ import annotations

import math
from dataclasses import asdict, dataclass, field

import numpy as np
from scipy.special import gammaln, logsumexp

from calib.cells import Cells

POOLING = ("partial",)
LIKELIHOOD = "tow_counts"  # observed variable: every group x species row, unconditional
SPLIT = "split"  # the split given the total, on the default model's cells
SPLIT_GROUP = "split_log_likelihood"  # InferenceData group holding it (possibly thinned draws)
_NEWTON_STEPS = 5


@dataclass(frozen=True)
class LognormalPriors:
    """Weakly informative priors of the lognormal-patchiness model (log scale).

    theta: as the default model (:class:`calib.model.Priors`): mu[g, k] ~ Normal(0, 1.5),
        tau[g] ~ HalfNormal(1), theta = mu + tau * Normal(0, 1).
    density_mean_loc = 0, density_mean_sd = 5
        m_s ~ Normal(0, 5): log of the expected reference-gear count per group-mean effort;
        95% between 5e-5 and 2e4 fish, vague on purpose (counts pin it down).
    density_sd_sd = 2
        d_s ~ HalfNormal(2): between-group sd of log density; median 1.35 (densities vary
        about fourfold between groups), up to a 50-fold spread allowed.
    log_tow_sd_loc_mean = log(0.7), log_tow_sd_loc_sd = 1
        log_tow_sd_mean[combo] ~ Normal(log 0.7, 1): typical tow sd; 95% between 0.1 and 5
        (a tow log-ratio sd of sqrt(2) * 0.7 = 1 at the centre).
    log_tow_sd_spread_sd = 0.5
        log_tow_sd_spread ~ HalfNormal(0.5): species differ in tow sd by about 30%
        (prior median 0.34 on the log scale).
    """

    theta_mu_sd: float = 1.5
    theta_tau_sd: float = 1.0
    density_mean_loc: float = 0.0
    density_mean_sd: float = 5.0
    density_sd_sd: float = 2.0
    log_tow_sd_loc_mean: float = math.log(0.7)
    log_tow_sd_loc_sd: float = 1.0
    log_tow_sd_spread_sd: float = 0.5

    def to_dict(self) -> dict:
        d = asdict(self)
        d["formulas"] = {
            "mu[gear, pool]": f"Normal(0, {self.theta_mu_sd})",
            "tau[gear]": f"HalfNormal({self.theta_tau_sd})",
            "theta[gear, species]": "mu[gear, pool(species)] + tau[gear] * Normal(0, 1)",
            "theta[reference, species]": "0",
            "density_mean[species]": f"Normal({self.density_mean_loc}, {self.density_mean_sd})",
            "density_sd[species]": f"HalfNormal({self.density_sd_sd})",
            "b[group, species]": "density_mean[species] + density_sd[species] * Normal(0, 1)",
            "log_tow_sd_mean[combo]": f"Normal({self.log_tow_sd_loc_mean:.4f}, {self.log_tow_sd_loc_sd})",
            "log_tow_sd_spread": f"HalfNormal({self.log_tow_sd_spread_sd})",
            "log_tow_sd[combo, species]": "log_tow_sd_mean[combo] + log_tow_sd_spread * Normal(0, 1)",
            "eps[group, gear, species]": "Normal(0, exp(log_tow_sd)), integrated by adaptive Gauss-Hermite",
        }
        return d


@dataclass(frozen=True)
class LognormalSpec:
    """Settings of the lognormal-patchiness model.

    quadrature_nodes : Gauss-Hermite nodes per count (adaptive). With 7: within 1e-6 on the
        log scale of scipy.integrate.quad for large counts, within 3e-3 on the most skewed
        small-count cell tested (y=1, eta=-5, sigma=2); see tests/test_patchiness.py.
    pooling : "partial" only (theta pooled across species per gear and pooling group).
    """

    quadrature_nodes: int = 7
    pooling: str = "partial"
    priors: LognormalPriors = field(default_factory=LognormalPriors)

    def __post_init__(self):
        if self.pooling not in POOLING:
            raise ValueError(f"--patchiness lognormal supports pooling {POOLING} only, not {self.pooling!r}")
        if not 1 <= int(self.quadrature_nodes) <= 40:
            raise ValueError("quadrature_nodes must be between 1 and 40")

    def to_dict(self) -> dict:
        return {
            "patchiness": "lognormal",
            "likelihood": "unconditional Poisson-lognormal counts (tow effect integrated by adaptive "
                          "Gauss-Hermite quadrature); pair x species density sampled non-centred",
            "quadrature_nodes": int(self.quadrature_nodes),
            "pooling": self.pooling,
            "parametrization": "non-centred",
            "priors": self.priors.to_dict(),
        }


# ---------------------------------------------------------------------------
# The Poisson-lognormal probability by adaptive Gauss-Hermite quadrature
# ---------------------------------------------------------------------------


def _hermite(nodes: int) -> tuple[np.ndarray, np.ndarray]:
    """Gauss-Hermite nodes z_k and log(weight_k) + z_k^2 (weight function exp(-z^2))."""
    z, wt = np.polynomial.hermite.hermgauss(int(nodes))
    return z, np.log(wt) + z**2


def _lambert_w_exp(x, xp=np):
    """W(exp(x)) (principal branch) without forming exp(x): Newton on w + log w = x.

    Start x - log x (x > 1) or 0.6 exp(x); five steps reach 1e-14 relative accuracy for
    x in [-600, 2000] (checked against scipy.special.lambertw in the tests).
    """
    x = xp.maximum(x, -600.0)
    big = x > 1.0
    w = xp.where(big, x - xp.log(xp.where(big, x, 2.0)), 0.6 * xp.exp(xp.minimum(x, 1.0)))
    for _ in range(_NEWTON_STEPS):
        w = w * (1.0 + x - xp.log(w)) / (1.0 + w)
    return w


def poisson_lognormal_logpmf(y, eta, sigma, nodes: int = 7) -> np.ndarray:
    """log P(Y = y) for Y ~ Poisson(exp(eta + e)), e ~ Normal(0, sigma) (numpy).

    y : counts (>= 0), eta : log of the median expected count, sigma : sd of the tow
    effect on the log scale (> 0); broadcast together. Adaptive Gauss-Hermite with ``nodes``
    nodes (Pinheiro & Bates 1995).
    """
    y = np.asarray(y, dtype=float)
    eta = np.asarray(eta, dtype=float)
    sigma = np.asarray(sigma, dtype=float)
    y, eta, sigma = np.broadcast_arrays(y, eta, sigma)
    z, log_wz = _hermite(nodes)
    s2 = sigma * sigma
    w = _lambert_w_exp(np.log(s2) + eta + s2 * y)
    mode = s2 * y - w
    scale = sigma / np.sqrt(1.0 + w)
    e = mode[..., None] + math.sqrt(2.0) * scale[..., None] * z
    lin = eta[..., None] + e
    log_f = y[..., None] * lin - np.exp(lin) - e * e / (2.0 * s2[..., None])
    const = -gammaln(y + 1.0) - np.log(sigma) - 0.5 * math.log(2.0 * math.pi) + np.log(math.sqrt(2.0) * scale)
    return const + logsumexp(log_f + log_wz, axis=-1)


def _pln_logpmf_pt(y, eta, sigma, nodes: int):
    """The same as :func:`poisson_lognormal_logpmf`, as a PyTensor graph (differentiable)."""
    import pytensor.tensor as pt
    from pytensor.gradient import disconnected_grad

    z, log_wz = _hermite(nodes)
    s2 = sigma * sigma
    # The nodes' centre and scale are held fixed when differentiating: the quadrature
    # value depends on them only through its (tiny) error, and the gradient then stays a
    # few elementwise operations instead of a trip back through the Newton steps.
    w = disconnected_grad(_lambert_w_exp(pt.log(s2) + eta + s2 * y, xp=pt))
    mode = s2 * y - w
    scale = sigma / pt.sqrt(1.0 + w)
    e = mode[..., None] + math.sqrt(2.0) * scale[..., None] * z
    lin = eta[..., None] + e
    log_f = y[..., None] * lin - pt.exp(lin) - e * e / (2.0 * s2[..., None])
    const = -pt.gammaln(y + 1.0) - pt.log(sigma) - 0.5 * math.log(2.0 * math.pi) + pt.log(math.sqrt(2.0) * scale)
    terms = log_f + log_wz
    # log-sum-exp written out with the shift held fixed: its gradient is the plain softmax
    # (PyTensor's own logsumexp gradient gave NaN in the joined gradient graph).
    top = disconnected_grad(pt.max(terms, axis=-1, keepdims=True))
    return const + top[..., 0] + pt.log(pt.exp(terms - top).sum(axis=-1))


# ---------------------------------------------------------------------------
# Every group x species: the unconditional unit
# ---------------------------------------------------------------------------


@dataclass
class CountTable:
    """Every calibration group x species (zero totals included), the unconditional model's rows.

    counts, present, weight : (n_rows, n_gears) as in :class:`calib.cells.Cells`.
    row_group, row_species, row_combo : (n_rows,) indices into the cells' groups, species, combos.
    row_of_cell : (n_cells,) the row of each of the cells' (non-zero) cells.
    complete : False when the cells carried no per-group table (built from cell arrays), so
        zero-total rows could not be restored (only non-zero cells are then used).
    """

    counts: np.ndarray
    present: np.ndarray
    weight: np.ndarray
    row_group: np.ndarray
    row_species: np.ndarray
    row_combo: np.ndarray
    row_of_cell: np.ndarray
    complete: bool

    @property
    def n_rows(self) -> int:
        return int(self.counts.shape[0])


def count_table(cells: Cells) -> CountTable:
    """Restore the zero-total group x species rows that :func:`calib.cells.build_cells` drops."""
    n_s = cells.n_species
    if cells.group_present is None:
        rows = np.arange(cells.n_cells)
        return CountTable(
            counts=np.asarray(cells.counts, dtype=np.int64), present=np.asarray(cells.present, dtype=bool),
            weight=np.asarray(cells.weight, dtype=float), row_group=np.asarray(cells.cell_group),
            row_species=np.asarray(cells.cell_species), row_combo=np.asarray(cells.cell_combo),
            row_of_cell=rows, complete=False,
        )
    gp = np.asarray(cells.group_present, dtype=bool)
    ge = np.asarray(cells.group_effort, dtype=float)
    n_groups = gp.shape[0]
    mean_effort = ge.sum(axis=1) / np.maximum(gp.sum(axis=1), 1)
    gw = np.where(gp, ge / mean_effort[:, None], 0.0)
    labels = ["+".join(g for g, p in zip(cells.gears, row) if p) for row in gp]
    combo = np.array([cells.combos.index(c) for c in labels], dtype=np.int64)
    row_group = np.repeat(np.arange(n_groups), n_s)
    row_species = np.tile(np.arange(n_s), n_groups)
    counts = np.zeros((n_groups * n_s, cells.n_gears), dtype=np.int64)
    row_of_cell = np.asarray(cells.cell_group) * n_s + np.asarray(cells.cell_species)
    counts[row_of_cell] = cells.counts
    return CountTable(
        counts=counts, present=gp[row_group], weight=gw[row_group], row_group=row_group,
        row_species=row_species, row_combo=combo[row_group], row_of_cell=row_of_cell, complete=True,
    )


def _arrays(cells: Cells) -> dict[str, np.ndarray]:
    t = count_table(cells)
    return {
        "counts": t.counts,
        "present": t.present,
        "log_weight": np.log(np.where(t.present, t.weight, 1.0)),
        "row_group": t.row_group.astype(np.int64),
        "row_species": t.row_species.astype(np.int64),
        "row_combo": t.row_combo.astype(np.int64),
    }


def _counts_logp(nodes: int):
    def logp(value, eta, sigma, present):
        import pytensor.tensor as pt

        y = pt.cast(value, "float64")
        sig = pt.broadcast_to(sigma[..., None], eta.shape)
        lp = _pln_logpmf_pt(pt.switch(present, y, 0.0), pt.switch(present, eta, 0.0), sig, nodes)
        return pt.switch(present, lp, 0.0).sum(axis=-1)

    return logp


def _counts_random(eta, sigma, present, rng=None, size=None):
    eta = np.asarray(eta, dtype=float)
    sigma = np.asarray(sigma, dtype=float)[..., None]
    if size is not None:
        shape = tuple(size) + eta.shape[-1:]
        eta, sigma, present = np.broadcast_to(eta, shape), np.broadcast_to(sigma, shape[:-1] + (1,)), np.broadcast_to(present, shape)
    lam = np.exp(eta + sigma * rng.standard_normal(eta.shape))
    return np.where(present, rng.poisson(np.where(present, lam, 0.0)), 0).astype(np.int64)


def build_model(cells: Cells, spec: LognormalSpec = LognormalSpec()):
    """Build the PyMC model of the counts with lognormal tow patchiness for ``cells``.

    Coordinates: gear, factor_gear, species, row (every group x species, zero totals
    included), group, combo, pool. Data containers: counts, present, log_weight (row, gear),
    row_group, row_species, row_combo (row), species_pool (species). Sample with :func:`sample`.
    """
    import pymc as pm
    import pytensor.tensor as pt

    if cells.n_gears < 2:
        raise ValueError("the model needs at least two gears (the reference and one other)")
    if cells.n_cells == 0:
        raise ValueError("no calibration cells with a non-zero total: nothing to fit")
    p = spec.priors
    arrays = _arrays(cells)
    n_rows = arrays["counts"].shape[0]
    coords = {
        "gear": list(cells.gears),
        "factor_gear": list(cells.gears[1:]),
        "species": list(cells.species),
        "row": np.arange(n_rows),
        "combo": list(cells.combos),
        "pool": list(cells.pool_groups),
    }
    with pm.Model(coords=coords) as model:
        counts = pm.Data("counts", arrays["counts"], dims=("row", "gear"))
        present = pm.Data("present", arrays["present"], dims=("row", "gear"))
        log_weight = pm.Data("log_weight", arrays["log_weight"], dims=("row", "gear"))
        row_species = pm.Data("row_species", arrays["row_species"], dims="row")
        row_combo = pm.Data("row_combo", arrays["row_combo"], dims="row")
        species_pool = pm.Data("species_pool", np.asarray(cells.species_pool, dtype=np.int64), dims="species")

        mu = pm.Normal("mu", 0.0, p.theta_mu_sd, dims=("factor_gear", "pool"))
        tau = pm.HalfNormal("tau", p.theta_tau_sd, dims="factor_gear")
        z_theta = pm.Normal("z_theta", 0.0, 1.0, dims=("factor_gear", "species"))
        theta_other = mu[:, species_pool] + tau[:, None] * z_theta
        theta = pm.Deterministic(
            "theta",
            pt.concatenate([pt.zeros((1, len(cells.species)), dtype="float64"), theta_other], axis=0),
            dims=("gear", "species"),
        )
        m = pm.Normal("density_mean", p.density_mean_loc, p.density_mean_sd, dims="species")
        d = pm.HalfNormal("density_sd", p.density_sd_sd, dims="species")
        z_b = pm.Normal("z_density", 0.0, 1.0, dims="row")
        b = m[row_species] + d[row_species] * z_b

        ls_mean = pm.Normal("log_tow_sd_mean", p.log_tow_sd_loc_mean, p.log_tow_sd_loc_sd, dims="combo")
        ls_spread = pm.HalfNormal("log_tow_sd_spread", p.log_tow_sd_spread_sd)
        z_ls = pm.Normal("z_log_tow_sd", 0.0, 1.0, dims=("combo", "species"))
        log_tow_sd = pm.Deterministic("log_tow_sd", ls_mean[:, None] + ls_spread * z_ls, dims=("combo", "species"))

        eta = b[:, None] + log_weight + theta[:, row_species].T
        sigma = pt.exp(log_tow_sd[row_combo, row_species])
        pm.CustomDist(
            LIKELIHOOD,
            eta,
            sigma,
            present,
            logp=_counts_logp(spec.quadrature_nodes),
            random=_counts_random,
            signature="(g),(),(g)->(g)",
            dtype="int64",
            observed=counts,
            dims=("row", "gear"),
        )
    model._calib_spec = spec
    return model


def set_cells(model, cells: Cells) -> None:
    """Swap new cells (same gears, species, combos, pools) into a built model."""
    import pymc as pm

    coords = model.coords
    for name, have in (("gear", cells.gears), ("species", cells.species), ("pool", cells.pool_groups),
                       ("combo", cells.combos)):
        if list(coords[name]) != list(have):
            raise ValueError(f"{name} differ from the model's: model {list(coords[name])}, cells {list(have)}")
    arrays = _arrays(cells)
    arrays.pop("row_group")
    arrays["species_pool"] = np.asarray(cells.species_pool, dtype=np.int64)
    pm.set_data(arrays, model=model, coords={"row": np.arange(arrays["counts"].shape[0])})


def sample(model, cells: Cells, *, draws: int = 1000, tune: int = 1000, chains: int = 2, seed: int = 0,
           progressbar: bool = True, cores: int | None = None, target_accept: float = 0.9,
           prior_draws: int = 2000, split_draws: int | None = 1000):
    """Sample with PyMC's NUTS; add prior draws and both pointwise log-likelihoods.

    log_likelihood ``tow_counts`` (row) is the unconditional per group x species log-likelihood;
    group ``split_log_likelihood`` holds ``split`` (chain, draw, cell), log p(split | total) of
    every non-zero cell (:func:`split_log_likelihood`), the unit shared with the default model. ``split_draws`` caps the posterior draws used for
    ``split`` (evenly thinned; None = all): it costs one convolution per cell and draw.

    Returns arviz.InferenceData (posterior, sample_stats, log_likelihood, prior, observed_data,
    constant_data).
    """
    from calib import model as split_model

    idata = split_model.sample(model, draws=draws, tune=tune, chains=chains, seed=seed, progressbar=progressbar,
                               cores=cores, target_accept=target_accept, prior_draws=prior_draws,
                               log_likelihood=True)
    if len(model.coords["row"]) != count_table(cells).n_rows:
        raise ValueError("cells do not match the model's data; call set_cells first")
    spec = getattr(model, "_calib_spec", LognormalSpec())
    split = split_log_likelihood(idata, cells, nodes=spec.quadrature_nodes, max_draws=split_draws)
    # Possibly thinned draws: a group of its own (log_likelihood needs every draw).
    idata.add_groups({SPLIT_GROUP: split.to_dataset(name=SPLIT)})
    return idata


# ---------------------------------------------------------------------------
# The split given the total: the unit shared with the default model
# ---------------------------------------------------------------------------


def _posterior_pieces(idata, cells: Cells, max_draws: int | None):
    """Per kept draw: theta (D, G, S), b (D, n_cells), sigma (D, n_cells); and the draw index."""
    post = idata.posterior
    n_chain, n_draw = post.sizes["chain"], post.sizes["draw"]
    keep = np.arange(n_draw)
    if max_draws is not None and n_chain * n_draw > max_draws:
        step = int(math.ceil(n_chain * n_draw / max_draws))
        keep = np.arange(0, n_draw, step)
    sub = post.isel(draw=keep)
    th = sub["theta"].sel(gear=list(cells.gears), species=list(cells.species))
    th = np.asarray(th.transpose("chain", "draw", "gear", "species").values, dtype=float)
    table = count_table(cells)
    rows = table.row_of_cell
    z = np.asarray(sub["z_density"].transpose("chain", "draw", "row").values, dtype=float)[..., rows]
    m = np.asarray(sub["density_mean"].sel(species=list(cells.species)).transpose("chain", "draw", "species").values)
    d = np.asarray(sub["density_sd"].sel(species=list(cells.species)).transpose("chain", "draw", "species").values)
    sp = np.asarray(cells.cell_species)
    b = m[..., sp] + d[..., sp] * z
    ls = sub["log_tow_sd"].sel(species=list(cells.species)).transpose("chain", "draw", "combo", "species")
    combos = [str(c) for c in ls["combo"].values]
    combo_index = np.array([combos.index(c) for c in cells.combos])[np.asarray(cells.cell_combo)]
    sigma = np.exp(np.asarray(ls.values)[..., combo_index, sp])
    return th, b, sigma, keep


def _cell_pmfs(y_cell, present, eta, sigma, nodes):
    """Per draw: log pmf of the reference-or-first-present gear's count 0..n and of the rest's sum.

    eta (D, G), sigma (D,). Returns (focus gear index, log p_focus (D, n+1), log p_rest (D, n+1)).
    """
    n = int(y_cell.sum())
    k = np.arange(n + 1, dtype=float)
    gears = np.flatnonzero(present)
    focus = gears[0]
    log_focus = poisson_lognormal_logpmf(k[None, :], eta[:, [focus]], sigma[:, None], nodes)
    log_rest = None
    for g in gears[1:]:
        lp = poisson_lognormal_logpmf(k[None, :], eta[:, [g]], sigma[:, None], nodes)
        log_rest = lp if log_rest is None else _log_convolve(log_rest, lp)
    return focus, log_focus, log_rest


def _log_convolve(a, b):
    """log of the convolution of two pmfs given on 0..n (rows are draws), truncated to 0..n."""
    n1 = a.shape[1]
    ma, mb = a.max(axis=1, keepdims=True), b.max(axis=1, keepdims=True)
    ea, eb = np.exp(a - ma), np.exp(b - mb)
    out = np.empty_like(a)
    for j in range(n1):
        out[:, j] = np.einsum("dk,dk->d", ea[:, : j + 1], eb[:, j::-1])
    with np.errstate(divide="ignore"):
        return np.log(out) + ma + mb


def split_log_likelihood(idata, cells: Cells, nodes: int = 7, max_draws: int | None = 1000):
    """log p(counts of cell i | its total n_i, b_i, theta, sigma) per cell and posterior draw.

    Under lognormal tow effects the split given the total is not a closed form; it is

        p(y | n) = prod_g PLN(y_g | eta_g, sigma) / P(sum_g Y_g = n),

    with PLN the Poisson-lognormal probability (:func:`poisson_lognormal_logpmf`) and the
    probability of the total the convolution of the gears' PLN probabilities over 0..n
    (exact up to the quadrature). b_i is the posterior draw of the pair density, which the
    total mostly pins down; PSIS-LOO on these terms estimates p(split_i | n_i, the other
    cells), the quantity the default model's ``split`` log-likelihood gives (docs/methods.md).

    Returns an xarray DataArray (chain, draw, cell); ``draw`` holds the kept draw labels.
    """
    import xarray as xr

    th, b, sigma, keep = _posterior_pieces(idata, cells, max_draws)
    n_chain, n_keep = th.shape[:2]
    th = th.reshape(n_chain * n_keep, *th.shape[2:])
    b = b.reshape(n_chain * n_keep, -1)
    sigma = sigma.reshape(n_chain * n_keep, -1)
    log_w = np.log(np.where(cells.present, cells.weight, 1.0))
    out = np.empty((n_chain * n_keep, cells.n_cells))
    for c in range(cells.n_cells):
        pres = np.asarray(cells.present[c], dtype=bool)
        y = np.asarray(cells.counts[c])
        eta = b[:, [c]] + log_w[c][None, :] + th[:, :, cells.cell_species[c]]
        _, lf, lr = _cell_pmfs(y, pres, eta, sigma[:, c], nodes)
        log_total = logsumexp(lf + lr[:, ::-1], axis=1)
        joint = sum(poisson_lognormal_logpmf(float(y[g]), eta[:, g], sigma[:, c], nodes) for g in np.flatnonzero(pres))
        out[:, c] = joint - log_total
    draws = np.asarray(idata.posterior["draw"].values)[keep]
    return xr.DataArray(out.reshape(n_chain, n_keep, cells.n_cells), dims=("chain", "draw", "cell"),
                        coords={"chain": idata.posterior["chain"].values, "draw": draws,
                                "cell": np.arange(cells.n_cells)})
