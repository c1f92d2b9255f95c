"""Stage 3 for unpaired side-by-side designs: counts with a site x period random effect.

Every haul h (gear g(h), effort e_h in the gear's own unit, site-period c(h)) and species s:

    y_hs ~ NegativeBinomial(mean m_hs, shape phi_g(h)s)      (variance m + m^2 / phi)
    log m_hs = log e_h + theta[g(h), s] + b[c(h), s]
    b[c, s] = beta_s + sigma_s * z[c, s],  z ~ Normal(0, 1)     (site-period density, non-centred)

theta[g, s] = log(q_gs / q_ref,s) with theta[reference, s] = 0, so the factor is exp(-theta) as
in the paired model (:mod:`calib.model`); b[c, s] is the log density of species s at site-period
c in reference-gear catch per unit of the reference's effort. Only site-periods fished by two or
more gears inform theta: there b cancels from the ratio of the gears' expected catches.

Hierarchy (``pooling="partial"``), weakly informative priors (:class:`SideBySidePriors`):

    theta[g, s]         ~ Normal(mu[g, pool(s)], tau[g])   centred or non-centred per entry
    mu[g, k]            ~ Normal(0, 1.5)        tau[g] ~ HalfNormal(1)
    beta_s              ~ Normal(log pooled cpue of s, 2.5)
    log sigma_s         = log_sigma_mean + log_sigma_sd * Normal(0, 1)
    log_sigma_mean      ~ Normal(0, 1)          log_sigma_sd ~ HalfNormal(0.5)
    log phi[g, s]       = log_phi_mean[g] + log_phi_sd * Normal(0, 1)
    log_phi_mean[g]     ~ Normal(log 2, 1.5)    log_phi_sd ~ HalfNormal(1)

``pooling="none"``: theta[g, s] ~ Normal(0, 5) and log phi[g, s] ~ Normal(log 2, 3), independent.
``overdispersion="none"``: Poisson counts (phi -> infinity). ``site_effect="fixed"``: b[c, s] ~
Normal(beta loc_s, 10) independently (no pooling across site-periods): with Poisson counts and
``pooling="none"`` this is the Poisson GLM with site-period x species fixed effects, used as
the reference-library check.

Names in the InferenceData: posterior ``theta`` (gear, species), ``mu``, ``tau``, ``beta``
(species), ``sigma`` (species), ``z_site`` (site_period, species; b = beta + sigma * z_site),
``log_phi`` (gear, species), and with site_effect="fixed" ``b`` itself; log_likelihood ``catch``
(obs): one value per haul x species, for LOO; observed_data ``catch``; constant_data count,
obs_haul, obs_species, haul_gear, haul_cell, log_effort, species_pool, beta_loc, centred.

Public: :class:`SideBySidePriors`, :class:`SideBySideSpec`, :func:`build_model`,
:func:`set_data`, :func:`sample`, :func:`share_check`, :func:`fit_side_by_side`.
"""

from __future__ import annotations

import math
from dataclasses import asdict, dataclass, field

import numpy as np
import pandas as pd

from calib.site_periods import SitePeriodData

OVERDISPERSION = ("negative-binomial", "none")
SITE_EFFECT = ("random", "fixed")
POOLING = ("partial", "none")
PARAMETRIZATION = ("auto", "centred", "non-centred")
LIKELIHOOD = "catch"


@dataclass(frozen=True)
class SideBySidePriors:
    """Weakly informative priors of the side-by-side model (log scale).

    theta_mu_sd = 1.5, theta_tau_sd = 1.0
        as in the paired model (:class:`calib.model.Priors`): mu[g, k] ~ Normal(0, 1.5) puts
        95% of the typical factor between 0.05 and 19; tau[g] ~ HalfNormal(1), species
        usually within a factor of about 2 of their gear's typical ratio.
    beta_sd = 2.5
        beta_s ~ Normal(log pooled cpue of species s, 2.5): the species' mean log density,
        centred on the data's pooled log catch per unit effort ((total + 0.5) / total effort,
        all hauls and gears; a data-based centring that only fixes the scale of the effort
        unit, common practice, no source); 2.5 allows a 150-fold shift either way.
    log_sigma_loc_sd = 1.0, log_sigma_spread_sd = 0.5
        log_sigma_mean ~ Normal(0, 1): the typical sd of log density between site-periods
        has prior median 1 (a 2.7-fold spread) and 95% range 0.14 to 7;
        log_sigma_sd ~ HalfNormal(0.5): species differ in that spread by a factor of about 1.4.
    log_phi_loc_mean = log 2, log_phi_loc_sd = 1.5, log_phi_spread_sd = 1.0
        log_phi_mean[g] ~ Normal(log 2, 1.5): per gear, the typical negative-binomial shape
        (haul-to-haul patchiness; coefficient of variation of a haul's catch rate
        1 / sqrt(phi), 0.71 at phi = 2; 95% range phi 0.1 to 38);
        log_phi_sd ~ HalfNormal(1): species differ by a factor of about 2.
    fixed_site_sd = 10.0
        site_effect="fixed": b[c, s] ~ Normal(beta loc_s, 10), vague.
    unpooled_theta_sd = 5.0, unpooled_log_phi_sd = 3.0
        pooling="none": theta ~ Normal(0, 5), log phi ~ Normal(log 2, 3), vague.
    """

    theta_mu_sd: float = 1.5
    theta_tau_sd: float = 1.0
    beta_sd: float = 2.5
    log_sigma_loc_sd: float = 1.0
    log_sigma_spread_sd: float = 0.5
    log_phi_loc_mean: float = math.log(2.0)
    log_phi_loc_sd: float = 1.5
    log_phi_spread_sd: float = 1.0
    fixed_site_sd: float = 10.0
    unpooled_theta_sd: float = 5.0
    unpooled_log_phi_sd: float = 3.0

    def to_dict(self) -> dict:
        """Plain dict (with readable formulas) for the manifest."""
        d = asdict(self)
        d["formulas"] = {
            "count[haul, species]": "NegativeBinomial(mean = effort * exp(theta[gear, species] + "
                                    "b[site_period, species]), shape = phi[gear, species])",
            "partial": {
                "mu[gear, pool]": f"Normal(0, {self.theta_mu_sd})",
                "tau[gear]": f"HalfNormal({self.theta_tau_sd})",
                "theta[gear, species]": "mu[gear, pool(species)] + tau[gear] * Normal(0, 1)",
                "log_phi_mean[gear]": f"Normal({self.log_phi_loc_mean:.4f}, {self.log_phi_loc_sd})",
                "log_phi_sd": f"HalfNormal({self.log_phi_spread_sd})",
                "log_phi[gear, species]": "log_phi_mean[gear] + log_phi_sd * Normal(0, 1)",
            },
            "none": {
                "theta[gear, species]": f"Normal(0, {self.unpooled_theta_sd})",
                "log_phi[gear, species]": f"Normal({self.log_phi_loc_mean:.4f}, {self.unpooled_log_phi_sd})",
            },
            "site effect random": {
                "beta[species]": f"Normal(log pooled cpue of the species, {self.beta_sd})",
                "log_sigma_mean": f"Normal(0, {self.log_sigma_loc_sd})",
                "log_sigma_sd": f"HalfNormal({self.log_sigma_spread_sd})",
                "sigma[species]": "exp(log_sigma_mean + log_sigma_sd * Normal(0, 1))",
                "b[site_period, species]": "beta[species] + sigma[species] * Normal(0, 1)",
            },
            "site effect fixed": {
                "b[site_period, species]": f"Normal(log pooled cpue of the species, {self.fixed_site_sd})",
            },
            "theta[reference, species]": "0",
        }
        return d


@dataclass(frozen=True)
class SideBySideSpec:
    """Which variant of the side-by-side model to build.

    overdispersion : "negative-binomial" (default) or "none" (Poisson counts).
    site_effect : "random" (site-period densities pooled per species, default) or "fixed"
        (one vague effect per site-period x species; for the reference-library check).
    pooling : "partial" (theta pooled across species per gear) or "none" (vague priors).
    parametrization : theta written centred / non-centred per entry ("auto", as in
        :func:`calib.model.centred_entries`, from the site-periods fished by two or more gears).
    priors : :class:`SideBySidePriors`.
    """

    overdispersion: str = "negative-binomial"
    site_effect: str = "random"
    pooling: str = "partial"
    parametrization: str = "auto"
    priors: SideBySidePriors = field(default_factory=SideBySidePriors)

    def __post_init__(self):
        for name, allowed in (("overdispersion", OVERDISPERSION), ("site_effect", SITE_EFFECT),
                              ("pooling", POOLING), ("parametrization", PARAMETRIZATION)):
            if getattr(self, name) not in allowed:
                raise ValueError(f"{name} must be one of {allowed}, not {getattr(self, name)!r}")

    def to_dict(self) -> dict:
        return {
            "design": "side-by-side",
            "likelihood": ("negative binomial count of every haul x species with a site x period "
                           "effect per species and a log effort offset"
                           if self.overdispersion == "negative-binomial" else
                           "Poisson count of every haul x species with a site x period effect per "
                           "species and a log effort offset"),
            "overdispersion": self.overdispersion,
            "site_effect": self.site_effect,
            "pooling": self.pooling,
            "parametrization": self.parametrization,
            "priors": self.priors.to_dict(),
        }


# ---------------------------------------------------------------------------
# PyMC model
# ---------------------------------------------------------------------------


def _centred(data: SitePeriodData, spec: SideBySideSpec) -> np.ndarray:
    """Which theta[g, s] are written centred, by the paired model's rule on the shared site-periods.

    The pilot information uses the Dirichlet-multinomial inflation of the paired model at its
    prior median patchiness, a rough stand-in for the negative binomial's (only the sampler's
    efficiency depends on it, not the posterior).
    """
    from calib import model as paired

    shape = (data.n_gears - 1, data.n_species)
    if spec.parametrization == "centred":
        return np.ones(shape, dtype=bool)
    if spec.parametrization == "non-centred" or data.cells.n_cells == 0:
        return np.zeros(shape, dtype=bool)
    return paired.centred_entries(data.cells, paired.ModelSpec(parametrization="auto"))


def _beta_loc(data: SitePeriodData) -> np.ndarray:
    """Pooled log cpue per species, (total + 0.5) / total effort over its observations."""
    total = np.bincount(data.obs_species, weights=data.obs_count, minlength=data.n_species)
    effort = np.bincount(data.obs_species, weights=data.haul_effort[data.obs_haul], minlength=data.n_species)
    return np.log((total + 0.5) / np.maximum(effort, 1e-300))


def _arrays(data: SitePeriodData, spec: SideBySideSpec) -> dict[str, np.ndarray]:
    return {
        "count": np.asarray(data.obs_count, dtype=np.int64),
        "obs_haul": np.asarray(data.obs_haul, dtype=np.int64),
        "obs_species": np.asarray(data.obs_species, dtype=np.int64),
        "haul_gear": np.asarray(data.haul_gear, dtype=np.int64),
        "haul_cell": np.asarray(data.haul_cell, dtype=np.int64),
        "log_effort": np.log(np.asarray(data.haul_effort, dtype=float)),
        "species_pool": np.asarray(data.species_pool, dtype=np.int64),
        "beta_loc": _beta_loc(data),
        "centred": _centred(data, spec),
    }


def build_model(data: SitePeriodData, spec: SideBySideSpec = SideBySideSpec()):
    """Build the PyMC side-by-side model for ``data``.

    Coordinates: gear (reference first), factor_gear, species, pool, site_period, haul, obs.
    Data containers (swap with :func:`set_data`): count, obs_haul, obs_species (obs),
    haul_gear, haul_cell, log_effort (haul), species_pool, beta_loc (species), centred.
    """
    import pymc as pm
    import pytensor.tensor as pt

    from calib.model import per_entry_normal

    if data.n_gears < 2:
        raise ValueError("the model needs at least two gears (the reference and one other)")
    if data.n_obs == 0:
        raise ValueError("no haul x species observations: nothing to fit")
    p = spec.priors
    coords = {
        "gear": list(data.gears),
        "factor_gear": list(data.gears[1:]),
        "species": list(data.species),
        "pool": list(data.pool_groups),
        "site_period": list(data.site_periods),
        "haul": list(data.haul_ids),
        "obs": np.arange(data.n_obs),
    }
    a = _arrays(data, spec)
    with pm.Model(coords=coords) as model:
        count = pm.Data("count", a["count"], dims="obs")
        obs_haul = pm.Data("obs_haul", a["obs_haul"], dims="obs")
        obs_species = pm.Data("obs_species", a["obs_species"], dims="obs")
        haul_gear = pm.Data("haul_gear", a["haul_gear"], dims="haul")
        haul_cell = pm.Data("haul_cell", a["haul_cell"], dims="haul")
        log_effort = pm.Data("log_effort", a["log_effort"], dims="haul")
        species_pool = pm.Data("species_pool", a["species_pool"], dims="species")
        beta_loc = pm.Data("beta_loc", a["beta_loc"], dims="species")

        if spec.pooling == "partial":
            mu = pm.Normal("mu", 0.0, p.theta_mu_sd, dims=("factor_gear", "pool"))
            tau = pm.HalfNormal("tau", p.theta_tau_sd, dims="factor_gear")
            centred = pm.Data("centred", a["centred"], dims=("factor_gear", "species"))
            theta_other = per_entry_normal("theta_raw", mu[:, species_pool], tau, centred)
        else:
            theta_other = pm.Normal("theta_free", 0.0, p.unpooled_theta_sd, dims=("factor_gear", "species"))
        theta = pm.Deterministic(
            "theta", pt.concatenate([pt.zeros((1, data.n_species)), theta_other], axis=0),
            dims=("gear", "species"),
        )

        if spec.site_effect == "random":
            beta = pm.Normal("beta", beta_loc, p.beta_sd, dims="species")
            ls_mean = pm.Normal("log_sigma_mean", 0.0, p.log_sigma_loc_sd)
            ls_sd = pm.HalfNormal("log_sigma_sd", p.log_sigma_spread_sd)
            z_sigma = pm.Normal("z_log_sigma", 0.0, 1.0, dims="species")
            sigma = pm.Deterministic("sigma", pt.exp(ls_mean + ls_sd * z_sigma), dims="species")
            z_site = pm.Normal("z_site", 0.0, 1.0, dims=("site_period", "species"))
            b = beta[None, :] + sigma[None, :] * z_site
        else:
            b = pm.Normal("b", beta_loc[None, :], p.fixed_site_sd, dims=("site_period", "species"))

        gear_o = haul_gear[obs_haul]
        log_mean = log_effort[obs_haul] + theta[gear_o, obs_species] + b[haul_cell[obs_haul], obs_species]
        if spec.overdispersion == "negative-binomial":
            if spec.pooling == "partial":
                lp_mean = pm.Normal("log_phi_mean", p.log_phi_loc_mean, p.log_phi_loc_sd, dims="gear")
                lp_sd = pm.HalfNormal("log_phi_sd", p.log_phi_spread_sd)
                z_phi = pm.Normal("z_log_phi", 0.0, 1.0, dims=("gear", "species"))
                log_phi = pm.Deterministic("log_phi", lp_mean[:, None] + lp_sd * z_phi, dims=("gear", "species"))
            else:
                log_phi = pm.Normal("log_phi", p.log_phi_loc_mean, p.unpooled_log_phi_sd, dims=("gear", "species"))
            pm.NegativeBinomial(LIKELIHOOD, mu=pt.exp(log_mean), alpha=pt.exp(log_phi[gear_o, obs_species]),
                                observed=count, dims="obs")
        else:
            pm.Poisson(LIKELIHOOD, mu=pt.exp(log_mean), observed=count, dims="obs")
    model._calib_spec = spec
    return model


def set_data(model, data: SitePeriodData) -> None:
    """Swap new data into a built model (same gears, species and pools; hauls, observations and
    site-periods may change in number)."""
    import pymc as pm

    for name, have in (("gear", data.gears), ("species", data.species), ("pool", data.pool_groups)):
        if list(model.coords[name]) != list(have):
            raise ValueError(f"{name} differ from the model's: model {list(model.coords[name])}, data {list(have)}")
    spec = getattr(model, "_calib_spec", SideBySideSpec())
    a = _arrays(data, spec)
    if "centred" not in model.named_vars:
        a.pop("centred")
    pm.set_data(a, model=model, coords={"obs": np.arange(data.n_obs), "haul": list(data.haul_ids),
                                        "site_period": list(data.site_periods)})


def sample(model, **kwargs):
    """Sample with PyMC's NUTS (see :func:`calib.model.sample` for the arguments; the
    ``log_likelihood`` group holds ``catch`` per haul x species observation)."""
    from calib import model as paired

    if kwargs.get("sampler", "pymc") != "pymc":
        raise ValueError("the side-by-side model is sampled with PyMC's NUTS (sampler='pymc')")
    return paired.sample(model, **kwargs)


# ---------------------------------------------------------------------------
# Posterior predictive check of the gear shares within site-periods
# ---------------------------------------------------------------------------


def _draws(posterior, name: str, dims: tuple[str, ...], index: np.ndarray) -> np.ndarray:
    values = posterior[name].transpose("chain", "draw", *dims).values
    return np.asarray(values, dtype=float).reshape(-1, *values.shape[2:])[index]


def share_check(idata, data: SitePeriodData, ppc_draws: int = 200, seed: int = 0) -> pd.DataFrame:
    """Posterior predictive p-value of the gear shares within site-periods, per gear x species.

    The paired model's check (:func:`calib.diagnostics.split_check`) adapted to hauls that are
    not pairs: for each of ``ppc_draws`` posterior draws every haul x species count is
    replicated from the fitted model (negative binomial or Poisson around the draw's site-period
    density b, theta and phi), then summed per site-period x gear. The discrepancy is Pearson's
    chi-square of the gear shares within the site-periods fished by two or more gears,

        T = sum over the species' shared site-periods where the gear fished,
            sum over the gears present, of (Y_cg - N_c p_cg)^2 / (N_c p_cg),

    with Y_cg the summed count, N_c the site-period's total and p_cg = E_cg exp(theta_gs) /
    sum_present E exp(theta) the share the draw expects (b cancels). ppp = share of draws with
    T(replicate) >= T(observed) (Gelman, Meng & Stern 1996, Statistica Sinica 6). Near 0: the
    shares vary between site-periods more than the model allows (e.g. the gears did not sample
    the same animals); near 1: less.
    """
    post = idata.posterior
    n_total = post.sizes["chain"] * post.sizes["draw"]
    rng = np.random.default_rng(seed)
    index = np.sort(rng.choice(n_total, size=min(ppc_draws, n_total), replace=False))
    theta = _draws(post, "theta", ("gear", "species"), index)
    theta = theta[:, [list(post["theta"].coords["gear"].values).index(g) for g in data.gears]]
    if "z_site" in post:
        z = _draws(post, "z_site", ("site_period", "species"), index)
        b = _draws(post, "beta", ("species",), index)[:, None, :] + _draws(post, "sigma", ("species",), index)[:, None, :] * z
    else:
        b = _draws(post, "b", ("site_period", "species"), index)
    log_phi = _draws(post, "log_phi", ("gear", "species"), index) if "log_phi" in post else None

    n_c, n_g, n_s = data.n_site_periods, data.n_gears, data.n_species
    oh, os_ = data.obs_haul, data.obs_species
    og, oc = data.haul_gear[oh], data.haul_cell[oh]
    present = np.zeros((n_c, n_g), dtype=bool)
    present[data.haul_cell, data.haul_gear] = True
    effort = np.zeros((n_c, n_g))
    np.add.at(effort, (data.haul_cell, data.haul_gear), data.haul_effort)
    multi = present.sum(axis=1) >= 2
    flat = (oc * n_s + os_) * n_g + og  # site-period x species x gear bin of each observation

    def summed(values):  # (D, n_obs) -> (D, n_c, n_s, n_g)
        out = np.zeros((values.shape[0], n_c * n_s * n_g))
        for d in range(values.shape[0]):
            out[d] = np.bincount(flat, weights=values[d], minlength=n_c * n_s * n_g)
        return out.reshape(-1, n_c, n_s, n_g)

    # Which (site-period, species, gear) entries were observed at all (species_recorded may mask).
    seen = np.bincount(flat, minlength=n_c * n_s * n_g).reshape(n_c, n_s, n_g) > 0
    mask = multi[:, None, None] & present[:, None, :] & seen
    y_obs = summed(data.obs_count[None, :].astype(float))[0]

    log_mean = np.log(data.haul_effort)[oh][None] + theta[:, og, os_] + b[:, oc, os_]
    mean = np.exp(log_mean)
    if log_phi is None:
        y_rep = rng.poisson(mean)
    else:
        phi = np.exp(log_phi[:, og, os_])
        y_rep = rng.poisson(rng.gamma(phi, mean / phi))
    y_rep = summed(y_rep.astype(float))

    log_w = np.log(np.where(present, effort, 1.0))  # (n_c, n_g)
    eta = log_w[None, :, None, :] + theta.transpose(0, 2, 1)[:, None, :, :]  # (D, n_c, n_s, n_g)
    eta = np.where(mask[None], eta, -np.inf)
    top = eta.max(axis=3, keepdims=True)
    top = np.where(np.isfinite(top), top, 0.0)
    share = np.exp(eta - top)
    share /= np.maximum(share.sum(axis=3, keepdims=True), 1e-300)

    def pearson(y):  # y (D or 1, n_c, n_s, n_g) -> per-gear contribution summed over gears (D, n_c, n_s)
        n = np.where(mask[None], y, 0.0).sum(axis=3, keepdims=True)
        expected = n * share
        terms = np.where(mask[None] & (expected > 0), (y - expected) ** 2 / np.where(expected > 0, expected, 1.0), 0.0)
        return terms.sum(axis=3)

    t_rep, t_obs = pearson(y_rep), pearson(y_obs[None])
    rows = []
    for g in range(1, n_g):
        for s in range(n_s):
            member = mask[:, s, g]
            if not member.any():
                rows.append((data.gears[g], data.species[s], np.nan))
                continue
            rep = t_rep[:, member, s].sum(axis=1)
            obs = t_obs[:, member, s].sum(axis=1)
            rows.append((data.gears[g], data.species[s], float(np.mean(rep >= obs))))
    return pd.DataFrame(rows, columns=["gear", "species", "ppp"])


# ---------------------------------------------------------------------------
# The side-by-side path of ``calib fit``
# ---------------------------------------------------------------------------


def fit_side_by_side(
    tables,
    *,
    reference: str,
    period_by: str = "auto",
    overdispersion: str = "negative-binomial",
    pooling: str = "partial",
    site_effect: str = "random",
    species_groups=None,
    draws: int = 1000,
    tune: int = 1000,
    chains: int = 2,
    seed: int = 20261202,
    interval: float = 0.9,
    rules=None,
    progressbar: bool = True,
):
    """Fit conversion factors from a side-by-side study (called by :func:`calib.fitting.fit` with
    ``design="side-by-side"``); returns the same :class:`calib.factors.FactorSet` as the paired
    model: factors.csv columns, ``theta`` (gear, species) draws, checks and manifest.

    tables : validated ``calib.tables.Tables``; every haul is used, ``pair_id`` is ignored.
    period_by : how hauls are grouped in time (:data:`calib.site_periods.PERIOD_BY`).
    overdispersion : "negative-binomial" (default) or "none" (Poisson counts).
    species_groups : path to a (species, group) table, a dict species -> group, or None.
    Other arguments as in :func:`calib.fitting.fit`. n_groups in factors.csv counts the
    site-periods where the gear fished beside another gear and the species' total was > 0.
    Raises ``InputError`` listing every problem (:func:`calib.tables.side_by_side_problems`).
    """
    from calib import diagnostics
    from calib.errors import InputError, Problem
    from calib.factors import assemble_factor_set, summarise_theta_draws
    from calib.fitting import _factor_table, _read_species_groups
    from calib.site_periods import PERIOD_COLUMN, build_site_periods, site_period_keys
    from calib.tables import complete_zeros, side_by_side_problems

    problems = side_by_side_problems(tables, reference, period_by)
    if problems:
        raise InputError(problems)
    groups_map = species_groups if isinstance(species_groups, dict) or species_groups is None \
        else _read_species_groups(species_groups)
    counts = complete_zeros(tables)
    if groups_map is not None:
        unlisted = sorted(set(counts["species"]) - set(groups_map))
        if unlisted:
            where = "species_groups" if isinstance(species_groups, dict) else str(species_groups)
            raise InputError([Problem(where, None, "species", f"species '{s}' is in the catches but not in the "
                                      "species groups table", "add a row for it (species, group) so it is pooled "
                                      "with the right group") for s in unlisted])
    data = build_site_periods(tables.hauls, counts, reference, period_by=period_by, species_groups=groups_map)
    rules = rules or diagnostics.StatusRules()
    spec = SideBySideSpec(overdispersion=overdispersion, pooling=pooling, site_effect=site_effect)
    settings = {"method": "hierarchical", "design": "side-by-side", "period_by": data.period_by, "draws": draws,
                "tune": tune, "chains": chains, "seed": seed, "interval": interval, "sampler": "PyMC NUTS",
                "target_accept": 0.9, "prior_draws": 2000, "posterior_predictive_draws": 200}
    model = build_model(data, spec)
    idata = sample(model, draws=draws, tune=tune, chains=chains, seed=seed, progressbar=progressbar,
                   target_accept=settings["target_accept"], prior_draws=settings["prior_draws"])
    ppp = share_check(idata, data, ppc_draws=settings["posterior_predictive_draws"], seed=seed)
    diag = diagnostics.factor_diagnostics(idata, data.cells, ppp=ppp)
    divergences = int(diagnostics.divergences(idata))
    summary = summarise_theta_draws(idata.posterior["theta"], interval)
    table = _factor_table(data.cells, summary, diag, divergences, rules, interval)

    # The shared site-periods play the calibration groups' part in the domain convert flags
    # records against; 'period' is no covariate.
    domain_hauls = (tables.hauls.assign(pair_id=site_period_keys(tables.hauls, data.period_by))
                    .drop(columns=[PERIOD_COLUMN], errors="ignore"))
    return assemble_factor_set(
        tables, table, diag.copy(), idata, method="hierarchical", reference=reference,
        effort_unit=data.effort_unit, model=spec.to_dict(), settings=settings, rules=rules,
        divergences=divergences, cells_report=data.report, gears=data.gears, species=data.species,
        species_groups=groups_map, domain_hauls=domain_hauls, extra={
            "design": "side-by-side",
            "posterior_predictive_check": ("gear shares within site-periods fished by two or more gears "
                                           "(Pearson chi-square, replicate hauls from the fitted model)")})
