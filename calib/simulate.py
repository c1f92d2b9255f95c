"""Seeded simulators of calibration studies and surveys, and the invented demo scenario.

Used by the tests (recovering known factors) and by ``calib demo`` (the bundled tables in
``demo_paired_tows/`` are exactly :func:`write_demo` output). Nothing here reads real data.

The generating model (design section 5). For calibration group i, species s, gear g, haul h of
gear g in group i, with effort e_h (in the gear's effort unit) and group mean effort

    ebar_i = mean over the gears present in i of E_ig,   E_ig = summed effort of gear g in i,

the expected count of haul h is D_is * e_h * exp(theta_gs), with D_is the local density (expected
reference-gear count per unit effort, lognormal between groups) and theta_gs = log(q_gs / q_ref,s)
(theta_ref = 0). Patchiness is the spread of a haul around that expectation:

- ``"gamma"``: count ~ Poisson(lambda_is * gamma_h), lambda_is = D_is * ebar_i,
  gamma_h ~ Gamma(shape = kappa_s * (e_h / ebar_i) * exp(theta_gs), rate = kappa_s).
  Summing the hauls of one gear in one group sums their shapes, so the group's gear counts given
  the group total are exactly Dirichlet-multinomial with concentrations
  alpha_igs = kappa_s * w_ig * exp(theta_gs), w_ig = E_ig / ebar_i (the model calib fits).
- ``"lognormal"``: count ~ Poisson(D_is * e_h * exp(theta_gs) * exp(eps)), eps ~ Normal(0, tow_sd),
  one eps per haul x species; no mean correction, so E[count] is exp(tow_sd**2 / 2) times the
  expectation above (the tow effect has median 1, as in design section 5's unconditional model).
- ``"none"``: count ~ Poisson(D_is * e_h * exp(theta_gs)).

Output tables follow design section 3: ``hauls`` (haul_id, gear, date, effort, effort_unit,
pair_id, then any covariates) and ``catches`` (haul_id, species, count) with **only rows with
count > 0**; a haul x species missing from ``catches`` is a true zero, as the reader assumes.
``lengths`` (haul_id, species, length_mm, n) holds a measured subsample.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd

__all__ = [
    "LengthSpec",
    "logistic_retention",
    "SimulatedStudy",
    "SimulatedSurvey",
    "SimulatedSideBySide",
    "simulate_side_by_side",
    "simulate_calibration",
    "simulate_survey",
    "simulate_demo",
    "demo_truth",
    "demo_csv_texts",
    "demo_truth_markdown",
    "write_demo",
    "DEMO_SEED",
    "DEMO_REFERENCE",
    "DEMO_GEARS",
    "DEMO_SPECIES",
]

PATCHINESS = ("gamma", "lognormal", "none")


# --------------------------------------------------------------------------------------------
# Parameter handling
# --------------------------------------------------------------------------------------------


def _per_species(value, species: Sequence[str], name: str, default=None) -> np.ndarray:
    """A scalar, a sequence in species order, or a mapping species -> value, as a float array."""
    if value is None:
        if default is None:
            raise ValueError(f"{name} is required")
        value = default
    if isinstance(value, Mapping):
        missing = [s for s in species if s not in value]
        if missing:
            raise ValueError(f"{name} has no value for species {missing}")
        return np.array([float(value[s]) for s in species])
    arr = np.asarray(value, dtype=float)
    if arr.ndim == 0:
        return np.full(len(species), float(arr))
    if arr.shape != (len(species),):
        raise ValueError(f"{name} must have one value per species ({len(species)}), got shape {arr.shape}")
    return arr


def _species_names(species, log_density_mean) -> list[str]:
    if species is not None:
        return [str(s) for s in species]
    if isinstance(log_density_mean, Mapping):
        return [str(s) for s in log_density_mean]
    n = len(np.atleast_1d(log_density_mean))
    return [f"species_{k + 1}" for k in range(n)]


def _theta_array(theta, gears: Sequence[str], species: Sequence[str]) -> np.ndarray:
    """theta as an (n_gears, n_species) array; row 0 is the reference gear and must be 0.

    ``theta`` is an array (n_gears, n_species) or a mapping gear -> (scalar | per-species
    sequence | mapping species -> value). Gears missing from the mapping (the reference) get 0.
    """
    n_g, n_s = len(gears), len(species)
    if isinstance(theta, Mapping):
        unknown = set(theta) - set(gears)
        if unknown:
            raise ValueError(f"theta names gears not in gears: {sorted(unknown)}")
        out = np.zeros((n_g, n_s))
        for g, gear in enumerate(gears):
            if gear in theta:
                out[g] = _per_species(theta[gear], species, f"theta[{gear!r}]")
    else:
        out = np.asarray(theta, dtype=float)
        if out.shape == (n_g - 1, n_s):
            out = np.vstack([np.zeros(n_s), out])
        if out.shape != (n_g, n_s):
            raise ValueError(f"theta must be (n_gears, n_species) = ({n_g}, {n_s}), got {out.shape}")
    if np.any(out[0] != 0):
        raise ValueError(f"theta of the reference gear {gears[0]!r} (first in gears) must be 0")
    return out


# --------------------------------------------------------------------------------------------
# Lengths
# --------------------------------------------------------------------------------------------


@dataclass
class LengthSpec:
    """How lengths are simulated.

    median_mm : per species (scalar, sequence or mapping), median length (mm) of the species as
        caught by the reference gear; lengths are lognormal with coefficient of variation ``cv``.
    cv : per species, coefficient of variation of length (dimensionless).
    slope_per_10mm : optional mapping gear -> per-species change of theta per 10 mm of length
        (log-linear selectivity relative to the reference), centred at the species median. The
        length effect is normalised so that the species-level theta you pass stays the species-level
        log ratio of expected counts (averaged over the reference gear's length distribution):
        theta_gs(l) = theta_gs + delta_gs(l) - log(sum_l p_sl * exp(delta_gs(l))).
    n_measured : at most this many individuals are measured per haul x species (a random
        subsample of the catch; all of them when fewer were caught).
    bin_mm : width (whole mm) of the simulator's length classes; measured individuals get a whole-mm
        length drawn uniformly inside their class.
    retention : optional mapping gear -> logistic retention curve (l50, sr) in mm, one pair for all
        species or a mapping species -> (l50, sr); gears not named retain every length. The usual
        logistic selection curve (Millar & Fryer 1999, Reviews in Fish Biology and Fisheries 9,
        "Estimating the size-selection curves of towed gears, traps, nets and hooks"):
        r(l) = 1 / (1 + exp(-2 log(3) (l - l50) / sr)), l50 the length retained with probability
        0.5 and sr = l75 - l25 the selection range. The length effect of gear g is then
        log r_g(l) - log r_ref(l) (added to the slope effect, evaluated at class mid-points and
        normalised as above), so the true factor at length l is exp(-theta_length).
    patchiness_level : ``"species"`` draws one catch rate per haul x species and then gives the caught
        individuals lengths from the gear's catch-at-length distribution, so the *species-level*
        split is exactly Dirichlet-multinomial (gamma patchiness); ``"length_class"`` draws one catch
        rate per haul x species x length class, so each *length-class* split is exactly
        Dirichlet-multinomial and the species total is only approximately so.
    """

    median_mm: object
    cv: object = 0.3
    slope_per_10mm: Mapping[str, object] | None = None
    n_measured: int = 30
    bin_mm: int = 5
    patchiness_level: str = "species"
    retention: Mapping[str, object] | None = None


def logistic_retention(length_mm, l50: float, sr: float) -> np.ndarray:
    """Logistic retention probability at ``length_mm`` (mm) for a gear with 50 % retention length
    ``l50`` (mm) and selection range ``sr`` = l75 - l25 (mm) (Millar & Fryer 1999, Reviews in Fish
    Biology and Fisheries 9)."""
    if sr <= 0:
        raise ValueError("selection range sr must be > 0 mm")
    b = 2.0 * math.log(3.0) / float(sr)
    return 1.0 / (1.0 + np.exp(-b * (np.asarray(length_mm, dtype=float) - float(l50))))


def _retention_params(value, species: Sequence[str], gear: str) -> list[tuple[float, float]]:
    if isinstance(value, Mapping):
        missing = [s for s in species if s not in value]
        if missing:
            raise ValueError(f"LengthSpec.retention[{gear!r}] has no curve for species {missing}")
        return [tuple(float(x) for x in value[s]) for s in species]
    l50, sr = (float(x) for x in value)
    return [(l50, sr)] * len(species)


@dataclass
class _LengthGrid:
    lower: list[np.ndarray]          # per species: class lower bounds (mm, int)
    share: list[np.ndarray]          # per species: class probabilities p_sl for the reference gear
    delta: list[np.ndarray]          # per species: (n_gears, n_classes) normalised length effect
    bin_mm: int


def _length_grid(spec: LengthSpec, gears: Sequence[str], species: Sequence[str]) -> _LengthGrid:
    from scipy import stats

    if spec.patchiness_level not in ("species", "length_class"):
        raise ValueError("LengthSpec.patchiness_level must be 'species' or 'length_class'")
    bin_mm = int(spec.bin_mm)
    if bin_mm < 1:
        raise ValueError("LengthSpec.bin_mm must be a whole number of mm >= 1")
    median = _per_species(spec.median_mm, species, "LengthSpec.median_mm")
    cv = _per_species(spec.cv, species, "LengthSpec.cv")
    slopes = np.zeros((len(gears), len(species)))
    for gear, val in (spec.slope_per_10mm or {}).items():
        if gear not in gears:
            raise ValueError(f"LengthSpec.slope_per_10mm names an unknown gear {gear!r}")
        slopes[list(gears).index(gear)] = _per_species(val, species, f"slope_per_10mm[{gear!r}]")
    if np.any(slopes[0] != 0):
        raise ValueError("the reference gear (first in gears) has no length effect by definition")
    curves: dict[int, list[tuple[float, float]]] = {}
    for gear, val in (spec.retention or {}).items():
        if gear not in gears:
            raise ValueError(f"LengthSpec.retention names an unknown gear {gear!r}")
        curves[list(gears).index(gear)] = _retention_params(val, species, gear)
    lower, share, delta = [], [], []
    for s in range(len(species)):
        sigma = math.sqrt(math.log1p(cv[s] ** 2))
        dist = stats.lognorm(s=sigma, scale=median[s])
        lo = max(1, int(math.floor(dist.ppf(0.0005) / bin_mm)) * bin_mm)
        hi = int(math.ceil(dist.ppf(0.9995) / bin_mm)) * bin_mm
        edges = np.arange(lo, hi + bin_mm, bin_mm)
        p = np.diff(dist.cdf(edges))
        p = p / p.sum()
        mid = edges[:-1] + bin_mm / 2.0
        d = slopes[:, s][:, None] * (mid[None, :] - median[s]) / 10.0
        if curves:
            log_r = np.zeros((len(gears), len(mid)))
            for g, params in curves.items():
                log_r[g] = np.log(logistic_retention(mid, *params[s]))
            d = d + log_r - log_r[0][None, :]
        d = d - np.log((p[None, :] * np.exp(d)).sum(axis=1, keepdims=True))
        lower.append(edges[:-1].astype(int))
        share.append(p)
        delta.append(d)
    return _LengthGrid(lower, share, delta, bin_mm)



def _in_haul_order(length_table: pd.DataFrame, haul_ids, species) -> pd.DataFrame:
    """Lengths rows ordered by haul, then species, then length (stable, as the hauls were made)."""
    order = {h: k for k, h in enumerate(haul_ids)}
    sp_order = {s: k for k, s in enumerate(species)}
    return (
        length_table.assign(_h=length_table["haul_id"].map(order), _s=length_table["species"].map(sp_order))
        .sort_values(["_h", "_s", "length_mm"], kind="stable")
        .drop(columns=["_h", "_s"])
        .reset_index(drop=True)
    )

def _measured_lengths(
    rng: np.random.Generator,
    class_counts: np.ndarray,
    lower: np.ndarray,
    bin_mm: int,
    haul_ids: np.ndarray,
    species: str,
) -> pd.DataFrame:
    """Whole-mm lengths of measured individuals, aggregated: haul_id, species, length_mm, n.

    ``class_counts`` (n_rows, n_classes) holds the measured individuals per length class.
    """
    rows, cls = np.nonzero(class_counts)
    reps = class_counts[rows, cls]
    fish_row = np.repeat(rows, reps)
    fish_len = np.repeat(lower[cls], reps) + rng.integers(0, bin_mm, size=int(reps.sum()))
    frame = pd.DataFrame({"haul_id": haul_ids[fish_row], "length_mm": fish_len})
    out = frame.groupby(["haul_id", "length_mm"], sort=False).size().rename("n").reset_index()
    out.insert(1, "species", species)
    return out


# --------------------------------------------------------------------------------------------
# Calibration study
# --------------------------------------------------------------------------------------------


@dataclass
class SimulatedStudy:
    """A simulated calibration study: input tables plus the truth that generated them.

    hauls, catches, lengths : tables in the input formats of design section 3 (catches holds only
        rows with count > 0; lengths is None unless lengths were simulated).
    theta : DataFrame (index gear, columns species), log(q_gear / q_reference); reference row 0.
    factors : exp(-theta), i.e. cpue_reference / cpue_gear.
    kappa : Series per species (inf for ``"none"``, NaN for ``"lognormal"``).
    theta_length : long DataFrame (species, gear, length_mm = class lower bound, bin_mm, share =
        reference-gear class probability, theta, factor) or None.
    density : DataFrame (index pair_id, columns species), the group's expected reference-gear count
        per ``density_effort`` units of effort.
    counts : int array (n_groups, n_gears, n_species), summed count of each gear in each group.
    group_effort : float array (n_groups, n_gears), summed effort (0 where the gear is absent).
    present : bool array (n_groups, n_gears).
    settings : the arguments that matter for reproduction.
    """

    hauls: pd.DataFrame
    catches: pd.DataFrame
    lengths: pd.DataFrame | None
    gears: list[str]
    species: list[str]
    groups: list[str]
    theta: pd.DataFrame
    factors: pd.DataFrame
    kappa: pd.Series
    theta_length: pd.DataFrame | None
    density: pd.DataFrame
    counts: np.ndarray
    group_effort: np.ndarray
    present: np.ndarray
    settings: dict = field(default_factory=dict)

    @property
    def reference(self) -> str:
        return self.gears[0]

    def truth_table(self) -> pd.DataFrame:
        """One row per non-reference gear x species: species, gear, reference, theta, factor, kappa."""
        rows = []
        for gear in self.gears[1:]:
            for s in self.species:
                rows.append(
                    {
                        "species": s,
                        "gear": gear,
                        "reference": self.reference,
                        "theta": float(self.theta.loc[gear, s]),
                        "factor": float(self.factors.loc[gear, s]),
                        "kappa": float(self.kappa[s]),
                    }
                )
        return pd.DataFrame(rows)

    def to_cells(self):
        """The study as :class:`calib.cells.Cells` (one cell per group x species with total > 0)."""
        from calib.cells import cells_from_arrays

        n_groups, n_gears, n_species = self.counts.shape
        counts = self.counts.transpose(0, 2, 1).reshape(-1, n_gears)
        present = np.repeat(self.present, n_species, axis=0)
        effort = np.repeat(self.group_effort, n_species, axis=0)
        cell_group = np.repeat(np.arange(n_groups), n_species)
        cell_species = np.tile(np.arange(n_species), n_groups)
        return cells_from_arrays(counts, present, effort, cell_group, cell_species, self.gears, self.species)


def _rng(seed) -> np.random.Generator:
    return seed if isinstance(seed, np.random.Generator) else np.random.default_rng(seed)


def _draw_effort(rng, spec, n_hauls: int, haul_group: np.ndarray, gear: str) -> np.ndarray:
    """Effort of each haul of one gear: scalar, (low, high) uniform, or per-group array."""
    if spec is None:
        return np.ones(n_hauls)
    if isinstance(spec, tuple) and len(spec) == 2:
        low, high = float(spec[0]), float(spec[1])
        if not 0 < low <= high:
            raise ValueError(f"effort range for {gear!r} must satisfy 0 < low <= high")
        return rng.uniform(low, high, size=n_hauls)
    arr = np.asarray(spec, dtype=float)
    if arr.ndim == 0:
        return np.full(n_hauls, float(arr))
    return arr[haul_group]


def simulate_calibration(
    n_groups: int,
    gears: Sequence[str],
    theta,
    log_density_mean,
    kappa=None,
    patchiness: str = "gamma",
    effort: Mapping[str, object] | None = None,
    seed: int | np.random.Generator = 0,
    group_gears: Sequence[Sequence[str]] | None = None,
    *,
    species: Sequence[str] | None = None,
    log_density_sd=1.0,
    tow_sd: float = 1.0,
    hauls_per_gear: Mapping[str, object] | None = None,
    theta_offset: np.ndarray | None = None,
    effort_unit: str | Mapping[str, str] | None = None,
    effort_decimals: int | None = None,
    density_effort: float | None = None,
    group_covariates: pd.DataFrame | None = None,
    lengths: LengthSpec | None = None,
    id_prefix: str = "G",
    start_date: str = "2024-04-01",
    season_days: int = 180,
) -> SimulatedStudy:
    """Simulate a calibration study (paired tows or side-by-side deployments).

    Parameters
    ----------
    n_groups : number of calibration groups (pair_ids).
    gears : gear names, the reference gear first.
    theta : log(q_gear / q_reference) per gear x species (dimensionless): an array
        (n_gears, n_species) or (n_gears - 1, n_species), or a mapping gear -> per-species values.
        The factor is exp(-theta).
    log_density_mean : per species, log of the expected reference-gear count per
        ``density_effort`` units of effort (the centre of the between-group spread).
        A mapping species -> value also names the species.
    kappa : per species, gamma patchiness (larger = less patchy); default 2.0. Used by "gamma" only.
    patchiness : "gamma" (Dirichlet-multinomial split, the default model), "lognormal" or "none".
    effort : mapping gear -> effort per haul: a number, a (low, high) tuple drawn uniformly per
        haul, or an array (n_groups,) giving each haul of the gear in group i its value. Default:
        every haul has effort 1 (unit "haul").
    seed : int seed or a numpy Generator (the only source of randomness).
    group_gears : per group, the gears that fished in it (default: all gears in every group);
        e.g. A-B and B-C groups with no A-C group, or 3-gear groups.
    species : species names (default from ``log_density_mean`` or species_1, species_2, ...).
    log_density_sd : per species, between-group sd of log density (0 = same density everywhere).
    tow_sd : sd of the normal tow effect on the log scale ("lognormal" only).
    hauls_per_gear : mapping gear -> hauls of that gear in each group where it fished (an int or an
        array (n_groups,)); several hauls are summed by the program (counts and effort).
    theta_offset : optional array (n_groups, n_gears) or (n_groups, n_gears, n_species) added to
        theta in each group (e.g. a day/night effect); the reported truth is theta without it.
    effort_unit : unit label, one for all gears or a mapping per gear (default "m2" when ``effort``
        is given, else "haul").
    effort_decimals : round drawn efforts to this many decimals before simulating counts.
    density_effort : effort units that ``log_density_mean`` refers to (default: mean haul effort).
    group_covariates : optional DataFrame with n_groups rows whose columns are copied to every haul
        of the group (e.g. date, site, stratum, depth_m); "date" and "site" override the defaults.
    lengths : optional :class:`LengthSpec`; adds a lengths table and ``theta_length``.
    id_prefix : pair_id is id_prefix + zero-padded group number; haul_id is pair_id-gear[-k].
    start_date, season_days : default dates are drawn uniformly in this many days from start_date.

    Returns
    -------
    SimulatedStudy with hauls, catches (count > 0 rows only), lengths and the truth.
    """
    if patchiness not in PATCHINESS:
        raise ValueError(f"patchiness must be one of {PATCHINESS}, got {patchiness!r}")
    rng = _rng(seed)
    gears = [str(g) for g in gears]
    if len(set(gears)) != len(gears) or len(gears) < 1:
        raise ValueError("gears must be distinct names, the reference first")
    species = _species_names(species, log_density_mean)
    n_g, n_s = len(gears), len(species)
    theta_gs = _theta_array(theta, gears, species)
    mu = _per_species(log_density_mean, species, "log_density_mean")
    sd = _per_species(log_density_sd, species, "log_density_sd")
    kap = _per_species(kappa, species, "kappa", default=2.0)
    if patchiness == "gamma" and np.any(kap <= 0):
        raise ValueError("kappa must be > 0")

    # Which gears fished in which group, and how many hauls each.
    if group_gears is None:
        present = np.ones((n_groups, n_g), dtype=bool)
    else:
        if len(group_gears) != n_groups:
            raise ValueError("group_gears needs one entry per group")
        present = np.zeros((n_groups, n_g), dtype=bool)
        for i, gs in enumerate(group_gears):
            for gname in gs:
                if gname not in gears:
                    raise ValueError(f"group_gears[{i}] names an unknown gear {gname!r}")
                present[i, gears.index(gname)] = True
    n_hauls = present.astype(int)
    for gname, val in (hauls_per_gear or {}).items():
        if gname not in gears:
            raise ValueError(f"hauls_per_gear names an unknown gear {gname!r}")
        g = gears.index(gname)
        n_hauls[:, g] = present[:, g] * np.broadcast_to(np.asarray(val, dtype=int), (n_groups,))
    present = n_hauls > 0
    if np.any(present.sum(axis=1) == 0):
        raise ValueError("every group needs at least one gear")

    # Haul layout (group-major, gear order, then haul number).
    gi_grid, g_grid = np.meshgrid(np.arange(n_groups), np.arange(n_g), indexing="ij")
    haul_group = np.repeat(gi_grid.ravel(), n_hauls.ravel())
    haul_gear = np.repeat(g_grid.ravel(), n_hauls.ravel())
    haul_k = np.concatenate([np.arange(k) for k in n_hauls.ravel()]) if n_hauls.sum() else np.array([], int)
    n_h = len(haul_group)

    haul_effort = np.empty(n_h)
    for g, gname in enumerate(gears):
        sel = haul_gear == g
        spec = None if effort is None else effort.get(gname)
        haul_effort[sel] = _draw_effort(rng, spec, int(sel.sum()), haul_group[sel], gname)
    if effort_decimals is not None:
        haul_effort = np.round(haul_effort, effort_decimals)
    if np.any(haul_effort <= 0):
        raise ValueError("effort must be > 0")
    group_effort = np.zeros((n_groups, n_g))
    np.add.at(group_effort, (haul_group, haul_gear), haul_effort)
    ebar = group_effort.sum(axis=1) / present.sum(axis=1)
    rel_effort = haul_effort / ebar[haul_group]  # e_h / ebar_i

    if density_effort is None:
        density_effort = float(haul_effort.mean())
    log_d = mu[None, :] + sd[None, :] * rng.standard_normal((n_groups, n_s))
    per_unit = np.exp(log_d) / density_effort  # D_is, reference count per unit effort
    lam = per_unit * ebar[:, None]  # lambda_is, reference count per group-mean effort

    th = np.broadcast_to(theta_gs[haul_gear], (n_h, n_s)).copy()
    if theta_offset is not None:
        off = np.asarray(theta_offset, dtype=float)
        if off.ndim == 2:
            off = off[:, :, None]
        th = th + np.broadcast_to(off, (n_groups, n_g, n_s))[haul_group, haul_gear]

    grid = _length_grid(lengths, gears, species) if lengths is not None else None
    by_class = grid is not None and lengths.patchiness_level == "length_class"
    length_frames: list[pd.DataFrame] = []

    def draw(lam_scale, rate_mean, k, size):
        """Counts with expectation lam_scale * rate_mean (see the module docstring).

        gamma: the catch rate has mean rate_mean and shape k * rate_mean (rate k)."""
        if patchiness == "gamma":
            rate = rng.gamma(shape=k * rate_mean, scale=1.0 / k, size=size)
            return rng.poisson(lam_scale * rate)
        if patchiness == "lognormal":
            return rng.poisson(lam_scale * rate_mean * np.exp(tow_sd * rng.standard_normal(size)))
        return rng.poisson(lam_scale * rate_mean)

    if not by_class:
        count = draw(lam[haul_group], rel_effort[:, None] * np.exp(th), kap[None, :], (n_h, n_s))
    else:
        count = np.zeros((n_h, n_s), dtype=np.int64)
        class_counts = []
        for s in range(n_s):
            p, d = grid.share[s], grid.delta[s]
            rate_mean = rel_effort[:, None] * np.exp(th[:, [s]] + d[haul_gear])
            y = draw(lam[haul_group, s][:, None] * p[None, :], rate_mean, kap[s], rate_mean.shape)
            class_counts.append(y)
            count[:, s] = y.sum(axis=1)
    count = count.astype(np.int64)

    # Group-level covariates and tables.
    width = max(3, len(str(n_groups)))
    groups = [f"{id_prefix}{i + 1:0{width}d}" for i in range(n_groups)]
    pair_arr = np.asarray(groups, dtype=object)[haul_group]
    gear_arr = np.asarray(gears, dtype=object)[haul_gear]
    suffix = np.where(n_hauls[haul_group, haul_gear] > 1, np.char.add("-", (haul_k + 1).astype(str)), "")
    haul_ids = np.array([f"{p}-{g}{x}" for p, g, x in zip(pair_arr, gear_arr, suffix)], dtype=object)
    if group_covariates is not None and len(group_covariates) != n_groups:
        raise ValueError("group_covariates needs one row per group")
    cov = group_covariates.reset_index(drop=True) if group_covariates is not None else pd.DataFrame(index=range(n_groups))
    if "date" in cov:
        dates = pd.to_datetime(cov["date"]).dt.strftime("%Y-%m-%d").to_numpy()
    else:
        day = rng.integers(0, season_days, size=n_groups)
        dates = (pd.Timestamp(start_date) + pd.to_timedelta(day, unit="D")).strftime("%Y-%m-%d").to_numpy()
    if isinstance(effort_unit, Mapping):
        unit_of = [effort_unit[g] for g in gears]
    else:
        unit_of = [effort_unit or ("m2" if effort is not None else "haul")] * n_g
    hauls = pd.DataFrame(
        {
            "haul_id": haul_ids,
            "gear": gear_arr,
            "date": np.asarray(dates, dtype=object)[haul_group],
            "effort": haul_effort,
            "effort_unit": np.asarray(unit_of, dtype=object)[haul_gear],
            "pair_id": pair_arr,
            "site": cov["site"].to_numpy()[haul_group] if "site" in cov else pair_arr,
        }
    )
    for col in cov.columns:
        if col not in ("date", "site"):
            hauls[col] = cov[col].to_numpy()[haul_group]

    hi, si = np.nonzero(count)
    catches = pd.DataFrame(
        {"haul_id": haul_ids[hi], "species": np.asarray(species, dtype=object)[si], "count": count[hi, si]}
    )

    length_table = None
    theta_length = None
    if grid is not None:
        for s in range(n_s):
            rows = np.nonzero(count[:, s])[0]
            m = np.minimum(count[rows, s], int(lengths.n_measured))
            if by_class:
                full = class_counts[s][rows]
                measured = np.zeros_like(full)
                for r in range(len(rows)):
                    if m[r] == full[r].sum():
                        measured[r] = full[r]
                    else:
                        measured[r] = rng.multivariate_hypergeometric(full[r], int(m[r]))
            else:
                # The measured individuals are a random subsample of iid catch-at-length draws.
                pi = grid.share[s][None, :] * np.exp(grid.delta[s])  # (n_gears, n_classes)
                pi = pi / pi.sum(axis=1, keepdims=True)
                measured = rng.multinomial(m, pi[haul_gear[rows]])
            length_frames.append(
                _measured_lengths(rng, measured, grid.lower[s], grid.bin_mm, haul_ids[rows], species[s])
            )
        length_table = pd.concat(length_frames, ignore_index=True) if length_frames else pd.DataFrame(
            columns=["haul_id", "species", "length_mm", "n"]
        )
        length_table = _in_haul_order(length_table, haul_ids, species)
        rows = []
        for s in range(n_s):
            for g in range(n_g):
                th_l = theta_gs[g, s] + grid.delta[s][g]
                for k, lo in enumerate(grid.lower[s]):
                    rows.append((species[s], gears[g], int(lo), grid.bin_mm, grid.share[s][k], th_l[k], math.exp(-th_l[k])))
        theta_length = pd.DataFrame(rows, columns=["species", "gear", "length_mm", "bin_mm", "share", "theta", "factor"])

    counts_g = np.zeros((n_groups, n_g, n_s), dtype=np.int64)
    np.add.at(counts_g, (haul_group, haul_gear), count)
    theta_df = pd.DataFrame(theta_gs, index=pd.Index(gears, name="gear"), columns=species)
    if patchiness == "gamma":
        kappa_truth = kap
    elif patchiness == "none":
        kappa_truth = np.full(n_s, np.inf)
    else:
        kappa_truth = np.full(n_s, np.nan)
    return SimulatedStudy(
        hauls=hauls,
        catches=catches,
        lengths=length_table,
        gears=gears,
        species=species,
        groups=groups,
        theta=theta_df,
        factors=np.exp(-theta_df),
        kappa=pd.Series(kappa_truth, index=species, name="kappa"),
        theta_length=theta_length,
        density=pd.DataFrame(np.exp(log_d), index=pd.Index(groups, name="pair_id"), columns=species),
        counts=counts_g,
        group_effort=group_effort,
        present=present,
        settings={
            "patchiness": patchiness,
            "tow_sd": tow_sd if patchiness == "lognormal" else None,
            "density_effort": density_effort,
            "log_density_sd": sd.tolist(),
            "length_patchiness_level": None if lengths is None else lengths.patchiness_level,
        },
    )


# --------------------------------------------------------------------------------------------
# Survey records
# --------------------------------------------------------------------------------------------


@dataclass
class SimulatedSurvey:
    """Simulated survey catches for a given set of hauls, with the true density behind them.

    catches : haul_id, species, count (count > 0 rows only).
    lengths : haul_id, species, length_mm, n, or None.
    true_density : stratum, year, species, density = expected reference-gear count per
        ``density_effort`` units of effort in that stratum and year.
    """

    catches: pd.DataFrame
    lengths: pd.DataFrame | None
    true_density: pd.DataFrame


def simulate_survey(
    hauls: pd.DataFrame,
    gears: Sequence[str],
    theta,
    stratum_log_density: pd.DataFrame,
    kappa=0.6,
    trend=0.0,
    year_effect_sd: float = 0.0,
    base_year: int | None = None,
    density_effort: float = 1.0,
    patchiness: str = "gamma",
    tow_sd: float = 1.0,
    lengths: LengthSpec | None = None,
    seed: int | np.random.Generator = 0,
) -> SimulatedSurvey:
    """Simulate catches for plain survey hauls (no pair_id) laid out by the caller.

    Parameters
    ----------
    hauls : DataFrame with haul_id, gear, date, effort, stratum (other columns are ignored).
    gears, theta : as in :func:`simulate_calibration` (reference first, theta = log q_g / q_ref).
    stratum_log_density : DataFrame, index stratum, columns species: log expected reference-gear
        count per ``density_effort`` units of effort in ``base_year`` (before the year effect).
    kappa : per species, gamma shape of the haul-to-haul spread (mean-1 gamma multiplier on the
        expected count; smaller = patchier). "lognormal" uses tow_sd instead; "none" is Poisson.
    trend : per species, true change of log density per year (e.g. -0.05 = about -4.9 % a year).
    year_effect_sd : sd of a normal log-density effect per species x year, shared by all strata.
    base_year : year at which the trend is zero (default: first year in hauls).
    density_effort : effort units the densities refer to (e.g. 1000 for "per 1000 m2").
    lengths : optional LengthSpec (patchiness_level is ignored: lengths follow the gear's
        catch-at-length distribution).
    seed : int or numpy Generator.
    """
    if patchiness not in PATCHINESS:
        raise ValueError(f"patchiness must be one of {PATCHINESS}, got {patchiness!r}")
    rng = _rng(seed)
    gears = [str(g) for g in gears]
    species = [str(s) for s in stratum_log_density.columns]
    n_s = len(species)
    theta_gs = _theta_array(theta, gears, species)
    kap = _per_species(kappa, species, "kappa")
    slope = _per_species(trend, species, "trend")
    gear_idx = hauls["gear"].map({g: k for k, g in enumerate(gears)})
    if gear_idx.isna().any():
        raise ValueError(f"hauls use gears not in gears: {sorted(set(hauls['gear']) - set(gears))}")
    gear_idx = gear_idx.to_numpy(dtype=int)
    years_of_haul = pd.to_datetime(hauls["date"]).dt.year.to_numpy()
    years = np.arange(years_of_haul.min(), years_of_haul.max() + 1)
    base = int(years[0] if base_year is None else base_year)
    year_eff = year_effect_sd * rng.standard_normal((len(years), n_s))
    strata = list(stratum_log_density.index)
    missing = set(hauls["stratum"]) - set(strata)
    if missing:
        raise ValueError(f"stratum_log_density has no row for strata {sorted(missing)}")

    log_dens = (
        stratum_log_density.to_numpy(dtype=float)[:, None, :]
        + slope[None, None, :] * (years - base)[None, :, None]
        + year_eff[None, :, :]
    )  # (stratum, year, species)
    st = hauls["stratum"].map({s: k for k, s in enumerate(strata)}).to_numpy(dtype=int)
    yr = years_of_haul - years[0]
    effort = hauls["effort"].to_numpy(dtype=float)
    mean = np.exp(log_dens[st, yr]) * (effort / density_effort)[:, None] * np.exp(theta_gs[gear_idx])
    if patchiness == "gamma":
        mean = mean * rng.gamma(shape=kap[None, :], scale=1.0 / kap[None, :], size=mean.shape)
    elif patchiness == "lognormal":
        mean = mean * np.exp(tow_sd * rng.standard_normal(mean.shape))
    count = rng.poisson(mean).astype(np.int64)

    haul_ids = hauls["haul_id"].to_numpy(dtype=object)
    hi, si = np.nonzero(count)
    catches = pd.DataFrame(
        {"haul_id": haul_ids[hi], "species": np.asarray(species, dtype=object)[si], "count": count[hi, si]}
    )
    length_table = None
    if lengths is not None:
        grid = _length_grid(lengths, gears, species)
        frames = []
        for s in range(n_s):
            rows = np.nonzero(count[:, s])[0]
            m = np.minimum(count[rows, s], int(lengths.n_measured))
            pi = grid.share[s][None, :] * np.exp(grid.delta[s])
            pi = pi / pi.sum(axis=1, keepdims=True)
            measured = rng.multinomial(m, pi[gear_idx[rows]])
            frames.append(_measured_lengths(rng, measured, grid.lower[s], grid.bin_mm, haul_ids[rows], species[s]))
        length_table = pd.concat(frames, ignore_index=True)
        length_table = _in_haul_order(length_table, haul_ids, species)
    k_st, k_yr, k_sp = np.meshgrid(np.arange(len(strata)), np.arange(len(years)), np.arange(n_s), indexing="ij")
    true_density = pd.DataFrame(
        {
            "stratum": np.asarray(strata, dtype=object)[k_st.ravel()],
            "year": years[k_yr.ravel()],
            "species": np.asarray(species, dtype=object)[k_sp.ravel()],
            "density": np.exp(log_dens.ravel()),
        }
    )
    return SimulatedSurvey(catches=catches, lengths=length_table, true_density=true_density)


# --------------------------------------------------------------------------------------------
# Unpaired side-by-side study (sites x periods)
# --------------------------------------------------------------------------------------------


@dataclass
class SimulatedSideBySide:
    """A simulated side-by-side study: input tables plus the truth that generated them.

    hauls : haul_id, gear, date, effort, effort_unit, pair_id (blank unless ``paired``), site,
        and ``period`` when asked for. catches : count > 0 rows only.
    theta : DataFrame (index gear, columns species), log(q_gear / q_reference); reference row 0.
    factors : exp(-theta).
    log_density : DataFrame (index site-period label "site | period", columns species): log of
        the expected reference-gear count per unit of effort at that site-period.
    dispersion : Series per species: negative-binomial shape (``"negative-binomial"``), gamma
        kappa (``"gamma"``) or inf (``"none"``).
    count : int array (n_hauls, n_species) in the hauls' order.
    """

    hauls: pd.DataFrame
    catches: pd.DataFrame
    gears: list[str]
    species: list[str]
    site_periods: list[str]
    theta: pd.DataFrame
    factors: pd.DataFrame
    log_density: pd.DataFrame
    dispersion: pd.Series
    count: np.ndarray
    haul_cell: np.ndarray
    settings: dict = field(default_factory=dict)

    @property
    def reference(self) -> str:
        return self.gears[0]

    def truth_table(self) -> pd.DataFrame:
        """One row per non-reference gear x species: species, gear, reference, theta, factor."""
        return pd.DataFrame([
            {"species": s, "gear": g, "reference": self.reference, "theta": float(self.theta.loc[g, s]),
             "factor": float(self.factors.loc[g, s])}
            for g in self.gears[1:] for s in self.species
        ])

    def to_data(self):
        """The study as :class:`calib.site_periods.SitePeriodData` (every haul x species observed)."""
        from calib.site_periods import from_arrays

        gear_index = {g: i for i, g in enumerate(self.gears)}
        unit = self.hauls.drop_duplicates("gear").set_index("gear")["effort_unit"].to_dict()
        return from_arrays(self.count, self.hauls["gear"].map(gear_index).to_numpy(), self.haul_cell,
                           self.hauls["effort"].to_numpy(dtype=float), self.gears, self.species,
                           site_periods=self.site_periods, haul_ids=list(self.hauls["haul_id"]),
                           effort_unit={g: unit[g] for g in self.gears})


def simulate_side_by_side(
    n_sites: int,
    n_periods: int,
    gears: Sequence[str],
    theta,
    log_density_mean,
    *,
    species: Sequence[str] | None = None,
    site_period_sd=1.0,
    patchiness: str = "negative-binomial",
    dispersion=2.0,
    hauls_per_gear: int | Mapping[str, object] = 2,
    gear_presence: Mapping[str, float] | None = None,
    cell_gears: Sequence[Sequence[str]] | None = None,
    effort: Mapping[str, object] | None = None,
    effort_unit: str | Mapping[str, str] | None = None,
    paired: bool = False,
    pair_sd: float = 0.0,
    period_column: bool = False,
    start_month: str = "2024-01",
    seed: int | np.random.Generator = 0,
) -> SimulatedSideBySide:
    """Simulate a side-by-side study: gears fishing the same sites in the same months.

    Site-period c (site x month) has log density b_cs = log_density_mean_s + site_period_sd_s * z,
    z ~ Normal(0, 1) (log expected reference-gear count per unit effort). Haul h of gear g there,
    with effort e_h, catches

        y_hs ~ Poisson(exp(b_cs) * e_h * exp(theta_gs) * exp(delta_h,s) * gamma_hs)

    with delta the pair's log density offset (``paired`` only, Normal(0, pair_sd), shared by the
    hauls of one pair) and gamma the haul's patchiness:

    - ``"negative-binomial"``: gamma ~ Gamma(shape phi_s, rate phi_s) (mean 1), so y is negative
      binomial with shape phi_s = ``dispersion`` (the side-by-side model's own likelihood);
    - ``"gamma"``: gamma ~ Gamma(shape kappa_s * w_h * exp(theta_gs), rate kappa_s) / (w_h exp(theta_gs)),
      w_h = e_h / mean effort of the gears in the pair (or site-period), kappa_s = ``dispersion``:
      the paired model's tow model, under which each pair's split is Dirichlet-multinomial;
    - ``"none"``: gamma = 1 (Poisson).

    Parameters
    ----------
    n_sites, n_periods : sites S01, S02, ... and consecutive months from ``start_month``.
    gears : gear names, the reference first. theta : as in :func:`simulate_calibration`.
    log_density_mean, site_period_sd : per species (scalar, sequence or mapping).
    dispersion : per species, phi (negative binomial) or kappa (gamma).
    hauls_per_gear : hauls of each gear in each site-period it fished: an int, or a mapping gear ->
        int or (low, high) drawn uniformly (inclusive) per site-period. With ``paired`` every gear
        makes the same number of hauls in a site-period (the first gear's), one per pair.
    gear_presence : mapping gear -> probability that the gear fished a site-period (default 1);
        site-periods where no gear was drawn get the reference.
    cell_gears : per site-period (site-major order), the gears that fished it (overrides
        gear_presence), e.g. for networks where two gears never met.
    effort : mapping gear -> number or (low, high) per haul (default 1, unit "haul").
    effort_unit : one label or a mapping per gear (default "m2" with ``effort``, else "haul").
    paired : give the hauls pair_ids (one haul of every gear present per pair).
    pair_sd : sd of the pairs' log density offset around their site-period's.
    period_column : add a ``period`` column (the month label, "P01", "P02", ...).
    seed : int or numpy Generator (the only source of randomness).
    """
    if patchiness not in ("negative-binomial", "gamma", "none"):
        raise ValueError("patchiness must be 'negative-binomial', 'gamma' or 'none'")
    rng = _rng(seed)
    gears = [str(g) for g in gears]
    species = _species_names(species, log_density_mean)
    n_g, n_s = len(gears), len(species)
    theta_gs = _theta_array(theta, gears, species)
    mu = _per_species(log_density_mean, species, "log_density_mean")
    sd = _per_species(site_period_sd, species, "site_period_sd")
    disp = _per_species(dispersion, species, "dispersion")
    if patchiness != "none" and np.any(disp <= 0):
        raise ValueError("dispersion must be > 0")

    sites = [f"S{i + 1:02d}" for i in range(n_sites)]
    months = pd.period_range(pd.Period(start_month, freq="M"), periods=n_periods, freq="M")
    n_c = n_sites * n_periods
    cell_site = np.repeat(np.arange(n_sites), n_periods)
    cell_month = np.tile(np.arange(n_periods), n_sites)
    labels = [f"{sites[a]} | {months[m].strftime('%Y-%m')}" for a, m in zip(cell_site, cell_month)]

    if cell_gears is not None:
        if len(cell_gears) != n_c:
            raise ValueError(f"cell_gears needs one entry per site-period ({n_c})")
        present = np.array([[g in set(gs) for g in gears] for gs in cell_gears], dtype=bool)
    else:
        prob = np.array([float((gear_presence or {}).get(g, 1.0)) for g in gears])
        present = rng.uniform(size=(n_c, n_g)) < prob[None, :]
        present[present.sum(axis=1) == 0, 0] = True
    n_hauls = np.zeros((n_c, n_g), dtype=int)
    for g, gname in enumerate(gears):
        spec = hauls_per_gear.get(gname, 1) if isinstance(hauls_per_gear, Mapping) else hauls_per_gear
        if isinstance(spec, tuple):
            n_hauls[:, g] = rng.integers(int(spec[0]), int(spec[1]) + 1, size=n_c)
        else:
            n_hauls[:, g] = int(spec)
    if paired:
        first = n_hauls[np.arange(n_c), np.argmax(present, axis=1)]
        n_hauls = np.repeat(first[:, None], n_g, axis=1)
    n_hauls = np.where(present, n_hauls, 0)

    c_grid, g_grid = np.meshgrid(np.arange(n_c), np.arange(n_g), indexing="ij")
    haul_cell = np.repeat(c_grid.ravel(), n_hauls.ravel())
    haul_gear = np.repeat(g_grid.ravel(), n_hauls.ravel())
    haul_k = np.concatenate([np.arange(k) for k in n_hauls.ravel()]).astype(int)
    n_h = len(haul_cell)
    haul_effort = np.ones(n_h)
    for g, gname in enumerate(gears):
        sel = haul_gear == g
        haul_effort[sel] = _draw_effort(rng, None if effort is None else effort.get(gname), int(sel.sum()),
                                        haul_cell[sel], gname)

    log_b = mu[None, :] + sd[None, :] * rng.standard_normal((n_c, n_s))
    unit_key = haul_cell * 10_000 + haul_k  # the pair (paired) or the site-period (unpaired)
    if not paired:
        unit_key = haul_cell.copy()
    _, unit = np.unique(unit_key, return_inverse=True)
    delta = pair_sd * rng.standard_normal((unit.max() + 1, n_s)) if paired else np.zeros((unit.max() + 1, n_s))
    mean = np.exp(log_b[haul_cell] + delta[unit]) * haul_effort[:, None] * np.exp(theta_gs[haul_gear])
    if patchiness == "negative-binomial":
        mean = mean * rng.gamma(disp[None, :], 1.0 / disp[None, :], size=mean.shape)
    elif patchiness == "gamma":
        unit_effort = np.bincount(unit, weights=haul_effort) / np.bincount(unit)
        rel = (haul_effort / unit_effort[unit])[:, None] * np.exp(theta_gs[haul_gear])
        mean = mean / rel * rng.gamma(disp[None, :] * rel, 1.0 / disp[None, :])
    count = rng.poisson(mean).astype(np.int64)

    site_arr = np.asarray(sites, dtype=object)[cell_site[haul_cell]]
    month_arr = months[cell_month[haul_cell]]
    day = rng.integers(1, 29, size=n_h)
    dates = [f"{m.strftime('%Y-%m')}-{d:02d}" for m, d in zip(month_arr, day)]
    haul_ids = np.array([f"{s}-{m.strftime('%Y%m')}-{gears[g]}-{k + 1}"
                         for s, m, g, k in zip(site_arr, month_arr, haul_gear, haul_k)], dtype=object)
    if isinstance(effort_unit, Mapping):
        unit_of = [effort_unit[g] for g in gears]
    else:
        unit_of = [effort_unit or ("m2" if effort is not None else "haul")] * n_g
    hauls = pd.DataFrame({
        "haul_id": haul_ids,
        "gear": np.asarray(gears, dtype=object)[haul_gear],
        "date": dates,
        "effort": haul_effort,
        "effort_unit": np.asarray(unit_of, dtype=object)[haul_gear],
        "pair_id": [f"{s}-{m.strftime('%Y%m')}-P{k + 1}" for s, m, k in zip(site_arr, month_arr, haul_k)]
        if paired else [""] * n_h,
        "site": site_arr,
    })
    if period_column:
        hauls["period"] = [f"P{m + 1:02d}" for m in cell_month[haul_cell]]
    hi, si = np.nonzero(count)
    catches = pd.DataFrame({"haul_id": haul_ids[hi], "species": np.asarray(species, dtype=object)[si],
                            "count": count[hi, si]})
    theta_df = pd.DataFrame(theta_gs, index=pd.Index(gears, name="gear"), columns=species)
    return SimulatedSideBySide(
        hauls=hauls, catches=catches, gears=gears, species=species, site_periods=labels,
        theta=theta_df, factors=np.exp(-theta_df),
        log_density=pd.DataFrame(log_b, index=pd.Index(labels, name="site_period"), columns=species),
        dispersion=pd.Series(np.full(n_s, np.inf) if patchiness == "none" else disp, index=species),
        count=count, haul_cell=haul_cell,
        settings={"patchiness": patchiness, "paired": paired, "pair_sd": pair_sd,
                  "site_period_sd": sd.tolist()},
    )


# --------------------------------------------------------------------------------------------
# The demo scenario (invented): Quillmarsh Estuary
# --------------------------------------------------------------------------------------------

DEMO_SEED = 20140417
DEMO_REFERENCE = "otter_trawl_new"
DEMO_GEARS = ("otter_trawl_new", "otter_trawl_old", "beach_seine")
DEMO_DENSITY_EFFORT = 1000.0  # densities are per 1000 m2 swept by the reference trawl

# species, scientific name, group,
# channel and shallow-flat density (expected otter_trawl_new catch per 1000 m2, median over groups),
# between-group sd of log density,
# theta of otter_trawl_old and beach_seine (log q_gear / q_otter_trawl_new, per m2 swept),
# kappa in trawl-trawl pairs and in seine-trawl groups, trend (log change per year),
# median length (mm), length cv.
_DEMO_TABLE = [
    ("pinfish", "Lagodon rhomboides", "fish", 8.0, 10.0, 1.2, -0.20, 0.90, 3.0, 1.5, 0.0, 65, 0.35),
    ("silver perch", "Bairdiella chrysoura", "fish", 3.0, 1.0, 1.2, -0.15, 0.40, 3.0, 1.5, 0.0, 75, 0.35),
    ("mummichog", "Fundulus heteroclitus", "fish", 0.1, 1.5, 1.2, -0.10, 2.10, 2.0, 1.0, 0.0, 50, 0.30),
    ("striped mullet", "Mugil cephalus", "fish", 0.3, 1.0, 1.2, -0.30, 1.80, 1.5, 0.8, 0.0, 70, 0.35),
    ("Atlantic silverside", "Menidia menidia", "fish", 1.5, 4.0, 1.5, -0.25, 2.50, 1.5, 0.8, 0.0, 60, 0.25),
    ("Atlantic menhaden", "Brevoortia tyrannus", "fish", 2.0, 2.0, 1.8, -0.35, 1.40, 0.8, 0.5, 0.0, 55, 0.30),
    ("spotted seatrout", "Cynoscion nebulosus", "fish", 0.15, 0.2, 1.2, -0.20, 0.30, 3.0, 1.5, 0.0, 130, 0.45),
    ("southern flounder", "Paralichthys lethostigma", "fish", 0.25, 0.2, 1.2, -0.50, -0.70, 4.0, 2.0, -0.05, 120, 0.45),
    ("hogchoker", "Trinectes maculatus", "fish", 1.5, 0.3, 1.2, -0.45, -0.90, 4.0, 2.0, 0.0, 75, 0.35),
    ("blue crab", "Callinectes sapidus", "crustacean", 1.2, 1.5, 1.2, -0.40, -0.20, 4.0, 2.0, 0.0, 60, 0.55),
    ("daggerblade grass shrimp", "Palaemon pugio", "crustacean", 6.0, 10.0, 1.2, -0.60, 1.60, 2.5, 1.2, 0.0, 30, 0.20),
    ("pink shrimp", "Penaeus duorarum", "crustacean", 2.5, 1.5, 1.2, -0.35, -0.55, 3.0, 1.5, 0.03, 65, 0.30),
]
DEMO_SPECIES = tuple(row[0] for row in _DEMO_TABLE)
# Length effects (change of theta per sd of length): the legacy trawl's larger mesh lets small
# individuals escape; the seine is relatively better at small sizes.
_DEMO_LENGTH_SLOPE_PER_SD = {"otter_trawl_old": 0.15, "beach_seine": -0.25}
_DEMO_N_MEASURED = {"gear_trials": 30, "survey": 10}
_DEMO_SURVEY_KAPPA = 0.6
_DEMO_YEAR_EFFECT_SD = 0.15
_DEMO_YEARS = (2004, 2025)

# Programs: source -> (name, hauls per year, strata with share of hauls, gear by year, months)
_DEMO_PROGRAMS = {
    "channel_trawl_survey": (
        "Quillmarsh Channel Trawl Survey", 30, {"lower_channel": 18, "upper_channel": 12},
        lambda y: "otter_trawl_old" if y <= 2014 else "otter_trawl_new", (4, 11),
    ),
    "shore_seine_survey": (
        "Quillmarsh Shore Seine Survey", 30, {"north_shore": 15, "south_shore": 15},
        lambda y: "beach_seine", (5, 10),
    ),
    "tidal_creek_survey": (
        "Quillmarsh Tidal Creek Survey", 20, {"creek_flats": 20},
        lambda y: "beach_seine" if y <= 2013 else "otter_trawl_new", (4, 10),
    ),
}
# stratum -> (area km2, habitat kind for densities, per-species multipliers on density)
_DEMO_STRATA = {
    "lower_channel": (14.20, "channel", {}),
    "upper_channel": (9.60, "channel", {"hogchoker": 2.0, "Atlantic menhaden": 1.3, "pink shrimp": 0.6}),
    "north_shore": (3.40, "shallow", {}),
    "south_shore": (2.80, "shallow", {"pinfish": 1.4, "pink shrimp": 1.5, "spotted seatrout": 1.3}),
    "creek_flats": (1.90, "shallow", {"mummichog": 2.0, "daggerblade grass shrimp": 1.5, "southern flounder": 1.2}),
}
# Fictional sites inside a made-up box in the open North Atlantic (34.00-34.20 N, 45.00-45.30 W),
# chosen so the coordinates point to no real place.
_DEMO_SITE_COUNTS = {"lower_channel": 8, "upper_channel": 6, "north_shore": 8, "south_shore": 8, "creek_flats": 6}
_SITE_CODE = {"lower_channel": "LC", "upper_channel": "UC", "north_shore": "NS", "south_shore": "SS", "creek_flats": "CF"}
_SOURCE_CODE = {"channel_trawl_survey": "CT", "shore_seine_survey": "SS", "tidal_creek_survey": "TC"}
_TRAWL_OPENING_M = {"otter_trawl_new": 3.6, "otter_trawl_old": 3.0}  # effective swept width
_SEINE_AREA_M2 = (200, 600)

_N_TRAWL_PAIRS = 140      # 2014 paired-tow experiment, otter_trawl_old beside otter_trawl_new
_N_SEINE_GROUPS = 72      # 2012-2013 side-by-side seine + new trawl at shallow sites
_N_DOUBLE_SEINE = 14      # of which groups with two seine hauls
_N_THREE_GEAR = 8         # of which groups (2013) where the legacy trawl also fished


def _demo_params():
    t = _DEMO_TABLE
    species = [r[0] for r in t]
    p = {
        "species": species,
        "scientific": {r[0]: r[1] for r in t},
        "group": {r[0]: r[2] for r in t},
        "channel": {r[0]: math.log(r[3]) for r in t},
        "shallow": {r[0]: math.log(r[4]) for r in t},
        "log_sd": {r[0]: r[5] for r in t},
        "theta": {"otter_trawl_old": {r[0]: r[6] for r in t}, "beach_seine": {r[0]: r[7] for r in t}},
        "kappa_pairs": {r[0]: r[8] for r in t},
        "kappa_seine": {r[0]: r[9] for r in t},
        "trend": {r[0]: r[10] for r in t},
        "median_mm": {r[0]: r[11] for r in t},
        "cv": {r[0]: r[12] for r in t},
    }
    slope = {
        gear: {s: b * 10.0 / (p["cv"][s] * p["median_mm"][s]) for s in species}
        for gear, b in _DEMO_LENGTH_SLOPE_PER_SD.items()
    }
    p["length_slope_per_10mm"] = slope
    return p


def _demo_lengths(p, n_measured: int, gears) -> LengthSpec:
    slopes = {g: v for g, v in p["length_slope_per_10mm"].items() if g in gears}
    return LengthSpec(
        median_mm=p["median_mm"], cv=p["cv"], slope_per_10mm=slopes,
        n_measured=n_measured, bin_mm=5, patchiness_level="species",
    )


def _demo_sites(rng: np.random.Generator) -> pd.DataFrame:
    rows = []
    # Channel strata lie in the middle of the box, shore/creek strata along its edges.
    boxes = {
        "lower_channel": (34.04, 34.10, 45.06, 45.16),
        "upper_channel": (34.10, 34.17, 45.14, 45.24),
        "north_shore": (34.15, 34.19, 45.02, 45.12),
        "south_shore": (34.01, 34.05, 45.10, 45.22),
        "creek_flats": (34.16, 34.19, 45.20, 45.29),
    }
    habitats = {
        "lower_channel": ["channel"], "upper_channel": ["channel"],
        "north_shore": ["sand", "seagrass"], "south_shore": ["seagrass", "sand"], "creek_flats": ["mud", "sand"],
    }
    for stratum, n in _DEMO_SITE_COUNTS.items():
        lat0, lat1, lon0, lon1 = boxes[stratum]
        kinds = habitats[stratum]
        for k in range(n):
            channel = _DEMO_STRATA[stratum][1] == "channel"
            rows.append(
                {
                    "site": f"{_SITE_CODE[stratum]}{k + 1:02d}",
                    "stratum": stratum,
                    "stratum_area": _DEMO_STRATA[stratum][0],
                    "latitude": round(rng.uniform(lat0, lat1), 4),
                    "longitude": -round(rng.uniform(lon0, lon1), 4),
                    "site_depth": rng.uniform(2.0, 5.5) if channel else rng.uniform(0.5, 1.3),
                    "habitat": kinds[k % len(kinds)],
                }
            )
    return pd.DataFrame(rows)


def _season_temperature(dates: pd.Series, rng) -> np.ndarray:
    doy = pd.to_datetime(dates).dt.day_of_year.to_numpy()
    t = 22.0 + 8.0 * np.sin(2 * np.pi * (doy - 110) / 365.25) + rng.normal(0, 1.2, size=len(doy))
    return np.round(t, 1)


def _random_dates(rng, year: int, months: tuple[int, int], n: int) -> pd.Series:
    start = pd.Timestamp(year=year, month=months[0], day=1)
    end = pd.Timestamp(year=year, month=months[1], day=1) + pd.offsets.MonthEnd(0)
    days = rng.integers(0, (end - start).days + 1, size=n)
    return pd.Series(np.sort(start + pd.to_timedelta(days, unit="D")))


def _group_layout(rng, sites: pd.DataFrame, strata: list[str], n: int, years_months) -> pd.DataFrame:
    """Group covariates: date, site, stratum, stratum_area, depth_m, temperature_c, habitat, source."""
    pool = sites[sites["stratum"].isin(strata)].reset_index(drop=True)
    pick = pool.iloc[rng.integers(0, len(pool), size=n)].reset_index(drop=True)
    dates = []
    per_year = np.array_split(np.arange(n), len(years_months))
    for (year, months), idx in zip(years_months, per_year):
        dates.append(_random_dates(rng, year, months, len(idx)))
    dates = pd.concat(dates, ignore_index=True)
    depth = np.round(np.maximum(0.3, pick["site_depth"].to_numpy() + rng.normal(0, 0.25, size=n)), 1)
    return pd.DataFrame(
        {
            "date": dates.dt.strftime("%Y-%m-%d"),
            "source": "gear_trials",
            "site": pick["site"],
            "stratum": pick["stratum"],
            "stratum_area": pick["stratum_area"],
            "latitude": pick["latitude"],
            "longitude": pick["longitude"],
            "depth_m": depth,
            "temperature_c": _season_temperature(dates, rng),
            "habitat": pick["habitat"],
        }
    )


def _jitter_coordinates(rng, hauls: pd.DataFrame, degrees: float) -> pd.DataFrame:
    out = hauls.copy()
    out["latitude"] = np.round(out["latitude"].to_numpy() + rng.uniform(-degrees, degrees, len(out)), 5)
    out["longitude"] = np.round(out["longitude"].to_numpy() + rng.uniform(-degrees, degrees, len(out)), 5)
    return out


_HAUL_COLUMNS = [
    "haul_id", "gear", "date", "effort", "effort_unit", "pair_id", "source", "site", "stratum",
    "stratum_area", "latitude", "longitude", "depth_m", "temperature_c", "day_night", "habitat",
]


def _demo_all(seed: int = DEMO_SEED) -> dict[str, pd.DataFrame]:
    p = _demo_params()
    species = p["species"]
    streams = [np.random.default_rng(s) for s in np.random.SeedSequence(seed).spawn(6)]
    layout_rng, pairs_rng, seine_rng, survey_layout_rng, survey_rng, jitter_rng = streams
    sites = _demo_sites(layout_rng)

    # 1. Paired tows, 2014: legacy and new otter trawl side by side in the channel.
    pcov = _group_layout(pairs_rng, sites, ["lower_channel", "upper_channel"], _N_TRAWL_PAIRS,
                         [(2014, (4, 11))])
    pcov["day_night"] = np.where(pairs_rng.random(_N_TRAWL_PAIRS) < 0.35, "night", "day")
    distance = pairs_rng.uniform(360, 760, size=_N_TRAWL_PAIRS)  # m towed, shared by the pair
    peffort = {
        g: np.round(_TRAWL_OPENING_M[g] * distance * pairs_rng.uniform(0.95, 1.05, _N_TRAWL_PAIRS))
        for g in ("otter_trawl_new", "otter_trawl_old")
    }
    pairs = simulate_calibration(
        _N_TRAWL_PAIRS, ["otter_trawl_new", "otter_trawl_old"], {"otter_trawl_old": p["theta"]["otter_trawl_old"]},
        p["channel"], kappa=p["kappa_pairs"], patchiness="gamma", effort=peffort, seed=pairs_rng,
        species=species, log_density_sd=p["log_sd"], effort_unit="m2", density_effort=DEMO_DENSITY_EFFORT,
        group_covariates=pcov, lengths=_demo_lengths(p, _DEMO_N_MEASURED["gear_trials"], DEMO_GEARS[:2]), id_prefix="P14-",
    )

    # 2. Side-by-side seine + new trawl at shallow sites, 2012-2013; some with two seine hauls,
    #    a few (2013) with the legacy trawl too.
    n = _N_SEINE_GROUPS
    scov = _group_layout(seine_rng, sites, ["north_shore", "south_shore", "creek_flats"], n,
                         [(2012, (5, 10)), (2013, (5, 10))])
    scov["day_night"] = np.where(seine_rng.random(n) < 0.1, "night", "day")
    two_seines = np.zeros(n, dtype=int) + 1
    two_seines[seine_rng.choice(n, _N_DOUBLE_SEINE, replace=False)] = 2
    three = seine_rng.choice(np.arange(n // 2, n), _N_THREE_GEAR, replace=False)  # 2013 half
    group_gears = [
        ("otter_trawl_new", "otter_trawl_old", "beach_seine") if i in set(three) else ("otter_trawl_new", "beach_seine")
        for i in range(n)
    ]
    dist = seine_rng.uniform(300, 600, size=n)
    seffort = {
        "otter_trawl_new": np.round(_TRAWL_OPENING_M["otter_trawl_new"] * dist * seine_rng.uniform(0.95, 1.05, n)),
        "otter_trawl_old": np.round(_TRAWL_OPENING_M["otter_trawl_old"] * dist * seine_rng.uniform(0.95, 1.05, n)),
        "beach_seine": _SEINE_AREA_M2,
    }
    seine = simulate_calibration(
        n, list(DEMO_GEARS), p["theta"], p["shallow"], kappa=p["kappa_seine"], patchiness="gamma",
        effort=seffort, seed=seine_rng, group_gears=group_gears, species=species, log_density_sd=p["log_sd"],
        hauls_per_gear={"beach_seine": two_seines}, effort_unit="m2", effort_decimals=0,
        density_effort=DEMO_DENSITY_EFFORT, group_covariates=scov,
        lengths=_demo_lengths(p, _DEMO_N_MEASURED["gear_trials"], DEMO_GEARS), id_prefix="S13-",
    )

    # 3. Survey records of three partner programs, no pair_id.
    srows = []
    for source, (_name, per_year, strata_n, gear_of, months) in _DEMO_PROGRAMS.items():
        for year in range(_DEMO_YEARS[0], _DEMO_YEARS[1] + 1):
            k = 0
            for stratum, m in strata_n.items():
                pool = sites[sites["stratum"] == stratum].reset_index(drop=True)
                pick = pool.iloc[survey_layout_rng.integers(0, len(pool), size=m)].reset_index(drop=True)
                dates = _random_dates(survey_layout_rng, year, months, m)
                gear = gear_of(year)
                if gear == "beach_seine":
                    eff = np.round(survey_layout_rng.uniform(*_SEINE_AREA_M2, size=m))
                else:
                    eff = np.round(_TRAWL_OPENING_M[gear] * survey_layout_rng.uniform(360, 760, size=m))
                depth = np.round(np.maximum(0.3, pick["site_depth"].to_numpy() + survey_layout_rng.normal(0, 0.25, m)), 1)
                for j in range(m):
                    k += 1
                    srows.append(
                        {
                            "haul_id": f"{_SOURCE_CODE[source]}{year}-{k:03d}",
                            "gear": gear, "date": dates[j].strftime("%Y-%m-%d"), "effort": eff[j],
                            "effort_unit": "m2", "pair_id": None, "source": source,
                            "site": pick.loc[j, "site"], "stratum": stratum,
                            "stratum_area": pick.loc[j, "stratum_area"],
                            "latitude": pick.loc[j, "latitude"], "longitude": pick.loc[j, "longitude"],
                            "depth_m": depth[j], "day_night": "day", "habitat": pick.loc[j, "habitat"],
                        }
                    )
    survey_hauls = pd.DataFrame(srows)
    survey_hauls["temperature_c"] = _season_temperature(survey_hauls["date"], survey_layout_rng)
    strata_density = pd.DataFrame(
        {
            stratum: {s: p[kind][s] + math.log(mult.get(s, 1.0)) for s in species}
            for stratum, (_area, kind, mult) in _DEMO_STRATA.items()
        }
    ).T[species]
    survey = simulate_survey(
        survey_hauls, list(DEMO_GEARS), p["theta"], strata_density, kappa=_DEMO_SURVEY_KAPPA,
        trend=p["trend"], year_effect_sd=_DEMO_YEAR_EFFECT_SD, base_year=_DEMO_YEARS[0],
        density_effort=DEMO_DENSITY_EFFORT, lengths=_demo_lengths(p, _DEMO_N_MEASURED["survey"], DEMO_GEARS), seed=survey_rng,
    )

    cal_hauls = pd.concat(
        [_jitter_coordinates(jitter_rng, pairs.hauls, 0.0008), _jitter_coordinates(jitter_rng, seine.hauls, 0.0004)],
        ignore_index=True,
    )
    survey_hauls = _jitter_coordinates(jitter_rng, survey_hauls, 0.0008)
    hauls = pd.concat([cal_hauls, survey_hauls], ignore_index=True)[_HAUL_COLUMNS]
    hauls["effort"] = hauls["effort"].astype(int)
    catches = pd.concat([pairs.catches, seine.catches, survey.catches], ignore_index=True)
    lengths = pd.concat([pairs.lengths, seine.lengths, survey.lengths], ignore_index=True)

    truth_factors = []
    for gear in DEMO_GEARS[1:]:
        for s in species:
            th = p["theta"][gear][s]
            truth_factors.append({"species": s, "gear": gear, "reference": DEMO_REFERENCE,
                                  "theta": th, "factor": math.exp(-th)})
    # Both studies share one length grid; take each gear's classes once.
    tl = pd.concat(
        [pairs.theta_length[pairs.theta_length["gear"] == "otter_trawl_old"],
         seine.theta_length[seine.theta_length["gear"] == "beach_seine"]],
        ignore_index=True,
    )
    tl = tl.assign(_s=tl["species"].map({s: k for k, s in enumerate(species)}),
                   _g=tl["gear"].map({g: k for k, g in enumerate(DEMO_GEARS)}))
    tl = tl.sort_values(["_s", "_g", "length_mm"]).drop(columns=["_s", "_g"]).reset_index(drop=True)
    tl.insert(2, "reference", DEMO_REFERENCE)
    truth_species = pd.DataFrame(
        {
            "species": species,
            "scientific_name": [p["scientific"][s] for s in species],
            "group": [p["group"][s] for s in species],
            "kappa_trawl_pairs": [p["kappa_pairs"][s] for s in species],
            "kappa_seine_groups": [p["kappa_seine"][s] for s in species],
            "survey_kappa": _DEMO_SURVEY_KAPPA,
            "trend_per_year": [p["trend"][s] for s in species],
            "channel_density": [math.exp(p["channel"][s]) for s in species],
            "shallow_density": [math.exp(p["shallow"][s]) for s in species],
            "log_density_sd": [p["log_sd"][s] for s in species],
            "median_length_mm": [p["median_mm"][s] for s in species],
            "length_cv": [p["cv"][s] for s in species],
        }
    )
    density = survey.true_density.rename(columns={"density": "density_per_1000m2"})
    return {
        "hauls": hauls,
        "catches": catches,
        "lengths": lengths,
        "species_groups": pd.DataFrame({"species": species, "group": [p["group"][s] for s in species]}),
        "truth/factors": pd.DataFrame(truth_factors),
        "truth/length_factors": tl.drop(columns=["share"]).assign(reference_length_share=tl["share"]),
        "truth/species": truth_species,
        "truth/density": density,
    }


_INPUT_FILES = ("hauls", "catches", "lengths", "species_groups")


def simulate_demo(seed: int = DEMO_SEED) -> dict[str, pd.DataFrame]:
    """The demo input tables: ``hauls``, ``catches``, ``lengths``, ``species_groups``.

    Effort is area swept in m2; catches hold only non-zero counts (zeros are implied); lengths in
    mm (fish total length; blue crab carapace width) for a measured subsample. See
    demo_paired_tows/README.md for the scenario and :func:`demo_truth` for the true values.
    """
    tables = _demo_all(seed)
    return {k: tables[k] for k in _INPUT_FILES}


def demo_truth(seed: int = DEMO_SEED) -> dict[str, pd.DataFrame]:
    """The truth behind the demo, keyed ``factors`` (species, gear, reference, theta, factor =
    cpue_reference / cpue_gear), ``length_factors`` (per 5 mm length class), ``species`` (kappas,
    trends, densities) and ``density`` (stratum, year, species, expected otter_trawl_new catch per
    1000 m2 including the year effect)."""
    tables = _demo_all(seed)
    return {k.split("/", 1)[1]: v for k, v in tables.items() if k.startswith("truth/")}


# Fixed text formats so the committed CSVs are reproducible byte for byte.
_FORMATS = {
    "stratum_area": "{:.2f}",
    "latitude": "{:.5f}",
    "longitude": "{:.5f}",
    "depth_m": "{:.1f}",
    "temperature_c": "{:.1f}",
    "theta": "{:.4f}",
    "factor": "{:.4f}",
    "reference_length_share": "{:.6f}",
    "density_per_1000m2": "{:.6g}",
    "channel_density": "{:.4g}",
    "shallow_density": "{:.4g}",
}


def _csv_text(frame: pd.DataFrame) -> str:
    out = frame.copy()
    for col in out.columns:
        fmt = _FORMATS.get(col)
        if fmt is not None:
            out[col] = [("" if pd.isna(v) else fmt.format(v)) for v in out[col]]
        elif pd.api.types.is_float_dtype(out[col]):
            out[col] = [("" if pd.isna(v) else repr(float(v))) for v in out[col]]
    return out.to_csv(index=False, lineterminator="\n")


def demo_csv_texts(seed: int = DEMO_SEED) -> dict[str, str]:
    """File name (relative to the demo directory) -> exact CSV text, inputs and truth."""
    return {f"{name}.csv": _csv_text(frame) for name, frame in _demo_all(seed).items()}


def demo_truth_markdown(seed: int = DEMO_SEED) -> str:
    """The table of true factors, kappas and trends that demo_paired_tows/README.md shows."""
    truth = demo_truth(seed)
    f = truth["factors"].set_index(["species", "gear"])
    sp = truth["species"]
    lines = [
        "| species | scientific name | factor otter_trawl_old | factor beach_seine | kappa trawl pairs "
        "| kappa seine groups | trend per year |",
        "|---|---|---|---|---|---|---|",
    ]
    for _, r in sp.iterrows():
        s = r["species"]
        lines.append(
            f"| {s} | *{r['scientific_name']}* | {f.loc[(s, 'otter_trawl_old'), 'factor']:.3f} "
            f"| {f.loc[(s, 'beach_seine'), 'factor']:.3f} | {r['kappa_trawl_pairs']:.1f} "
            f"| {r['kappa_seine_groups']:.1f} | {r['trend_per_year']:+.2f} |"
        )
    return "\n".join(lines)


def write_demo(directory: str | Path, seed: int = DEMO_SEED) -> list[Path]:
    """Write the demo CSVs (inputs at the top, true values under ``truth/``) into ``directory``.

    Returns the paths written. The README is not written (it is maintained by hand and checked
    against :func:`demo_truth_markdown` by the tests).
    """
    import os

    from calib.outputs import atomic_file

    directory = Path(directory)
    umask = os.umask(0)
    os.umask(umask)
    written = []
    for name, text in demo_csv_texts(seed).items():
        path = directory / name
        atomic_file(path, text.encode("utf-8"))
        os.chmod(path, 0o666 & ~umask)  # the temporary file behind atomic_file is private (0600)
        written.append(path)
    return written
