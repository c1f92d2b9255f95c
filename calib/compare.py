"""Compare fitted calibration-model variants on the same observations (``calib fit --compare``).

Any variant can enter: :func:`compare_variants` takes named pointwise log-likelihoods, arrays
(chain, draw, observation) over the SAME observations, and ranks them by PSIS-LOO (Vehtari,
Gelman & Gabry 2017, Statistics and Computing 27, "Practical Bayesian model evaluation using
leave-one-out cross-validation and WAIC"; ``arviz.compare``), with standard errors of the
differences and Pareto-k warnings. A new variant (length-dependent, covariates) only has to
give its log-likelihood on the same units.

The patchiness variants (design section 5) are compared on one unit: the split of each cell
(group x species with a non-zero total) given its total. The default (gamma) model's
likelihood IS that split. The lognormal model is fitted to the counts themselves, so its
per-cell term is log p(split | total, pair density, theta, tow sd)
(:func:`calib.model_lognormal.split_log_likelihood`); PSIS-LOO on it estimates
p(split_i | total_i, other cells), the same predictive quantity (docs/methods.md).

:func:`spread_check` is the posterior predictive check of how the spread of the split changes
with the group total, where the two patchiness forms predict different shapes.

Public: :class:`Comparison`, :func:`pointwise_split`, :func:`compare_variants`, :func:`compare_models`,
:func:`spread_check`, :func:`compare_patchiness`.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from calib.cells import species_view

# A difference counts as clear when it exceeds both 4 and twice its standard error
# (common practice, no source; Vehtari et al. 2017 warn that small differences are noisy).
CLEAR_DIFFERENCE = 4.0
CLEAR_SE_MULTIPLE = 2.0
PARETO_K_LIMIT = 0.7  # Vehtari et al. 2024, JMLR 25, "Pareto smoothed importance sampling" (recalled from memory)


@dataclass
class Comparison:
    """Result of a comparison: the LOO table, the spread check and a plain-words verdict.

    table : one row per variant (best first): variant, elpd_loo, se, elpd_diff, dse (se of the
        difference to the best), p_loo, n_high_k (observations with Pareto k > 0.7), max_k,
        weight (stacking), n_obs.
    spread : :func:`spread_check` table (or empty).
    preferred : the variant the data support (the default when no clear difference).
    verdict : sentences for people.
    """

    table: pd.DataFrame
    preferred: str
    verdict: str
    spread: pd.DataFrame = field(default_factory=pd.DataFrame)
    unit: str = ""

    def manifest_entry(self) -> dict:
        return {
            "unit": self.unit,
            "preferred": self.preferred,
            "verdict": self.verdict,
            "elpd_loo": {r.variant: round(float(r.elpd_loo), 3) for r in self.table.itertuples()},
            "elpd_diff": {r.variant: round(float(r.elpd_diff), 3) for r in self.table.itertuples()},
            "dse": {r.variant: round(float(r.dse), 3) for r in self.table.itertuples()},
            "n_high_pareto_k": {r.variant: int(r.n_high_k) for r in self.table.itertuples()},
        }


def pointwise_split(factor_set):
    """The split-given-total log-likelihood of a fitted hierarchical factor set, (chain, draw, cell)."""
    from calib import model_lognormal

    idata = factor_set.idata
    if factor_set.manifest.get("patchiness") == "lognormal":
        return getattr(idata, model_lognormal.SPLIT_GROUP)[model_lognormal.SPLIT]
    return idata.log_likelihood["split"]


def compare_variants(variants: dict, *, default: str | None = None, unit: str = "observation") -> Comparison:
    """Rank named variants by PSIS-LOO on the same observations.

    variants : name -> xarray DataArray (chain, draw, obs) of pointwise log-likelihoods (any
        name for the third dim; every variant must have the same number of observations, in
        the same order).
    default : the variant kept when no difference is clear (default: the first given).

    Returns :class:`Comparison` (without the spread check).
    """
    import arviz as az
    import xarray as xr

    if len(variants) < 2:
        raise ValueError("a comparison needs at least two variants")
    names = list(variants)
    default = default or names[0]
    sizes = {n: int(np.prod(v.shape[2:])) for n, v in variants.items()}
    if len(set(sizes.values())) != 1:
        raise ValueError(f"variants are not on the same observations (sizes {sizes}); "
                         "compare only log-likelihoods of the same units")
    idatas = {}
    for name, ll in variants.items():
        ll = ll.rename({ll.dims[2]: "obs"}) if ll.dims[2] != "obs" else ll
        ll = ll.assign_coords(obs=np.arange(ll.sizes["obs"]))
        idatas[name] = az.InferenceData(log_likelihood=xr.Dataset({"ll": ll}))
    loos = {}
    for name, idata in idatas.items():
        ll = idata.log_likelihood["ll"]
        # Relative efficiency of the draws for PSIS: ESS of the pointwise likelihoods over the
        # number of draws, averaged (as the loo package does; only a posterior-free route here).
        lik = np.exp(ll - ll.max(dim=("chain", "draw")))
        n = ll.sizes["chain"] * ll.sizes["draw"]
        ess = az.ess(lik.to_dataset(name="lik"))["lik"].values if ll.sizes["chain"] > 1 or ll.sizes["draw"] > 3 else n
        reff = float(np.clip(np.nanmean(ess) / n, 1e-3, 1.0))
        loos[name] = az.loo(idata, pointwise=True, var_name="ll", reff=reff)
    cmp = az.compare(loos, ic="loo", method="stacking")
    rows = []
    for name, r in cmp.iterrows():
        k = np.asarray(loos[name].pareto_k)
        rows.append({
            "variant": name, "elpd_loo": float(r["elpd_loo"]), "se": float(r["se"]),
            "elpd_diff": float(r["elpd_diff"]), "dse": float(r["dse"]), "p_loo": float(r["p_loo"]),
            "n_high_k": int((k > PARETO_K_LIMIT).sum()), "max_k": float(np.nanmax(k)),
            "weight": float(r["weight"]), "n_obs": int(k.size),
        })
    table = pd.DataFrame(rows)
    preferred, verdict = _verdict(table, default, unit)
    return Comparison(table=table, preferred=preferred, verdict=verdict, unit=unit)


def _verdict(table: pd.DataFrame, default: str, unit: str) -> tuple[str, str]:
    best = table.iloc[0]
    lines = []
    if best["variant"] == default:
        runner = table.iloc[1]
        gap, se = float(runner["elpd_diff"]), float(runner["dse"])
        clear = gap > CLEAR_DIFFERENCE and gap > CLEAR_SE_MULTIPLE * se
        preferred = default
        if clear:
            lines.append(f"The data support '{default}': it predicts held-out {unit}s better than "
                         f"'{runner['variant']}' by {gap:.1f} log-units (standard error {se:.1f}).")
        else:
            lines.append(f"'{default}' and '{runner['variant']}' predict held-out {unit}s about equally well "
                         f"(difference {gap:.1f}, standard error {se:.1f}); keep '{default}'.")
    else:
        row_default = table[table["variant"] == default].iloc[0]
        gap, se = float(row_default["elpd_diff"]), float(row_default["dse"])
        clear = gap > CLEAR_DIFFERENCE and gap > CLEAR_SE_MULTIPLE * se
        if clear:
            preferred = str(best["variant"])
            lines.append(f"The data support '{preferred}': it predicts held-out {unit}s better than "
                         f"'{default}' by {gap:.1f} log-units (standard error {se:.1f}).")
        else:
            preferred = default
            lines.append(f"'{best['variant']}' predicts held-out {unit}s slightly better than '{default}' "
                         f"(difference {gap:.1f}, standard error {se:.1f}), not clearly; keep '{default}'.")
    # The variants the first sentence did not name (three or more variants).
    named = {default, str(best["variant"])} | ({str(table.iloc[1]["variant"])} if best["variant"] == default else set())
    others = table[~table["variant"].isin(named)]
    for r in others.itertuples():
        lines.append(f"'{r.variant}' predicts {r.elpd_diff:.1f} log-units worse than '{best['variant']}' "
                     f"(standard error {r.dse:.1f}).")
    bad = table[table["n_high_k"] > 0]
    for r in bad.itertuples():
        lines.append(f"Warning: for '{r.variant}', {r.n_high_k} of {r.n_obs} {unit}s have Pareto k above "
                     f"{PARETO_K_LIMIT} (largest {r.max_k:.2f}); its LOO estimate is unreliable there.")
    return preferred, " ".join(lines)


# ---------------------------------------------------------------------------
# Spread of the split versus the group total
# ---------------------------------------------------------------------------


def _focus_gear(cells) -> np.ndarray:
    """Per cell, the gear whose share is followed: the reference where it fished, else the first present."""
    present = np.asarray(cells.present, dtype=bool)
    return np.argmax(present, axis=1)


def _expected_share(cells, focus: np.ndarray) -> np.ndarray:
    """Fixed expected share of the focus gear per cell, from the conditional-logit ML fit (glm
    baseline), so observed and replicated splits are measured against the same yardstick."""
    from calib.baselines import fit_glm

    point = fit_glm(cells, n_draws=1).point
    theta = np.zeros((cells.n_gears, cells.n_species))
    for r in point.itertuples():
        if np.isfinite(r.theta):
            theta[cells.gears.index(r.gear), cells.species.index(r.species)] = r.theta
    eta = np.log(np.where(cells.present, cells.weight, 1.0)) + theta[:, cells.cell_species].T
    eta = np.where(cells.present, eta, -np.inf)
    p = np.exp(eta - eta.max(axis=1, keepdims=True))
    p /= p.sum(axis=1, keepdims=True)
    return p[np.arange(cells.n_cells), focus]


def _replicate_gamma(factor_set, cells, focus, n_draws, rng) -> np.ndarray:
    from calib.diagnostics import _log_kappa_cells, _theta_draws
    from calib.model import draw_split

    theta = _theta_draws(factor_set.idata.posterior, cells)
    index = np.sort(rng.choice(theta.shape[0], size=min(n_draws, theta.shape[0]), replace=False))
    lk = _log_kappa_cells(factor_set.idata.posterior, cells, index)
    eta = np.log(np.where(cells.present, cells.weight, 1.0))[None] + theta[index][:, :, cells.cell_species].transpose(0, 2, 1)
    log_alpha = eta + lk[:, :, None] if lk is not None else eta
    d = len(index)
    y = draw_split(rng, np.broadcast_to(cells.totals(), (d, cells.n_cells)),
                   np.broadcast_to(cells.present, (d,) + cells.present.shape), log_alpha,
                   overdispersed=lk is not None)
    return y[:, np.arange(cells.n_cells), focus]


def _replicate_lognormal(factor_set, cells, focus, n_draws, rng) -> np.ndarray:
    """Focus-gear counts drawn from their exact conditional law given the total (per draw)."""
    from calib import model_lognormal as ml

    nodes = int(factor_set.manifest.get("model", {}).get("quadrature_nodes", 7))
    th, b, sigma, _ = ml._posterior_pieces(factor_set.idata, cells, None)
    th = th.reshape(-1, *th.shape[2:])
    b, sigma = b.reshape(-1, cells.n_cells), sigma.reshape(-1, cells.n_cells)
    index = np.sort(rng.choice(th.shape[0], size=min(n_draws, th.shape[0]), replace=False))
    th, b, sigma = th[index], b[index], sigma[index]
    log_w = np.log(np.where(cells.present, cells.weight, 1.0))
    out = np.zeros((len(index), cells.n_cells), dtype=np.int64)
    for c in range(cells.n_cells):
        pres = np.asarray(cells.present[c], dtype=bool)
        eta = b[:, [c]] + log_w[c][None, :] + th[:, :, cells.cell_species[c]]
        # The focus gear first: _cell_pmfs follows the first present gear.
        order = np.concatenate([[focus[c]], np.flatnonzero(pres & (np.arange(cells.n_gears) != focus[c]))])
        _, lf, lr = ml._cell_pmfs(np.asarray(cells.counts[c])[order], np.ones(len(order), dtype=bool),
                                  eta[:, order], sigma[:, c], nodes)
        logp = lf + lr[:, ::-1]
        p = np.exp(logp - logp.max(axis=1, keepdims=True))
        p /= p.sum(axis=1, keepdims=True)
        u = rng.uniform(size=(len(index), 1))
        out[:, c] = (np.cumsum(p, axis=1) < u).sum(axis=1)
    return out


def _spread(y_focus, n, share, bins, n_bins):
    dev = (y_focus / n - share) ** 2 / (share * (1.0 - share))
    return np.array([dev[..., bins == k].mean(axis=-1) for k in range(n_bins)]).T


def spread_check(factor_sets: dict, cells, *, n_bins: int = 5, n_draws: int = 200, seed: int = 0,
                 interval: float = 0.9) -> pd.DataFrame:
    """Posterior predictive check of the split's spread against the group total.

    For every cell, the share of one gear (the reference where it fished) is compared with a
    fixed expected share p_i (conditional-logit ML, the same for observed and replicated data):

        spread(bin) = mean over the bin's cells of (y_i / n_i - p_i)^2 / (p_i (1 - p_i)),

    with cells binned by their total n_i (quantile bins). Binomial sampling alone gives about
    1 / n_i; gamma patchiness adds a part growing with n_i toward a limit set by kappa; a
    common lognormal tow sd gives a different curve (docs/methods.md). Replicates keep each
    cell's observed total: Dirichlet-multinomial draws for ``gamma``, the exact conditional
    law of the count given the total for ``lognormal``.

    factor_sets : name -> fitted FactorSet (patchiness in its manifest).
    Returns one row per bin: bin, total_from, total_to, n_cells, observed, binomial_only and,
    per variant, {name}_median, {name}_lower, {name}_upper, {name}_p (share of replicates
    at least as spread as observed).
    """
    rng = np.random.default_rng(seed)
    focus = _focus_gear(cells)
    share = np.clip(_expected_share(cells, focus), 1e-9, 1 - 1e-9)
    n = cells.totals().astype(float)
    y_obs = np.asarray(cells.counts)[np.arange(cells.n_cells), focus].astype(float)
    edges = np.unique(np.quantile(n, np.linspace(0, 1, n_bins + 1)))
    bins = np.clip(np.searchsorted(edges, n, side="right") - 1, 0, len(edges) - 2)
    n_b = len(edges) - 1
    used = [k for k in range(n_b) if (bins == k).any()]
    observed = _spread(y_obs, n, share, bins, n_b)
    frame = pd.DataFrame({
        "bin": range(1, n_b + 1),
        "total_from": [int(n[bins == k].min()) if (bins == k).any() else np.nan for k in range(n_b)],
        "total_to": [int(n[bins == k].max()) if (bins == k).any() else np.nan for k in range(n_b)],
        "n_cells": [int((bins == k).sum()) for k in range(n_b)],
        "observed": observed,
        "binomial_only": [float((1.0 / n[bins == k]).mean()) if (bins == k).any() else np.nan for k in range(n_b)],
    })
    lo, hi = (1 - interval) / 2, 1 - (1 - interval) / 2
    for name, fs in factor_sets.items():
        if fs.manifest.get("patchiness") == "lognormal":
            rep = _replicate_lognormal(fs, cells, focus, n_draws, rng)
        else:
            rep = _replicate_gamma(fs, cells, focus, n_draws, rng)
        s = _spread(rep.astype(float), n[None], share[None], bins, n_b)  # (draws, bins)
        frame[f"{name}_median"] = np.median(s, axis=0)
        frame[f"{name}_lower"] = np.quantile(s, lo, axis=0)
        frame[f"{name}_upper"] = np.quantile(s, hi, axis=0)
        frame[f"{name}_p"] = (s >= observed[None]).mean(axis=0)
    return frame.iloc[used].reset_index(drop=True)


# ---------------------------------------------------------------------------
# calib fit --compare
# ---------------------------------------------------------------------------


def compare_patchiness(hauls, catches=None, *, reference: str, patchiness: str | None = None,
                       spread_bins: int = 5, **fit_kwargs):
    """Fit both patchiness variants to the same counts and compare them.

    Arguments as :func:`calib.fitting.fit` (method "hierarchical"). ``patchiness`` None keeps
    the variant the comparison prefers; "gamma" or "lognormal" keeps that one whatever the
    verdict. Returns (FactorSet of the kept variant, with ``comparison.csv`` and
    ``spread_check.csv`` as extra tables and the comparison in its manifest; Comparison).
    """
    from calib.fitting import _as_tables, fit

    tables = _as_tables(hauls, catches, fit_kwargs.pop("lengths", None),
                        fit_kwargs.pop("species_recorded", None), fit_kwargs.pop("species_names", None))
    fits = {name: fit(tables, reference=reference, patchiness=name, **fit_kwargs) for name in ("gamma", "lognormal")}
    cells = fits["gamma"].cells
    comparison = compare_variants({name: pointwise_split(fs) for name, fs in fits.items()}, default="gamma",
                                  unit="cell split")
    comparison.spread = spread_check(fits, cells, n_bins=spread_bins, seed=int(fit_kwargs.get("seed", 0)))
    comparison.verdict += " " + spread_sentence(comparison.spread, list(fits))
    kept = patchiness or comparison.preferred
    chosen = fits[kept]
    chosen.manifest["comparison"] = {**comparison.manifest_entry(), "kept": kept,
                                     "files": ["comparison.csv", "spread_check.csv"]}
    chosen.extra_tables = {**chosen.extra_tables, "comparison": comparison.table, "spread_check": comparison.spread}
    return chosen, comparison


def spread_sentence(spread: pd.DataFrame, names: list[str]) -> str:
    """One sentence: in how many total bins each variant's 90% band holds the observed spread."""
    if spread.empty:
        return ""
    parts = []
    for name in names:
        inside = ((spread["observed"] >= spread[f"{name}_lower"]) & (spread["observed"] <= spread[f"{name}_upper"])).sum()
        parts.append(f"'{name}' {int(inside)} of {len(spread)}")
    return ("Spread of the split by group total, bins where the predicted 90% band holds the observed spread: "
            + ", ".join(parts) + " (spread_check.csv).")


# ---------------------------------------------------------------------------
# calib fit --compare with --length-bin / --covariate: constant, length, covariate
# ---------------------------------------------------------------------------

MODEL_VARIANTS = ("constant", "length", "covariate")


def covariates_on(view, cc):
    """:class:`calib.cells.CovariateCells` for other cells of the same calibration groups (e.g.
    :func:`calib.cells.species_view`): each cell takes its group's covariate values from ``cc`` (the group
    cells' covariates), with the same levels, baseline, centring and scale."""
    from dataclasses import replace

    pair_ids = np.asarray(view.groups, dtype=object)[np.asarray(view.cell_group)]
    row = {str(p): i for i, p in enumerate(cc.group_values["pair_id"].astype(str))}
    missing = sorted({str(p) for p in pair_ids} - set(row))
    if missing:
        raise ValueError(f"groups {missing[:5]} have length-class cells but no covariate values")
    at = np.array([row[str(p)] for p in pair_ids], dtype=np.int64)
    cell_level = np.zeros((len(at), len(cc.categorical)), dtype=np.int64)
    for k, name in enumerate(cc.categorical):
        index = {lv: i for i, lv in enumerate(cc.levels[name])}
        cell_level[:, k] = np.array([index[str(v)] for v in cc.group_values[name].to_numpy()[at]], dtype=np.int64)
    cell_value = np.zeros((len(at), len(cc.numeric)))
    for k, name in enumerate(cc.numeric):
        cell_value[:, k] = cc.group_values[name].to_numpy(dtype=float)[at]
    return replace(cc, cells=view, cell_level=cell_level, cell_value=cell_value)


def _sample_split(pm_model, *, draws, tune, chains, seed, progressbar):
    """Sample a model only for its pointwise split log-likelihood (no prior draws)."""
    from calib import model as model_mod
    from calib.diagnostics import divergences

    idata = model_mod.sample(pm_model, draws=draws, tune=tune, chains=chains, seed=seed, progressbar=progressbar,
                             target_accept=0.9, prior_draws=0)
    return idata.log_likelihood["split"], int(divergences(idata))


def compare_models(hauls, catches=None, *, reference: str, length_bin: float | None = None,
                   covariates: list[str] | None = None, model: str | None = None, **fit_kwargs):
    """Fit the constant, length-dependent and covariate variants the options allow and compare them.

    Arguments as :func:`calib.fitting.fit` (hierarchical method, partial pooling). With
    ``length_bin`` every variant is scored on the same observations: the split of the measured fish
    of each group x species x length class (the length model's cells), the constant model and (with
    ``covariates``) the covariate model being fitted to those cells with a factor that does not
    change with length (:func:`calib.cells.species_view`). Without ``length_bin`` the constant and covariate
    variants are scored on the split of each group x species total.

    The variant kept is the one PSIS-LOO clearly prefers (else 'constant', the simpler model), or
    ``model`` when given. The length model kept is the one compared; a kept constant or covariate
    variant is refitted to all counted fish (the ordinary ``calib fit`` or ``calib fit --covariate``),
    as the comparison only says which form the factor takes.

    Returns (FactorSet of the kept variant, with ``comparison.csv`` as an extra table and the
    comparison in its manifest; Comparison).
    """
    from calib.fitting import _as_tables, fit, prepare_counts

    if length_bin is None and not covariates:
        raise ValueError("comparing model variants needs length_bin or covariates (else compare patchiness)")
    offered = ["constant"] + (["length"] if length_bin is not None else []) + (["covariate"] if covariates else [])
    if model is not None and model not in offered:
        raise ValueError(f"model {model!r} is not among the variants fitted ({', '.join(offered)}); "
                         + ("give --length-bin MM to fit the length variant" if model == "length" else
                            "give --covariate NAME to fit the covariate variant" if model == "covariate" else
                            f"choose one of {MODEL_VARIANTS}"))
    tables = _as_tables(hauls, catches, fit_kwargs.pop("lengths", None), fit_kwargs.pop("species_recorded", None),
                        fit_kwargs.pop("species_names", None))
    fit_kwargs.pop("patchiness", None)
    sampling = {k: fit_kwargs[k] for k in ("draws", "tune", "chains", "seed", "progressbar") if k in fit_kwargs}
    overdispersion = fit_kwargs.get("overdispersion", "dirichlet-multinomial")
    fitted: dict = {}
    lls: dict = {}
    divergences: dict = {}

    def full_fit(variant):
        if variant not in fitted:
            fitted[variant] = fit(tables, reference=reference, length_bin=length_bin if variant == "length" else None,
                                  covariates=list(covariates) if variant == "covariate" else None, **fit_kwargs)
        return fitted[variant]

    if length_bin is not None:
        from calib import covariate_model as cm
        from calib import model as model_mod
        from calib.cells import build_covariate_cells

        length_set = full_fit("length")
        lc = length_set.cells
        lls["length"] = length_set.idata.log_likelihood["split"]
        view = species_view(lc)
        lls["constant"], divergences["constant"] = _sample_split(
            model_mod.build_model(view, model_mod.ModelSpec(overdispersion=overdispersion)), **sampling)
        if covariates:
            counts, groups_map = prepare_counts(tables, reference, fit_kwargs.get("species_groups"))
            cc = build_covariate_cells(tables.hauls, counts, reference, list(covariates), species_groups=groups_map,
                                       hauls_file=str(tables.files.get("hauls") or "hauls"))
            lls["covariate"], divergences["covariate"] = _sample_split(
                cm.build_covariate_model(covariates_on(view, cc), cm.CovariateModelSpec(overdispersion=overdispersion)),
                **sampling)
        unit = "length-class split"
        note = ("scored on the split of the measured fish of each group x species x length class; the constant and "
                "covariate variants fitted to those cells with a factor that does not change with length; a kept "
                "constant or covariate variant is refitted to all counted fish")
    else:
        for variant in ("constant", "covariate"):
            lls[variant] = pointwise_split(full_fit(variant))
        if not np.array_equal(np.asarray(fitted["constant"].cells.counts),
                              np.asarray(fitted["covariate"].cells.cells.counts)):
            raise RuntimeError("the constant and covariate fits are not on the same cells")  # a bug, not input
        unit = "cell split"
        note = "scored on the split of each group x species total among the gears"
    comparison = compare_variants({v: lls[v] for v in offered}, default="constant", unit=unit)
    kept = model or comparison.preferred
    if model is not None and model != comparison.preferred:
        comparison.verdict += f" Kept '{model}' as asked (--model)."
    chosen = full_fit(kept)
    chosen.manifest["comparison"] = {**comparison.manifest_entry(), "kept": kept, "variants": offered,
                                     "how": note, "files": ["comparison.csv"],
                                     "divergences_of_comparison_fits": divergences}
    chosen.extra_tables = {**chosen.extra_tables, "comparison": comparison.table}
    return chosen, comparison
