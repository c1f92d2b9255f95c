"""Fit conversion factors that depend on group-level covariates (``calib fit --covariate NAME``).

tables -> :func:`calib.cells.build_covariate_cells` -> :func:`calib.covariate_model.build_covariate_model`
-> diagnostics per species x gear x level (the per-species tools of :mod:`calib.diagnostics`, run on
the fit seen per level: :func:`calib.covariate_model.level_view`) -> :class:`calib.factors.FactorSet`.

factors.csv gets, for every covariate, one row per species x gear x level (``covariate`` = its
name, ``level`` = the level; the other covariates at their baseline level / calibration mean). A
numeric covariate is reported at the 10th, 50th and 90th percentiles of its group values
(``level`` = the value). The manifest's ``"covariates"`` entry records the kind, levels, baseline,
centring (the calibration mean), scale and reported values of every covariate.
"""

from __future__ import annotations


import numpy as np
import pandas as pd


def _numeric_diagnostics(idata, cc, name: str, support: pd.DataFrame) -> pd.DataFrame:
    """rhat, ESS and prior_ratio of theta at the reported values of a numeric covariate.

    n_groups / n_caught are the species x gear's (every group informs the slope); no split check
    (ppp NaN): a record's split depends on its group's own value, not on a reported one.
    """
    import arviz as az

    from calib.covariate_model import _safe

    s = _safe(name)
    var = f"theta_by_{s}"
    other = list(cc.cells.gears[1:])
    th = idata.posterior[var].sel(gear=other)
    ds = th.to_dataset(name="t")
    rhat, eb, et = az.rhat(ds)["t"], az.ess(ds, method="bulk")["t"], az.ess(ds, method="tail")["t"]
    post_sd = th.std(dim=("chain", "draw"))
    prior = getattr(idata, "prior", None)
    prior_sd = prior[var].sel(gear=other).std(dim=("chain", "draw")) if prior is not None and var in prior else None
    rows = []
    for g in other:
        for sp in cc.cells.species:
            sup = support[(support["gear"] == g) & (support["species"] == sp)].iloc[0]
            for x in cc.percentiles[name]:
                at = {"gear": g, "species": sp, f"at_{s}": x}
                ps = float(post_sd.sel(at))
                rows.append({"gear": g, "species": sp, "value": x, "n_groups": int(sup["n_groups"]),
                             "n_caught": int(sup["n_caught"]), "rhat": float(rhat.sel(at)),
                             "ess_bulk": float(eb.sel(at)), "ess_tail": float(et.sel(at)),
                             "prior_ratio": ps / float(prior_sd.sel(at)) if prior_sd is not None else np.nan,
                             "ppp": np.nan})
    return pd.DataFrame(rows)


def covariate_summary(idata, cc, interval: float = 0.9) -> pd.DataFrame:
    """Effects of the covariates: one row per non-reference gear x covariate x level (categorical:
    the offset on theta against the baseline level) or gear x covariate (numeric: the slope per unit).

    Columns covariate, kind, gear, level, effect_median, effect_lower, effect_upper (theta scale;
    the factor at that level is the baseline factor times exp(-effect)). Saved as covariate_effects.csv.
    """
    from calib.covariate_model import _safe

    lo, hi = (1 - interval) / 2, 1 - (1 - interval) / 2
    rows = []
    post = idata.posterior
    for c in cc.categorical:
        off = post[f"offset_{_safe(c)}"]
        for g in cc.cells.gears[1:]:
            for lv in cc.levels[c][1:]:
                v = off.sel(gear=g, **{f"level_{_safe(c)}": lv}).values.ravel()
                rows.append((c, "categorical", g, lv, float(np.median(v)), float(np.quantile(v, lo)),
                             float(np.quantile(v, hi))))
    for n in cc.numeric:
        for g in cc.cells.gears[1:]:
            v = post["slope"].sel(gear=g, numeric=n).values.ravel()
            rows.append((n, "numeric (per unit)", g, "", float(np.median(v)), float(np.quantile(v, lo)),
                         float(np.quantile(v, hi))))
    return pd.DataFrame(rows, columns=["covariate", "kind", "gear", "level", "effect_median", "effect_lower",
                                       "effect_upper"])


def fit_with_covariates(tables, counts, *, reference: str, covariates, groups_map=None,
                        overdispersion: str = "dirichlet-multinomial", draws: int = 1000, tune: int = 1000,
                        chains: int = 2, seed: int = 20261202, interval: float = 0.9, rules=None,
                        progressbar: bool = True):
    """Fit covariate-dependent factors; called by :func:`calib.fitting.fit` with ``covariates``.

    tables : validated ``Tables``; counts : zero-completed counts; covariates : hauls column names.
    Other arguments as :func:`calib.fitting.fit`. Returns a :class:`calib.factors.FactorSet` whose
    ``extra_tables`` hold ``covariate_effects`` (:func:`covariate_summary`).
    """
    from calib import cells as cells_mod
    from calib import covariate_model as cm
    from calib import diagnostics
    from calib import model as model_mod
    from calib.factors import assemble_factor_set, summarise_theta_draws
    from calib.fitting import _factor_table

    hauls_file = str(tables.files.get("hauls") or "hauls")
    cc = cells_mod.build_covariate_cells(tables.hauls, counts, reference, list(covariates),
                                         species_groups=groups_map, hauls_file=hauls_file)
    spec = cm.CovariateModelSpec(overdispersion=overdispersion)
    rules = rules or diagnostics.StatusRules()
    settings = {"method": "hierarchical", "covariates": list(covariates), "draws": draws, "tune": tune,
                "chains": chains, "seed": seed, "interval": interval, "sampler": "PyMC NUTS",
                "target_accept": 0.9, "prior_draws": 2000, "posterior_predictive_draws": 200}
    pm_model = cm.build_covariate_model(cc, spec)
    idata = model_mod.sample(pm_model, draws=draws, tune=tune, chains=chains, seed=seed, progressbar=progressbar,
                             target_accept=settings["target_accept"], prior_draws=settings["prior_draws"])
    divergences = int(diagnostics.divergences(idata))
    single = len(cc.categorical) + len(cc.numeric) == 1
    tables_out, checks_out = [], []
    for c in cc.categorical:
        view_idata, view_cells, strata = cm.level_view(idata, cc, c)
        diag = diagnostics.factor_diagnostics(view_idata, view_cells, ppc_draws=settings["posterior_predictive_draws"],
                                              seed=seed)
        if not single:
            diag["ppp"] = np.nan  # the view ignores the other covariates: no exact split check
        summary = summarise_theta_draws(view_idata.posterior["theta"], interval)
        t = _factor_table(view_cells, summary, diag, divergences, rules, interval)
        st = strata.set_index("stratum")
        t["covariate"] = c
        t["level"] = t["species"].map(st["level"])
        t["species"] = t["species"].map(st["species"])
        tables_out.append(t)
        ch = diag.rename(columns={"species": "stratum"})
        ch.insert(1, "species", ch["stratum"].map(st["species"]))
        ch.insert(2, "covariate", c)
        ch.insert(3, "level", ch["stratum"].map(st["level"]))
        checks_out.append(ch.drop(columns="stratum"))
    support = cells_mod.factor_support(cc.cells)
    for n in cc.numeric:
        diag = _numeric_diagnostics(idata, cc, n, support)
        status = diagnostics.assign_status(diag, divergences, rules)
        th = idata.posterior[f"theta_by_{cm._safe(n)}"].sel(gear=list(cc.cells.gears[1:]))
        lo, hi = (1 - interval) / 2, 1 - (1 - interval) / 2
        q = np.exp(-th).quantile([lo, 0.5, hi], dim=("chain", "draw"))
        rows = []
        for r in status.to_dict("records"):
            at = {"gear": r["gear"], "species": r["species"], f"at_{cm._safe(n)}": r["value"]}
            f = q.sel(at).values
            rows.append({**r, "factor_lower": float(f[0]), "factor_median": float(f[1]), "factor_upper": float(f[2])})
        t = pd.DataFrame(rows)
        t["reference"] = reference
        t["effort_unit"] = t["gear"].map(cc.cells.effort_unit)
        t["length_mm"] = pd.NA
        t["covariate"] = n
        t["level"] = t["value"].map(lambda x: f"{x:.6g}")
        t["interval"] = interval
        tables_out.append(t)
        ch = diag.copy()
        ch.insert(2, "covariate", n)
        ch = ch.rename(columns={"value": "level"})
        checks_out.append(ch)
    from calib.factors import FACTOR_COLUMNS

    table = pd.concat([t[FACTOR_COLUMNS] for t in tables_out], ignore_index=True)
    table["level"] = table["level"].astype(str)
    table = table.sort_values(["species", "gear", "covariate"], kind="stable").reset_index(drop=True)
    checks = pd.concat(checks_out, ignore_index=True)

    cov_info = {}
    for c in cc.categorical:
        cov_info[c] = {"kind": "categorical", "levels": cc.levels[c], "baseline": cc.levels[c][0],
                       "baseline_rule": "the level of most calibration groups (ties: first in sorted order)",
                       "groups_per_level": cc.n_groups_per_level[c],
                       "effect": "offset on theta per gear x level, pooled sd, baseline offset 0"}
    for n in cc.numeric:
        cov_info[n] = {"kind": "numeric", "group_value": "mean over the group's hauls",
                       "centre": cc.centre[n], "centring": "slope on (group mean - calibration mean)",
                       "scale": cc.scale[n], "reported_at_percentiles": list(cells_mod.COVARIATE_PERCENTILES),
                       "reported_values": cc.percentiles[n],
                       "calibrated_range": [float(cc.group_values[n].min()), float(cc.group_values[n].max())]}
    return assemble_factor_set(
        tables, table, checks, idata, method="hierarchical", reference=reference,
        effort_unit=cc.cells.effort_unit, model={"variant": "covariates", **spec.to_dict()}, settings=settings,
        rules=rules, divergences=divergences, cells_report=cc.cells.report, gears=cc.cells.gears,
        species=cc.cells.species, species_groups=groups_map, extra={
            "covariates": cov_info,
            "covariate_rows": ("one factors.csv row per species x gear x level of each covariate, the other "
                               "covariates at their baseline level and calibration mean")},
        extra_tables={"covariate_effects": covariate_summary(idata, cc, interval)}, cells=cc)


def is_covariate_factor_set(factor_set) -> bool:
    """True when the factor set was fitted with ``--covariate`` (its manifest lists covariates)."""
    return bool(factor_set.manifest.get("covariates"))


__all__ = ["fit_with_covariates", "covariate_summary", "is_covariate_factor_set"]
