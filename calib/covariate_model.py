"""Stage 3 (covariate variant): theta depends on group-level covariates (``calib fit --covariate``).

Same split likelihood as :mod:`calib.model` (Dirichlet-multinomial of each cell's total among the
gears present, absent gears masked; design section 5), with theta shifted in each calibration
group i by its covariates:

    alpha_igs   = kappa_s * w_ig * exp(theta_gs + sum_c delta[g, c, level_c(i)] + sum_n b[g, n] * z_n(i))
    z_n(i)      = (x_n(i) - centre_n) / scale_n          x_n(i): mean of numeric covariate n over
                                                         group i's hauls; centre, scale: mean and sd
                                                         of x_n over the calibration groups
    delta[g, c, baseline_c] = 0;  delta[g, c, l] ~ Normal(0, sd_c)   (sampled centred)
    sd_c        ~ HalfNormal(offset_sd)                  (one pooled sd per categorical covariate,
                                                         shrinking every gear x level offset toward 0;
                                                         fixed at single_offset_sd when the covariate
                                                         has fewer than 3 offsets)
    b[g, n]     ~ Normal(0, slope_sd)                    (change of theta per scale_n of covariate n)
    theta_gs    ~ Normal(mu[g, pool(s)], tau_g)          (as the constant model; theta is the value at
                                                         the baseline levels and the calibration means)

The offsets and slopes are per gear, shared by the species of a gear (the covariate changes how
the gear fishes relative to the reference, e.g. a trawl's night catchability, whatever the
species). The reference gear has no offset and no slope (theta_ref = 0 at every level).

Public: :class:`CovariateModelSpec`, :func:`build_covariate_model`, :func:`level_view`.

InferenceData names: posterior ``theta`` (gear, species; baseline levels, numeric covariates at
their calibration mean), per categorical covariate c ``offset_<c>`` (gear, level_<c>) and
``theta_by_<c>`` (gear, species, level_<c>), ``sd_<c>``; for numeric covariates ``slope`` (gear,
numeric; per unit of the covariate) and per numeric covariate n ``theta_by_<n>`` (gear, species,
at_<n>: theta at the 10th, 50th and 90th percentiles of the group values); ``mu``, ``tau``,
``log_kappa`` (combo, species) and the sampler's variables; log_likelihood ``split`` (cell).
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from calib.cells import Cells, CovariateCells
from calib.model import (ModelSpec, Priors, _cell_arrays, cell_coords, centred_entries, gather_pairs, gather_rows,
                         per_entry_normal, split_likelihood)


@dataclass(frozen=True)
class CovariateModelSpec:
    """Settings of the covariate model.

    offset_sd : sd_c ~ HalfNormal(offset_sd), the pooled spread of the level offsets (log scale).
        0.5 says a level usually changes the factor by a factor of about exp(0.34) = 1.4 (prior
        median of sd_c); offsets of 1 (a factor of 2.7) are possible, an offset near 0 (the
        level does not matter) is favoured. Rule of thumb, no source.
    min_pooled_offsets : the pooled sd_c is estimated only when a covariate has at least this many
        offsets (non-reference gears x non-baseline levels); with fewer (e.g. one gear and day/night)
        the offsets are Normal(0, single_offset_sd) with that sd fixed.
    single_offset_sd : 1.0, the prior sd of an offset that is not pooled: a level may change the
        factor by up to a factor of about 7 (exp(1.96)) at 95%. Weakly informative; rule of thumb.
    slope_sd : b ~ Normal(0, slope_sd) per scale (one sd of the covariate over the calibration
        groups): a change of one sd moves theta by less than 1 (a factor of 2.7) at 95%.
    overdispersion, priors, parametrization : as :class:`calib.model.ModelSpec`.
    """

    offset_sd: float = 0.5
    min_pooled_offsets: int = 3
    single_offset_sd: float = 1.0
    slope_sd: float = 0.5
    overdispersion: str = "dirichlet-multinomial"
    priors: Priors = field(default_factory=Priors)
    parametrization: str = "auto"

    def base_spec(self) -> ModelSpec:
        return ModelSpec(overdispersion=self.overdispersion, pooling="partial", priors=self.priors,
                         parametrization=self.parametrization)

    def to_dict(self) -> dict:
        d = self.base_spec().to_dict()
        d["theta"] = ("theta_gs + sum over categorical covariates of offset[gear, level] + sum over numeric "
                      "covariates of slope[gear] * (group mean - calibration mean)")
        d["offset_sd"] = self.offset_sd
        d["min_pooled_offsets"] = self.min_pooled_offsets
        d["single_offset_sd"] = self.single_offset_sd
        d["slope_sd"] = self.slope_sd
        d["priors"]["formulas"]["covariates"] = {
            "offset[gear, baseline level]": "0",
            "offset[gear, other level]": "Normal(0, sd_c)",
            "sd_c": f"HalfNormal({self.offset_sd}) with at least {self.min_pooled_offsets} offsets "
                    f"(gears x non-baseline levels), else fixed at {self.single_offset_sd}",
            "slope[gear, n] * scale_n": f"Normal(0, {self.slope_sd})",
        }
        return d


def _safe(name: str) -> str:
    return "".join(ch if ch.isalnum() or ch == "_" else "_" for ch in str(name))


def build_covariate_model(cc: CovariateCells, spec: CovariateModelSpec = CovariateModelSpec()):
    """Build the PyMC covariate model for :class:`calib.cells.CovariateCells` (module docstring).

    Coordinates: gear, factor_gear, species, cell, combo, pool, level_<c> per categorical
    covariate, numeric, at_<n> per numeric covariate. Returns a ``pm.Model``; sample it with
    :func:`calib.model.sample`.
    """
    import pymc as pm
    import pytensor.tensor as pt

    cells = cc.cells
    coords = cell_coords(cells)
    base = spec.base_spec()
    p = spec.priors
    for c in cc.categorical:
        coords[f"level_{_safe(c)}"] = list(cc.levels[c])
        coords[f"other_level_{_safe(c)}"] = list(cc.levels[c][1:])
    if cc.numeric:
        coords["numeric"] = list(cc.numeric)
        for n in cc.numeric:
            coords[f"at_{_safe(n)}"] = list(cc.percentiles[n])
    arrays = _cell_arrays(cells, list(cells.combos))
    n_fg, n_sp = cells.n_gears - 1, cells.n_species
    with pm.Model(coords=coords) as model:
        counts = pm.Data("counts", arrays["counts"], dims=("cell", "gear"))
        present = pm.Data("present", arrays["present"], dims=("cell", "gear"))
        pm.Data("weight", arrays["weight"], dims=("cell", "gear"))
        # Parameter-free terms computed once (calib.model.split_constant, calib.model.log_weight).
        log_w = pm.Data("log_weight", arrays["log_weight"], dims=("cell", "gear"))
        constant = pm.Data("split_constant", arrays["split_constant"], dims="cell")
        cell_species = pm.Data("cell_species", arrays["cell_species"], dims="cell")
        cell_combo = pm.Data("cell_combo", arrays["cell_combo"], dims="cell")
        species_pool = np.asarray(cells.species_pool, dtype=np.int64)

        mu = pm.Normal("mu", 0.0, p.theta_mu_sd, dims=("factor_gear", "pool"))
        tau = pm.HalfNormal("tau", p.theta_tau_sd, dims="factor_gear")
        centred = pm.Data("centred", centred_entries(cells, base), dims=("factor_gear", "species"))
        theta_other = per_entry_normal("theta_raw", mu[:, species_pool], tau, centred)
        theta = pm.Deterministic(
            "theta", pt.concatenate([pt.zeros((1, n_sp), dtype="float64"), theta_other], axis=0),
            dims=("gear", "species"))
        shift = pt.zeros((cells.n_cells, cells.n_gears))  # covariate part of theta, per cell x gear

        for k, c in enumerate(cc.categorical):
            s = _safe(c)
            n_lv = len(cc.levels[c])
            level = pm.Data(f"cell_level_{s}", np.asarray(cc.cell_level[:, k], dtype=np.int64), dims="cell")
            if n_fg * (n_lv - 1) >= spec.min_pooled_offsets:
                sd_c = pm.HalfNormal(f"sd_{s}", spec.offset_sd)
            else:
                # One or two offsets cannot inform a pooled sd (its posterior stays its prior) and a
                # hierarchical sd then only adds a funnel: fixed prior sd instead.
                sd_c = spec.single_offset_sd
            # Centred: the offsets are few and the data usually pin them down; the non-centred form
            # (offset = sd * z) gave 9 divergences in 600 draws on a 60-group day/night study.
            free = pm.Normal(f"offset_free_{s}", 0.0, sd_c, dims=("factor_gear", f"other_level_{s}"))
            full = pt.concatenate([pt.zeros((n_fg, 1)), free], axis=1)
            full = pt.concatenate([pt.zeros((1, n_lv)), full], axis=0)  # reference row 0
            offset = pm.Deterministic(f"offset_{s}", full, dims=("gear", f"level_{s}"))
            pm.Deterministic(f"theta_by_{s}", theta[:, :, None] + offset[:, None, :],
                             dims=("gear", "species", f"level_{s}"))
            shift = shift + gather_rows(offset.T, level)

        if cc.numeric:
            sc = np.array([cc.scale[n] for n in cc.numeric])
            ce = np.array([cc.centre[n] for n in cc.numeric])
            zval = pm.Data("cell_value_std", (np.asarray(cc.cell_value, dtype=float) - ce) / sc,
                           dims=("cell", "numeric"))
            b = pm.Normal("slope_std", 0.0, spec.slope_sd, dims=("factor_gear", "numeric"))
            b_full = pt.concatenate([pt.zeros((1, len(cc.numeric))), b], axis=0)
            slope = pm.Deterministic("slope", b_full / sc[None, :], dims=("gear", "numeric"))
            shift = shift + pt.dot(zval, b_full.T)
            for k, n in enumerate(cc.numeric):
                s = _safe(n)
                at = np.asarray(cc.percentiles[n], dtype=float) - cc.centre[n]
                pm.Deterministic(f"theta_by_{s}", theta[:, :, None] + slope[:, k][:, None, None] * at[None, None, :],
                                 dims=("gear", "species", f"at_{s}"))

        log_alpha = log_w + gather_rows(theta.T, cell_species) + shift
        if spec.overdispersion == "dirichlet-multinomial":
            eta = pm.Normal("log_kappa_mean", p.log_kappa_loc_mean, p.log_kappa_loc_sd, dims="combo")
            sigma = pm.HalfNormal("log_kappa_sd", p.log_kappa_spread_sd)
            z_kappa = pm.Normal("z_log_kappa", 0.0, 1.0, dims=("combo", "species"))
            log_kappa = pm.Deterministic("log_kappa", eta[:, None] + sigma * z_kappa, dims=("combo", "species"))
            log_alpha = log_alpha + gather_pairs(log_kappa, cell_combo, cell_species)[:, None]
        split_likelihood(log_alpha, present, counts, constant, spec.overdispersion == "dirichlet-multinomial")
    model._calib_covariate_spec = spec
    return model


def level_view(idata, cc: CovariateCells, covariate: str):
    """The fit seen per species x level of one categorical covariate, for :mod:`calib.diagnostics`.

    Returns (InferenceData, Cells, strata) where the *species* axis is species x level (label
    ``"species | name=level"``): posterior/prior ``theta`` (gear, species) is ``theta_by_<c>``
    flattened, ``log_kappa`` the species' value repeated over its levels; the cells are the fit's
    with each cell's species replaced by its species x level stratum. ``strata`` is a DataFrame
    (stratum, species, level). With a single categorical covariate the split check (ppp) on this
    view is exact; with more covariates it ignores the others.
    """
    import arviz as az
    import pandas as pd
    import xarray as xr

    s = _safe(covariate)
    levels = list(cc.levels[covariate])
    k = cc.categorical.index(covariate)
    cells = cc.cells
    n_lv = len(levels)
    labels = [f"{sp} | {covariate}={lv}" for sp in cells.species for lv in levels]
    strata = pd.DataFrame({"stratum": labels, "species": np.repeat(cells.species, n_lv),
                           "level": np.tile(levels, cells.n_species)})

    def flat(group):
        th = group[f"theta_by_{s}"].stack(stratum=("species", f"level_{s}"))
        th = th.drop_vars(["stratum", "species", f"level_{s}"]).assign_coords(stratum=labels)
        out = {"theta": th.rename({"stratum": "species"}).transpose("chain", "draw", "gear", "species")}
        if "log_kappa" in group:
            lk = group["log_kappa"].sel(species=xr.DataArray(np.repeat(cells.species, n_lv), dims="stratum"))
            out["log_kappa"] = lk.drop_vars("species").rename({"stratum": "species"}).assign_coords(species=labels)
        return xr.Dataset(out)

    groups = {"posterior": flat(idata.posterior)}
    if getattr(idata, "prior", None) is not None and f"theta_by_{s}" in idata.prior:
        groups["prior"] = flat(idata.prior)
    if getattr(idata, "sample_stats", None) is not None:
        groups["sample_stats"] = idata.sample_stats
    view = Cells(
        reference=cells.reference, gears=list(cells.gears), species=labels, groups=list(cells.groups),
        combos=list(cells.combos), pool_groups=list(cells.pool_groups), counts=cells.counts,
        present=cells.present, weight=cells.weight, effort=cells.effort, cell_group=cells.cell_group,
        cell_species=cells.cell_species * n_lv + cc.cell_level[:, k], cell_combo=cells.cell_combo,
        species_pool=np.repeat(cells.species_pool, n_lv), effort_unit=dict(cells.effort_unit),
        report=dict(cells.report))
    return az.InferenceData(**groups), view, strata


__all__ = ["CovariateModelSpec", "build_covariate_model", "level_view"]
