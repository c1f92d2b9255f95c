"""Planning a calibration study (``calib plan``): how many paired deployments are needed.

Before boat days are spent, a cooperative wants to know how many calibration groups (pairs of
deployments of the reference gear and the gear to be calibrated, at the same place and time)
give a useful conversion factor for each species. This module answers by simulation with the
project's own model family: studies of increasing size are simulated with
:func:`calib.simulate.simulate_calibration` (gamma patchiness, i.e. the Dirichlet-multinomial /
beta-binomial split of :mod:`calib.model`), each is fitted quickly, and the share of studies
that reach the target gives the number of groups needed. Method and equations:
docs/planning.md.

Inputs, per species x gear (the reference gear needs its own expected catch):

* expected catch per deployment m_ref, m_gear (fish per deployment): typed in
  (:func:`expected_catch_from_table`), taken from survey records (mean catch per haul by
  species and gear, :func:`expected_catch_from_records`) or from a fitted factor set
  (:func:`expected_catch_from_factors`);
* patchiness kappa: from a fitted factor set (:func:`kappa_from_factors`, posterior median of
  kappa for the reference + gear combination) or the default ``DEFAULT_KAPPA`` = exp(log 3) = 3,
  the prior median of kappa in :class:`calib.model.Priors`;
* between-pair spread of log density (``density_spread``, sd on the log scale, default 1).

Simulated study of n groups (per species): local density D_i lognormal with mean m_ref and
log-scale sd ``density_spread``; gear g's catch Poisson(D_i Gamma_ig), Gamma_ig with mean
exp(theta) and shape kappa exp(theta) (reference: theta = 0) -- exactly
:func:`calib.simulate.simulate_calibration` with ``patchiness="gamma"`` (``"none"`` for
kappa = inf). theta = log(m_gear / m_ref) and factor = exp(-theta) = m_ref / m_gear
(per deployment). Studies are nested (the study of n groups is the first n groups of a study
of the largest size), which makes the curves smooth across sizes (common random numbers).

Fast fit (:func:`fit_split_ml`): maximum likelihood of the beta-binomial split (theta and
log kappa) by vectorised Newton's method, with the Laplace (Wald) interval
theta_hat +- z se, se from the inverse observed information. Without overdispersion
(kappa = inf) the fit is the closed-form binomial logit: theta_hat = log(Y_gear / Y_ref),
se^2 = 1/Y_gear + 1/Y_ref. :func:`full_fit_check` compares it with a full PyMC fit of
:func:`calib.model.build_model` (``pooling="none"``) at one size.

Targets (:class:`PlanTarget`):

* ``"width"``: the central ``interval`` (0.9) interval of the factor lies within a factor
  ``width_factor`` (1.25) of its median at both ends: upper <= 1.25 x median and
  lower >= median / 1.25. On the log scale: z se <= log 1.25.
* ``"power"``: the true factor is ``effect`` (1.5, or 1/1.5 when the expected factor is
  below 1) and the interval excludes 1 on the correct side.

A study "succeeds" when it meets the target; groups needed = the number of groups at which
the share of successful studies last crosses ``assurance`` (0.8), read off a coarse log-spaced
grid refined with up to 12 whole numbers around the crossing, interpolated on log n and
rounded up. Its Monte Carlo error comes from a bootstrap over the replicate studies
(:func:`groups_needed`).
"""

from __future__ import annotations

import argparse
import json
import math
import textwrap
import time
from dataclasses import asdict, dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd
from scipy.special import gammaln, psi
from scipy.stats import norm

from calib.errors import InputError, Problem, ProblemList
from calib.model import Priors
from calib.series import _positive_int  # the argparse type the commands share

DEFAULT_KAPPA = math.exp(Priors().log_kappa_loc_mean)  # 3: the model's prior median of kappa
DEFAULT_DENSITY_SPREAD = 1.0  # sd of log density between pairs (see docs/planning.md)
DEFAULT_MAX_GROUPS = 200  # "no realistic study" beyond this many pairs (common practice, no source)
MIN_GROUPS = 5
KAPPA_BOUNDS = (1e-2, 1e4)  # fast fit keeps kappa inside; at the upper bound the split is ~binomial
THETA_BOUND = 15.0

CATCH_TABLE_COLUMNS = ("species", "gear", "expected_catch")
PLAN_COLUMNS = [
    "species", "gear", "reference", "catch_reference", "catch_gear", "factor_per_deployment", "kappa",
    "kappa_source",
    "catch_source", "target", "assurance", "groups_needed", "mc_sd", "mc_lower", "mc_upper",
    "success_at_max", "max_groups", "verdict", "note",
]
CURVE_COLUMNS = ["species", "gear", "n_groups", "width_median", "width_low", "width_high", "success",
                 "success_se", "n_studies", "not_estimable"]

CAUTION = (
    "A plan is only as good as its assumptions: the expected catches, the patchiness (kappa) and "
    "the spread of density between pairs. Factors from the study will hold only for the gears, sizes, "
    "habitats and seasons it covers. Defer to the survey program's own standards and to qualified "
    "review before any management use."
)

# Design advice with sources (docs/planning.md repeats it). Sources marked "recalled from memory"
# were not re-checked while writing; the rest is common practice without a written source.
DESIGN_ADVICE = [
    ("Balance the order and side of the gears within pairs: alternate which gear fishes first and "
     "which takes which side (or lane), so a systematic order or side effect cancels instead of "
     "entering the factor.",
     "Cochran & Cox 1957, Experimental Designs, 2nd ed., Wiley (balancing of order in cross-over "
     "designs; recalled from memory); for gear pairs specifically common practice, no source."),
    ("Spread the pairs over the habitats, depths, seasons and times of day to which the factor will "
     "be applied, rather than many pairs at one convenient site: a factor only holds where it was "
     "measured, and pairs at one site are not independent replicates.",
     "Hurlbert 1984, Pseudoreplication and the design of ecological field experiments, Ecological "
     "Monographs 54:187-211 (interspersion of replicates; recalled from memory)."),
    ("Measure effort the same way for both gears and throughout the study (same unit, same way of "
     "timing tows or measuring area swept) and record it for every deployment; calib converts catch "
     "per unit effort, so a change in how effort is measured becomes part of the factor.",
     "common practice, no source."),
    ("Fish both gears of a pair as close in place and time as practical (same day, within a short "
     "distance), so both sample the same animals; a seine on the marsh edge and a trawl in the "
     "channel do not.",
     "Lewy, Nielsen & Hovgaard 2004, Survey gear calibration independent of spatial fish "
     "distribution, Canadian Journal of Fisheries and Aquatic Sciences 61:636-647 (recalled from "
     "memory); calib design notes."),
    ("Plan for the rarest species that matter: the number of pairs is set by the species with the "
     "lowest catches, and pairs in which neither gear caught the species carry no information about "
     "its factor.",
     "follows from the split model (a pair with total 0 drops out of the likelihood)."),
]


# ----------------------------------------------------------------------------- target


@dataclass(frozen=True)
class PlanTarget:
    """What a calibration study must achieve.

    kind : "width" (interval within a factor ``width_factor`` of the median at both ends) or
        "power" (interval excludes 1 when the true factor is ``effect``).
    interval : level of the central interval (0.9 = 90%).
    width_factor : > 1; 1.25 means upper <= 1.25 x median and lower >= median / 1.25.
    effect : > 1; the factor to detect against 1 (power target).
    assurance : share of studies that must meet the target (0.8).
    """

    kind: str = "width"
    interval: float = 0.9
    width_factor: float = 1.25
    effect: float = 1.5
    assurance: float = 0.8

    def __post_init__(self):
        if self.kind not in ("width", "power"):
            raise ValueError(f"target kind must be 'width' or 'power', not {self.kind!r}")
        if not 0 < self.interval < 1:
            raise ValueError("interval must be between 0 and 1")
        if not self.width_factor > 1:
            raise ValueError("width_factor must be above 1")
        if not self.effect > 1:
            raise ValueError("effect must be above 1")
        if not 0 < self.assurance < 1:
            raise ValueError("assurance must be between 0 and 1")

    @property
    def z(self) -> float:
        return float(norm.ppf(0.5 + self.interval / 2))

    def describe(self) -> str:
        level = f"{100 * self.interval:g}%"
        share = f"{100 * self.assurance:g}%"
        if self.kind == "width":
            return (f"{level} interval of the factor within a factor {self.width_factor:g} of its median "
                    f"(both ends), in {share} of studies")
        return (f"{level} interval excludes 1 when the true factor is {self.effect:g} "
                f"(power {share})")


# ----------------------------------------------------------------------------- inputs


def _problem(file, row, column, message, fix) -> Problem:
    return Problem(str(file), row, column, message, fix, str(file).lower().endswith(".csv"))


def _factor_set(directory):
    """(FactorSet, label) from a saved factor-set directory or an in-memory FactorSet."""
    from calib.factors import FactorSet, load_factors

    if isinstance(directory, FactorSet):
        return directory, directory.manifest.get("factor_set_id", "in memory")
    return load_factors(directory), Path(directory).name


def _pair_frame(per_gear: pd.DataFrame, reference: str, source: str, file: str) -> pd.DataFrame:
    """Species x non-reference gear rows with catch_reference and catch_gear from a long frame
    (species, gear, expected_catch)."""
    gears = set(per_gear["gear"])
    if reference not in gears:
        raise InputError([_problem(file, None, "gear", f"the reference gear '{reference}' has no expected catch",
                                   f"add rows for gear '{reference}' or name another --reference "
                                   f"(gears found: {', '.join(sorted(gears))})")])
    ref = per_gear[per_gear["gear"] == reference].set_index("species")["expected_catch"]
    rows, problems = [], []
    for (species, gear), value in per_gear.set_index(["species", "gear"])["expected_catch"].items():
        if gear == reference:
            continue
        if species not in ref.index:
            problems.append(_problem(file, None, "species",
                                     f"species '{species}' has an expected catch for gear '{gear}' but none for "
                                     f"the reference gear '{reference}'",
                                     f"add a row: {species},{reference},<expected catch>"))
            continue
        rows.append({"species": species, "gear": gear, "reference": reference,
                     "catch_reference": float(ref[species]), "catch_gear": float(value), "catch_source": source})
    if problems:
        raise InputError(problems)
    if not rows:
        raise InputError([_problem(file, None, "gear", f"only the reference gear '{reference}' is listed",
                                   "add rows for the gear(s) to be calibrated")])
    return pd.DataFrame(rows)


def expected_catch_from_table(path, reference: str) -> pd.DataFrame:
    """Expected catches typed in by the user.

    ``path``: CSV or Parquet with columns species, gear, expected_catch (mean number of the species
    caught per deployment of that gear: per tow, seine haul or trap set; >= 0). The reference gear
    needs a row for every species. Extra columns are ignored.

    Returns one row per species x non-reference gear: species, gear, reference, catch_reference,
    catch_gear (fish per deployment), catch_source. Raises InputError naming file, row and column.
    """
    from calib.tables import read_table

    table = read_table(path)
    problems = ProblemList()
    missing = [c for c in CATCH_TABLE_COLUMNS if c not in table.columns]
    for c in missing:
        problems.add(str(path), None, c, "required column is missing",
                     f"the header must name {', '.join(CATCH_TABLE_COLUMNS)} (found: {', '.join(table.columns)})",
                     str(path).lower().endswith(".csv"))
    problems.raise_if_any()
    if table.empty:
        raise InputError([_problem(path, None, None, "the table has no rows",
                                   "add one row per species and gear, the reference gear included")])
    seen: dict[tuple[str, str], int] = {}
    values = []
    for i, rec in enumerate(table.itertuples(index=False), start=1):
        species, gear, text = (str(getattr(rec, c)).strip() for c in CATCH_TABLE_COLUMNS)
        if not species:
            problems.add(str(path), i, "species", "blank species name", "write the species name", True)
        if not gear:
            problems.add(str(path), i, "gear", "blank gear name", "write the gear name", True)
        try:
            value = float(text)
        except ValueError:
            value = float("nan")
        if not text:
            problems.add(str(path), i, "expected_catch", "blank value",
                         "write the expected number caught per deployment (0 or more)", True)
        elif not math.isfinite(value):
            problems.add(str(path), i, "expected_catch", f"'{text}' is not a number",
                         "write a plain number such as 4 or 0.5", True)
        elif value < 0:
            problems.add(str(path), i, "expected_catch", f"negative value {text}",
                         "expected catch per deployment is 0 or more", True)
        key = (species, gear)
        if species and gear and key in seen:
            problems.add(str(path), i, "species", f"'{species}' with gear '{gear}' is listed twice "
                         f"(also row {seen[key]})", "keep one row per species and gear", True)
        seen.setdefault(key, i)
        values.append((species, gear, value))
    problems.raise_if_any()
    long = pd.DataFrame(values, columns=["species", "gear", "expected_catch"])
    return _pair_frame(long, reference, "typed in", str(path))


def expected_catch_from_records(hauls, catches, reference: str, species_names=None,
                                species_recorded=None) -> pd.DataFrame:
    """Mean catch per haul by species and gear from survey records (hauls + catches tables).

    Every listed haul counts, zeros completed as in :func:`calib.tables.complete_zeros` (only
    for species a source recorded, when ``species_recorded`` is given). Returns the frame of
    :func:`expected_catch_from_table` with catch_source "survey records (n hauls)".
    """
    from calib.tables import complete_zeros, load_tables

    tables = load_tables(hauls, catches, species_recorded=species_recorded, species_names=species_names)
    counts = complete_zeros(tables)
    gear_of = tables.hauls.set_index("haul_id")["gear"].astype(str)
    counts = counts.assign(gear=gear_of.reindex(counts["haul_id"].astype(str)).to_numpy())
    mean = counts.groupby(["species", "gear"], sort=True)["count"].agg(["mean", "size"]).reset_index()
    long = mean.rename(columns={"mean": "expected_catch"})
    out = _pair_frame(long[["species", "gear", "expected_catch"]], reference, "survey records", tables.files["hauls"])
    n_hauls = tables.hauls["gear"].astype(str).value_counts()
    out["catch_source"] = [f"survey records ({n_hauls.get(reference, 0)} {reference} / {n_hauls.get(g, 0)} {g} hauls)"
                           for g in out["gear"]]
    return out


def expected_catch_from_factors(directory) -> pd.DataFrame:
    """Expected catches per deployment implied by a fitted factor set (``calib fit`` output
    directory, or a :class:`calib.factors.FactorSet`).

    Groups where a gear fished with the reference: N_g = the largest n_groups of the gear over the
    species (exact when some species was caught in every group; cells with a zero total are not
    stored). catch_gear = n_caught / N_g. catch_reference = the reference's catch in the same groups
    / N_g, read from the stored cell counts (posterior.nc constant_data) when the fit kept them,
    else catch_gear x factor_median (equal effort per deployment assumed). Rows for length classes
    or covariate levels are left out.
    """
    fs, name = _factor_set(directory)
    t = fs.table.copy()
    for col in ("length_mm", "level"):
        if col in t:
            t = t[t[col].isna() | (t[col].astype(str) == "")]
    t = t[(t["n_groups"] > 0) & np.isfinite(t["factor_median"]) & np.isfinite(t["n_caught"])]
    if t.empty:
        raise InputError([_problem(f"{name}/factors.csv", None, "factor_median",
                                   "no factor with a median and catches to plan from",
                                   "give expected catches with --catch-table or survey records instead")])
    reference = fs.reference
    groups_of_gear = t.groupby("gear")["n_groups"].max()
    ref_caught = _reference_catch_in_cells(fs, reference)
    rows = []
    for r in t.itertuples():
        n_g = float(groups_of_gear[r.gear])
        catch_gear = float(r.n_caught) / n_g
        if ref_caught is not None and (r.gear, r.species) in ref_caught:
            catch_ref, how = ref_caught[(r.gear, r.species)] / n_g, "reference catch from the stored cells"
        else:
            catch_ref, how = catch_gear * float(r.factor_median), "reference catch = gear catch x factor"
        rows.append({"species": str(r.species), "gear": str(r.gear), "reference": reference,
                     "catch_reference": catch_ref, "catch_gear": catch_gear,
                     "catch_source": f"factor set {name} (n_caught / {int(n_g)} groups; {how})"})
    return pd.DataFrame(rows)


def _reference_catch_in_cells(fs, reference: str) -> dict | None:
    """{(gear, species): fish the reference caught in the cells it shared with the gear}, or None."""
    idata = fs.idata
    if "constant_data" not in idata.groups():
        return None
    data = idata.constant_data
    if not {"counts", "present", "cell_species"} <= set(data.data_vars):
        return None
    gears = [str(g) for g in data["counts"].coords["gear"].values]
    species = [str(s) for s in data.coords["species"].values] if "species" in data.coords else None
    if species is None or reference not in gears:
        return None
    counts = np.asarray(data["counts"].values, dtype=float)
    present = np.asarray(data["present"].values, dtype=bool)
    cell_species = np.asarray(data["cell_species"].values, dtype=int)
    ref = gears.index(reference)
    out = {}
    for g, gear in enumerate(gears):
        if g == ref:
            continue
        both = present[:, g] & present[:, ref]
        sums = np.bincount(cell_species[both], weights=counts[both, ref], minlength=len(species))
        out.update({(gear, s): float(sums[k]) for k, s in enumerate(species)})
    return out


def kappa_from_factors(directory) -> pd.DataFrame:
    """Posterior median of kappa per species x gear from a fitted factor set (posterior.nc; a
    directory or a :class:`calib.factors.FactorSet`).

    Uses log_kappa of the gear combination made of exactly the reference and the gear when the
    fit had one; otherwise the median over the combinations that include the gear. Returns
    species, gear, kappa, kappa_source (empty when the factor set has no kappa, e.g. a ratio fit).
    """
    fs, name = _factor_set(directory)
    post = fs.idata.posterior if hasattr(fs.idata, "posterior") else None
    if post is None or "log_kappa" not in post:
        return pd.DataFrame(columns=["species", "gear", "kappa", "kappa_source"])
    lk = post["log_kappa"]
    reference = fs.reference
    combos = [str(c) for c in lk.coords["combo"].values]
    rows = []
    for gear in sorted(set(fs.table["gear"].astype(str)) - {reference}):
        exact = [c for c in combos if set(c.split("+")) == {reference, gear}]
        use = exact or [c for c in combos if gear in c.split("+")]
        if not use:
            continue
        for species in lk.coords["species"].values:
            values = np.exp(lk.sel(combo=use, species=species).values).ravel()
            rows.append({"species": str(species), "gear": gear, "kappa": float(np.median(values)),
                         "kappa_source": f"posterior median, factor set {name} ({', '.join(use)})"})
    return pd.DataFrame(rows)


# ----------------------------------------------------------------------------- fast fit


def _trigamma(x: np.ndarray) -> np.ndarray:
    """Trigamma function for x > 0 (numpy; faster than scipy's polygamma(1, x)).

    Recurrence psi1(x) = psi1(x + 1) + 1 / x^2 up to x >= 6, then the asymptotic series
    1/x + 1/(2x^2) + 1/(6x^3) - 1/(30x^5) + 1/(42x^7) - 1/(30x^9) (Abramowitz & Stegun 1964,
    Handbook of Mathematical Functions, 6.4.12; recalled from memory; tests compare with scipy).
    """
    x = np.asarray(x, dtype=float)
    acc = np.zeros_like(x)
    for _ in range(6):
        small = x < 6.0
        if not small.any():
            break
        acc = acc + np.where(small, 1.0 / (x * x), 0.0)
        x = np.where(small, x + 1.0, x)
    inv = 1.0 / x
    inv2 = inv * inv
    series = inv + inv2 / 2 + inv * inv2 * (1.0 / 6 - inv2 * (1.0 / 30 - inv2 * (1.0 / 42 - inv2 / 30)))
    return acc + series


def fit_split_ml(y_gear: np.ndarray, y_ref: np.ndarray, overdispersed: bool = True, max_iter: int = 60,
                 tol: float = 1e-6, start: np.ndarray | None = None) -> tuple[np.ndarray, np.ndarray]:
    """Maximum-likelihood split of paired catches, vectorised over studies.

    y_gear, y_ref : (..., n_groups) counts of the gear and the reference in each pair (equal
        effort; pairs with total 0 carry no information and may be included as zeros; a pair
        left out of a study can be marked by giving both counts 0).
    overdispersed : True fits the beta-binomial split (theta and log kappa, the two-gear case of
        calib.model's Dirichlet-multinomial); False the binomial (kappa = inf), closed form.
    start : optional log kappa to start from, shape (...,) (e.g. the fit of a smaller nested study);
        default log 3. theta starts at the ratio of the sums.

    Returns (theta_hat, se) with shape (...,): theta = log(q_gear / q_ref), se on the log scale
    from the inverse observed information (profiling kappa). Studies in which one gear caught
    nothing give theta_hat = -+inf and se = inf (not estimable).
    """
    theta, se, _ = _fit_split(y_gear, y_ref, overdispersed, max_iter, tol, start)
    return theta, se


def _fit_split(y_gear, y_ref, overdispersed=True, max_iter=60, tol=1e-6, start=None):
    """:func:`fit_split_ml` that also returns the fitted log kappa (inf for the binomial split)."""
    y1 = np.asarray(y_gear, dtype=float)
    y0 = np.asarray(y_ref, dtype=float)
    s1, s0 = y1.sum(axis=-1), y0.sum(axis=-1)
    ok = (s1 > 0) & (s0 > 0)
    with np.errstate(divide="ignore"):
        theta0 = np.log(np.where(ok, s1, 1.0) / np.where(ok, s0, 1.0))
        binom_se = np.sqrt(1.0 / np.where(ok, s1, 1.0) + 1.0 / np.where(ok, s0, 1.0))
    if not overdispersed:
        theta = np.where(ok, theta0, np.where(s1 > 0, np.inf, -np.inf))
        return theta, np.where(ok, binom_se, np.inf), np.full(theta.shape, np.inf)
    n = y1 + y0
    theta = np.where(ok, theta0, 0.0)
    lo, hi = (math.log(b) for b in KAPPA_BOUNDS)
    phi = np.full_like(theta, math.log(DEFAULT_KAPPA))
    if start is not None:
        phi = np.clip(np.where(np.isfinite(start), start, phi), lo, hi)
    flat_shape = theta.shape
    theta, phi = theta.reshape(-1), phi.reshape(-1)
    y1f, y0f, nf = (a.reshape(-1, a.shape[-1]) for a in (y1, y0, n))

    def loglik(th, ph, rows):
        a1 = np.exp(ph + th)[:, None]
        a0 = np.exp(ph)[:, None]
        a = a1 + a0
        yy1, yy0, nn = y1f[rows], y0f[rows], nf[rows]
        cell = gammaln(a) - gammaln(nn + a) + gammaln(yy1 + a1) - gammaln(a1) + gammaln(yy0 + a0) - gammaln(a0)
        return cell.sum(axis=-1)

    def derivatives(th, ph, rows):
        a1 = np.exp(ph + th)[:, None]
        a0 = np.exp(ph)[:, None]
        a = a1 + a0
        yy1, yy0, nn = y1f[rows], y0f[rows], nf[rows]
        common = psi(a) - psi(nn + a)
        d1 = common + psi(yy1 + a1) - psi(a1)
        d0 = common + psi(yy0 + a0) - psi(a0)
        h10 = _trigamma(a) - _trigamma(nn + a)
        h11 = h10 + _trigamma(yy1 + a1) - _trigamma(a1)
        h00 = h10 + _trigamma(yy0 + a0) - _trigamma(a0)
        g1, g0 = a1 * d1, a0 * d0
        g_th = g1.sum(axis=-1)
        g_ph = (g1 + g0).sum(axis=-1)
        h_tt = (g1 + a1**2 * h11).sum(axis=-1)
        h_tp = h_tt + (a1 * a0 * h10).sum(axis=-1)
        h_pp = (g1 + g0 + a1**2 * h11 + 2 * a1 * a0 * h10 + a0**2 * h00).sum(axis=-1)
        return g_th, g_ph, h_tt, h_tp, h_pp

    ok_flat = ok.reshape(-1)
    active = np.flatnonzero(ok_flat)  # studies still iterating; only these are computed
    ll = np.zeros_like(theta)
    ll[active] = loglik(theta[active], phi[active], active)
    for _ in range(max_iter):
        if active.size == 0:
            break
        th, ph = theta[active], phi[active]
        g_t, g_p, h_tt, h_tp, h_pp = derivatives(th, ph, active)
        det = h_tt * h_pp - h_tp**2
        newton = (h_tt < 0) & (det > 1e-12 * np.maximum(1.0, np.abs(h_tt * h_pp)))
        safe_det = np.where(newton, det, 1.0)
        # Where the likelihood is not locally concave (typically kappa running off to its bound, the
        # split looking binomial), move theta by its own Newton step and log kappa by one unit uphill;
        # the backtracking below keeps every accepted step an improvement.
        theta_alone = np.where(h_tt < 0, -g_t / np.where(h_tt < 0, h_tt, -1.0), 0.5 * np.sign(g_t))
        step_t = np.clip(np.where(newton, -(h_pp * g_t - h_tp * g_p) / safe_det, theta_alone), -2.0, 2.0)
        step_p = np.clip(np.where(newton, -(h_tt * g_p - h_tp * g_t) / safe_det, np.sign(g_p)), -2.0, 2.0)
        scale = np.ones_like(th)
        old = ll[active]
        for _half in range(12):  # backtracking: never accept a step that lowers the likelihood
            new_t = np.clip(th + scale * step_t, -THETA_BOUND, THETA_BOUND)
            new_p = np.clip(ph + scale * step_p, lo, hi)
            new_ll = loglik(new_t, new_p, active)
            worse = ~(new_ll >= old - 1e-10)
            if not worse.any():
                break
            scale = np.where(worse, scale / 2, scale)
        accept = new_ll >= old - 1e-10
        moved = np.maximum(np.abs(new_t - th), np.abs(new_p - ph))
        theta[active] = np.where(accept, new_t, th)
        phi[active] = np.where(accept, new_p, ph)
        ll[active] = np.where(accept, new_ll, old)
        active = active[accept & (moved > tol)]
    var = np.full_like(theta, np.inf)
    rows = np.flatnonzero(ok_flat)
    if rows.size:
        _, _, h_tt, h_tp, h_pp = derivatives(theta[rows], phi[rows], rows)
        det = h_tt * h_pp - h_tp**2
        joint = (h_pp < 0) & (det > 1e-10 * np.maximum(1.0, np.abs(h_tt * h_pp)))
        with np.errstate(divide="ignore", invalid="ignore"):
            var_joint = -h_pp / np.where(joint, det, 1.0)  # [(-H)^-1]_theta,theta, kappa profiled
            var_cond = -1.0 / np.where(h_tt < 0, h_tt, -1e-300)  # kappa at its bound: theta alone
        var[rows] = np.where(joint & (var_joint > 0), var_joint, var_cond)
    theta, var = theta.reshape(flat_shape), var.reshape(flat_shape)
    se = np.where(ok, np.sqrt(np.maximum(var, 0.0)), np.inf)
    theta = np.where(ok, theta, np.where(s1 > 0, np.inf, -np.inf))
    return theta, se, phi.reshape(flat_shape)


# ----------------------------------------------------------------------------- groups needed


def _crossing(share: np.ndarray, sizes: np.ndarray, assurance: float) -> np.ndarray:
    """Groups at which ``share`` (..., K) last crosses ``assurance``, interpolated on log n.

    sizes[0] when every size meets it; inf when the largest does not.
    """
    below = share < assurance
    k_any = below.any(axis=-1)
    last = np.where(k_any, below.shape[-1] - 1 - np.argmax(below[..., ::-1], axis=-1), -1)
    out = np.full(share.shape[:-1], np.nan)
    out[~k_any] = sizes[0]
    out[last == len(sizes) - 1] = np.inf
    mid = k_any & (last < len(sizes) - 1)
    if mid.any():
        k = last[mid]
        s_lo = np.take_along_axis(share[mid], k[:, None], axis=-1)[:, 0]
        s_hi = np.take_along_axis(share[mid], (k + 1)[:, None], axis=-1)[:, 0]
        t = np.clip((assurance - s_lo) / np.maximum(s_hi - s_lo, 1e-12), 0.0, 1.0)
        log_n = np.log(sizes[k]) + t * (np.log(sizes[k + 1]) - np.log(sizes[k]))
        out[mid] = np.exp(log_n)
    return out


def groups_needed(success: np.ndarray, sizes, assurance: float = 0.8, n_boot: int = 500,
                  seed: int = 0) -> dict:
    """Groups needed and its Monte Carlo error from replicate studies.

    success : bool (n_studies, n_sizes), study r of size sizes[k] met the target (nested studies).
    Estimate: :func:`_crossing` of the share of successes, rounded up. Monte Carlo error: the
    same computed on ``n_boot`` bootstrap resamples of the studies (rows); mc_sd is their sd
    (over finite values), mc_lower / mc_upper the 5% and 95% quantiles (inf when more than 5% of
    resamples never reach the target).

    Returns dict: groups_needed (float, inf when not reached), mc_sd, mc_lower, mc_upper,
    at_minimum (True when the smallest size already meets the target).
    """
    success = np.asarray(success, dtype=float)
    sizes = np.asarray(sizes, dtype=float)
    share = success.mean(axis=0)
    est = float(_crossing(share, sizes, assurance))
    rng = np.random.default_rng(seed)
    n = success.shape[0]
    weights = rng.multinomial(n, np.full(n, 1.0 / n), size=n_boot)
    boot = _crossing(weights @ success / n, sizes, assurance)
    finite = boot[np.isfinite(boot)]
    sd = float(np.std(finite, ddof=1)) if finite.size > 1 else float("nan")
    lower, upper = np.quantile(boot, [0.05, 0.95], method="inverted_cdf")
    return {"groups_needed": math.ceil(est) if math.isfinite(est) else math.inf, "mc_sd": sd,
            "mc_lower": float(math.floor(lower)) if math.isfinite(lower) else math.inf,
            "mc_upper": float(math.ceil(upper)) if math.isfinite(upper) else math.inf,
            "at_minimum": bool(est == sizes[0])}


def _refine(share: np.ndarray, sizes: np.ndarray, assurance: float, max_extra: int = 12) -> np.ndarray:
    """Extra study sizes around the crossing of the coarse grid: whole numbers between the two grid
    sizes that bracket it (at most ``max_extra``, evenly spread), so the groups needed is read off
    nearby sizes rather than interpolated across a wide step.
    Nested studies make these fits cheap (same simulated studies, cut at more sizes)."""
    below = np.flatnonzero(share < assurance)
    if below.size == 0 or below[-1] == len(sizes) - 1:
        return np.array([], dtype=int)
    k = int(below[-1])
    lo, hi = int(sizes[k]), int(sizes[k + 1])
    return np.unique(np.round(np.linspace(lo, hi, min(hi - lo + 1, max_extra))).astype(int))


def default_sizes(max_groups: int = DEFAULT_MAX_GROUPS, min_groups: int = MIN_GROUPS, n: int = 14) -> np.ndarray:
    """Study sizes simulated: about ``n`` sizes spaced evenly on a log scale, whole numbers."""
    if max_groups < min_groups:
        raise ValueError(f"max_groups must be at least {min_groups}")
    return np.unique(np.round(np.geomspace(min_groups, max_groups, n)).astype(int))


# ----------------------------------------------------------------------------- simulation


def _simulate_counts(rows: pd.DataFrame, gear: str, reference: str, n_groups: int, density_spread: float,
                     seed) -> tuple[np.ndarray, np.ndarray]:
    """One simulated study of ``n_groups`` pairs for the species rows of one gear.

    Returns (y_gear, y_ref), each (n_species, n_groups). Uses simulate_calibration (gamma
    patchiness; "none" when every kappa is infinite).
    """
    from calib.simulate import simulate_calibration

    species = list(rows["species"])
    theta = np.log(rows["catch_gear"].to_numpy(float) / rows["catch_reference"].to_numpy(float))
    kappa = rows["kappa"].to_numpy(float)
    infinite = np.isinf(kappa)
    if infinite.any() and not infinite.all():
        raise ValueError("simulate species with and without overdispersion separately")
    mean_log = np.log(rows["catch_reference"].to_numpy(float)) - density_spread**2 / 2  # E[D] = m_ref
    study = simulate_calibration(
        n_groups, [reference, gear], {gear: theta}, mean_log,
        kappa=None if infinite.all() else kappa, patchiness="none" if infinite.all() else "gamma",
        seed=seed, species=species, log_density_sd=density_spread, density_effort=1.0,
    )
    counts = study.counts  # (n_groups, 2, n_species)
    return counts[:, 1, :].T, counts[:, 0, :].T


def _plan_truth(rows: pd.DataFrame, target: PlanTarget) -> pd.DataFrame:
    """Rows with the catch the simulation uses: the power target replaces the gear's expected catch
    so that the true factor is ``effect`` (direction of the expected factor), reference catch kept."""
    rows = rows.copy()
    if target.kind == "power":
        factor = rows["catch_reference"] / rows["catch_gear"]
        effect = np.where(factor >= 1, target.effect, 1.0 / target.effect)
        rows["catch_gear"] = rows["catch_reference"] / effect
    return rows


def _success(theta_hat, se, theta_true, target: PlanTarget) -> np.ndarray:
    z = target.z
    if target.kind == "width":
        return z * se <= math.log(target.width_factor)
    return (np.abs(theta_hat) > z * se) & (np.sign(theta_hat) == np.sign(theta_true)) & np.isfinite(se)


@dataclass
class PlanResult:
    """Result of :func:`plan`.

    table : one row per species x gear (``PLAN_COLUMNS``): groups_needed with its Monte Carlo sd
        and 5-95% range, verdict ("reachable", "at most the smallest size", "not reachable",
        "no catch") and a plain note.
    curve : one row per species x gear x study size (``CURVE_COLUMNS``): half-width factor
        exp(z se) of the interval (median and 10% / 90% over studies), share of studies meeting
        the target and its binomial standard error.
    full_fit : comparison of the fast fit with full PyMC fits at one size (empty when skipped).
    settings : everything needed to repeat the run (seed included).
    """

    table: pd.DataFrame
    curve: pd.DataFrame
    full_fit: pd.DataFrame
    settings: dict
    target: PlanTarget
    elapsed_s: float = 0.0
    replicate_theta: dict = field(default_factory=dict, repr=False)

    def sentences(self) -> list[str]:
        return [f"{r.species} ({r.gear} vs {r.reference}): {r.note}" for r in self.table.itertuples()]

    def summary(self) -> str:
        lines = [f"Target: {self.target.describe()}.",
                 f"Simulated {self.settings['n_studies']} studies at each of {len(self.settings['sizes'])} sizes "
                 f"({self.settings['sizes'][0]}-{self.settings['sizes'][-1]} groups) in {self.elapsed_s:.0f} s.", ""]
        lines += ["  " + s for s in self.sentences()]
        if not self.full_fit.empty:
            lines += ["", full_fit_sentence(self.full_fit)]
        return "\n".join(lines)

    def markdown(self) -> str:
        return plan_markdown(self)

    def save(self, directory, figure: bool = True) -> Path:
        """Write plan.csv, curve.csv, full_fit_check.csv, plan_curves.png, plan.md, manifest.json
        atomically into ``directory``."""
        from calib.outputs import atomic_directory

        directory = Path(directory)
        protect = [(p, "an input") for p in self.settings.get("input_paths", []) if p]
        with atomic_directory(directory, protect=protect) as tmp:
            self.table.to_csv(tmp / "plan.csv", index=False, float_format="%.6g")
            self.curve.to_csv(tmp / "curve.csv", index=False, float_format="%.6g")
            self.full_fit.to_csv(tmp / "full_fit_check.csv", index=False, float_format="%.6g")
            if figure:
                from calib.plots import plan_curves_figure, save_figure

                save_figure(plan_curves_figure(self.curve, self.table, target=asdict(self.target)),
                            tmp / "plan_curves.png")
            (tmp / "plan.md").write_text(self.markdown())
            (tmp / "manifest.json").write_text(json.dumps(self.manifest(), indent=2, default=str) + "\n")
        return directory

    def manifest(self) -> dict:
        from calib.factors import software_versions, utc_timestamp

        return {"command": "plan", "target": asdict(self.target), "settings": self.settings,
                "software": software_versions(), "timestamp": utc_timestamp(), "caution": CAUTION,
                "elapsed_s": round(self.elapsed_s, 2)}


def _verdict(need: dict, share_at_max: float, width_at_max: float, target: PlanTarget,
             max_groups: int) -> tuple[str, str]:
    pct = f"{100 * target.assurance:g}%"
    if need["groups_needed"] == math.inf:
        typical = (f" With {max_groups} pairs the typical study's interval ends lie within a factor "
                   f"{width_at_max:.2f} of the median." if math.isfinite(width_at_max) else "")
        return ("not reachable",
                f"cannot be calibrated to this target with a realistic study: even {max_groups} pairs meet it in "
                f"only {100 * share_at_max:.0f}% of simulated studies (needed: {pct}).{typical}")
    rng = (f"Monte Carlo range {need['mc_lower']:g}-{need['mc_upper']:g}" if math.isfinite(need["mc_upper"])
           else f"Monte Carlo range {need['mc_lower']:g} to more than {max_groups}")
    if need["at_minimum"]:
        return ("at most the smallest size",
                f"{need['groups_needed']} pairs (the smallest size simulated) already meet the target in "
                f"{pct} of studies or more.")
    return ("reachable", f"about {need['groups_needed']} pairs ({rng}) meet the target in {pct} of simulated studies.")


def plan(
    inputs: pd.DataFrame,
    target: PlanTarget = PlanTarget(),
    *,
    kappa: float | None = None,
    kappa_table: pd.DataFrame | None = None,
    density_spread: float = DEFAULT_DENSITY_SPREAD,
    max_groups: int = DEFAULT_MAX_GROUPS,
    sizes=None,
    n_studies: int = 200,
    n_boot: int = 500,
    seed: int = 0,
    full_fit: bool = True,
    full_fit_studies: int = 2,
    full_fit_groups: int | None = None,
    full_fit_draws: int = 500,
    progressbar: bool = True,
    input_paths=(),
) -> PlanResult:
    """Simulate calibration studies of increasing size and report the groups needed per species.

    inputs : frame from one of the ``expected_catch_from_*`` readers (species, gear, reference,
        catch_reference, catch_gear in fish per deployment, catch_source).
    target : :class:`PlanTarget`.
    kappa : patchiness used for every species (overrides ``kappa_table``); ``math.inf`` = no
        overdispersion (binomial split). Default: ``kappa_table`` where it has the species x gear,
        else ``DEFAULT_KAPPA`` (3, the prior median of kappa in calib.model.Priors).
    kappa_table : species, gear, kappa, kappa_source (:func:`kappa_from_factors`).
    density_spread : sd of log density between pairs (natural-log scale; 1 = a factor e).
    max_groups : largest study simulated; beyond it a species is "not reachable".
    sizes : study sizes (groups) to simulate; default :func:`default_sizes`.
    n_studies : replicate studies per size (nested: the same studies cut at each size).
    n_boot : bootstrap resamples of the studies for the Monte Carlo error of groups needed.
    full_fit : compare the fast fit with full PyMC fits (``full_fit_studies`` studies of
        ``full_fit_groups`` pairs, default the median groups needed, ``full_fit_draws`` draws
        per chain, 2 chains).
    """
    started = time.perf_counter()
    sizes = default_sizes(max_groups) if sizes is None else np.unique(np.asarray(sizes, dtype=int))
    max_groups = int(sizes[-1])
    rows = inputs.copy().reset_index(drop=True)
    if kappa is not None:
        rows["kappa"] = float(kappa)
        rows["kappa_source"] = "no overdispersion (binomial split)" if math.isinf(kappa) else "given (--kappa)"
    else:
        rows["kappa"] = DEFAULT_KAPPA
        rows["kappa_source"] = "default: prior median of kappa in calib.model.Priors"
        if kappa_table is not None and not kappa_table.empty:
            k = kappa_table.set_index(["species", "gear"])
            for i, r in rows.iterrows():
                if (r["species"], r["gear"]) in k.index:
                    rows.loc[i, "kappa"] = float(k.loc[(r["species"], r["gear"]), "kappa"])
                    rows.loc[i, "kappa_source"] = str(k.loc[(r["species"], r["gear"]), "kappa_source"])
    rows["factor_per_deployment"] = rows["catch_reference"] / rows["catch_gear"].where(rows["catch_gear"] > 0)
    truth = _plan_truth(rows, target)
    can = (rows["catch_reference"] > 0) & (rows["catch_gear"] > 0)

    from tqdm.auto import tqdm

    rng = np.random.default_rng(seed)
    table_rows, curve_rows, replicate_theta = [], [], {}
    groups = [(gear, kinf) for gear in rows["gear"].unique() for kinf in (False, True)]
    work = [(gear, kinf, truth[can & (truth["gear"] == gear) & (np.isinf(truth["kappa"]) == kinf)])
            for gear, kinf in groups]
    work = [w for w in work if not w[2].empty]
    bar = tqdm(total=sum(n_studies + len(w[2]) for w in work), desc="simulating studies", unit="step",
               disable=not progressbar)
    for gear, kinf, sub in work:
        reference = str(sub["reference"].iloc[0])
        y1 = np.zeros((len(sub), n_studies, max_groups), dtype=np.int64)
        y0 = np.zeros_like(y1)
        for r in range(n_studies):
            y1[:, r], y0[:, r] = _simulate_counts(sub, gear, reference, max_groups, density_spread, rng)
            bar.update()
        for j, (idx, row) in enumerate(sub.iterrows()):
            theta_true = math.log(row["catch_gear"] / row["catch_reference"])
            fits = {}

            def fit_at(ns):
                for n in sorted(ns):
                    if n in fits:
                        continue
                    smaller = [m for m in fits if m < n]  # warm start from the nested smaller study
                    start = fits[max(smaller)][2] if smaller else None
                    fits[n] = _fit_split(y1[j, :, :n], y0[j, :, :n], not kinf, start=start)

            fit_at(sizes)
            coarse = np.array([_success(*fits[n][:2], theta_true, target).mean() for n in sizes])
            fit_at(_refine(coarse, sizes, target.assurance))
            all_sizes = np.array(sorted(fits))
            theta_hat = np.stack([fits[n][0] for n in all_sizes], axis=1)
            se = np.stack([fits[n][1] for n in all_sizes], axis=1)
            success = _success(theta_hat, se, theta_true, target)
            replicate_theta[(row["species"], gear)] = {"sizes": all_sizes, "theta_hat": theta_hat, "se": se,
                                                        "theta_true": theta_true}
            width = np.exp(target.z * se)
            share = success.mean(axis=0)
            for k, n in enumerate(all_sizes):
                q = np.quantile(width[:, k], [0.5, 0.1, 0.9], method="inverted_cdf")
                curve_rows.append({"species": row["species"], "gear": gear, "n_groups": int(n),
                                   "width_median": q[0], "width_low": q[1], "width_high": q[2],
                                   "success": share[k],
                                   "success_se": math.sqrt(share[k] * (1 - share[k]) / n_studies),
                                   "n_studies": n_studies, "not_estimable": int(np.sum(~np.isfinite(se[:, k])))})
            need = groups_needed(success, all_sizes, target.assurance, n_boot=n_boot, seed=seed + j)
            width_at_max = float(np.quantile(width[:, -1], 0.5, method="inverted_cdf"))
            verdict, note = _verdict(need, share[-1], width_at_max, target, max_groups)
            table_rows.append({**_row_base(rows.loc[idx], target), **{k: need[k] for k in
                               ("groups_needed", "mc_sd", "mc_lower", "mc_upper")},
                               "success_at_max": share[-1], "max_groups": max_groups, "verdict": verdict,
                               "note": note})
            bar.update()
    bar.close()
    for idx, row in rows[~can].iterrows():
        which = [g for g, m in ((row["reference"], row["catch_reference"]), (row["gear"], row["catch_gear"])) if m <= 0]
        table_rows.append({**_row_base(row, target), "groups_needed": math.inf, "mc_sd": np.nan,
                           "mc_lower": math.inf, "mc_upper": math.inf, "success_at_max": 0.0,
                           "max_groups": max_groups, "verdict": "no catch",
                           "note": f"cannot be calibrated: the expected catch of {' and '.join(which)} is 0, "
                                   "so no number of pairs gives a factor."})
    order = {(s, g): i for i, (s, g) in enumerate(zip(rows["species"], rows["gear"]))}
    table = pd.DataFrame(table_rows, columns=PLAN_COLUMNS)
    table = table.iloc[np.argsort([order[(s, g)] for s, g in zip(table["species"], table["gear"])])]
    curve = pd.DataFrame(curve_rows, columns=CURVE_COLUMNS)
    settings = {"sizes": [int(s) for s in sizes], "n_studies": n_studies, "n_boot": n_boot, "seed": seed,
                "density_spread": density_spread, "kappa_given": kappa, "default_kappa": DEFAULT_KAPPA,
                "max_groups": max_groups, "fast_fit": "maximum likelihood beta-binomial split, Laplace (Wald) interval",
                "simulator": "calib.simulate.simulate_calibration (nested studies)",
                "full_fit": {"done": bool(full_fit)}, "input_paths": [str(p) for p in input_paths if p]}
    result = PlanResult(table=table.reset_index(drop=True), curve=curve, full_fit=pd.DataFrame(),
                        settings=settings, target=target, replicate_theta=replicate_theta)
    if full_fit and curve_rows:
        check = full_fit_check(truth[can], result, n_groups=full_fit_groups, n_studies=full_fit_studies,
                               draws=full_fit_draws, density_spread=density_spread, seed=seed + 7919,
                               progressbar=progressbar)
        result.full_fit = check
        settings["full_fit"] = {"done": True, "n_studies": full_fit_studies, "draws": full_fit_draws, "tune": full_fit_draws,
                                "chains": 2, "n_groups": int(check["n_groups"].iloc[0]) if not check.empty else None,
                                "model": "calib.model.build_model, pooling='none' (vague priors)"}
    result.elapsed_s = time.perf_counter() - started
    return result


def _row_base(row, target: PlanTarget) -> dict:
    return {"species": row["species"], "gear": row["gear"], "reference": row["reference"],
            "catch_reference": row["catch_reference"], "catch_gear": row["catch_gear"],
            "factor_per_deployment": row["factor_per_deployment"],
            "kappa": row["kappa"], "kappa_source": row["kappa_source"], "catch_source": row["catch_source"],
            "target": target.describe(), "assurance": target.assurance}


# ----------------------------------------------------------------------------- full-fit check


def full_fit_check(rows: pd.DataFrame, result: PlanResult, *, n_groups: int | None = None, n_studies: int = 2,
                   draws: int = 500, density_spread: float = DEFAULT_DENSITY_SPREAD, seed: int = 0,
                   progressbar: bool = False) -> pd.DataFrame:
    """Fast fit against a full PyMC fit on the same simulated studies.

    For each gear, ``n_studies`` studies of ``n_groups`` pairs (default: the median groups needed
    over the species that reach the target, within the simulated sizes; else the middle size) are
    simulated for all its species and fitted twice: by :func:`fit_split_ml` and by NUTS on
    :func:`calib.model.build_model` with ``pooling="none"`` (each species on its own, vague priors;
    the model is built once per gear and the data swapped with :func:`calib.model.set_cells`).

    Returns one row per species x gear x study: theta_fast, theta_full (posterior median),
    width_fast = exp(z se), width_full = exp((q_hi - q_lo) / 2) of the posterior theta quantiles,
    width_ratio = log width_full / log width_fast, shift_se = (theta_full - theta_fast) / se_fast.
    """
    from calib import model as cm
    from calib.cells import cells_from_arrays

    target = result.target
    z = target.z
    out = []
    finite = result.table[np.isfinite(result.table["groups_needed"].astype(float))]
    sizes = result.settings["sizes"]
    if n_groups is None:
        n_groups = int(np.median(finite["groups_needed"])) if not finite.empty else int(sizes[len(sizes) // 2])
        n_groups = int(min(max(n_groups, sizes[0]), sizes[-1]))
    rng = np.random.default_rng(seed)
    q = [0.5 - target.interval / 2, 0.5, 0.5 + target.interval / 2]
    for gear in rows["gear"].unique():
        sub = rows[(rows["gear"] == gear) & ~np.isinf(rows["kappa"])]
        if sub.empty:
            continue
        reference = str(sub["reference"].iloc[0])
        species = list(sub["species"])
        model = None
        for r in range(n_studies):
            y1, y0 = _simulate_counts(sub, gear, reference, n_groups, density_spread, rng)
            n_s = len(species)
            counts = np.stack([y0.T.ravel(), y1.T.ravel()], axis=1)  # group-major, species inner
            cells = cells_from_arrays(counts, np.ones_like(counts, dtype=bool), np.ones(counts.shape),
                                      np.repeat(np.arange(n_groups), n_s), np.tile(np.arange(n_s), n_groups),
                                      [reference, gear], species)
            spec = cm.ModelSpec(pooling="none")
            if model is None:
                model = cm.build_model(cells, spec)
            else:
                cm.set_cells(model, cells)
            idata = cm.sample(model, draws=draws, tune=draws, chains=2, seed=seed + r, progressbar=progressbar,
                              cores=1, prior_draws=0, log_likelihood=False)
            theta_post = idata.posterior["theta"].sel(gear=gear)
            th_fast, se_fast = fit_split_ml(y1, y0)
            for j, s in enumerate(species):
                lo, med, hi = np.quantile(theta_post.sel(species=s).values.ravel(), q)
                w_fast = math.exp(z * se_fast[j]) if np.isfinite(se_fast[j]) else math.inf
                w_full = math.exp((hi - lo) / 2)
                out.append({"species": s, "gear": gear, "study": r + 1, "n_groups": n_groups,
                            "theta_fast": th_fast[j], "theta_full": med, "se_fast": se_fast[j],
                            "width_fast": w_fast, "width_full": w_full,
                            "width_ratio": math.log(w_full) / math.log(w_fast) if math.isfinite(w_fast) else np.nan,
                            "shift_se": (med - th_fast[j]) / se_fast[j] if np.isfinite(se_fast[j]) else np.nan,
                            "divergences": int(idata.sample_stats["diverging"].values.sum())})
    return pd.DataFrame(out)


def full_fit_sentence(check: pd.DataFrame) -> str:
    """One plain sentence on how the fast fit compared with the full PyMC fit."""
    ok = check.dropna(subset=["width_ratio"])
    if ok.empty:
        return "Full-fit check: no species could be compared (one gear caught nothing)."
    ratio = ok["width_ratio"]
    mean_r = float(ratio.mean())
    return (f"Full-fit check ({ok['study'].nunique()} studies of {int(ok['n_groups'].iloc[0])} pairs, "
            f"{len(ok)} species fits): the full PyMC interval was on average {100 * (mean_r - 1):+.0f}% as wide as "
            f"the fast fit's on the log scale (range {100 * (ratio.min() - 1):+.0f}% to {100 * (ratio.max() - 1):+.0f}%), "
            f"and its centre moved by {ok['shift_se'].abs().mean():.2f} standard errors on average. "
            f"Groups needed scale roughly with the square of the width, so a {100 * (mean_r - 1):+.0f}% width "
            f"difference means about {100 * (mean_r**2 - 1):+.0f}% groups.")


# ----------------------------------------------------------------------------- report


def _fmt_groups(v) -> str:
    return "not reachable" if not math.isfinite(float(v)) else f"{int(v)}"


def plan_markdown(result: PlanResult) -> str:
    """plan.md: per species in plain language, design advice with sources, cautions."""
    t, s = result.target, result.settings
    lines = ["# Calibration study plan", "",
             f"Target: {t.describe()}.", "",
             f"Each species was simulated with {s['n_studies']} replicate studies at {len(s['sizes'])} sizes from "
             f"{s['sizes'][0]} to {s['sizes'][-1]} pairs (seed {s['seed']}). A pair is one deployment of the reference "
             "gear and one of the gear to be calibrated, at the same place and time. The number of pairs needed is "
             "where the share of simulated studies meeting the target reaches "
             f"{100 * t.assurance:g}%; its Monte Carlo range comes from a bootstrap over the simulated studies.", "",
             "## Per species", ""]
    for r in result.table.itertuples():
        factor = f"{r.factor_per_deployment:.2f}" if np.isfinite(r.factor_per_deployment) else "n/a"
        lines.append(f"- **{r.species}** ({r.gear} against {r.reference}; expected catch per deployment "
                     f"{r.catch_reference:.3g} and {r.catch_gear:.3g}, factor per deployment {factor}, kappa {r.kappa:.3g}): "
                     f"{r.note}")
    lines += ["", "| species | gear | pairs needed | Monte Carlo sd | 5-95% range | verdict |",
              "|---|---|---|---|---|---|"]
    for r in result.table.itertuples():
        sd = f"{r.mc_sd:.1f}" if np.isfinite(r.mc_sd) else ""
        rng = ("" if r.verdict in ("no catch", "not reachable")
               else f"{_fmt_groups(r.mc_lower)}-{_fmt_groups(r.mc_upper)}")
        lines.append(f"| {r.species} | {r.gear} | {_fmt_groups(r.groups_needed)} | {sd} | {rng} | {r.verdict} |")
    lines += ["", "Sources of the inputs: " + "; ".join(sorted(set(result.table["catch_source"]))) + ".",
              "Patchiness (kappa): " + "; ".join(sorted(set(result.table["kappa_source"]))) + ".",
              f"Spread of density between pairs: sd {s['density_spread']:g} on the log scale.", ""]
    lines += ["## Fast fit against the full model", ""]
    if not result.full_fit.empty:
        lines += [full_fit_sentence(result.full_fit), ""]
    elif s.get("full_fit", {}).get("done"):
        lines += ["Not compared: no species was planned with overdispersion (without it the fast fit is the "
                  "closed-form binomial logit, see docs/planning.md).", ""]
    else:
        lines += ["Not checked in this run: the fast fit (maximum likelihood with a Laplace interval) was not "
                  "compared with a full Bayesian fit. Run `calib plan` without --skip-full-fit-check to see the "
                  "difference.", ""]
    lines += ["## Design advice", ""]
    for advice, source in DESIGN_ADVICE:
        lines.append(f"- {advice} *Source: {source}*")
    lines += ["", "## Cautions", "",
              "- The plan assumes the split model calib fits (gamma patchiness, the beta-binomial split). If tow-to-tow "
              "noise is rather lognormal and common to both gears, the real study may need more pairs.",
              "- Kappa and the expected catches are guesses; a plan from a default kappa is a first look. Rerun "
              "with the kappa of a pilot study (`--factors`).",
              "- Length-dependent factors need many more fish than a single factor per species.",
              f"- {CAUTION}", ""]
    return "\n".join(lines)


# ----------------------------------------------------------------------------- command line

PLAN_DESCRIPTION = """\
How many calibration pairs does a study need? A pair (or group) is one deployment
of the reference gear and one of the gear to be calibrated at the same place and
time. calib simulates studies of increasing size with its own model of the catch
split, fits each quickly, and reports for every species the number of pairs at
which the target is met in most (--assurance) of the simulated studies, with the
simulation error of that number.

Expected catch per deployment (one of):
  --catch-table FILE      a small table you write: species, gear, expected_catch
                          (mean number caught per tow / haul / set), with rows for
                          the reference gear too
  --hauls H --catches C   survey records: the mean catch per haul by species and gear
  --factors DIR           a fitted factor set: n_caught / n_groups and the factor

Patchiness (kappa; smaller = patchier catches): from --factors when given, else
--kappa, else 3 (the model's prior median).

Writes OUT/plan.csv, curve.csv, plan_curves.png, plan.md (plain language, design
advice, cautions), full_fit_check.csv and manifest.json.
"""


def _max_groups(text: str) -> int:
    value = _positive_int(text)
    if value < MIN_GROUPS:
        raise argparse.ArgumentTypeError(f"must be at least {MIN_GROUPS}, not {text!r}")
    return value


def _number(accept, requirement: str, none_is_infinite: bool = False):
    """An argparse type: a float that ``accept`` admits, else an error saying ``requirement``."""
    def parse(text: str) -> float:
        if none_is_infinite and text.strip().lower() in ("inf", "none"):
            return math.inf
        try:
            value = float(text)
        except ValueError:
            value = float("nan")
        if not accept(value):  # NaN fails every comparison, so non-numbers land here too
            raise argparse.ArgumentTypeError(f"must be {requirement}, not {text!r}")
        return value

    return parse


_fraction = _number(lambda v: 0 < v < 1, "a number between 0 and 1")
_above_one = _number(lambda v: v > 1, "a number above 1")
_positive_float = _number(lambda v: v > 0, "a number above 0 (or 'none')", none_is_infinite=True)
_non_negative_float = _number(lambda v: v >= 0, "a number of 0 or more")


def add_plan_parser(sub, formatter_class=argparse.RawDescriptionHelpFormatter) -> argparse.ArgumentParser:
    """Add the ``plan`` subcommand to an argparse subparsers object; returns its parser."""
    p = sub.add_parser("plan", formatter_class=formatter_class,
                       help="how many calibration pairs a study needs for a target precision",
                       description=textwrap.dedent(PLAN_DESCRIPTION))
    p.add_argument("--out", required=True, metavar="DIR", help="directory to write the plan to")
    src = p.add_argument_group("expected catches")
    src.add_argument("--catch-table", metavar="FILE", default=None,
                     help="CSV with columns species, gear, expected_catch (fish per deployment)")
    src.add_argument("--hauls", metavar="FILE", default=None, help="survey hauls table (with --catches)")
    src.add_argument("--catches", metavar="FILE", default=None, help="survey catches table (with --hauls)")
    src.add_argument("--factors", metavar="DIR", default=None,
                     help="factor set from `calib fit`: gives kappa, and the expected catches when no table is given")
    src.add_argument("--reference", metavar="GEAR", default=None,
                     help="reference gear (needed with --catch-table or --hauls; a factor set names its own)")
    src.add_argument("--gear", action="append", default=[], metavar="GEAR",
                     help="plan only for this gear (repeatable; default every gear)")
    src.add_argument("--species", action="append", default=[], metavar="NAME",
                     help="plan only for this species (repeatable; default every species)")
    tgt = p.add_argument_group("target")
    tgt.add_argument("--goal", choices=["width", "power"], default="width",
                     help="width: the interval of the factor within --within of its median; "
                          "power: detect a factor of --effect against 1")
    tgt.add_argument("--within", type=_above_one, default=1.25, metavar="RATIO",
                     help="width goal: both interval ends within this factor of the median (1.25 = +25%% / -20%%)")
    tgt.add_argument("--effect", type=_above_one, default=1.5, metavar="FACTOR",
                     help="power goal: the true factor the study should detect against 1")
    tgt.add_argument("--interval", type=_fraction, default=0.9, help="interval level")
    tgt.add_argument("--assurance", type=_fraction, default=0.8,
                     help="share of studies that must meet the goal (for --goal power, the power)")
    sim = p.add_argument_group("simulation")
    sim.add_argument("--kappa", type=_positive_float, default=None,
                     help="patchiness for every species (overrides --factors); 'none' = no overdispersion")
    sim.add_argument("--density-spread", type=_non_negative_float, default=DEFAULT_DENSITY_SPREAD, metavar="SD",
                     help="sd of log density between pairs (1 = pairs' densities differ by a factor of about 2.7)")
    sim.add_argument("--max-groups", type=_max_groups, default=DEFAULT_MAX_GROUPS, metavar="N",
                     help="largest study simulated; species not calibrated by then are reported as not reachable")
    sim.add_argument("--studies", type=_positive_int, default=200, metavar="N",
                     help="simulated studies per size (more = smaller simulation error, slower)")
    sim.add_argument("--seed", type=int, default=20261202, help="random seed; the same seed gives the same plan")
    sim.add_argument("--skip-full-fit-check", action="store_true",
                     help="do not compare the fast fit with a full Bayesian fit (saves 15 s to a minute)")
    sim.add_argument("--full-fit-studies", type=_positive_int, default=2, metavar="N",
                     help="simulated studies fitted with the full model for the check")
    sim.add_argument("--quiet", action="store_true", help="no progress bar")
    return p


def _select(frame: pd.DataFrame, column: str, wanted: list[str], option: str) -> pd.DataFrame:
    if not wanted:
        return frame
    have = set(frame[column])
    unknown = [w for w in wanted if w not in have]
    if unknown:
        raise InputError([Problem(option, None, None, f"{', '.join(unknown)} not in the expected catches",
                                  f"choose among: {', '.join(sorted(have))}", False)])
    return frame[frame[column].isin(wanted)]


def run_plan_command(args) -> int:
    """Run ``calib plan`` from parsed arguments; prints the summary; returns the exit code.

    Raises InputError on bad input (the caller prints it and exits 1).
    """
    sources = [bool(args.catch_table), bool(args.hauls or args.catches)]
    if sum(sources) > 1:
        raise InputError([Problem("--catch-table/--hauls", None, None, "two sources of expected catches were given",
                                  "give either --catch-table or --hauls with --catches", False)])
    if bool(args.hauls) != bool(args.catches):
        raise InputError([Problem("--hauls/--catches", None, None, "survey records need both tables",
                                  "give --hauls and --catches together", False)])
    if not any(sources) and not args.factors:
        raise InputError([Problem("calib plan", None, None, "no expected catches given",
                                  "give --catch-table FILE, --hauls H --catches C, or --factors DIR", False)])
    if any(sources) and not args.reference:
        if args.factors:
            from calib.factors import load_factors

            args.reference = load_factors(args.factors).reference
        else:
            raise InputError([Problem("--reference", None, None, "the reference gear is not named",
                                      "add --reference GEAR (the gear everything is converted to)", False)])
    if args.catch_table:
        inputs = expected_catch_from_table(args.catch_table, args.reference)
    elif args.hauls:
        inputs = expected_catch_from_records(args.hauls, args.catches, args.reference)
    else:
        inputs = expected_catch_from_factors(args.factors)
    inputs = _select(_select(inputs, "gear", args.gear, "--gear"), "species", args.species, "--species")
    kappa_table = kappa_from_factors(args.factors) if args.factors and args.kappa is None else None
    target = PlanTarget(kind=args.goal, interval=args.interval, width_factor=args.within, effect=args.effect,
                        assurance=args.assurance)
    result = plan(inputs, target, kappa=args.kappa, kappa_table=kappa_table, density_spread=args.density_spread,
                  max_groups=args.max_groups, n_studies=args.studies, seed=args.seed,
                  full_fit=not args.skip_full_fit_check, full_fit_studies=args.full_fit_studies,
                  progressbar=not args.quiet,
                  input_paths=[args.catch_table, args.hauls, args.catches, args.factors])
    out = result.save(args.out)
    print(result.summary())
    print(f"\nWrote {out}/: plan.csv, curve.csv, plan_curves.png, plan.md, full_fit_check.csv, manifest.json")
    return 0
