"""Stage 3: the Bayesian calibration model (design section 5).

For calibration cell i (one group x species) with total n_i = sum_g y_ig over the gears
present in the group, the split of the catch among the gears is

    Dirichlet-multinomial(n_i; alpha_i),   alpha_ig = kappa_i * w_ig * exp(theta_gs)

with w_ig the relative effort, theta_gs = log(q_gs / q_ref,s) (theta_ref,s = 0) and kappa
the patchiness concentration of the cell's species and gear combination. The
concentrations are not normalised, so gears absent from a group are simply masked out
of the cell's likelihood (aggregation property of the Dirichlet-multinomial; for two
gears it is the beta-binomial). ``overdispersion="none"`` is the kappa -> infinity limit,
the multinomial split with p_ig = w_ig exp(theta_gs) / sum_present w exp(theta).

Hierarchy (``pooling="partial"``):

    theta[g, s]      ~ Normal(mu[g, pool(s)], tau[g])                (non-reference gears)
    log_kappa[c, s]  = log_kappa_mean[c] + log_kappa_sd * z_log_kappa[c, s]   (non-centred)

theta is stored in one free variable ``theta_raw`` written, entry by entry, either centred
(theta_raw = theta) or non-centred (theta = mu + tau * theta_raw, theta_raw ~ N(0, 1)),
whichever the data make easier to sample (:func:`centred_entries`; same model, same
posterior). ``pooling="none"`` gives every species its own vague priors (``theta_free``,
``log_kappa``; no borrowing).

Public: :class:`Priors`, :class:`ModelSpec`, :func:`build_model`, :func:`set_cells`,
:func:`sample`, :func:`cell_log_density`, :func:`draw_split`; for other models built on the same
split: :func:`split_likelihood`, :func:`split_constant`, :func:`log_weight`, :func:`gather_rows`,
:func:`gather_pairs`.

Names in the InferenceData: posterior ``theta`` (gear, species; reference row 0),
``log_kappa`` (combo, species; absent with ``overdispersion="none"``), the hyper-parameters
``mu`` (factor_gear, pool), ``tau`` (factor_gear), ``log_kappa_mean`` (combo),
``log_kappa_sd`` and the sampler's variables ``theta_raw`` / ``theta_free``,
``z_log_kappa``; log_likelihood ``split`` (cell); prior: every free variable and
deterministic (``theta`` included); observed_data ``split`` (cell, gear); constant_data the
data containers (counts, present, weight, cell_species, cell_combo, species_pool, centred, and
log_weight, split_constant: the parameter-free terms of the log-density, computed once).
"""

from __future__ import annotations

import math
import os
import weakref
from dataclasses import asdict, dataclass, field

import numpy as np
from scipy.special import gammaln, logsumexp

from calib.cells import Cells

OVERDISPERSION = ("dirichlet-multinomial", "none")
POOLING = ("partial", "none")
PARAMETRIZATION = ("auto", "centred", "non-centred")

LIKELIHOOD = "split"  # name of the observed variable and of its log_likelihood entry


@dataclass(frozen=True)
class Priors:
    """Weakly informative priors of the calibration model (all on the log scale).

    theta_mu_sd = 1.5
        mu[g, k] ~ Normal(0, 1.5): the typical log catchability ratio of gear g to the
        reference within pooling group k. 95% of prior mass puts the typical factor
        between exp(-2.94) = 0.05 and 19: gears that catch 20 times more or less than the
        reference are possible, a factor of 100 is not expected.
    theta_tau_sd = 1.0
        tau[g] ~ HalfNormal(1): species-to-species spread of theta around mu. The prior
        median 0.67 says species usually differ by a factor of about 2 from the
        gear's typical ratio; tau near 0 (all species alike) is allowed.
    log_kappa_loc_mean = log(3), log_kappa_loc_sd = 1.5
        log_kappa_mean[combo] ~ Normal(log 3, 1.5): typical patchiness per gear combination.
        A tow's catch rate has coefficient of variation 1/sqrt(kappa * w * exp(theta)); at
        kappa = 3 that is 0.58 for a gear as efficient as the reference, and the
        log-ratio of two such tows has sd sqrt(2 * trigamma(3)) = 0.80. The 95% range,
        kappa 0.16 to 57, runs from very patchy catches (CV 2.5) to near-Poisson ones.
    log_kappa_spread_sd = 1.0
        log_kappa_sd ~ HalfNormal(1): species differ in patchiness by a factor of about
        2 (prior median 0.67 on the log scale).
    unpooled_theta_sd = 5.0
        pooling="none": theta[g, s] ~ Normal(0, 5), vague (factors from 5e-5 to 2e4
        at 95%), so the likelihood alone decides, as in maximum likelihood.
    unpooled_log_kappa_mean = log(3), unpooled_log_kappa_sd = 3.0
        pooling="none": log_kappa[combo, s] ~ Normal(log 3, 3), independent, vague.
    """

    theta_mu_sd: float = 1.5
    theta_tau_sd: float = 1.0
    log_kappa_loc_mean: float = math.log(3.0)
    log_kappa_loc_sd: float = 1.5
    log_kappa_spread_sd: float = 1.0
    unpooled_theta_sd: float = 5.0
    unpooled_log_kappa_mean: float = math.log(3.0)
    unpooled_log_kappa_sd: float = 3.0

    def to_dict(self) -> dict:
        """Plain dict (with readable formulas) for the manifest."""
        d = asdict(self)
        d["formulas"] = {
            "partial": {
                "mu[gear, pool]": f"Normal(0, {self.theta_mu_sd})",
                "tau[gear]": f"HalfNormal({self.theta_tau_sd})",
                "theta[gear, species]": "mu[gear, pool(species)] + tau[gear] * Normal(0, 1)",
                "log_kappa_mean[combo]": f"Normal({self.log_kappa_loc_mean:.4f}, {self.log_kappa_loc_sd})",
                "log_kappa_sd": f"HalfNormal({self.log_kappa_spread_sd})",
                "log_kappa[combo, species]": "log_kappa_mean[combo] + log_kappa_sd * Normal(0, 1)",
            },
            "none": {
                "theta[gear, species]": f"Normal(0, {self.unpooled_theta_sd})",
                "log_kappa[combo, species]": (
                    f"Normal({self.unpooled_log_kappa_mean:.4f}, {self.unpooled_log_kappa_sd})"
                ),
            },
            "theta[reference, species]": "0",
        }
        return d


@dataclass(frozen=True)
class ModelSpec:
    """Which variant of the split model to build.

    overdispersion : "dirichlet-multinomial" (gamma patchiness, default) or "none"
        (multinomial split, kappa -> infinity).
    pooling : "partial" (theta and log kappa pooled across species) or "none"
        (every species on its own, vague priors).
    priors : :class:`Priors`.
    parametrization : how theta's hierarchy is written for the sampler (same model, same
        posterior; only sampling efficiency differs). "auto" (default) writes a species x
        gear centred when its data are informative and non-centred otherwise (see
        :func:`centred_entries`); "centred" / "non-centred" force one form everywhere.
        Ignored with pooling="none".
    """

    overdispersion: str = "dirichlet-multinomial"
    pooling: str = "partial"
    priors: Priors = field(default_factory=Priors)
    parametrization: str = "auto"

    def __post_init__(self):
        if self.parametrization not in PARAMETRIZATION:
            raise ValueError(f"parametrization must be one of {PARAMETRIZATION}, not {self.parametrization!r}")
        if self.overdispersion not in OVERDISPERSION:
            raise ValueError(f"overdispersion must be one of {OVERDISPERSION}, not {self.overdispersion!r}")
        if self.pooling not in POOLING:
            raise ValueError(f"pooling must be one of {POOLING}, not {self.pooling!r}")

    def to_dict(self) -> dict:
        return {
            "likelihood": "conditional split of each group's total among the gears present",
            "overdispersion": self.overdispersion,
            "pooling": self.pooling,
            "parametrization": self.parametrization,
            "priors": self.priors.to_dict(),
        }


# ---------------------------------------------------------------------------
# Reference implementation (numpy / scipy)
# ---------------------------------------------------------------------------


def cell_log_density(
    counts: np.ndarray,
    present: np.ndarray,
    weight: np.ndarray,
    theta_cells: np.ndarray,
    kappa_cells: np.ndarray | None = None,
) -> np.ndarray:
    """Log-probability of each cell's split given its total (nats), plain numpy.

    counts, present, weight, theta_cells : (n_cells, n_gears); theta_cells holds
        theta[g, species(i)] for every gear (0 for the reference).
    kappa_cells : (n_cells,) concentration kappa of each cell, or None for the
        multinomial split (overdispersion "none").

    Returns (n_cells,) log p(y_i | n_i), including the multinomial coefficient.
    """
    y = np.asarray(counts, dtype=float)
    present = np.asarray(present, dtype=bool)
    n = y.sum(axis=1)
    log_w = np.log(np.where(present, weight, 1.0))
    eta = log_w + np.asarray(theta_cells, dtype=float)
    coef = gammaln(n + 1.0) - np.where(present, gammaln(y + 1.0), 0.0).sum(axis=1)
    if kappa_cells is None:
        log_p = eta - logsumexp(np.where(present, eta, -np.inf), axis=1, keepdims=True)
        return coef + np.where(present, y * np.where(present, log_p, 0.0), 0.0).sum(axis=1)
    alpha = np.where(present, np.asarray(kappa_cells, dtype=float)[:, None] * np.exp(eta), 1.0)
    a_sum = np.where(present, alpha, 0.0).sum(axis=1)
    terms = np.where(present, gammaln(y + alpha) - gammaln(alpha), 0.0).sum(axis=1)
    return coef + gammaln(a_sum) - gammaln(n + a_sum) + terms


def draw_split(
    rng: np.random.Generator,
    totals: np.ndarray,
    present: np.ndarray,
    log_alpha: np.ndarray,
    overdispersed: bool = True,
) -> np.ndarray:
    """Replicate counts of each cell given its total (numpy).

    totals (..., ), present (..., n_gears), log_alpha (..., n_gears) = log kappa + log w + theta
    (with overdispersed=False the kappa part is irrelevant: p = softmax over present gears).
    Dirichlet-multinomial via gamma draws normalised over the present gears.
    """
    totals = np.asarray(totals, dtype=np.int64)
    present = np.asarray(present, dtype=bool)
    log_alpha = np.asarray(log_alpha, dtype=float)
    if overdispersed:
        # Gamma(alpha) draws; tiny alphas can underflow to 0, so work on the log scale
        # via log U / alpha (Gamma(a) = Gamma(a + 1) * U^(1/a)).
        alpha = np.exp(np.where(present, log_alpha, 0.0))
        log_g = np.log(rng.gamma(alpha + 1.0)) + np.log(rng.uniform(size=alpha.shape)) / alpha
    else:
        log_g = log_alpha
    log_g = np.where(present, log_g, -np.inf)
    p = np.exp(log_g - log_g.max(axis=-1, keepdims=True))
    p = p / p.sum(axis=-1, keepdims=True)
    flat_p = p.reshape(-1, p.shape[-1])
    flat_n = totals.reshape(-1)
    out = rng.multinomial(flat_n, flat_p)
    return out.reshape(p.shape).astype(np.int64)


# ---------------------------------------------------------------------------
# PyMC model
# ---------------------------------------------------------------------------


def _species_sums(cells: Cells, values: np.ndarray) -> np.ndarray:
    """Sum a per-cell vector within each species: (n_cells,) -> (n_species,)."""
    return np.bincount(cells.cell_species, weights=values, minlength=cells.n_species)


def theta_information(cells: Cells, spec: ModelSpec = ModelSpec()) -> np.ndarray:
    """Rough Fisher information (1 / sd^2, log scale) the data hold about theta[g, s].

    Array (n_gears - 1, n_species) for the non-reference gears. Gear g's pooled share p
    of the catch in the cells where it fished gives the binomial information
    sum_i n_i p (1 - p); with overdispersion each cell's term is divided by the
    Dirichlet-multinomial variance inflation (n_i + A_i) / (1 + A_i), A_i = kappa0 x (gears
    present) with kappa0 the prior median of kappa. A pilot value for choosing the
    parametrization, not an estimate.
    """
    y = np.asarray(cells.counts, dtype=float)
    present = np.asarray(cells.present, dtype=bool)
    n = y.sum(axis=1)
    if spec.overdispersion == "none":
        inflation = np.ones_like(n)
    else:
        a_sum = math.exp(spec.priors.log_kappa_loc_mean) * present.sum(axis=1)
        inflation = (n + a_sum) / (1.0 + a_sum)
    info = np.zeros((cells.n_gears - 1, cells.n_species))
    for j in range(1, cells.n_gears):
        at = present[:, j]
        caught = _species_sums(cells, at * y[:, j])
        total = _species_sums(cells, at * n)
        share = np.divide(caught, total, out=np.zeros_like(caught), where=total > 0)
        info[j - 1] = share * (1.0 - share) * _species_sums(cells, at * n / inflation)
    return info


def pilot_theta(cells: Cells) -> np.ndarray:
    """Ratio-of-sums pilot estimate of theta[g, s] against the reference (nan if not estimable).

    log[(sum y_g / sum w_g) / (sum y_ref / sum w_ref)] over the cells where gear g and the
    reference both fished; (n_gears - 1, n_species).
    """
    y = np.asarray(cells.counts, dtype=float)
    w = np.asarray(cells.weight, dtype=float)
    present = np.asarray(cells.present, dtype=bool)
    est = np.full((cells.n_gears - 1, cells.n_species), np.nan)
    for j in range(1, cells.n_gears):
        both = present[:, j] & present[:, 0]
        cg, cr = _species_sums(cells, both * y[:, j]), _species_sums(cells, both * y[:, 0])
        eg, er = _species_sums(cells, both * w[:, j]), _species_sums(cells, both * w[:, 0])
        ok = (cg > 0) & (cr > 0)
        est[j - 1, ok] = np.log((cg[ok] / eg[ok]) / (cr[ok] / er[ok]))
    return est


def pilot_tau(cells: Cells, spec: ModelSpec = ModelSpec()) -> np.ndarray:
    """Method-of-moments estimate of tau per non-reference gear (nan if too few species).

    DerSimonian & Laird 1986 (Controlled Clinical Trials 7, "Meta-analysis in clinical
    trials") applied to the pilot thetas with variances 1 / :func:`theta_information`,
    deviations taken around each pooling group's weighted mean.
    """
    est = pilot_theta(cells)
    info = theta_information(cells, spec)
    pools = np.asarray(cells.species_pool)
    out = np.full(cells.n_gears - 1, np.nan)
    for j in range(cells.n_gears - 1):
        q = c = 0.0
        df = 0
        for k in np.unique(pools):
            ok = (pools == k) & np.isfinite(est[j]) & (info[j] > 0)
            if ok.sum() < 2:
                continue
            wt, x = info[j, ok], est[j, ok]
            q += float(np.sum(wt * (x - np.sum(wt * x) / wt.sum()) ** 2))
            c += float(wt.sum() - np.sum(wt**2) / wt.sum())
            df += int(ok.sum()) - 1
        if df >= 1 and c > 0:
            out[j] = math.sqrt(max(0.0, (q - df) / c))
    return out


def centred_entries(cells: Cells, spec: ModelSpec = ModelSpec()) -> np.ndarray:
    """Which theta[g, s] (non-reference gears x species) the model writes centred.

    Same model either way; only how fast NUTS explores it differs. The centred form
    mixes better when the data pin theta[g, s] down more tightly than the spread tau of
    the hierarchy, the non-centred one otherwise (Papaspiliopoulos, Roberts & Skold 2007,
    Statistical Science 22, "A general framework for the parametrization of hierarchical
    models"; Betancourt & Girolami 2015, "Hamiltonian Monte Carlo for hierarchical
    models"). Rule (``parametrization="auto"``): centred when the pilot data sd
    1 / sqrt(information) is below half the pilot tau (:func:`pilot_tau`; the prior
    median of tau when it cannot be estimated). The factor one half is a rule of thumb
    (no source), tuned on simulations: a 12 species x 200 pair beta-binomial took about
    15 leapfrog steps per draw centred against 58 non-centred; 6 species x 40 pairs with
    tau near 0.2 diverged centred and not non-centred.
    """
    shape = (cells.n_gears - 1, cells.n_species)
    if spec.parametrization == "centred":
        return np.ones(shape, dtype=bool)
    if spec.parametrization == "non-centred":
        return np.zeros(shape, dtype=bool)
    tau = pilot_tau(cells, spec)
    tau = np.where(np.isfinite(tau), tau, 0.674 * spec.priors.theta_tau_sd)
    info = theta_information(cells, spec)
    return info * (0.5 * tau[:, None]) ** 2 > 1.0


def _dm_logp(value, log_alpha, present, total):
    """Dirichlet-multinomial log-density over the present gears (pytensor).

    An absent gear has count 0, so its terms gammaln(0 + alpha) - gammaln(alpha) and
    gammaln(0 + 1) vanish exactly: only the sum of the concentrations needs the mask, which
    keeps the graph (and its gradient) about half as long as masking every term.
    """
    import pytensor.tensor as pt

    y = pt.cast(value, "float64")
    n = y.sum(axis=-1)
    alpha = pt.exp(log_alpha)
    a_sum = (alpha * present).sum(axis=-1)
    coef = pt.gammaln(n + 1.0) - pt.gammaln(y + 1.0).sum(axis=-1)
    terms = (pt.gammaln(y + alpha) - pt.gammaln(alpha)).sum(axis=-1)
    return coef + pt.gammaln(a_sum) - pt.gammaln(n + a_sum) + terms


def _multinomial_logp(value, log_alpha, present, total):
    """Multinomial log-density over the present gears (pytensor); kappa cancels."""
    import pytensor.tensor as pt

    y = pt.cast(value, "float64")
    n = y.sum(axis=-1)
    masked = pt.switch(present, log_alpha, -np.inf)
    log_norm = pt.logsumexp(masked, axis=-1, keepdims=True)
    coef = pt.gammaln(n + 1.0) - pt.switch(present, pt.gammaln(y + 1.0), 0.0).sum(axis=-1)
    return coef + pt.switch(present, y * (pt.switch(present, log_alpha, 0.0) - log_norm), 0.0).sum(axis=-1)


def split_constant(counts: np.ndarray, present: np.ndarray) -> np.ndarray:
    """The parameter-free part of each cell's log-probability: log n! - sum over present gears of log y!.

    (n_cells,) from counts and present (n_cells, n_gears). Computed once per data set (numpy) and
    passed to the model as data, so the sampler does not re-evaluate it at every gradient.
    """
    y = np.asarray(counts, dtype=float)
    return gammaln(y.sum(axis=1) + 1.0) - np.where(np.asarray(present, dtype=bool), gammaln(y + 1.0), 0.0).sum(axis=1)


def log_weight(present: np.ndarray, weight: np.ndarray) -> np.ndarray:
    """log w with absent gears set to 0 (their weight is masked out of the likelihood)."""
    return np.log(np.where(np.asarray(present, dtype=bool), np.asarray(weight, dtype=float), 1.0))


def _dm_split_logp(value, log_alpha, present, total, constant):
    """:func:`_dm_logp` with the parameter-free part ``constant`` (:func:`split_constant`) given as data.

    Same values; each evaluation computes only the terms that depend on the concentrations.
    """
    import pytensor.tensor as pt

    y = pt.cast(value, "float64")
    alpha = pt.exp(log_alpha)
    a_sum = (alpha * present).sum(axis=-1)
    terms = (pt.gammaln(y + alpha) - pt.gammaln(alpha)).sum(axis=-1)
    return constant + pt.gammaln(a_sum) - pt.gammaln(total + a_sum) + terms


def _multinomial_split_logp(value, log_alpha, present, total, constant):
    """:func:`_multinomial_logp` with the parameter-free part ``constant`` given as data."""
    import pytensor.tensor as pt

    y = pt.cast(value, "float64")
    masked = pt.switch(present, log_alpha, -np.inf)
    log_norm = pt.logsumexp(masked, axis=-1, keepdims=True)
    return constant + pt.switch(present, y * (pt.switch(present, log_alpha, 0.0) - log_norm), 0.0).sum(axis=-1)


def gather_rows(table, rows):
    """``table[rows]`` for a 2-d pytensor ``table`` (n_rows, k) and integer ``rows`` (n,): (n, k).

    Written as one take from the flattened table: PyTensor runs that take and its gradient (a
    scatter-add into a vector) as compiled C loops, whereas the gradient of a 2-d integer gather
    is a Python-level scatter (measured: 107 of the 850 microseconds of a gradient at 1,700 cells).
    """
    import pytensor.tensor as pt

    k = table.shape[1]
    flat = (rows[:, None] * k + pt.arange(k)[None, :]).ravel()
    return table.ravel()[flat].reshape((rows.shape[0], k))


def gather_pairs(table, rows, cols):
    """``table[rows, cols]`` for a 2-d pytensor ``table`` as a take from the flattened table (see
    :func:`gather_rows`)."""
    return table.ravel()[rows * table.shape[1] + cols]


def split_likelihood(log_alpha, present, counts, constant, overdispersed: bool, dims=("cell", "gear")):
    """The observed split (``LIKELIHOOD``) of the counts among the present gears, in a PyMC model context.

    log_alpha (cell, gear): log kappa + log w + theta (kappa ignored when not ``overdispersed``);
    present, counts: the data containers; constant: the data container of :func:`split_constant`.
    The stored pointwise log-likelihood is the full normalised log-probability of each cell.
    """
    import pymc as pm

    random = _random_factory(overdispersed)
    return pm.CustomDist(
        LIKELIHOOD,
        log_alpha,
        present,
        counts.sum(axis=1),
        constant,
        logp=_dm_split_logp if overdispersed else _multinomial_split_logp,
        random=lambda log_alpha, present, total, constant, rng=None, size=None: random(
            log_alpha, present, total, rng=rng, size=size),
        signature="(g),(g),(),()->(g)",
        dtype="int64",
        observed=counts,
        dims=dims,
    )


def _random_factory(overdispersed: bool):
    def random(log_alpha, present, total, rng=None, size=None):
        log_alpha = np.asarray(log_alpha)
        if size is not None:
            shape = tuple(size) + log_alpha.shape[-1:]
            log_alpha = np.broadcast_to(log_alpha, shape)
            present = np.broadcast_to(present, shape)
            total = np.broadcast_to(total, shape[:-1])
        return draw_split(rng, total, present, log_alpha, overdispersed=overdispersed)

    return random


def _cell_arrays(cells: Cells, combos: list[str]) -> dict[str, np.ndarray]:
    index = {c: i for i, c in enumerate(combos)}
    unknown = sorted(set(cells.combos) - set(index))
    if unknown:
        raise ValueError(f"gear combinations {unknown} are not in the model (built for {combos})")
    combo_map = np.array([index[c] for c in cells.combos], dtype=np.int64)
    return {
        "counts": np.asarray(cells.counts, dtype=np.int64),
        "present": np.asarray(cells.present, dtype=bool),
        "weight": np.asarray(cells.weight, dtype=np.float64),
        "cell_species": np.asarray(cells.cell_species, dtype=np.int64),
        "cell_combo": combo_map[np.asarray(cells.cell_combo, dtype=np.int64)]
        if len(cells.cell_combo)
        else np.zeros(0, dtype=np.int64),
        "log_weight": log_weight(cells.present, cells.weight),
        "split_constant": split_constant(cells.counts, cells.present),
    }


def per_entry_normal(name: str, loc, tau, centred, dims=("factor_gear", "species")):
    """Normal(loc, tau[:, None]) values (factor_gear, species), each entry written for the sampler
    centred or non-centred as ``centred`` says (:func:`centred_entries`).

    One free variable ``name``: centred entries hold the value itself, ~ Normal(loc, tau); the
    others a standard normal z with value = loc + tau * z. Same prior either way. Returns the value
    (pytensor); call inside a ``pm.Model`` context.
    """
    import pymc as pm
    import pytensor.tensor as pt

    scale = pt.broadcast_to(tau[:, None], loc.shape)
    raw = pm.Normal(name, pt.switch(centred, loc, 0.0), pt.switch(centred, scale, 1.0), dims=dims)
    return pt.switch(centred, raw, loc + scale * raw)


def cell_coords(cells: Cells) -> dict:
    """The coordinates every split model over :class:`Cells` shares (gear, factor_gear, species,
    cell, combo, pool), after checking there is something to fit (ValueError otherwise)."""
    if cells.n_gears < 2:
        raise ValueError("the model needs at least two gears (the reference and one other)")
    if cells.n_cells == 0:
        raise ValueError("no calibration cells with a non-zero total: nothing to fit")
    return {
        "gear": list(cells.gears),
        "factor_gear": list(cells.gears[1:]),
        "species": list(cells.species),
        "cell": np.arange(cells.n_cells),
        "combo": list(cells.combos),
        "pool": list(cells.pool_groups),
    }


def build_model(cells: Cells, spec: ModelSpec = ModelSpec()):
    """Build the PyMC model of the catch split for ``cells``.

    Coordinates: gear (all gears, reference first), factor_gear (non-reference gears),
    species, cell, combo (gear combinations of the groups), pool (species pooling groups).
    Data containers (swap with :func:`set_cells`): counts, present, weight, log_weight (cell, gear),
    cell_species, cell_combo, split_constant (cell), species_pool (species).

    Returns a ``pm.Model``; sample it with :func:`sample`.
    """
    import pymc as pm
    import pytensor.tensor as pt

    coords = cell_coords(cells)
    p = spec.priors
    arrays = _cell_arrays(cells, list(cells.combos))
    with pm.Model(coords=coords) as model:
        counts = pm.Data("counts", arrays["counts"], dims=("cell", "gear"))
        present = pm.Data("present", arrays["present"], dims=("cell", "gear"))
        pm.Data("weight", arrays["weight"], dims=("cell", "gear"))  # kept for constant_data (plan, checks)
        cell_species = pm.Data("cell_species", arrays["cell_species"], dims="cell")
        cell_combo = pm.Data("cell_combo", arrays["cell_combo"], dims="cell")
        species_pool = pm.Data("species_pool", np.asarray(cells.species_pool, dtype=np.int64), dims="species")
        # Parameter-free terms, computed once per data set (swapped with the counts by set_cells).
        log_w = pm.Data("log_weight", arrays["log_weight"], dims=("cell", "gear"))
        constant = pm.Data("split_constant", arrays["split_constant"], dims="cell")

        if spec.pooling == "partial":
            mu = pm.Normal("mu", 0.0, p.theta_mu_sd, dims=("factor_gear", "pool"))
            tau = pm.HalfNormal("tau", p.theta_tau_sd, dims="factor_gear")
            centred = pm.Data("centred", centred_entries(cells, spec), dims=("factor_gear", "species"))
            theta_other = per_entry_normal("theta_raw", mu[:, species_pool], tau, centred)
        else:
            theta_other = pm.Normal("theta_free", 0.0, p.unpooled_theta_sd, dims=("factor_gear", "species"))
        n_species = len(cells.species)
        theta = pm.Deterministic(
            "theta",
            pt.concatenate([pt.zeros((1, n_species), dtype="float64"), theta_other], axis=0),
            dims=("gear", "species"),
        )
        log_alpha = log_w + gather_rows(theta.T, cell_species)

        if spec.overdispersion == "dirichlet-multinomial":
            if spec.pooling == "partial":
                eta = pm.Normal("log_kappa_mean", p.log_kappa_loc_mean, p.log_kappa_loc_sd, dims="combo")
                sigma = pm.HalfNormal("log_kappa_sd", p.log_kappa_spread_sd)
                z_kappa = pm.Normal("z_log_kappa", 0.0, 1.0, dims=("combo", "species"))
                log_kappa = pm.Deterministic(
                    "log_kappa", eta[:, None] + sigma * z_kappa, dims=("combo", "species")
                )
            else:
                log_kappa = pm.Normal(
                    "log_kappa", p.unpooled_log_kappa_mean, p.unpooled_log_kappa_sd, dims=("combo", "species")
                )
            log_alpha = log_alpha + gather_pairs(log_kappa, cell_combo, cell_species)[:, None]
        split_likelihood(log_alpha, present, counts, constant, spec.overdispersion == "dirichlet-multinomial")
    model._calib_spec = spec  # read by sample() / diagnostics
    return model


def set_cells(model, cells: Cells) -> None:
    """Swap new calibration cells into a built model (same gears, species, combos, pools).

    The number of cells may change; nothing is recompiled by PyMC for the graph
    (the PyTensor C cache makes the next compile cheap).
    """
    import pymc as pm

    coords = model.coords
    for name, have in (("gear", cells.gears), ("species", cells.species), ("pool", cells.pool_groups)):
        if list(coords[name]) != list(have):
            raise ValueError(f"{name} differ from the model's: model {list(coords[name])}, cells {list(have)}")
    arrays = _cell_arrays(cells, list(coords["combo"]))
    arrays["species_pool"] = np.asarray(cells.species_pool, dtype=np.int64)
    if "centred" in model.named_vars:
        arrays["centred"] = centred_entries(cells, model_spec(model))
    pm.set_data(
        arrays,
        model=model,
        coords={"cell": np.arange(cells.n_cells)},
    )


def model_spec(model) -> ModelSpec:
    """The :class:`ModelSpec` a model was built with."""
    return getattr(model, "_calib_spec", ModelSpec())


SAMPLERS = ("pymc", "nutpie")

# Compiled nutpie models, one per PyMC model object: data are swapped in with
# ``with_data`` so replicate fits compile once (numba compilation takes 20-40 s).
_NUTPIE_CACHE: "weakref.WeakKeyDictionary" = weakref.WeakKeyDictionary()


def _data_values(model) -> dict[str, np.ndarray]:
    return {
        v.name: np.asarray(v.get_value())
        for v in model.data_vars
        if hasattr(v, "get_value")
    }


def _sample_nutpie(model, draws, tune, chains, seed, progressbar, cores, target_accept):
    import nutpie

    compiled = _NUTPIE_CACHE.get(model)
    if compiled is None:
        compiled = nutpie.compile_pymc_model(model, backend="numba")
        _NUTPIE_CACHE[model] = compiled
    # Only the containers the compiled graph uses (e.g. no cell_combo without kappa).
    used = set(compiled.shared_data)
    compiled = compiled.with_data(**{k: v for k, v in _data_values(model).items() if k in used})
    kwargs = {"cores": cores} if cores is not None else {}
    idata = nutpie.sample(
        compiled,
        draws=draws,
        tune=tune,
        chains=chains,
        seed=seed,
        progress_bar=progressbar,
        target_accept=target_accept,
        save_warmup=False,
        **kwargs,
    )
    # Keep the same variables as PyMC's sampler: no transformed (``*__``) values.
    idata.posterior = idata.posterior.drop_vars([v for v in idata.posterior.data_vars if v.endswith("__")])
    return idata


def _data_groups(model) -> dict:
    """observed_data / constant_data groups with the model's coords (for nutpie fits)."""
    import xarray as xr

    coords = {k: np.asarray(v) for k, v in model.coords.items()}
    dims = {name: tuple(d) for name, d in model.named_vars_to_dims.items()}

    def dataset(values: dict, dims_of: dict) -> "xr.Dataset":
        return xr.Dataset(
            {
                name: xr.DataArray(val, dims=dims_of[name], coords={d: coords[d] for d in dims_of[name]})
                for name, val in values.items()
            }
        )

    data = _data_values(model)
    observed = dataset({LIKELIHOOD: data["counts"]}, {LIKELIHOOD: dims["counts"]})
    return {"observed_data": observed, "constant_data": dataset(data, dims)}


def sample(
    model,
    *,
    draws: int = 1000,
    tune: int = 1000,
    chains: int = 2,
    seed: int = 0,
    progressbar: bool = True,
    cores: int | None = None,
    target_accept: float = 0.9,
    sampler: str = "pymc",
    prior_draws: int = 2000,
    log_likelihood: bool = True,
):
    """Sample the posterior with NUTS and add the log_likelihood and prior groups.

    draws, tune : iterations per chain (kept / adaptation). seed : the same seed gives
        identical draws. cores : chains run in parallel (default: one per chain, up to the CPUs
        this process may use; the draws do not depend on it).
    sampler : "pymc" (PyMC's NUTS, the default) or "nutpie" (compiled once per model
        object and reused after :func:`set_cells`; about 5x faster per fit on small models,
        but 20-40 s of numba compilation the first time).
    prior_draws : draws of the prior (group ``prior``; theta's prior sd gives prior_ratio);
        0 leaves the group out.
    log_likelihood : add the per-cell log-likelihood ``split`` (needed for LOO).

    Returns ``arviz.InferenceData``: posterior (theta, log_kappa, hyper-parameters),
    sample_stats (diverging, ...), log_likelihood, prior, observed_data, constant_data.
    """
    import pymc as pm

    if sampler not in SAMPLERS:
        raise ValueError(f"sampler must be one of {SAMPLERS}, not {sampler!r}")
    if cores is None:
        # PyMC's own default assumes half the CPUs are hyper-threads (2 CPUs -> 1 job, chains one
        # after the other); the chains are independent, so run up to one per CPU.
        cores = max(1, min(chains, len(os.sched_getaffinity(0)) if hasattr(os, "sched_getaffinity")
                           else (os.cpu_count() or 1)))
    with model:
        if sampler == "pymc":
            idata = pm.sample(
                draws=draws,
                tune=tune,
                chains=chains,
                cores=cores,
                random_seed=seed,
                progressbar=progressbar,
                target_accept=target_accept,
                idata_kwargs={"log_likelihood": log_likelihood},
                compute_convergence_checks=False,
            )
        else:
            idata = _sample_nutpie(model, draws, tune, chains, seed, progressbar, cores, target_accept)
            idata.add_groups(_data_groups(model))
            if log_likelihood:
                pm.compute_log_likelihood(idata, model=model, progressbar=False)
        if prior_draws:
            names = [rv.name for rv in model.free_RVs] + [v.name for v in model.deterministics]
            prior = pm.sample_prior_predictive(draws=prior_draws, var_names=names, random_seed=seed + 1)
            idata.add_groups({"prior": prior.prior})
    return idata
