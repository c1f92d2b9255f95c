"""Fit conversion factors: the public entry point behind ``calib fit``.

Runs tables -> cells -> (model | baseline) -> diagnostics -> :class:`FactorSet`.
All methods return the same FactorSet: the same table columns, theta draws with the
same labels, and a manifest.
"""

from __future__ import annotations


import numpy as np
import pandas as pd

from calib import cells as cells_mod
from calib.errors import InputError, Problem
from calib.factors import FACTOR_COLUMNS, FactorSet, assemble_factor_set, summarise_theta_draws

METHODS = ("hierarchical", "ratio", "glm")
DESIGNS = ("paired", "side-by-side")
PATCHINESS = ("gamma", "lognormal")


def _as_tables(hauls, catches, lengths, species_recorded=None, species_names=None):
    from calib.tables import Tables, load_tables

    if isinstance(hauls, Tables):
        return hauls
    return load_tables(hauls, catches, lengths, species_recorded=species_recorded,
                       species_names=species_names)


def _read_species_groups(path) -> dict[str, str] | None:
    if path is None:
        return None
    from calib.tables import read_table

    frame = read_table(path)
    missing = [c for c in ("species", "group") if c not in frame.columns]
    if missing:
        raise InputError(
            [Problem(str(path), None, c, "required column missing", "add columns 'species' and 'group'")
             for c in missing]
        )
    return dict(zip(frame["species"].astype(str).str.strip(), frame["group"].astype(str).str.strip()))


def prepare_counts(tables, reference: str, species_groups=None):
    """Validate the tables for fitting and return (zero-completed counts, species -> pool group map).

    species_groups : None, a dict species -> group or a path to a (species, group) table; every
        species in the catches must be listed. Raises ``InputError`` naming file, row and column.
    """
    from calib.tables import complete_zeros, fit_problems

    problems = fit_problems(tables, reference)
    if problems:
        raise InputError(problems)
    groups_map = species_groups if isinstance(species_groups, dict) or species_groups is None else _read_species_groups(species_groups)
    counts = complete_zeros(tables)
    if groups_map is not None:
        unlisted = sorted(set(counts["species"]) - set(groups_map))
        if unlisted:
            raise InputError([
                Problem(str(species_groups) if not isinstance(species_groups, dict) else "species_groups",
                        None, "species", f"species '{s}' is in the catches but not in the species groups table",
                        "add a row for it (species, group) so it is pooled with the right group")
                for s in unlisted
            ])
    return counts, groups_map


def fit(
    hauls,
    catches=None,
    *,
    reference: str,
    lengths=None,
    species_recorded=None,
    species_names=None,
    method: str = "hierarchical",
    overdispersion: str = "dirichlet-multinomial",
    pooling: str = "partial",
    patchiness: str = "gamma",
    species_groups=None,
    draws: int = 1000,
    tune: int = 1000,
    chains: int = 2,
    seed: int = 20261202,
    interval: float = 0.9,
    n_boot: int = 1000,
    rules=None,
    progressbar: bool = True,
    length_bin: float | None = None,
    length_min_fish: int = 1,
    design: str = "paired",
    period_by: str = "auto",
    covariates: list[str] | None = None,
) -> FactorSet:
    """Fit conversion factors from calibration groups.

    Parameters
    ----------
    hauls, catches, lengths : paths to the input tables (CSV or Parquet), or a
        ``calib.tables.Tables`` as ``hauls`` (then ``catches``/``lengths`` are ignored).
    reference : the reference gear; factors convert every other gear's cpue to it.
    method : "hierarchical" (Bayesian Dirichlet-multinomial model, the default),
        "ratio" (ratio of mean cpue, percentile bootstrap over groups) or
        "glm" (conditional multinomial logit maximum likelihood, Wald interval).
    overdispersion : "dirichlet-multinomial" (default) or "none" (plain multinomial split).
    pooling : "partial" (species pooled per gear and pooling group) or "none".
    patchiness : "gamma" (default: the Dirichlet-multinomial split of calib.model) or
        "lognormal" (unconditional Poisson-lognormal counts, calib.model_lognormal; method
        "hierarchical" only).
    species_recorded, species_names : optional paths to the intake tables (which species each
        source recorded in which years; partner names mapped to accepted names).
    species_groups : optional path to a table (species, group) or a dict species -> group.
    draws, tune, chains, seed : sampler settings (per chain); ``n_boot`` for ratio.
    interval : central interval level for factor_lower / factor_upper (e.g. 0.9).
    rules : ``calib.diagnostics.StatusRules`` to override the default status rules.
    length_bin : width (mm) of length classes; when given, theta is a smooth function of length
        per species x gear (P-spline, :mod:`calib.length_fit`) fitted to the lengths table, and
        factors.csv gets one row per species x gear x length class. Hierarchical method only.
    length_min_fish : with ``length_bin``, a species' calibrated length range runs from its first
        to its last class with at least this many measured fish.
    design : "paired" (calibration groups by pair_id, the default) or "side-by-side" (every haul
        placed in its site x period, pair_id ignored; :func:`calib.model_sidebyside.fit_side_by_side`,
        method "hierarchical" only; overdispersion "none" there means Poisson counts).
    period_by : side-by-side only: "auto", "column", "month", "season" or "year"
        (:mod:`calib.site_periods`).
    covariates : hauls columns theta depends on (:mod:`calib.covariate_fit`): text columns as
        per-level offsets (same level in every haul of a group), numeric ones as a slope on the
        group mean. factors.csv gets one row per species x gear x level. Hierarchical method only.

    Returns
    -------
    FactorSet
    """
    from calib import diagnostics

    if method not in METHODS:
        raise ValueError(f"method must be one of {METHODS}, not {method!r}")
    if patchiness not in PATCHINESS:
        raise ValueError(f"patchiness must be one of {PATCHINESS}, not {patchiness!r}")
    if patchiness != "gamma" and method != "hierarchical":
        raise ValueError("--patchiness lognormal needs --method hierarchical")
    if not 0 < interval < 1:
        raise ValueError("interval must be between 0 and 1, e.g. 0.9")
    tables = _as_tables(hauls, catches, lengths, species_recorded, species_names)
    if design == "side-by-side":
        from calib.model_sidebyside import fit_side_by_side

        if length_bin is not None or covariates:
            raise ValueError("length_bin and covariates work with design 'paired' only")
        if method != "hierarchical":
            raise ValueError("design 'side-by-side' is fitted with method 'hierarchical' only")
        return fit_side_by_side(
            tables, reference=reference, period_by=period_by, pooling=pooling, species_groups=species_groups,
            overdispersion="none" if overdispersion == "none" else "negative-binomial", draws=draws, tune=tune,
            chains=chains, seed=seed, interval=interval, rules=rules, progressbar=progressbar)
    if design not in DESIGNS:
        raise ValueError(f"design must be one of {DESIGNS}, not {design!r}")
    counts, groups_map = prepare_counts(tables, reference, species_groups)
    if covariates and length_bin is not None:
        raise ValueError("--covariate and --length-bin cannot be combined yet; fit them separately")
    if length_bin is not None:
        if method != "hierarchical" or pooling != "partial":
            raise ValueError("--length-bin works with the hierarchical method and partial pooling only")
        from calib.length_fit import fit_by_length

        return fit_by_length(tables, counts, reference=reference, length_bin=length_bin, groups_map=groups_map,
                             overdispersion=overdispersion, draws=draws, tune=tune, chains=chains, seed=seed,
                             interval=interval, rules=rules, progressbar=progressbar,
                             min_class_fish=length_min_fish)
    if covariates:
        if method != "hierarchical" or pooling != "partial":
            raise ValueError("--covariate works with the hierarchical method and partial pooling, without "
                             "--length-bin")
        from calib.covariate_fit import fit_with_covariates

        return fit_with_covariates(tables, counts, reference=reference, covariates=list(covariates),
                                   groups_map=groups_map, overdispersion=overdispersion, draws=draws, tune=tune,
                                   chains=chains, seed=seed, interval=interval, rules=rules,
                                   progressbar=progressbar)
    cells = cells_mod.build_cells(tables.hauls, counts, reference, species_groups=groups_map)
    rules = rules or diagnostics.StatusRules()

    settings = {"method": method, "draws": draws, "tune": tune, "chains": chains, "seed": seed,
                "interval": interval, "sampler": "PyMC NUTS", "target_accept": 0.9,
                "prior_draws": 2000, "posterior_predictive_draws": 200}
    spec_dict: dict = {}
    divergences = None
    if method == "hierarchical" and patchiness == "lognormal":
        from calib import model_lognormal

        spec = model_lognormal.LognormalSpec(pooling=pooling)
        spec_dict = spec.to_dict()
        pm_model = model_lognormal.build_model(cells, spec)
        idata = model_lognormal.sample(pm_model, cells, draws=draws, tune=tune, chains=chains, seed=seed,
                                       progressbar=progressbar, target_accept=settings["target_accept"],
                                       prior_draws=settings["prior_draws"])
        # R-hat, ESS and prior_ratio as for every model; the split check (ppp) is the default
        # model's and is replaced by the spread-versus-total check of `calib fit --compare`.
        diag = diagnostics.factor_diagnostics(idata, cells, ppc_draws=0, seed=seed)
        divergences = int(diagnostics.divergences(idata))
        summary = summarise_theta_draws(idata.posterior["theta"], interval)
    elif method == "hierarchical":
        from calib import model as model_mod

        spec = model_mod.ModelSpec(overdispersion=overdispersion, pooling=pooling)
        spec_dict = spec.to_dict()
        pm_model = model_mod.build_model(cells, spec)
        idata = model_mod.sample(pm_model, draws=draws, tune=tune, chains=chains, seed=seed,
                                 progressbar=progressbar, target_accept=settings["target_accept"],
                                 prior_draws=settings["prior_draws"])
        diag = diagnostics.factor_diagnostics(idata, cells, ppc_draws=settings["posterior_predictive_draws"],
                                              seed=seed)
        divergences = int(diagnostics.divergences(idata))
        summary = summarise_theta_draws(idata.posterior["theta"], interval)
    else:
        import arviz as az

        from calib import baselines

        if method == "ratio":
            result = baselines.fit_ratio(cells, n_boot=n_boot, interval=interval, seed=seed)
            settings = {"method": method, "n_boot": n_boot, "seed": seed, "interval": interval}
        else:
            result = baselines.fit_glm(cells, interval=interval, n_draws=draws, seed=seed)
            settings = {"method": method, "draws": draws, "seed": seed, "interval": interval}
        spec_dict = {"method": method, **result.settings}
        idata = az.InferenceData(posterior=result.theta_draws.to_dataset(name="theta"))
        point = result.point.copy()
        summary = point[["gear", "species"]].copy()
        summary["factor_median"] = np.exp(-point["theta"].to_numpy())
        summary["factor_lower"] = np.exp(-point["theta_upper"].to_numpy())
        summary["factor_upper"] = np.exp(-point["theta_lower"].to_numpy())
        diag = _baseline_diagnostics(cells, point)

    table = _factor_table(cells, summary, diag, divergences, rules, interval)
    checks = diag.copy()

    return assemble_factor_set(
        tables, table, checks, idata, method=method, reference=reference, effort_unit=cells.effort_unit,
        model=spec_dict, settings=settings, rules=rules, divergences=divergences, cells_report=cells.report,
        gears=cells.gears, species=cells.species, species_groups=groups_map,
        extra={"patchiness": patchiness if method == "hierarchical" else None}, cells=cells)


def _baseline_diagnostics(cells, point: pd.DataFrame) -> pd.DataFrame:
    """n_groups / n_caught per factor for the baselines (no sampler diagnostics)."""
    diag = cells_mod.factor_support(cells)
    diag = diag.merge(point[["gear", "species", "note"]], on=["gear", "species"], how="left")
    for col in ("rhat", "ess_bulk", "ess_tail", "prior_ratio", "ppp"):
        diag[col] = np.nan
    return diag


def _factor_table(cells, summary, diag, divergences, rules, interval) -> pd.DataFrame:
    from calib.diagnostics import assign_status

    summary = summary[summary["gear"] != cells.reference]
    status = assign_status(diag, divergences or 0, rules)
    t = summary.merge(status, on=["gear", "species"], how="left")
    if "note" in t:
        # A baseline that could not estimate a factor says why; it is a failure.
        bad = t["note"].notna() & (t["note"].astype(str) != "") & ~np.isfinite(t["factor_median"])
        t.loc[bad, "status"] = "fail"
        t.loc[bad, "reason"] = t.loc[bad, "note"]
    t["reference"] = cells.reference
    t["effort_unit"] = t["gear"].map(cells.effort_unit)
    t["length_mm"] = pd.NA
    t["covariate"] = pd.NA
    t["level"] = pd.NA
    t["interval"] = interval
    t["reason"] = t["reason"].fillna("")
    t = t[FACTOR_COLUMNS].sort_values(["species", "gear"]).reset_index(drop=True)
    return t
