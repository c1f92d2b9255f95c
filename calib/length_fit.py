"""Fit length-dependent conversion factors (``calib fit --length-bin MM``).

tables -> :func:`calib.cells.build_length_cells` -> :func:`calib.length_model.build_length_model`
-> diagnostics per species x gear x length class (the per-species tools of
:mod:`calib.diagnostics`, run on the fit seen per class) -> :class:`calib.factors.FactorSet`
with one factors.csv row per species x gear x length class inside the calibrated range
(``length_mm`` = the class lower bound).

The factor set's posterior holds ``theta`` with dims (chain, draw, gear, species, length) (NaN
outside a species' calibrated range) and ``theta_class`` (chain, draw, gear, stratum); the
manifest's ``"lengths"`` entry records the class width, the input class widths, the classes and
the calibrated range of every species, and what was left out.
"""

from __future__ import annotations


import numpy as np

from calib.errors import InputError, Problem


def prior_theta_class(lc, spec, n_draws: int = 2000, seed: int = 0) -> np.ndarray:
    """Draws of theta per non-reference gear x stratum from the length model's prior (numpy).

    Same prior as :func:`calib.length_model.build_length_model` (mu, tau, level, sigma_rw and the
    random walk of the B-spline coefficients), drawn directly instead of compiling the model's
    prior predictive. Returns (n_draws, n_gears - 1, n_strata).
    """
    from calib.length_model import _basis_blocks

    rng = np.random.default_rng(seed)
    p = spec.priors
    basis, n_basis, k_max = _basis_blocks(lc, spec)
    n_fg, n_sp = lc.cells.n_gears - 1, len(lc.species)
    n_pool = int(np.max(lc.species_pool)) + 1 if len(lc.species_pool) else 1
    mu = rng.normal(0.0, p.theta_mu_sd, size=(n_draws, n_fg, n_pool))
    tau = np.abs(rng.normal(0.0, p.theta_tau_sd, size=(n_draws, n_fg)))
    sigma = np.abs(rng.normal(0.0, spec.rw_sd, size=(n_draws, n_fg)))
    level = mu[:, :, lc.species_pool] + tau[:, :, None] * rng.standard_normal((n_draws, n_fg, n_sp))
    mask = (np.arange(k_max)[None, :] < n_basis[:, None]).astype(float)
    walk = np.concatenate([np.zeros((n_draws, n_fg, n_sp, 1)),
                           np.cumsum(rng.standard_normal((n_draws, n_fg, n_sp, max(k_max - 1, 0))), axis=3)],
                          axis=3) * mask
    centre = walk.sum(axis=3, keepdims=True) / n_basis[None, None, :, None]
    beta = level[..., None] + sigma[:, :, None, None] * (walk - centre) * mask
    return (beta[:, :, lc.stratum_species, :] * basis[None, None]).sum(axis=3)


def _prior_group(lc, spec, n_draws: int, seed: int):
    import xarray as xr

    draws = prior_theta_class(lc, spec, n_draws, seed)
    full = np.concatenate([np.zeros((n_draws, 1, draws.shape[2])), draws], axis=1)[None]
    return xr.Dataset({"theta_class": xr.DataArray(
        full, dims=("chain", "draw", "gear", "stratum"),
        coords={"chain": [0], "draw": np.arange(n_draws), "gear": list(lc.cells.gears),
                "stratum": list(lc.cells.species)})})


def fit_by_length(tables, counts, *, reference: str, length_bin: float, groups_map=None, species_groups=None,
                  overdispersion: str = "dirichlet-multinomial", draws: int = 1000, tune: int = 1000,
                  chains: int = 2, seed: int = 20261202, interval: float = 0.9, rules=None,
                  progressbar: bool = True, sampler: str = "pymc", min_class_fish: int = 1,
                  max_basis: int | None = None):
    """Fit length-dependent factors; called by :func:`calib.fitting.fit` with ``length_bin``.

    tables : validated ``Tables`` with a lengths table; counts : zero-completed counts.
    length_bin : width of the fit's length classes (mm); never finer than the input classes.
    min_class_fish : a species' calibrated range runs from its first to its last class with at
        least this many measured fish in calibration groups.
    Other arguments as :func:`calib.fitting.fit`. Returns a :class:`calib.factors.FactorSet`.
    """
    from calib import cells as cells_mod
    from calib import diagnostics
    from calib import length_model as lm
    from calib import model as model_mod
    from calib.factors import assemble_factor_set, summarise_theta_draws
    from calib.fitting import _factor_table

    lengths_file = tables.files.get("lengths") or "lengths"
    if tables.lengths is None or len(tables.lengths) == 0:
        raise InputError([Problem(lengths_file, None, None,
                                  "--length-bin needs a lengths table with measured fish",
                                  "give --lengths FILE (haul_id, species, length_mm, n), or leave out --length-bin "
                                  "to fit factors that do not depend on length")])
    if not length_bin > 0:
        raise ValueError("length_bin must be > 0 mm")
    lc = cells_mod.build_length_cells(tables.hauls, counts, tables.lengths, reference, float(length_bin),
                                      species_groups=groups_map, min_class_fish=min_class_fish,
                                      lengths_file=str(lengths_file))
    if lc.cells.n_cells == 0:
        raise InputError([Problem(lengths_file, None, None,
                                  "no calibration group has measured fish of one species from two or more gears",
                                  "measure lengths in the calibration hauls of every gear")])
    kw = {"overdispersion": overdispersion}
    if max_basis is not None:
        kw["max_basis"] = int(max_basis)
    spec = lm.LengthModelSpec(**kw)
    rules = rules or diagnostics.StatusRules()
    prior_draws = 2000
    settings = {"method": "hierarchical", "length_bin_mm": float(length_bin), "draws": draws, "tune": tune,
                "chains": chains, "seed": seed, "interval": interval,
                "sampler": "PyMC NUTS" if sampler == "pymc" else "nutpie NUTS", "target_accept": 0.9,
                "prior_draws": prior_draws, "posterior_predictive_draws": 200}

    pm_model = lm.build_length_model(lc, spec)
    idata = model_mod.sample(pm_model, draws=draws, tune=tune, chains=chains, seed=seed, progressbar=progressbar,
                             target_accept=settings["target_accept"], prior_draws=0, sampler=sampler)
    idata.add_groups({"prior": _prior_group(lc, spec, prior_draws, seed + 1)})
    flat = lm.per_stratum_idata(idata, lc)
    diag = diagnostics.factor_diagnostics(flat, lc.cells, ppc_draws=settings["posterior_predictive_draws"], seed=seed)
    divergences = int(diagnostics.divergences(idata))
    summary = summarise_theta_draws(flat.posterior["theta"], interval)
    table = _factor_table(lc.cells, summary, diag, divergences, rules, interval)
    strata = lc.stratum_frame().set_index("stratum")
    table["length_mm"] = table["species"].map(strata["length_mm"]).astype(float)
    table["species"] = table["species"].map(strata["species"])
    table = table.sort_values(["species", "gear", "length_mm"]).reset_index(drop=True)
    checks = diag.rename(columns={"species": "stratum"})
    checks.insert(1, "species", checks["stratum"].map(strata["species"]))
    checks.insert(2, "length_mm", checks["stratum"].map(strata["length_mm"]))

    split = split_by_length(idata, lc, interval=interval, seed=seed)
    return assemble_factor_set(
        tables, table, checks, idata, method="hierarchical", reference=reference,
        effort_unit=lc.cells.effort_unit, model={"variant": "length", **spec.to_dict()}, settings=settings,
        rules=rules, divergences=divergences, cells_report=lc.report, gears=lc.cells.gears, species=lc.species,
        species_groups=groups_map, extra={
            "lengths": {
                "bin_mm": lc.bin_mm,
                "class_rule": "class lower bound = floor(length_mm / bin_mm) * bin_mm; factors.csv length_mm is "
                              "the lower bound",
                "input_resolution_mm": lc.input_resolution,
                "min_class_fish": int(min_class_fish),
                "calibrated_range_mm": lc.species_range,
                "classes_mm": lc.classes,
                "no_lengths_haul_species": lc.report["no_lengths_haul_species"],
                "no_lengths_fish": lc.report["no_lengths_fish"],
                "fish_outside_range": lc.report["fish_outside_range"],
                "species_without_range": lc.report["species_without_range"],
            },
        }, extra_tables={"length_split": split}, cells=lc)


def split_by_length(idata, lc, *, interval: float = 0.9, n_draws: int = 200, seed: int = 0):
    """Observed and fitted share of each gear in each species x length class, pooled over groups.

    For species s, class l and gear g, over the cells of that class (groups where the gear fished):
    observed share = sum_i y_ig / sum_i n_i; fitted share at draw d = sum_i n_i p_ig(d) / sum_i n_i
    with p_ig = w_ig exp(theta_g(l)) / sum over present gears (the split's expected share). Saved in
    the factor set as ``length_split.csv`` (species, length_mm, gear, n_fish, observed_share,
    fitted_median, fitted_lower, fitted_upper) for :func:`calib.plots.plot_split_by_length`.
    """
    import pandas as pd

    cells = lc.cells
    th = idata.posterior["theta_class"].transpose("chain", "draw", "gear", "stratum").values
    th = th.reshape(-1, th.shape[2], th.shape[3])
    rng = np.random.default_rng(seed)
    pick = np.sort(rng.choice(th.shape[0], size=min(n_draws, th.shape[0]), replace=False))
    th = th[pick]  # (D, G, S)
    present = np.asarray(cells.present, dtype=bool)
    log_w = np.log(np.where(present, cells.weight, 1.0))
    eta = log_w[None] + th[:, :, cells.cell_species].transpose(0, 2, 1)  # (D, C, G)
    eta = np.where(present[None], eta, -np.inf)
    share = np.exp(eta - eta.max(axis=2, keepdims=True))
    share /= share.sum(axis=2, keepdims=True)
    y = np.asarray(cells.counts, dtype=float)
    n = y.sum(axis=1)
    lo_q, hi_q = (1 - interval) / 2, 1 - (1 - interval) / 2
    rows = []
    for k in range(len(cells.species)):
        m = cells.cell_species == k
        for g, gear in enumerate(cells.gears):
            mg = m & present[:, g]
            if not mg.any():
                continue
            tot = n[mg].sum()
            fitted = (share[:, mg, g] * n[mg][None]).sum(axis=1) / tot
            rows.append((lc.species[lc.stratum_species[k]], float(lc.stratum_length[k]), gear, int(tot),
                         float(y[mg, g].sum() / tot), float(np.median(fitted)), float(np.quantile(fitted, lo_q)),
                         float(np.quantile(fitted, hi_q))))
    return pd.DataFrame(rows, columns=["species", "length_mm", "gear", "n_fish", "observed_share", "fitted_median",
                                       "fitted_lower", "fitted_upper"])


def factor_set_from_length_draws(theta, *, reference: str, bin_mm: float, factor_set_id: str,
                                 effort_unit: str = "m2", status="ok", interval: float = 0.9):
    """A length factor set from known theta draws (for simulations and tests; no fitting).

    ``theta``: xarray DataArray (chain, draw, gear, species, length) of log(q_gear / q_ref) per class
    (length = class lower bound, mm; NaN outside a species' classes; the reference gear's row 0).
    ``status``: one status for every row, or a dict (species, gear, length_mm) -> status.
    Every finite non-reference entry gets a factors.csv row; the manifest records the classes.
    """
    import arviz as az
    import pandas as pd

    from calib.factors import FACTOR_COLUMNS, FactorSet

    lengths = np.asarray(theta.coords["length"].values, dtype=float)
    classes, rows = {}, []
    for sp in theta.coords["species"].values:
        finite = np.isfinite(theta.sel(species=sp).values).all(axis=(0, 1, 2))
        classes[str(sp)] = [float(x) for x in lengths[finite]]
        for gear in theta.coords["gear"].values:
            if gear == reference:
                continue
            for L in lengths[finite]:
                row = {c: np.nan for c in FACTOR_COLUMNS}
                st = status.get((str(sp), str(gear), float(L)), "ok") if isinstance(status, dict) else status
                row.update(species=str(sp), gear=str(gear), reference=reference, effort_unit=effort_unit,
                           length_mm=float(L), status=st, reason="", interval=interval)
                rows.append(row)
    ranges = {s: [v[0], v[-1] + bin_mm] for s, v in classes.items() if v}
    manifest = {"factor_set_id": factor_set_id, "reference": reference, "reference_effort_unit": effort_unit,
                "method": "synthetic", "settings": {"interval": interval}, "inputs": {},
                "domain": {"numeric": [], "categorical": [], "skipped": {}, "by_gear": {}},
                "lengths": {"bin_mm": float(bin_mm), "classes_mm": classes, "calibrated_range_mm": ranges}}
    return FactorSet(table=pd.DataFrame(rows, columns=FACTOR_COLUMNS), checks=pd.DataFrame(),
                     idata=az.InferenceData(posterior=theta.to_dataset(name="theta")), manifest=manifest)


def length_theta_draws(factor_set, species: str, gear: str) -> tuple[np.ndarray, np.ndarray]:
    """Class lower bounds (mm) and theta draws (n_draws, n_classes) of one species x gear of a
    length factor set, inside the species' calibrated range only."""
    theta = factor_set.idata.posterior["theta"]
    classes = np.asarray(factor_set.manifest["lengths"]["classes_mm"][species], dtype=float)
    sel = theta.sel(species=species, gear=gear, length=classes)
    values = sel.transpose("chain", "draw", "length").values
    return classes, values.reshape(-1, len(classes))


def is_length_factor_set(factor_set) -> bool:
    """True when the factor set was fitted with ``--length-bin`` (theta has a length dimension)."""
    return "length" in factor_set.idata.posterior["theta"].dims


__all__ = ["fit_by_length", "prior_theta_class", "length_theta_draws", "is_length_factor_set", "split_by_length",
           "factor_set_from_length_draws"]
