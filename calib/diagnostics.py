"""Stage 4: is a fitted factor to be trusted? Per-factor diagnostics and status rules.

:func:`factor_diagnostics` gives one row per non-reference gear x species: how much data
stands behind the factor (n_groups, n_caught), how well the sampler explored theta
(R-hat, bulk and tail ESS), how much the data moved theta from its prior (prior_ratio)
and whether the fitted split reproduces the observed one (posterior predictive p-value,
``ppp``). :func:`assign_status` turns those into ``ok`` / ``warn`` / ``fail`` with reasons
(design section 4).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

from calib.cells import Cells, factor_support
from calib.model import draw_split

_PPC_CHUNK = 50  # posterior draws replicated at a time in split_check

DIAGNOSTIC_COLUMNS = [
    "gear", "species", "n_groups", "n_caught", "rhat", "ess_bulk", "ess_tail", "prior_ratio", "ppp",
]


def divergences(idata) -> int:
    """Number of divergent transitions in the fit (all chains; 0 without sample_stats)."""
    stats = getattr(idata, "sample_stats", None)
    if stats is None or "diverging" not in stats:
        return 0
    return int(np.asarray(stats["diverging"]).sum())


def _theta_draws(group, cells: Cells) -> np.ndarray:
    """theta as (chain * draw, gear, species) in the cells' gear and species order."""
    theta = group["theta"].sel(gear=list(cells.gears), species=list(cells.species))
    values = np.asarray(theta.transpose("chain", "draw", "gear", "species").values, dtype=float)
    return values.reshape(-1, *values.shape[2:])


def _log_kappa_cells(posterior, cells: Cells, index: np.ndarray) -> np.ndarray | None:
    """log kappa of every cell at the chosen draws, (n_draws, n_cells), or None (multinomial)."""
    if "log_kappa" not in posterior:
        return None
    lk = posterior["log_kappa"].sel(species=list(cells.species))
    lk = lk.transpose("chain", "draw", "combo", "species")
    combos = [str(c) for c in lk["combo"].values]
    values = np.asarray(lk.values, dtype=float).reshape(-1, len(combos), cells.n_species)[index]
    combo_index = np.array([combos.index(c) for c in cells.combos])[cells.cell_combo]
    return values[:, combo_index, cells.cell_species]


def split_check(idata, cells: Cells, ppc_draws: int = 200, seed: int = 0) -> pd.DataFrame:
    """Posterior predictive p-value of the split, per non-reference gear x species.

    For each of ``ppc_draws`` posterior draws (chosen at random with ``seed``), every
    cell's counts are replicated given the cell's total from the fitted split
    distribution (Dirichlet-multinomial, or multinomial without overdispersion). The
    discrepancy is Pearson's chi-square of the gear shares,

        T(y, draw) = sum over the species' cells where the gear fished,
                     sum over the gears present, of (y_ig - n_i p_ig)^2 / (n_i p_ig),

    with p_ig = alpha_ig / sum_present alpha the split's expected share at that draw.
    ppp = share of draws with T(y_rep) >= T(y_obs) (a realized-discrepancy p-value:
    Gelman, Meng & Stern 1996, Statistica Sinica 6, "Posterior predictive assessment of
    model fitness via realized discrepancies"). Near 0: the observed split varies more
    than the model allows; near 1: less.

    Returns gear, species, ppp (nan where the gear has no cells for the species).
    """
    posterior = idata.posterior
    theta_all = _theta_draws(posterior, cells)
    rng = np.random.default_rng(seed)
    n_total = theta_all.shape[0]
    index = np.sort(rng.choice(n_total, size=min(ppc_draws, n_total), replace=False))
    log_kappa_all = _log_kappa_cells(posterior, cells, index)

    y = np.asarray(cells.counts, dtype=float)
    present = np.asarray(cells.present, dtype=bool)
    n = y.sum(axis=1)
    log_w = np.log(np.where(present, cells.weight, 1.0))
    labels = [(g, s) for g in range(1, cells.n_gears) for s in range(cells.n_species)]
    # membership (cell, factor): the cells of species s where gear g fished
    member = np.column_stack([present[:, g] & (cells.cell_species == s) for g, s in labels]).astype(float)

    exceed = np.zeros(len(labels))
    for start in range(0, len(index), _PPC_CHUNK):  # chunks bound memory on large fits
        chunk = slice(start, start + _PPC_CHUNK)
        theta = theta_all[index[chunk]]  # (D, G, S)
        eta = log_w[None] + theta[:, :, cells.cell_species].transpose(0, 2, 1)  # (D, C, G)
        masked = np.where(present[None], eta, -np.inf)
        share = np.exp(masked - masked.max(axis=2, keepdims=True))
        share /= share.sum(axis=2, keepdims=True)
        expected = n[None, :, None] * share
        overdispersed = log_kappa_all is not None
        log_alpha = eta + log_kappa_all[chunk][:, :, None] if overdispersed else eta
        d = eta.shape[0]
        y_rep = draw_split(rng, np.broadcast_to(np.asarray(cells.counts).sum(axis=1), (d, len(n))),
                           np.broadcast_to(present, (d,) + present.shape), log_alpha,
                           overdispersed=overdispersed).astype(float)
        safe = np.where(present[None], expected, 1.0)

        def pearson(counts):
            return np.where(present[None], (counts - expected) ** 2 / safe, 0.0).sum(axis=2)  # (D, C)

        exceed += ((pearson(y_rep) @ member) >= (pearson(y[None]) @ member)).sum(axis=0)
    ppp = np.where(member.sum(axis=0) > 0, exceed / len(index), np.nan)
    return pd.DataFrame({
        "gear": [cells.gears[g] for g, _ in labels],
        "species": [cells.species[s] for _, s in labels],
        "ppp": ppp,
    })


def factor_diagnostics(idata, cells: Cells, ppc_draws: int = 200, seed: int = 0,
                       ppp: pd.DataFrame | None = None) -> pd.DataFrame:
    """Diagnostics of theta[g, s] for every non-reference gear x species.

    Columns: gear, species, n_groups (cells where this gear fished with another gear and
    the species' total > 0), n_caught (fish of the species this gear caught there), rhat,
    ess_bulk, ess_tail (ArviZ rank-normalised R-hat and ESS of theta[g, s]), prior_ratio
    (posterior sd / prior sd of theta[g, s]; the prior sd comes from the ``prior`` group,
    nan without one), ppp (:func:`split_check`, or the caller's own ``ppp`` table with columns
    gear, species, ppp for models whose replicates are not a split, e.g. the side-by-side model;
    NaN with ``ppc_draws=0``, e.g. the lognormal-patchiness model, checked by calib.compare).
    """
    import arviz as az

    support = factor_support(cells)
    posterior = idata.posterior
    other = list(cells.gears[1:])
    theta = posterior["theta"].sel(gear=other, species=list(cells.species))
    subset = theta.to_dataset(name="theta")
    stats = {
        "rhat": az.rhat(subset)["theta"],
        "ess_bulk": az.ess(subset, method="bulk")["theta"],
        "ess_tail": az.ess(subset, method="tail")["theta"],
        "post_sd": theta.std(dim=("chain", "draw")),
    }
    prior = getattr(idata, "prior", None)
    if prior is not None and "theta" in prior:
        stats["prior_sd"] = prior["theta"].sel(gear=other, species=list(cells.species)).std(dim=("chain", "draw"))

    frame = support.copy()
    for name, arr in stats.items():
        table = arr.to_pandas()  # index gear, columns species
        frame[name] = [float(table.loc[g, s]) for g, s in zip(frame["gear"], frame["species"])]
    if "prior_sd" in frame:
        frame["prior_ratio"] = frame["post_sd"] / frame["prior_sd"]
    else:
        frame["prior_ratio"] = np.nan
    if ppp is None and ppc_draws > 0:
        ppp = split_check(idata, cells, ppc_draws=ppc_draws, seed=seed)
    elif ppp is None:  # no split check (e.g. the lognormal-patchiness model, checked by calib.compare)
        ppp = support[["gear", "species"]].assign(ppp=np.nan)
    frame = frame.merge(ppp, on=["gear", "species"], how="left")
    return frame[DIAGNOSTIC_COLUMNS].reset_index(drop=True)


@dataclass
class StatusRules:
    """When a factor is ``fail`` or ``warn`` (design section 4 defaults).

    fail: rhat > fail_rhat, ess_bulk < fail_ess_bulk, n_caught == 0 (the gear never caught
    the species in its groups), prior_ratio > fail_prior_ratio (the data said little).
    warn: rhat > warn_rhat, ess_bulk or ess_tail < warn_ess, any divergence in the fit
    (when warn_on_divergences), ppp outside [ppp_low, ppp_high].
    A diagnostic that is NaN (e.g. baselines have no R-hat) is skipped, not failed.
    The thresholds are common practice (R-hat 1.01 and ESS 400 for 4 chains follow Vehtari
    et al. 2021, Bayesian Analysis 16, "Rank-normalization, folding, and localization: an
    improved R-hat", recalled from memory; the fail levels and the prior_ratio and ppp limits are rules of thumb,
    no source).
    """

    fail_rhat: float = 1.05
    fail_ess_bulk: float = 100.0
    fail_prior_ratio: float = 0.9
    warn_rhat: float = 1.01
    warn_ess: float = 400.0
    warn_on_divergences: bool = True
    ppp_low: float = 0.05
    ppp_high: float = 0.95


def _value(row, name) -> float:
    v = row.get(name, np.nan)
    try:
        v = float(v)
    except (TypeError, ValueError):
        return np.nan
    return v


def _reasons(row, n_divergences: int, rules: StatusRules) -> tuple[str, list[str]]:
    fail: list[str] = []
    warn: list[str] = []
    rhat, ess_bulk, ess_tail = _value(row, "rhat"), _value(row, "ess_bulk"), _value(row, "ess_tail")
    n_caught, prior_ratio, ppp = _value(row, "n_caught"), _value(row, "prior_ratio"), _value(row, "ppp")
    # NaN comparisons are False, so a missing diagnostic never triggers a rule.
    if rhat > rules.fail_rhat:
        fail.append(f"R-hat {rhat:.3f} > {rules.fail_rhat:g}")
    elif rhat > rules.warn_rhat:
        warn.append(f"R-hat {rhat:.3f} > {rules.warn_rhat:g}")
    if ess_bulk < rules.fail_ess_bulk:
        fail.append(f"bulk ESS {ess_bulk:.0f} < {rules.fail_ess_bulk:g}")
    elif ess_bulk < rules.warn_ess:
        warn.append(f"bulk ESS {ess_bulk:.0f} < {rules.warn_ess:g}")
    if ess_tail < rules.warn_ess:
        warn.append(f"tail ESS {ess_tail:.0f} < {rules.warn_ess:g}")
    if n_caught == 0:
        fail.append("the gear never caught the species in its groups")
    if prior_ratio > rules.fail_prior_ratio:
        fail.append(f"prior_ratio {prior_ratio:.2f} > {rules.fail_prior_ratio:g} (the data said little)")
    if rules.warn_on_divergences and n_divergences > 0:
        warn.append(f"{n_divergences} divergent transition{'s' if n_divergences != 1 else ''} in the fit")
    if ppp < rules.ppp_low or ppp > rules.ppp_high:
        warn.append(f"split check p = {ppp:.3f} outside {rules.ppp_low:g}-{rules.ppp_high:g}")
    status = "fail" if fail else "warn" if warn else "ok"
    return status, fail + warn


def assign_status(diag: pd.DataFrame, divergences: int, rules: StatusRules | None = None) -> pd.DataFrame:
    """Add ``status`` (ok / warn / fail) and ``reason`` (every reason, joined with "; ").

    ``diag`` has the columns of :func:`factor_diagnostics` (missing ones count as NaN);
    ``divergences`` is the fit's number of divergent transitions.
    """
    rules = rules or StatusRules()
    out = diag.copy()
    results = [_reasons(row, int(divergences or 0), rules) for row in out.to_dict("records")]
    out["status"] = [r[0] for r in results]
    out["reason"] = ["; ".join(r[1]) for r in results]
    return out
