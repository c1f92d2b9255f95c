"""Stage 3 (length variant): theta as a smooth function of length (``calib fit --length-bin``).

Same split likelihood as :mod:`calib.model` (Dirichlet-multinomial of each cell's measured fish
among the gears present, absent gears masked; design section 5), but a cell is one group x
species x length class l and theta depends on the class:

    alpha_igsl   = kappa_s * w_igs * exp(theta_gs(l)),   w_igs = relative effort x measured fraction
    theta_gs(l)  = sum_k B_sk(l) * beta_gsk             (P-spline; B_sk cubic B-splines on the
                                                         species' calibrated range, at class mid-points)
    beta_gsk     = level_gs + sigma_g * (r_gsk - mean_k r_gsk),   r_gs = random walk:
    r_gs1 = 0,   r_gsk - r_gs(k-1) ~ Normal(0, 1)        (first-order random-walk prior on the
                                                         coefficients, the Bayesian form of the
                                                         P-spline difference penalty)
    level_gs     ~ Normal(mu[g, pool(s)], tau_g)        (pooled across species, as the constant model)
    sigma_g      ~ HalfNormal(rw_sd)                    (smoothness, one per gear: pooled across species)

B-splines sum to one at every length, so level_gs is the mean coefficient and a constant beta is a
constant factor; with sigma_g -> 0 every species' curve flattens to the constant model. P-splines:
Eilers & Marx 1996, Statistical Science 11, "Flexible smoothing with B-splines and penalties";
random-walk priors on the coefficients: Lang & Brezger 2004, Journal of Computational and Graphical
Statistics 13, "Bayesian P-splines" (recalled from memory).

Public: :class:`LengthModelSpec`, :func:`spline_basis`, :func:`spectral_basis`, :func:`level_centring`,
:func:`build_length_model`, :func:`per_stratum_idata`.

InferenceData names: posterior ``theta`` (gear, species, length; NaN outside a species' calibrated
range; reference row 0), ``theta_class`` (gear, stratum; the same values, one per species x class),
``beta`` (factor_gear, species, basis; "centred" form) or ``level_raw`` (factor_gear, species:
the level itself where ``constant_data["level_centred"]``, else its standard normal z) and
``z_component`` (factor_gear, species, component; the walk's standard-normal eigen-coordinates),
``level``, ``sigma_rw``, ``mu``, ``tau``, ``log_kappa`` (combo, species), ``log_kappa_mean``,
``log_kappa_sd``, ``z_log_kappa``; log_likelihood ``split`` (cell); observed_data ``split``
(cell, gear).
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from calib.cells import LengthCells
from calib.model import (Priors, gather_pairs, gather_rows, log_weight, per_entry_normal, split_constant,
                         split_likelihood)


PARAMETRIZATION = ("auto", "non-centred", "centred")


@dataclass(frozen=True)
class LengthModelSpec:
    """Settings of the length model.

    max_basis : at most this many B-spline coefficients per species x gear (cubic B-splines;
        a species with fewer than 4 classes gets one coefficient per class, i.e. the random walk
        on the classes themselves). More coefficients than the data can resolve are harmless: the
        random-walk prior does the smoothing (the point of P-splines). Too few are not: with 7
        coefficients over 16 classes a steep logistic retention ratio was followed by a spurious
        dip and rise (ringing) in simulations; 12 removed it.
    rw_sd : prior scale of sigma_g ~ HalfNormal(rw_sd), the sd of one random-walk step of the
        coefficients (log scale). 0.5 allows the log factor to change by about 0.5 * sqrt(K - 1),
        i.e. a factor of about 3 across the range at one prior sd with K = 12; sigma near 0 (a
        factor constant in length) is allowed.
    overdispersion : "dirichlet-multinomial" (default) or "none", as in :class:`calib.model.ModelSpec`.
    priors : the constant model's :class:`calib.model.Priors` (mu, tau, kappa).
    parametrization : how the coefficients are written for the sampler; same model, same
        posterior, only NUTS's speed differs.
        "auto" (default): the centred random walk in its eigen-coordinates (:func:`spectral_basis`:
        independent standard-normal components times sigma, non-centred) plus the level, written
        centred for the species x gears whose data pin it down and non-centred otherwise
        (:func:`level_centring`, the constant model's rule). "non-centred": the same with every
        level non-centred. "centred": the coefficients sampled directly, their prior written as a
        density. Measured (2 chains x (500 + 500), gradient evaluations per effective draw of the
        slowest parameter; benchmarks/fit_speed.py data): 12 species x 150 pairs (18,794 cells)
        "auto" 89 against 343 for the earlier default (level and random-walk steps non-centred;
        3.9 x fewer gradients, 2.4 x less wall time); 12 species x 20 pairs 42 against 144; the
        data-rich test study (2 species x 30 groups, every fish measured) 99 against 277. Centring
        every level left sigma_rw, tau and mu as the slowest parameters of the earlier form; the
        earlier "centred" form took 3,706 at 20 pairs (R-hat 1.13: a funnel where classes hold
        few fish). Tried and dropped: centring the well-informed eigen-components too (21
        divergences in 1,000 draws on the test study) and partial centring of the components
        (weights I sigma^2 / (1 + I sigma^2); 19 divergences, 144 gradients per effective draw).
    """

    max_basis: int = 12
    rw_sd: float = 0.5
    overdispersion: str = "dirichlet-multinomial"
    priors: Priors = field(default_factory=Priors)
    parametrization: str = "auto"

    def __post_init__(self):
        if self.parametrization not in PARAMETRIZATION:
            raise ValueError(f"parametrization must be one of {PARAMETRIZATION}, not {self.parametrization!r}")

    def to_dict(self) -> dict:
        d = {
            "likelihood": "conditional split of each group x species x length class's measured fish "
                          "among the gears present; weight = relative effort x measured fraction",
            "theta": "P-spline in length per species x gear: cubic B-splines, first-order random walk on "
                     "the coefficients, smoothness sigma pooled across species per gear",
            "max_basis": self.max_basis,
            "rw_sd": self.rw_sd,
            "overdispersion": self.overdispersion,
            "parametrization": self.parametrization,
            "priors": self.priors.to_dict(),
        }
        d["priors"]["formulas"]["length"] = {
            "level[gear, species]": f"Normal(mu[gear, pool], tau[gear]); mu ~ Normal(0, {self.priors.theta_mu_sd}), "
                                    f"tau ~ HalfNormal({self.priors.theta_tau_sd})",
            "sigma_rw[gear]": f"HalfNormal({self.rw_sd})",
            "beta[gear, species, k]": "level + sigma_rw * (walk_k - mean(walk)), walk steps Normal(0, 1)",
            "theta[gear, species, length]": "sum_k B_k(length) * beta[gear, species, k]",
        }
        return d


def spline_basis(lowers, bin_mm: float, max_basis: int = 12) -> np.ndarray:
    """B-spline basis of one species' length classes, evaluated at the class mid-points.

    lowers : class lower bounds (mm), consecutive classes of width ``bin_mm``.
    Returns (n_classes, K): cubic B-splines with equally spaced knots over the calibrated range
    [lowers[0], lowers[-1] + bin_mm], K = min(n_classes, max_basis); fewer than 4 classes (or
    ``max_basis`` < 4) give the identity (one coefficient per class). Rows sum to 1.
    """
    from scipy.interpolate import BSpline

    lowers = np.asarray(lowers, dtype=float)
    n = len(lowers)
    k_basis = min(n, int(max_basis))
    if n < 4 or k_basis < 4:
        return np.eye(n)
    degree = 3
    lo, hi = lowers[0], lowers[-1] + bin_mm
    n_inner = k_basis - degree  # segments between lo and hi
    inner = np.linspace(lo, hi, n_inner + 1)
    step = inner[1] - inner[0]
    knots = np.concatenate([lo - step * np.arange(degree, 0, -1), inner, hi + step * np.arange(1, degree + 1)])
    mid = lowers + bin_mm / 2.0
    basis = BSpline.design_matrix(mid, knots, degree, extrapolate=False).toarray()
    return basis


def _basis_blocks(lc: LengthCells, spec: LengthModelSpec):
    """Per stratum its basis row (padded to the largest K) and per species its K."""
    n_sp = len(lc.species)
    blocks = {}
    for sp, lowers in lc.classes.items():
        blocks[sp] = spline_basis(lowers, lc.bin_mm, spec.max_basis)
    k_max = max((b.shape[1] for b in blocks.values()), default=1)
    basis = np.zeros((len(lc.stratum_species), k_max))
    n_basis = np.ones(n_sp, dtype=int)
    for s, sp in enumerate(lc.species):
        if sp not in blocks:
            continue
        rows = np.flatnonzero(lc.stratum_species == s)
        b = blocks[sp]
        basis[rows, : b.shape[1]] = b
        n_basis[s] = b.shape[1]
    return basis, n_basis, k_max


def spectral_basis(basis: np.ndarray) -> np.ndarray:
    """(n_classes, K - 1): the random walk's centred part in its eigen-coordinates, per class.

    The first-order random-walk prior on K coefficients, centred, is Normal(0, P^+) with P = D'D
    (D the first differences; P's null space is the constant). With P = U diag(lam) U', the
    centred walk is sum_j U_j z_j / sqrt(lam_j), z_j independent N(0, 1): the same prior with
    independent components (the mixed-model form of a P-spline). Returned: B U_j / sqrt(lam_j)
    for the K - 1 non-null components, smoothest first.
    """
    k = basis.shape[1]
    if k < 2:
        return np.zeros((basis.shape[0], 0))
    d = np.diff(np.eye(k), axis=0)
    lam, u = np.linalg.eigh(d.T @ d)
    order = np.argsort(lam)[1:]
    return basis @ (u[:, order] / np.sqrt(lam[order]))


def spectral_blocks(stratum_species, basis: np.ndarray, n_basis: np.ndarray) -> np.ndarray:
    """(stratum, component): each species x class's row of :func:`spectral_basis` for its species,
    padded with zeros to the largest K - 1 (padding components do not enter theta).

    stratum_species : species index of each stratum; basis, n_basis : per stratum its B-spline row
    and per species its K (as built for the model)."""
    stratum_species = np.asarray(stratum_species)
    phi = np.zeros((len(stratum_species), max(basis.shape[1] - 1, 0)))
    for s in range(len(n_basis)):
        rows = np.flatnonzero(stratum_species == s)
        if len(rows):
            b = spectral_basis(basis[np.ix_(rows, np.arange(n_basis[s]))])
            phi[np.ix_(rows, np.arange(b.shape[1]))] = b
    return phi


def level_centring(lc: LengthCells, spec) -> np.ndarray:
    """(factor_gear, species): which levels the "auto" parametrization writes centred.

    The constant model's rule (:func:`calib.model.centred_entries`: centred when the pilot data sd
    is below half the pilot tau) applied to the same cells seen per species
    (:func:`calib.cells.species_view`): the level is the species' mean log factor.
    "non-centred" centres none; the "centred" form does not use it.
    """
    from calib.cells import species_view
    from calib.model import ModelSpec, centred_entries

    if spec.parametrization != "auto":
        return np.zeros((lc.cells.n_gears - 1, len(lc.species)), dtype=bool)
    return centred_entries(species_view(lc), ModelSpec(overdispersion=spec.overdispersion, priors=spec.priors))


def length_axis(lc: LengthCells) -> np.ndarray:
    """All class lower bounds of any species (mm), sorted: the ``length`` coordinate."""
    return np.unique(np.round(lc.stratum_length, 9))


def build_length_model(lc: LengthCells, spec: LengthModelSpec = LengthModelSpec()):
    """Build the PyMC length model for :class:`calib.cells.LengthCells` (see module docstring).

    Coordinates: gear, factor_gear, species, length (class lower bounds, mm), stratum (species x
    class), basis, cell, combo, pool. Data containers: counts, present, weight, log_weight (cell, gear),
    cell_stratum, cell_combo, split_constant (cell). Returns a ``pm.Model``; sample it with
    :func:`calib.model.sample`.
    """
    import pymc as pm
    import pytensor.tensor as pt

    cells = lc.cells
    if cells.n_gears < 2:
        raise ValueError("the model needs at least two gears (the reference and one other)")
    if cells.n_cells == 0:
        raise ValueError("no length-class cells with measured fish in two or more gears: nothing to fit")
    if spec.overdispersion not in ("dirichlet-multinomial", "none"):
        raise ValueError(f"unknown overdispersion {spec.overdispersion!r}")
    p = spec.priors
    basis, n_basis, k_max = _basis_blocks(lc, spec)
    n_sp = len(lc.species)
    lengths = length_axis(lc)
    len_pos = np.searchsorted(lengths, np.round(lc.stratum_length, 9))
    # mask of real (not padding) coefficients, and the centring weights 1 / K_s
    coef_mask = (np.arange(k_max)[None, :] < n_basis[:, None]).astype(float)
    coords = {
        "gear": list(cells.gears),
        "factor_gear": list(cells.gears[1:]),
        "species": list(lc.species),
        "length": lengths,
        "stratum": list(cells.species),
        "basis": np.arange(k_max),
        "component": np.arange(1, k_max) if k_max > 1 else np.arange(0),
        "cell": np.arange(cells.n_cells),
        "combo": list(cells.combos),
        "pool": list(cells.pool_groups),
    }
    with pm.Model(coords=coords) as model:
        counts = pm.Data("counts", np.asarray(cells.counts, dtype=np.int64), dims=("cell", "gear"))
        present = pm.Data("present", np.asarray(cells.present, dtype=bool), dims=("cell", "gear"))
        pm.Data("weight", np.asarray(cells.weight, dtype=float), dims=("cell", "gear"))
        cell_stratum = pm.Data("cell_stratum", np.asarray(cells.cell_species, dtype=np.int64), dims="cell")
        cell_combo = pm.Data("cell_combo", np.asarray(cells.cell_combo, dtype=np.int64), dims="cell")
        # Parameter-free terms computed once (calib.model.split_constant, calib.model.log_weight).
        log_w = pm.Data("log_weight", log_weight(cells.present, cells.weight), dims=("cell", "gear"))
        constant = pm.Data("split_constant", split_constant(cells.counts, cells.present), dims="cell")
        stratum_species = np.asarray(lc.stratum_species, dtype=np.int64)

        mu = pm.Normal("mu", 0.0, p.theta_mu_sd, dims=("factor_gear", "pool"))
        tau = pm.HalfNormal("tau", p.theta_tau_sd, dims="factor_gear")
        sigma = pm.HalfNormal("sigma_rw", spec.rw_sd, dims="factor_gear")
        loc = mu[:, lc.species_pool]
        if spec.parametrization == "centred":
            # beta itself is sampled; its prior written as a density: mean(beta) ~ Normal(mu, tau),
            # steps beta_k - beta_(k-1) ~ Normal(0, sigma) (a linear change of variables from the
            # non-centred form with constant Jacobian: the same prior). Padding coefficients ~ N(0, 1).
            # Measured (quiet machine): about as fast as the non-centred form on data-rich studies, far
            # slower when classes hold few fish (see LengthModelSpec).
            beta = pm.Flat("beta", dims=("factor_gear", "species", "basis"))
            mean_b = (beta * coef_mask[None]).sum(axis=2) / n_basis[None, :]
            lp = pm.logp(pm.Normal.dist(loc, tau[:, None]), mean_b).sum()
            if k_max > 1:
                steps = beta[:, :, 1:] - beta[:, :, :-1]
                lp += (pm.logp(pm.Normal.dist(0.0, sigma[:, None, None]), steps) * coef_mask[None, :, 1:]).sum()
            lp += (pm.logp(pm.Normal.dist(0.0, 1.0), beta) * (1.0 - coef_mask[None])).sum()
            pm.Potential("coefficient_prior", lp)
            pm.Deterministic("level", mean_b, dims=("factor_gear", "species"))
            # theta per stratum: sum_k B[stratum, k] * beta[g, species(stratum), k]
            theta_cls = (beta[:, stratum_species, :] * basis[None]).sum(axis=2)  # (factor_gear, stratum)
        else:
            # The random walk in its eigen-coordinates (spectral_basis): theta = level + sum_j phi_j a_j,
            # a_j = sigma * z_j, z_j ~ N(0, 1), always non-centred (centring the well-informed
            # components diverged; see LengthModelSpec). Each level is centred or not as the constant
            # model's theta (level_centring).
            phi = spectral_blocks(lc.stratum_species, basis, n_basis)
            centred = pm.Data("level_centred", level_centring(lc, spec), dims=("factor_gear", "species"))
            level = pm.Deterministic("level", per_entry_normal("level_raw", loc, tau, centred),
                                     dims=("factor_gear", "species"))
            theta_cls = level[:, stratum_species]
            if phi.shape[1]:
                z = pm.Normal("z_component", 0.0, 1.0, dims=("factor_gear", "species", "component"))
                # (species, gear, component): the gather per stratum is a 1-d take (C-compiled gradient)
                z_stratum = z.dimshuffle(1, 0, 2)[stratum_species]
                theta_cls = theta_cls + sigma[:, None] * (z_stratum * phi[:, None, :]).sum(axis=2).T
        theta_class = pm.Deterministic(
            "theta_class", pt.concatenate([pt.zeros((1, len(stratum_species))), theta_cls], axis=0),
            dims=("gear", "stratum"))
        grid = pt.fill(pt.zeros((cells.n_gears, n_sp, len(lengths))), np.nan)
        grid = pt.set_subtensor(grid[:, stratum_species, len_pos], theta_class)
        pm.Deterministic("theta", grid, dims=("gear", "species", "length"))

        log_alpha = log_w + gather_rows(theta_class.T, cell_stratum)
        if spec.overdispersion == "dirichlet-multinomial":
            eta = pm.Normal("log_kappa_mean", p.log_kappa_loc_mean, p.log_kappa_loc_sd, dims="combo")
            spread = pm.HalfNormal("log_kappa_sd", p.log_kappa_spread_sd)
            z_kappa = pm.Normal("z_log_kappa", 0.0, 1.0, dims=("combo", "species"))
            log_kappa = pm.Deterministic("log_kappa", eta[:, None] + spread * z_kappa, dims=("combo", "species"))
            cell_sp = stratum_species[np.asarray(cells.cell_species, dtype=np.int64)]
            log_alpha = log_alpha + gather_pairs(log_kappa, cell_combo, cell_sp)[:, None]
        split_likelihood(log_alpha, present, counts, constant, spec.overdispersion == "dirichlet-multinomial")
    model._calib_length_spec = spec
    return model


def per_stratum_idata(idata, lc: LengthCells):
    """The fit seen per species x length class, for the per-species tools of calib.diagnostics.

    Returns an InferenceData whose posterior (and prior) ``theta`` has dims (chain, draw, gear,
    species) with *species* = the strata of ``lc.cells`` and ``log_kappa`` (combo, species) the
    species' value repeated over its classes; sample_stats is kept (divergences).
    """
    import arviz as az
    import xarray as xr

    labels = list(lc.cells.species)
    sp_of = np.asarray(lc.species, dtype=object)[lc.stratum_species]

    def flat(group):
        out = {}
        th = group["theta_class"].rename({"stratum": "species"})
        out["theta"] = th.assign_coords(species=labels)
        if "log_kappa" in group:
            lk = group["log_kappa"].sel(species=xr.DataArray(sp_of, dims="stratum"))
            lk = lk.drop_vars("species").rename({"stratum": "species"}).assign_coords(species=labels)
            out["log_kappa"] = lk
        return xr.Dataset(out)

    groups = {"posterior": flat(idata.posterior)}
    if getattr(idata, "prior", None) is not None and "theta_class" in idata.prior:
        groups["prior"] = flat(idata.prior)
    if getattr(idata, "sample_stats", None) is not None:
        groups["sample_stats"] = idata.sample_stats
    return az.InferenceData(**groups)


__all__ = ["LengthModelSpec", "spline_basis", "spectral_basis", "spectral_blocks", "level_centring", "build_length_model",
           "per_stratum_idata", "length_axis", "PARAMETRIZATION"]
