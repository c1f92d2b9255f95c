"""Stage 6: harmonized abundance series (``calib series``).

Reads converted records (``calib convert``: records.parquet, factor_draws.parquet and the
manifest, or a :class:`calib.convert.Conversion` in memory) and gives, per species and year
(and per stratum when the hauls have a ``stratum``), the mean catch per unit effort in
reference-gear units, with an interval that carries both sampling error and conversion error.

Estimator
---------
For species s, year y and stratum h with hauls i = 1..n_h (the species' converted records;
a haul whose record was rejected by convert is not among them):

    ybar_h = (1/n_h) sum_i f(s, g_i) x_i            x_i = cpue of haul i, g_i its gear,
                                                    f   = the conversion factor (1 for the reference)

and over strata the stratified mean (Cochran 1977, Sampling Techniques, 3rd ed., ch. 5,
eq. 5.1):

    ybar_st = sum_h W_h ybar_h,   W_h = A_h / sum_k A_k     (A = stratum_area)

with the sum over the strata sampled that year. When any of those strata has no area, the
combined value is the plain mean over all the year's hauls (W_h = n_h / n), and the row says
so (``method`` = ``haul_mean``, flag ``unweighted``). A year in which some strata were not
sampled that the species has records from in other years is marked incomplete (``complete``
False, ``strata_missing`` lists them); its value is the stratified mean over the strata that
were sampled (weights renormalised among them, ``area_covered`` tells what share of the area
that is) or, with ``incomplete="blank"``, no value at all. Never a silent re-weighting.
With ``by_stratum=False`` strata are ignored: one plain mean per species and year, hauls
resampled within the year. Years without hauls are absent, not zero.

Uncertainty: one bootstrap resample paired with each posterior draw
--------------------------------------------------------------------
For draw d = 1..D: resample the n_h hauls of every species x stratum x year with replacement
(the nonparametric bootstrap, Efron & Tibshirani 1993, An Introduction to the Bootstrap, ch. 6;
resampling within strata as for stratified samples, their section 6.4 -- recalled from memory),
and convert the resample with posterior draw d of the factors -- the same draw d for every
record of a species x gear, and draw d of every factor comes from the same posterior sample
(factor_draws.parquet). The D values of ybar_st are draws of the index carrying both errors;
``lower`` / ``upper`` are their equal-tailed quantiles (percentile interval) and ``estimate``
is the median over draws of the index of the observed hauls (no resampling) converted with
each draw. The raw, unconverted series (``raw_*``) is the same estimator on the raw cpue with
the SAME resamples (bootstrap only), so raw and harmonized draws are paired and their
difference holds the conversion alone.

Cost: O(records + cells x draws), cells = distinct species x gear x year x stratum, never
records x draws. Within one species x stratum x year (a "unit", n hauls) the resampled mean
for draw d is (1/n) sum_g f_d(g) S_gd, where S_gd is the sum of the resampled cpue of gear g's
hauls; only these per-gear sums are drawn. Zero catches add nothing to a sum, so a resample is
described by K_gd, the number of picks of gear g's NON-ZERO hauls, the other picks falling on
the unit's zeros: (K_1d, ..., K_Gd, zeros) ~ multinomial(n, (nz_1/n, ..., nz_G/n, zeros/n)).
The picks of different gears are negatively correlated through this multinomial, which is
what the joint resampling of one stratum x year's hauls implies.

* units with at most ``exact_max_hauls`` (default 30) non-zero hauls are resampled exactly:
  K by conditional binomials, then K uniform picks among the gear's non-zero values, summed
  (cost about non-zero hauls x draws, at most 30 x units x draws);
* larger units use a moment-matched approximation: K from the normal with the multinomial's
  mean and covariance n (diag(p) - p p') (drawn exactly instead when a gear has fewer than
  ``FEW_NONZERO`` non-zero hauls there, where a normal would be poor), and, given K, the sum of
  K picks from the gear's non-zero values (independent across gears given K, as in the
  bootstrap) as a shifted gamma (Pearson type III) with that sum's mean K mu, variance
  K sigma^2 and third central moment K mu3 (mu, sigma, mu3: the moments of the gear's non-zero
  values, i.e. of the empirical distribution resampled). Catch rates are skewed, so matching
  the skewness as well as the variance matters near the threshold (tests/test_series.py shows
  a normal fails where this passes); the gamma variate comes from the Wilson-Hilferty cube-root
  transformation of one normal (an exact gamma where its shape is below 2), a normal is used
  when the skewness is below 1e-3, and sums are kept >= 0. tests/test_series.py checks the
  quantiles against exact resampling above the threshold.

Records with their own factor (converted by length class or with their own covariate values;
:class:`RecordFactors`): record i's converted cpue for draw d is x_i m_i[d], m_i rebuilt from the
conversion's files with draw d of the same posterior sample as every other factor. Exact
resampling sums x_i m_i[d] over the same picks as the raw sum. Moment matching uses, per cell and
draw, the moments of the non-zero x_i m_i[d] (a shifted gamma with the raw sum's K) and a normal
correlated with the raw sum's by the correlation of x and x m[d] over the cell's hauls (the
correlation of the two sums of the same picks; a Gaussian copula). Multipliers are built about
2^20 values at a time; cost O(their non-zero records x draws) on top of the path above.

Species are resampled independently (each species' series on its own); trend (issue 4) and
any other consumer of paired draws should call :func:`series_draws` rather than re-implement
the pairing.

Outputs of :meth:`SeriesResult.save`: ``series.csv`` (one row per species x year x stratum,
stratum ``all`` for the combined value; columns in ``SERIES_COLUMNS``), ``series_draws.parquet``
(species, year, stratum, draw, value, raw_value: the paired draws; ``draw`` is the factor draw
number of factor_draws.parquet) and ``manifest.json``.
"""

from __future__ import annotations

import argparse
import hashlib
import json
import textwrap
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd

from calib.errors import InputError, Problem

ALL = "all"  # stratum label of the combined value
EXACT_MAX_HAULS = 30  # units with more non-zero hauls than this use the moment-matched resampling
FEW_DRAWS = 200  # fewer paired draws than this make rough interval ends (common practice, no source)
UNCERTAINTY = ("both", "sampling", "conversion")
INCOMPLETE = ("flag", "blank")
REQUIRED = ("species", "year", "gear", "cpue")
OPTIONAL = ("stratum", "stratum_area", "factor_species", "factor_gear", "factor_status", "domain_flag",
            "effort_unit")
SERIES_COLUMNS = ["species", "year", "stratum", "estimate", "lower", "upper", "raw_estimate", "raw_lower",
                  "raw_upper", "interval", "n_hauls", "gears", "method", "weight", "area_covered", "complete",
                  "strata_missing", "resampling", "n_domain_flagged", "n_unconverged", "flags"]
DRAW_COLUMNS = ["species", "year", "stratum", "draw", "value", "raw_value"]
_CHUNK = 2_000_000  # resampled haul picks held at once by the exact resampling
_BLOCK = 1 << 18  # cell x draw values worked on at once by the moment-matched resampling
FEW_NONZERO = 10  # a large unit with a cell of fewer non-zero hauls draws its picks exactly

CAUTION = (
    "The harmonized series holds only as far as the conversion factors do: for the gears, sizes, "
    "habitats and seasons of the calibration study (see n_domain_flagged). Defer to the survey "
    "program's own standards and to qualified review before any management use."
)


# ----------------------------------------------------------------------------- draws


@dataclass
class SeriesDraws:
    """Paired draws of the series: bootstrap resample d converted with posterior draw d.

    Attributes
    ----------
    table : one row per species x year x stratum (``stratum == "all"`` for the combined value
        over strata): species, year, stratum, n_hauls, gears, method, weight, area_covered,
        complete, strata_missing, resampling, n_domain_flagged, n_unconverged, flags.
    value : (rows, draws) index in reference-gear cpue for each paired draw (NaN for a combined
        row left blank by ``incomplete="blank"``).
    raw : (rows, draws) the same resamples, unconverted (bootstrap only).
    estimate : (rows,) median over draws of the index of the observed hauls, converted.
    raw_estimate : (rows,) the index of the observed hauls, unconverted.
    draw : (draws,) the factor draw numbers used (``draw`` of factor_draws.parquet).
    species, years : labels of the axes of :meth:`cube`.
    settings : how the draws were made (seed, uncertainty, exact_max_hauls, ...).
    """

    table: pd.DataFrame
    value: np.ndarray
    raw: np.ndarray
    estimate: np.ndarray
    raw_estimate: np.ndarray
    draw: np.ndarray
    species: list[str]
    years: np.ndarray
    settings: dict = field(default_factory=dict)

    def cube(self, which: str = "value", stratum: str = ALL) -> np.ndarray:
        """Dense array over ``species`` x ``years`` [x draws] for one stratum (default the combined).

        ``which``: "value" or "raw" give (species, year, draw); "estimate" or "raw_estimate"
        give (species, year). Species-years without hauls are NaN.
        """
        data = {"value": self.value, "raw": self.raw, "estimate": self.estimate,
                "raw_estimate": self.raw_estimate}[which]
        sel = (self.table["stratum"] == stratum).to_numpy()
        si = pd.Index(self.species).get_indexer(self.table["species"][sel])
        yi = pd.Index(self.years).get_indexer(self.table["year"][sel])
        shape = (len(self.species), len(self.years)) + data.shape[1:]
        out = np.full(shape, np.nan)
        out[si, yi] = data[sel]
        return out


def _factorize(col: pd.Series) -> tuple[np.ndarray, list[str]]:
    """Codes 0..k-1 into the sorted distinct values present; -1 for missing (NaN or blank)."""
    codes, labels = _codes(col)
    if not len(codes):
        return codes, []
    present = np.bincount(codes[codes >= 0], minlength=len(labels)) > 0
    keep = np.flatnonzero(present)
    lut = np.full(len(labels) + 1, -1, dtype=np.int32)
    lut[keep] = np.arange(len(keep))
    return lut[codes], [labels[i] for i in keep]


def _codes(col) -> tuple[np.ndarray, list[str]]:
    """Integer codes into sorted labels; -1 for missing (NaN or blank). Labels may include
    values no record has (unused categories): they cost nothing, as only cells that occur make
    rows. A categorical with sorted, non-blank categories costs no pass over the records."""
    if isinstance(getattr(col, "dtype", None), pd.CategoricalDtype):
        codes = np.asarray(col.cat.codes if isinstance(col, pd.Series) else col.codes)
        cats = [str(c) for c in col.dtype.categories]
    else:
        codes, uniq = pd.factorize(col, use_na_sentinel=True)
        cats = [str(u) for u in uniq]
    keep = sorted((i for i, c in enumerate(cats) if c.strip() != ""), key=lambda i: cats[i])
    if keep == list(range(len(cats))):
        return codes, cats
    lut = np.full(len(cats) + 1, -1, dtype=np.int32)  # lut[-1] = -1 keeps missing missing
    lut[keep] = np.arange(len(keep))
    return lut[codes], [cats[i] for i in keep]


def _label_mask(codes: np.ndarray, labels: list[str], pick) -> np.ndarray | None:
    """Boolean per code: whether its label satisfies ``pick``; None when none does."""
    chosen = np.array([bool(pick(v)) for v in labels] + [False])  # [-1] -> False (missing)
    return chosen[codes] if chosen.any() else None


def _problem(where: str, rows: np.ndarray, column: str, message: str, fix: str) -> InputError:
    first = int(rows[0]) + 1 if len(rows) else None
    more = f" (rows {', '.join(str(int(r) + 1) for r in rows[:5])}{', ...' if len(rows) > 5 else ''})" \
        if len(rows) > 1 else ""
    return InputError([Problem(where, first, column, message + more, fix, is_csv=where.endswith(".csv"))])


def _factor_matrix(factor_draws: pd.DataFrame, where: str) -> tuple[np.ndarray, list[tuple[str, str]], np.ndarray]:
    """factor_draws (species, gear, draw, factor) as a (factors, draws) matrix, keys and draw numbers."""
    missing = [c for c in ("species", "gear", "draw", "factor") if c not in factor_draws.columns]
    if missing:
        raise InputError([Problem(where, None, c, "column missing from the factor draws",
                                  "point --converted at a directory written by `calib convert`", False)
                          for c in missing])
    sp = factor_draws["species"].astype(str).to_numpy(dtype=object)
    ge = factor_draws["gear"].astype(str).to_numpy(dtype=object)
    dr = factor_draws["draw"].to_numpy()
    order = np.lexsort((dr, ge, sp))  # by species, gear, draw
    sp, ge, dr = sp[order], ge[order], dr[order]
    draw = np.unique(dr)
    D = len(draw)
    ok = D > 0 and len(sp) % D == 0
    if ok:
        first = np.arange(0, len(sp), D)
        keys = list(zip(sp[first].tolist(), ge[first].tolist()))
        ok = (len(set(keys)) == len(keys) and (dr.reshape(-1, D) == draw).all()
              and (sp.reshape(-1, D) == sp[first][:, None]).all() and (ge.reshape(-1, D) == ge[first][:, None]).all())
    if not ok:
        raise InputError([Problem(where, None, "draw", "the factors do not all have the same draws",
                                  "convert again: every factor is stored with the same draws", False)])
    values = factor_draws["factor"].to_numpy(dtype=float)[order].reshape(len(keys), D)
    if not np.isfinite(values).all():
        raise InputError([Problem(where, None, "factor", "some factor draws are not finite numbers",
                                  "convert again: convert never stores non-finite draws", False)])
    return values, keys, draw


@dataclass
class RecordFactors:
    """Per-record factor draws of records converted by length class or with their own covariate
    values (each such record has its own factor, not one per species x gear).

    ``parts`` are the conversion kinds present (:class:`calib.length_convert.LengthRecordFactors`,
    :class:`calib.covariate_convert.CovariateRecordFactors`); each knows the species x gear keys it
    converted (``keys``), the record columns it needs (``columns``), its draw numbers (``draw``) and
    ``bind(records, rows, pick)``, which returns a function giving, for a chunk of the bound records,
    the (records x draws) multiplier matrix m with cpue_ref[d] = cpue * m[d]. Build one with
    :meth:`from_directory` or :meth:`from_conversion`; pass it to :func:`series_draws`.
    """

    parts: list

    @property
    def keys(self) -> list[tuple[str, str]]:
        return [k for p in self.parts for k in p.keys]

    @property
    def columns(self) -> list[str]:
        return list(dict.fromkeys(c for p in self.parts for c in p.columns))

    @classmethod
    def from_directory(cls, d: Path, manifest: dict) -> "RecordFactors | None":
        """From the files ``calib convert`` wrote into ``d`` (None when no record needs them)."""
        from calib.covariate_convert import CovariateRecordFactors
        from calib.length_convert import LengthRecordFactors

        counts = manifest.get("counts", {})
        parts = []
        if counts.get("length_converted"):
            fp, rp = d / "length_factor_draws.parquet", d / "record_lengths.csv"
            _need_files(d, [fp, rp], "convert again with --lengths")
            parts.append(LengthRecordFactors(_read(pd.read_parquet, fp),
                                             _read(pd.read_csv, rp, dtype={"haul_id": str, "species": str}),
                                             where=str(fp), lengths_where=str(rp)))
        if counts.get("covariate_converted"):
            tp = d / "covariate_term_draws.parquet"
            _need_files(d, [tp], "convert again with this version of calib: it stores the term draws that "
                                 "series and trend rebuild each record's factor from")
            parts.append(CovariateRecordFactors(_read(pd.read_parquet, tp), manifest.get("covariates") or {},
                                                where=str(tp)))
        return cls(parts) if parts else None

    @classmethod
    def from_conversion(cls, conversion) -> "RecordFactors | None":
        """From a :class:`calib.convert.Conversion` in memory (None when no record needs them)."""
        from calib.covariate_convert import CovariateRecordFactors
        from calib.length_convert import LengthRecordFactors

        counts = conversion.manifest.get("counts", {})
        parts = []
        if counts.get("length_converted"):
            parts.append(LengthRecordFactors(conversion.length_factor_draws, conversion.record_lengths))
        if counts.get("covariate_converted"):
            parts.append(CovariateRecordFactors(conversion.covariate_term_draws,
                                                conversion.manifest.get("covariates") or {}))
        return cls(parts) if parts else None

    def check_draws(self, factor_draws: pd.DataFrame, draw_numbers: np.ndarray, where: str) -> np.ndarray:
        """The draw numbers shared with factor_draws (all of them when it is empty); an InputError
        when the tables hold different draws or different posterior samples for a draw."""
        from calib.length_convert import _posterior_of

        ref = _posterior_of(factor_draws) if len(factor_draws) else None
        for p in self.parts:
            numbers = draw_numbers if len(factor_draws) else p.draw
            same = len(p.draw) == len(numbers) and np.array_equal(np.sort(p.draw), np.sort(numbers))
            if same and ref is not None and p.posterior is not None:
                same = ref.reindex(p.posterior.index).equals(p.posterior)
            if not same:
                raise InputError([Problem(getattr(p, "where", where), None, "draw",
                                          f"the {p.kind} factor draws are not the same posterior draws as {where}",
                                          "use the files of one conversion, or convert again", False)])
            draw_numbers = numbers
            ref = ref if ref is not None else p.posterior
        return draw_numbers


def _need_files(d: Path, files, fix: str) -> None:
    missing = [f for f in files if not f.is_file()]
    if missing:
        raise InputError([Problem(str(f), None, None, "file not found in the converted directory", fix, False)
                          for f in missing])


def _read(reader, path, **kw):
    try:
        return reader(path, **kw)
    except (OSError, ValueError) as err:
        raise InputError([Problem(str(path), None, None, f"cannot be read ({err})",
                                  "convert again into a new directory", False)]) from None


@dataclass
class _Codes:
    """What the estimator needs of the records, as integer codes, built without any
    record-sized text. Arrays marked "per haul" are indexed by ``haul`` (per record) when
    ``haul`` is given, else they are per record."""

    n: int
    sp: np.ndarray  # per record: species code
    species: list[str]
    cpue: np.ndarray  # per record
    haul: np.ndarray | None  # per record: position in the per-haul arrays
    year: np.ndarray  # per haul
    st: np.ndarray  # per haul: stratum code (0 when unstratified)
    strata: list[str]  # [ALL] when unstratified
    stratified: bool
    area: np.ndarray  # per stratum (NaN: no area)
    f: np.ndarray  # per haul: factor-key code
    f_row: np.ndarray  # (species, f codes): row of the factor matrix; -1 none
    f_gear: list[str]  # gear of each f code
    flagged: np.ndarray | None  # per haul: outside the calibration domain
    fail: np.ndarray | None  # per record: converted with a factor of status fail
    effort_units: list[str]
    haul_counts: np.ndarray | None = None  # records per haul; set when ``haul`` is non-decreasing
    used: np.ndarray | None = None  # per haul: has records

    def per_record(self, values: np.ndarray) -> np.ndarray:
        """A per-haul array spread to the records (np.repeat when records follow the hauls)."""
        if self.haul is None:
            return values
        if self.haul_counts is not None:
            return np.repeat(values, self.haul_counts)
        return values[self.haul]


def _strata_codes(stratum, used: np.ndarray | None, n: int, where: str, by_stratum: bool,
                  describe) -> tuple[np.ndarray, list[str], bool]:
    """Stratum codes, labels and whether the series is stratified; InputError for a partly
    blank stratum column or a stratum named 'all'. ``used`` marks the rows that matter."""
    if stratum is None or not by_stratum:
        return np.zeros(n, dtype=np.int8), [ALL], False
    st, strata = _codes(stratum)
    blank = st < 0 if used is None else (st < 0) & used
    if st.min(initial=0) < 0 and blank.any():
        if blank.sum() == (n if used is None else used.sum()):
            return np.zeros(n, dtype=np.int8), [ALL], False
        raise describe(np.flatnonzero(blank), "stratum",
                       f"{int(blank.sum())} {'records' if used is None else 'hauls with records'} have no stratum "
                       "while the others have one",
                       "give every haul a stratum in the hauls table and convert again, or build the series "
                       "without strata (--ignore-strata)")
    if ALL in strata:
        rows = np.flatnonzero((st == strata.index(ALL)) & (True if used is None else used))
        if len(rows):
            raise describe(rows, "stratum", f"a stratum is named '{ALL}', the label of the combined value",
                           "rename that stratum in the hauls table and convert again")
    return st, strata, True


def _stratum_areas(st: np.ndarray, area_r: np.ndarray, strata: list[str], describe) -> np.ndarray:
    """The area of each stratum (NaN: none given); an InputError when one stratum has several."""
    known = ~np.isnan(area_r)
    rows_known = np.flatnonzero(known)
    rep = np.full(len(strata), -1, dtype=np.int64)
    rep[st[rows_known]] = rows_known  # some row with an area, per stratum
    area = np.where(rep >= 0, area_r[np.maximum(rep, 0)], np.nan)
    odd = known & (area_r != area[st])
    if odd.any():
        r = int(np.flatnonzero(odd)[0])
        h = int(st[r])
        vals = np.unique(area_r[known & (st == h)])
        raise describe(np.array([r]), "stratum_area",
                       f"stratum '{strata[h]}' has {len(vals)} different stratum_area values "
                       f"({', '.join(f'{v:g}' for v in vals[:5])})",
                       "give one area per stratum in the hauls table and convert again")
    return area


def _codes_from_frame(records: pd.DataFrame, fkeys, by_stratum: bool, where: str) -> _Codes:
    missing = [c for c in REQUIRED if c not in records.columns]
    if missing:
        raise InputError([Problem(where, None, c, "column missing from the converted records",
                                  "point --converted at a directory written by `calib convert`", False)
                          for c in missing])
    n = len(records)

    def describe(rows, column, message, fix):
        return _problem(where, rows, column, message, fix)

    sp, species = _codes(records["species"])
    if sp.min(initial=0) < 0:
        rows = np.flatnonzero(sp < 0)
        raise describe(rows, "species", f"{len(rows)} records have no species", "convert again from valid tables")
    year = records["year"].to_numpy()
    if not np.issubdtype(year.dtype, np.integer):
        bad = np.flatnonzero(~np.isfinite(year.astype(float)) | (year != np.round(year)))
        if len(bad):
            raise describe(bad, "year", "year is not a whole number", "convert again from valid hauls")
        year = year.astype(np.int64)
    cpue = records["cpue"].to_numpy(dtype=float)
    st, strata, stratified = _strata_codes(records["stratum"] if "stratum" in records.columns else None, None, n,
                                           where, by_stratum, describe)
    area = np.full(len(strata), np.nan)
    if stratified and "stratum_area" in records.columns:
        area = _stratum_areas(st, records["stratum_area"].to_numpy(dtype=float), strata, describe)
    # factor key: (factor_species, factor_gear), default (species, gear)
    gc, g_labels = _codes(records["factor_gear"] if "factor_gear" in records.columns else records["gear"])
    krow = {k: i for i, k in enumerate(fkeys)}
    if "factor_species" in records.columns and not _same_codes(records["factor_species"], records["species"]):
        fsc, fs_labels = _codes(records["factor_species"])
        pair = fsc.astype(np.int64) * len(g_labels) + gc
        pair[(fsc < 0) | (gc < 0)] = -1
        present, f = np.unique(pair, return_inverse=True)
        f = f.reshape(-1)
        if present[0] < 0:
            rows = np.flatnonzero(pair < 0)
            raise describe(rows, "factor_species", f"{len(rows)} records have no factor_species or factor_gear",
                           "convert again from valid tables")
        pairs = [(fs_labels[c // len(g_labels)], g_labels[c % len(g_labels)]) for c in present.tolist()]
        f_row = np.tile(np.array([krow.get(pr, -1) for pr in pairs], dtype=np.int64), (len(species), 1))
        f_gear = [pr[1] for pr in pairs]
    else:
        f = gc
        f_row = np.array([[krow.get((s, g), -1) for g in g_labels] for s in species], dtype=np.int64).reshape(
            len(species), len(g_labels))
        f_gear = g_labels
    if f.min(initial=0) < 0:
        rows = np.flatnonzero(f < 0)
        raise describe(rows, "factor_gear", f"{len(rows)} records have no gear", "convert again from valid hauls")
    flagged = fail = None
    if "domain_flag" in records.columns:
        flagged = _label_mask(*_codes(records["domain_flag"]), lambda v: v != "")
    if "factor_status" in records.columns:
        fail = _label_mask(*_codes(records["factor_status"]), lambda v: v == "fail")
    units = _factorize(records["effort_unit"])[1] if "effort_unit" in records.columns else []
    return _Codes(n=n, sp=sp, species=species, cpue=cpue, haul=None, year=year, st=st, strata=strata,
                  stratified=stratified, area=area, f=f, f_row=f_row, f_gear=f_gear, flagged=flagged, fail=fail,
                  effort_units=units)


def _codes_from_conversion(conversion, fkeys, by_stratum: bool, where: str) -> _Codes:
    """The same from a Conversion in memory, at haul level: O(records) integer passes only."""
    lean = conversion.lean_records()
    h, haul = lean["hauls"], lean["haul"]
    n, n_h = len(haul), len(h)
    in_order = bool(n < 2 or (haul[1:] >= haul[:-1]).all())
    if in_order:  # records follow the hauls' order (convert's): counts from the run boundaries
        starts = np.flatnonzero(np.r_[True, haul[1:] != haul[:-1]]) if n else np.zeros(0, dtype=np.int64)
        counts = np.zeros(n_h, dtype=np.int64)
        counts[haul[starts]] = np.diff(np.r_[starts, n])
    else:
        counts = np.bincount(haul, minlength=n_h)
    used = counts > 0  # hauls with converted records

    def describe(rows, column, message, fix):
        ids = ", ".join(f"'{x}'" for x in h["haul_id"].to_numpy()[rows[:5]])
        return InputError([Problem(conversion.manifest.get("inputs", {}).get("hauls", {}).get("path", where), None,
                                   column, f"{message} (hauls {ids}{', ...' if len(rows) > 5 else ''})", fix)])

    species = lean["species_labels"]
    effort = h["effort"].to_numpy(dtype=float)
    cpue = lean["count"] / (np.repeat(effort, counts) if in_order else effort[haul])
    st, strata, stratified = _strata_codes(h["stratum"] if "stratum" in h.columns else None, used, n_h, where,
                                           by_stratum, describe)
    area = np.full(len(strata), np.nan)
    if stratified and "stratum_area" in h.columns:
        rows = np.flatnonzero(used)
        area = _stratum_areas(st[rows], h["stratum_area"].to_numpy(dtype=float)[rows], strata,
                              lambda r, *a: describe(rows[r], *a))
    gc, g_labels = _codes(h["gear"])
    krow = {k: i for i, k in enumerate(fkeys)}
    f_row = np.array([[krow.get((s, g), -1) for g in g_labels] for s in species], dtype=np.int64).reshape(
        len(species), len(g_labels))
    flag = np.asarray(lean["haul_flag"], dtype=object)
    flagged = flag != "" if len(flag) else None
    status_fail = np.array([s == "fail" for s in lean["factor_status"]], dtype=bool)
    fail = status_fail[lean["factor"]] if status_fail.any() else None
    uc, u_labels = _codes(h["effort_unit"])
    units = [u_labels[i] for i in np.unique(uc[used]) if i >= 0]
    return _Codes(n=n, sp=lean["species"], species=species, cpue=cpue, haul=haul, year=h["year"].to_numpy(),
                  st=st, strata=strata, stratified=stratified, area=area, f=gc, f_row=f_row, f_gear=g_labels,
                  flagged=flagged, fail=fail, effort_units=units, haul_counts=counts if in_order else None,
                  used=used)


def series_draws(records, factor_draws: pd.DataFrame, *, draws: int | None = None, seed: int = 0,
                 by_stratum: bool = True, uncertainty: str = "both", exact_max_hauls: int = EXACT_MAX_HAULS,
                 incomplete: str = "flag", where: str = "records",
                 draws_where: str = "factor_draws", stream: int | None = None,
                 record_factors: RecordFactors | None = None) -> SeriesDraws:
    """Paired draws of the harmonized (and raw) series: the estimator shared by series and trend.

    Parameters
    ----------
    records : converted records -- a :class:`calib.convert.Conversion` (fastest: nothing
        record-sized is built), or a DataFrame with one row per haul x species: species, year,
        gear, cpue (count / effort, per effort unit of the gear) and optionally stratum,
        stratum_area, factor_species / factor_gear (the factor key, default species / gear),
        factor_status, domain_flag, effort_unit. Text columns may be categoricals (fast) or
        text. A subset of records (e.g. one source's) gives that subset's series.
    factor_draws : species, gear, draw, factor: every factor's draws (reference factors 1), as
        written by convert.
    draws : number of paired draws; default every factor draw; otherwise a seeded subset.
    seed : seed of the subset and of the resampling; the same seed gives the same draws.
    by_stratum : use the records' strata (per-stratum rows and the stratified combination);
        False treats every year as one unstratified sample.
    uncertainty : "both" (default): resample d with factor draw d; "sampling": resamples with the
        median factor (conversion error ignored); "conversion": the observed hauls with each
        factor draw (sampling error ignored). For comparisons; "both" is the honest interval.
    exact_max_hauls : units (species x stratum x year) with at most this many hauls with a
        non-zero catch are resampled exactly, larger ones by the moment-matched approximation
        (module docstring). Zero catches do not count: they add nothing to a resampled sum.
    incomplete : "flag" (default) gives incomplete years the mean over the strata sampled;
        "blank" leaves their combined value empty (NaN).
    where, draws_where : names of the inputs for error messages.
    stream : None (default) resamples with the generator that picked the draws; a number gives
        the resampling its own stream, ``default_rng([seed, stream])``, after the same pick of
        draws. Series of disjoint subsets of records (e.g. one per source) compared draw by
        draw need the same factor draws but independent resamples: give each its own stream.
    record_factors : the per-record factor draws of records converted by length class or with
        their own covariates (:class:`RecordFactors`; built from a Conversion automatically). A
        DataFrame of such records then needs haul_id (length) or the covariate columns. Each such
        record's converted cpue for draw d is cpue * m[d], its own multiplier rebuilt from the same
        factor draw d as every other record; resampling is the same, the moment-matched path uses
        each draw's moments of the converted values (module docstring).

    Returns
    -------
    SeriesDraws. ``value[r, d]`` pairs with ``raw[r, d]`` and with factor draw ``draw[d]``.

    Raises
    ------
    InputError when columns are missing, some records have a stratum and others none, a
    stratum has several areas or is named "all", or a record's factor has no draws.
    """
    from calib.convert import Conversion

    if uncertainty not in UNCERTAINTY:
        raise ValueError(f"uncertainty must be one of {UNCERTAINTY}, not {uncertainty!r}")
    if incomplete not in INCOMPLETE:
        raise ValueError(f"incomplete must be one of {INCOMPLETE}, not {incomplete!r}")
    if int(exact_max_hauls) != exact_max_hauls or exact_max_hauls < 1:
        raise ValueError(f"exact_max_hauls must be a positive whole number, not {exact_max_hauls}")
    is_conv = isinstance(records, Conversion)
    rf = record_factors
    if is_conv and rf is None:
        rf = RecordFactors.from_conversion(records)
    if is_conv and rf is not None:  # such records have no single species x gear factor: work on a frame
        wanted = list(dict.fromkeys(list(REQUIRED) + list(OPTIONAL) + rf.columns))
        records = records.record_columns([c for c in wanted if c in records.store.columns])
        is_conv = False
    if rf is not None and not len(factor_draws):
        F_all, fkeys, draw_numbers = np.zeros((0, 0)), [], np.zeros(0, dtype=np.int64)
    else:
        F_all, fkeys, draw_numbers = _factor_matrix(factor_draws, draws_where)
    rm_fk = np.zeros(len(fkeys), dtype=bool)  # factor rows whose records carry their own multipliers
    part_of_fk = np.full(len(fkeys), -1, dtype=np.int64)
    if rf is not None:
        draw_numbers = rf.check_draws(factor_draws, draw_numbers, draws_where)
        clash = sorted(set(rf.keys) & set(fkeys))
        if clash:
            raise InputError([Problem(draws_where, None, "species", f"'{clash[0][0]}' with '{clash[0][1]}' has both "
                                      "species-level and per-record factor draws", "convert again", False)])
        part_of_fk = np.r_[part_of_fk, [p for p, part in enumerate(rf.parts) for _ in part.keys]].astype(np.int64)
        # their factor row is 1: the record's own multiplier carries the conversion
        F_all = np.vstack([F_all.reshape(-1, len(draw_numbers)), np.ones((len(rf.keys), len(draw_numbers)))])
        fkeys = list(fkeys) + rf.keys
        rm_fk = part_of_fk >= 0
    n = records.n_records if is_conv else len(records)
    if n == 0:
        raise InputError([Problem(where, None, None, "there are no converted records",
                                  "convert survey records first; see rejected.csv for why none converted", False)])
    rng = np.random.default_rng(seed)
    if draws is not None:
        if int(draws) != draws or draws < 1:
            raise ValueError(f"draws must be a positive whole number, not {draws}")
        if draws > len(draw_numbers):
            raise InputError([Problem(draws_where, None, None,
                                      f"{draws} draws asked for, but the conversion holds {len(draw_numbers)}",
                                      f"give --draws {len(draw_numbers)} or fewer, or leave it out", False)])
        pick = np.sort(rng.choice(len(draw_numbers), size=int(draws), replace=False))
    else:
        pick = np.arange(len(draw_numbers))
    if stream is not None:
        rng = np.random.default_rng([int(seed), int(stream)])
    F = F_all[:, pick]
    D = F.shape[1]
    codes = (_codes_from_conversion(records, fkeys, by_stratum, where) if is_conv
             else _codes_from_frame(records, fkeys, by_stratum, where))
    cpue = codes.cpue
    if not (cpue.min() >= 0 and np.isfinite(cpue.sum())):
        bad = np.flatnonzero(~np.isfinite(cpue) | (cpue < 0))
        raise _problem(where, bad, "cpue", "cpue is not a finite number >= 0", "convert again from valid tables")
    species, strata, area = codes.species, codes.strata, codes.area
    has_strata = codes.stratified
    mult, rm_rec = None, None
    if rm_fk.any():
        mult, rm_rec = _bind_record_factors(rf, records, codes, part_of_fk, pick, D, uncertainty, where)
    S_, H, NF = len(species), len(strata), len(codes.f_gear)

    # --- cells: species x year x stratum x factor key; key = species * (Y H NF) + the haul's part,
    # so the record-level work is one gather and two integer operations
    year = codes.year
    used_year = year if codes.haul is None else year[codes.used]
    y0 = int(used_year.min())
    years = np.arange(y0, int(used_year.max()) + 1)
    Y = len(years)
    part = year.astype(np.int64) - y0  # per haul (or record)
    part *= H
    part += codes.st
    part *= NF
    part += codes.f
    cell_key = codes.sp.astype(np.int64)
    cell_key *= Y * H * NF
    cell_key += codes.per_record(part)
    del part
    # Every per-cell total is a bincount over the raw key when its range is small (no record-sized
    # lookup), else over the key's rank among the keys present.
    R = S_ * Y * H * NF
    if R <= max(4 * n, 1 << 22):
        key, n_keys, cells = cell_key, R, None
    else:
        cells, key = np.unique(cell_key, return_inverse=True)
        key, n_keys = key.reshape(-1), len(cells)
    del cell_key
    tag = key * 4
    tag += cpue > 0
    if codes.flagged is not None:
        tag += 2 * codes.per_record(codes.flagged)
    counts = np.bincount(tag, minlength=4 * n_keys).reshape(n_keys, 4)  # (in domain, out) x (zero, non-zero)
    del tag
    sums = [np.bincount(key, weights=cpue, minlength=n_keys)]
    power = cpue * cpue
    sums.append(np.bincount(key, weights=power, minlength=n_keys))
    power *= cpue
    sums.append(np.bincount(key, weights=power, minlength=n_keys))
    del power
    unconverged = np.zeros(n_keys) if codes.fail is None else np.bincount(key[codes.fail], minlength=n_keys)
    n_all = counts.sum(axis=1)
    if cells is None:
        cells = np.flatnonzero(n_all)
        keep = cells
    else:
        keep = slice(None)
    C = len(cells)
    n_c = n_all[keep].astype(np.int64)
    nz_c = (counts[keep, 1] + counts[keep, 3]).astype(np.int64)
    flagged = (counts[keep, 2] + counts[keep, 3]).astype(float)
    sx, s2, s3 = (x[keep] for x in sums)
    unconverged = unconverged[keep].astype(float)
    del counts, sums, n_all

    def cell_of_records(key: np.ndarray) -> np.ndarray:
        """Cell index of every record from its key (a record-sized lookup, made only when needed)."""
        if isinstance(keep, slice):
            return key
        lut = np.full(n_keys, -1, dtype=np.int64)
        lut[cells] = np.arange(C)
        return lut[key]

    f_c = cells % NF
    unit_of_key = cells // NF
    c_sp = unit_of_key // (Y * H)
    fk_c = codes.f_row[c_sp, f_c]
    if fk_c.min(initial=0) < 0:
        c = int(np.flatnonzero(fk_c < 0)[0])
        rows = np.flatnonzero(cell_of_records(key) == c)
        raise _problem(where, rows[:1], "factor_gear",
                       f"no factor draws for species '{species[c_sp[c]]}' with gear '{codes.f_gear[f_c[c]]}' "
                       f"({len(rows)} records)",
                       "convert again: records and factor_draws.parquet must come from one conversion")
    # moments of each cell's non-zero catch rates: zeros add nothing to a resampled sum, only to
    # how many picks are made, and that is drawn exactly (see _exact_sums, _moment_matched_block).
    # Power sums over all records (a zero adds 0 to each), then central moments per cell.
    mu_nz, var_nz, m3_nz = _central_moments(nz_c, sx, s2, s3)

    units, unit_of_cell = np.unique(unit_of_key, return_inverse=True)
    unit_of_cell = unit_of_cell.reshape(-1)
    U = len(units)
    ustart = np.flatnonzero(np.r_[True, np.diff(unit_of_cell) != 0])
    n_u = np.add.reduceat(n_c, ustart)
    nz_u = np.add.reduceat(nz_c, ustart)
    u_st = units % H
    u_yc = (units // H) % Y
    u_sp = units // (H * Y)

    # --- resampled per-cell sums S[c, d] (sum of the resampled cpue of the cell's hauls)
    exact_u = nz_u <= exact_max_hauls
    resample = uncertainty != "conversion"
    exact_c = exact_u[unit_of_cell] & (nz_c > 0)
    # cells of records with their own multipliers (length- or covariate-converted): their converted
    # sums are not factor x raw sum; their non-zero records, sorted by cell, are visited in chunks
    rm_c = rm_fk[fk_c]
    rm_any = mult is not None and bool(rm_c.any())
    if rm_any:
        cor = cell_of_records(key)
        rsel = np.flatnonzero(rm_rec & (cpue > 0))
        rcell = cor[rsel]
        o = np.argsort(rcell, kind="stable")
        rm_order, rm_cell = rsel[o], rcell[o]
        rm_ptr = np.r_[0, np.cumsum(np.bincount(rcell, minlength=C))]
        del cor, rsel, rcell, o
    S_exact = Sh_exact = None
    if resample and exact_c.any():
        S_exact, Sh_exact = _exact_sums(rng, cpue, cell_of_records(key), unit_of_cell, ustart, n_u, nz_c, exact_c, D,
                                        mult=mult if rm_any else None, rm_c=rm_c)
    del key
    F_use = F if uncertainty != "sampling" else np.repeat(np.median(F, axis=1)[:, None], D, axis=1)
    harm_u, raw_u = np.empty((U, D)), np.empty((U, D))
    raw_point_u = np.add.reduceat(sx, ustart) / n_u
    # observed hauls converted with each draw: sum over the unit's cells of sx_c F[fk_c, d] / n_u,
    # a sparse (units x factors) times dense (factors x draws) product
    from scipy.sparse import csr_matrix

    point_u = csr_matrix((np.where(rm_c, 0.0, sx) / n_u[unit_of_cell], (unit_of_cell, fk_c)),
                         shape=(U, F_use.shape[0])) @ F_use
    point_u = np.asarray(point_u)  # cells with per-record multipliers are added block by block below
    ex_row = np.cumsum(exact_c) - 1  # row of each exact cell in S_exact
    exh_row = np.cumsum(exact_c & rm_c) - 1  # row of each exact cell with multipliers in Sh_exact
    uend = np.r_[ustart[1:], C]
    u0 = 0
    while u0 < U:  # blocks of whole units, about _BLOCK cell x draw values each (kept in cache)
        u1 = max(u0 + 1, int(np.searchsorted(uend, ustart[u0] + max(_BLOCK // D, 1), side="right")))
        c0, c1 = ustart[u0], uend[u1 - 1]
        rc = rm_c[c0:c1] if rm_any else np.zeros(c1 - c0, dtype=bool)
        mm = ~exact_u[u0:u1] if resample else np.zeros(u1 - u0, dtype=bool)
        P = None
        if rc.any():  # sums of the converted values, draw by draw (higher powers for moment matching)
            P = _power_sums(mult, cpue, rm_order, rm_cell, rm_ptr, c0, c1, D, higher=bool(mm.any()))
        if resample:
            S = np.zeros((c1 - c0, D))
            Sh = np.zeros((c1 - c0, D)) if P is not None else S  # converted sums where they differ
            ex = np.flatnonzero(exact_c[c0:c1])
            if len(ex):
                S[ex] = S_exact[ex_row[c0 + ex]]
                if P is not None:
                    Sh[ex] = S[ex]
                    exr = ex[rc[ex]]
                    if len(exr):
                        Sh[exr] = Sh_exact[exh_row[c0 + exr]]
            if mm.any():
                hm = None
                if P is not None:  # each draw's moments of the converted values, and their covariance with cpue
                    with np.errstate(divide="ignore", invalid="ignore"):
                        cov = np.where(nz_c[c0:c1, None] > 0, P[3] / nz_c[c0:c1, None], 0.0) - \
                            mu_nz[c0:c1, None] * np.where(nz_c[c0:c1, None] > 0, P[0] / nz_c[c0:c1, None], 0.0)
                    hm = (*_central_moments(nz_c[c0:c1, None], *P[:3]), cov)
                _moment_matched_block(S, rng, unit_of_cell[c0:c1] - u0, ustart[u0:u1] - c0, mm, n_u[u0:u1],
                                      nz_c[c0:c1], mu_nz[c0:c1], var_nz[c0:c1], m3_nz[c0:c1],
                                      Sh=Sh if P is not None else None, rm=rc, harm=hm)
        else:
            S = np.broadcast_to(sx[c0:c1, None], (c1 - c0, D))
            Sh = S
            if P is not None:
                Sh = np.array(S)
                Sh[rc] = P[0][rc]
        starts = ustart[u0:u1] - c0
        nu = n_u[u0:u1, None]
        raw_u[u0:u1] = np.add.reduceat(S, starts, axis=0) / nu
        FS = F_use[fk_c[c0:c1]]
        FS *= Sh
        harm_u[u0:u1] = np.add.reduceat(FS, starts, axis=0) / nu
        if P is not None:  # observed hauls converted with their own multipliers, draw by draw
            point_u[u0:u1] += np.add.reduceat(P[0], starts, axis=0) / nu
        u0 = u1
    del S_exact

    # --- combine strata per species x year
    group = units // H  # species x year
    gstart = np.flatnonzero(np.r_[True, np.diff(group) != 0])
    gid = np.repeat(np.arange(len(gstart)), np.diff(np.r_[gstart, U]))
    u_area = area[u_st]
    g_all_area = np.logical_and.reduceat(np.isfinite(u_area), gstart) if has_strata else np.zeros(len(gstart), bool)
    n_g = np.add.reduceat(n_u, gstart)
    area_sum = np.add.reduceat(np.where(np.isfinite(u_area), u_area, 0.0), gstart)
    weighted = g_all_area[gid]
    w_u = np.where(weighted, u_area / np.where(weighted, area_sum[gid], 1.0), n_u / n_g[gid])
    harm_g = np.add.reduceat(w_u[:, None] * harm_u, gstart, axis=0)
    raw_g = np.add.reduceat(w_u[:, None] * raw_u, gstart, axis=0)
    point_g = np.add.reduceat(w_u[:, None] * point_u, gstart, axis=0)
    raw_point_g = np.add.reduceat(w_u * raw_point_u, gstart)

    # strata the species has records from in some year; a year without one of them is incomplete
    expected = [set() for _ in species]
    for s_, h_ in zip(u_sp, u_st):
        expected[s_].add(int(h_))
    g_sp, g_yc = u_sp[gstart], u_yc[gstart]
    sampled = [set(u_st[a:b].tolist()) for a, b in zip(gstart, np.r_[gstart[1:], U])]
    g_missing = [sorted(expected[s_] - smp) for s_, smp in zip(g_sp, sampled)] if has_strata else [[] for _ in gstart]
    g_complete = np.array([not m for m in g_missing])
    if incomplete == "blank":
        harm_g[~g_complete] = np.nan
        raw_g[~g_complete] = np.nan
        point_g[~g_complete] = np.nan
        raw_point_g[~g_complete] = np.nan
    expected_area = np.array([sum(area[h] for h in expected[s_]) for s_ in g_sp])
    g_area_covered = np.where(g_all_area, area_sum / np.where(g_all_area, expected_area, 1.0), np.nan)

    # --- descriptive columns (Python loops over cells and rows only, never records)
    cell_gear = [fkeys[k][1] for k in fk_c]
    u_gears = [dict() for _ in range(U)]
    for c in range(C):
        d_ = u_gears[unit_of_cell[c]]
        d_[cell_gear[c]] = d_.get(cell_gear[c], 0) + int(n_c[c])
    u_flagged = np.add.reduceat(flagged, ustart)
    u_unconv = np.add.reduceat(unconverged, ustart)
    no_area = sorted({strata[h] for h in np.unique(u_st) if not np.isfinite(area[h])}) if has_strata else []

    def gears_text(d_: dict) -> str:
        return "; ".join(f"{g}:{k}" for g, k in sorted(d_.items()))

    rows = []
    values, raws, points, raw_points = [], [], [], []
    for gi, (a, b) in enumerate(zip(gstart, np.r_[gstart[1:], U])):
        s_, y_ = species[g_sp[gi]], int(years[g_yc[gi]])
        merged: dict = {}
        for u in range(a, b):
            for g, k in u_gears[u].items():
                merged[g] = merged.get(g, 0) + k
        single = [strata[u_st[u]] for u in range(a, b) if n_u[u] == 1]
        modes = {"exact" if exact_u[u] else "moment-matched" for u in range(a, b)} if resample else {"none"}
        flags = []
        if g_missing[gi]:
            names = ", ".join(strata[h] for h in g_missing[gi])
            flags.append(f"incomplete: {names} not sampled this year (sampled in other years)"
                         + ("; combined value left blank" if incomplete == "blank" else
                            "; mean over the strata sampled"))
        method = "stratified_mean" if g_all_area[gi] else "haul_mean"
        if has_strata and not g_all_area[gi]:
            lacking = ", ".join(strata[u_st[u]] for u in range(a, b) if not np.isfinite(area[u_st[u]]))
            flags.append(f"unweighted: no stratum_area for {lacking}; plain mean over hauls")
        if single:
            flags.append(f"single haul in {', '.join(single)}: no sampling variance there")
        nf, nu_ = int(u_flagged[a:b].sum()), int(u_unconv[a:b].sum())
        if nf:
            flags.append(f"outside the calibration domain: {nf} hauls")
        if nu_:
            flags.append(f"unconverged factor used for {nu_} hauls")
        rows.append({"species": s_, "year": y_, "stratum": ALL, "n_hauls": int(n_g[gi]), "gears": gears_text(merged),
                     "method": method, "weight": np.nan, "area_covered": g_area_covered[gi],
                     "complete": bool(g_complete[gi]),
                     "strata_missing": "; ".join(strata[h] for h in g_missing[gi]),
                     "resampling": "+".join(sorted(modes)), "n_domain_flagged": nf, "n_unconverged": nu_,
                     "flags": "; ".join(flags)})
        values.append(harm_g[gi]); raws.append(raw_g[gi])  # noqa: E702
        points.append(point_g[gi]); raw_points.append(raw_point_g[gi])  # noqa: E702
        if not has_strata:
            continue
        for u in range(a, b):
            uf = []
            if n_u[u] == 1:
                uf.append("single haul: no sampling variance")
            if u_flagged[u]:
                uf.append(f"outside the calibration domain: {int(u_flagged[u])} hauls")
            if u_unconv[u]:
                uf.append(f"unconverged factor used for {int(u_unconv[u])} hauls")
            rows.append({"species": s_, "year": y_, "stratum": strata[u_st[u]], "n_hauls": int(n_u[u]),
                         "gears": gears_text(u_gears[u]), "method": "haul_mean", "weight": w_u[u],
                         "area_covered": np.nan, "complete": True, "strata_missing": "",
                         "resampling": ("exact" if exact_u[u] else "moment-matched") if resample else "none",
                         "n_domain_flagged": int(u_flagged[u]), "n_unconverged": int(u_unconv[u]),
                         "flags": "; ".join(uf)})
            values.append(harm_u[u]); raws.append(raw_u[u])  # noqa: E702
            points.append(point_u[u]); raw_points.append(raw_point_u[u])  # noqa: E702
    table = pd.DataFrame(rows)
    value, raw = np.vstack(values), np.vstack(raws)
    shown = np.isfinite(np.asarray(raw_points))  # rows not left blank
    if not (np.isfinite(value[shown]).all() and np.isfinite(raw[shown]).all()):  # pragma: no cover
        raise AssertionError("internal error: non-finite series draws")
    point = np.vstack(points)
    with np.errstate(all="ignore"):
        estimate = row_quantiles(point, [0.5])[0]
    settings = {"draws_used": int(D), "draws_available": int(len(draw_numbers)), "thinned": draws is not None,
                "seed": int(seed), "uncertainty": uncertainty, "exact_max_hauls": int(exact_max_hauls),
                "by_stratum": bool(by_stratum), "stratified": bool(has_strata), "incomplete": incomplete,
                "strata": [strata[h] for h in np.unique(u_st)] if has_strata else [],
                "strata_without_area": no_area,
                "units_exact": int(exact_u.sum()), "units_moment_matched": int((~exact_u).sum()),
                "cells": int(C), "records": int(n), "effort_units": codes.effort_units,
                "records_with_own_factor": int(rm_rec.sum()) if rm_rec is not None else 0,
                "own_factor_kinds": [p.kind for p in rf.parts] if rf is not None and rm_rec is not None else []}
    return SeriesDraws(table=table, value=value, raw=raw, estimate=estimate, raw_estimate=np.asarray(raw_points),
                       draw=draw_numbers[pick], species=[species[i] for i in np.unique(u_sp)],
                       years=years[np.unique(u_yc)], settings=settings)


def _bind_record_factors(rf, records, codes, part_of_fk, pick, D, uncertainty, where):
    """The multiplier function of the records with their own factor draws, and which they are.

    Returns (mult, rm) where ``mult(idx)`` is the (len(idx), D) matrix of the records' multipliers
    at the draws used (1 for records converted with a species x gear factor; each record's median
    over the draws when ``uncertainty == "sampling"``) and ``rm`` marks the records that have their
    own; (None, None) when no record does.
    """
    fk = codes.f_row[codes.sp, codes.f]  # per record: frame records only
    part = np.where(fk >= 0, part_of_fk[np.maximum(fk, 0)], -1)
    if not (part >= 0).any():
        return None, None
    row = np.full(codes.n, -1, dtype=np.int64)
    fns = []
    for p, prov in enumerate(rf.parts):
        rows = np.flatnonzero(part == p)
        if not len(rows):
            fns.append(None)
            continue
        missing = [c for c in prov.columns if c not in records.columns]
        if missing:
            raise InputError([Problem(where, None, c, f"column missing: the records converted by {prov.kind} need it "
                                      "to find their own factor draws",
                                      "pass the records with every column convert wrote", False) for c in missing])
        fn, has = prov.bind(records, rows, pick)
        bad = rows[~has & (codes.cpue[rows] > 0)]
        if len(bad):
            what = ("have no measured lengths in record_lengths.csv" if prov.kind == "length" else
                    "have covariate values with no term draws in covariate_term_draws.parquet")
            raise _problem(where, bad, "haul_id" if prov.kind == "length" else "species",
                           f"{len(bad)} records with a catch converted by {prov.kind} {what}",
                           "use the files of one conversion, or convert again")
        row[rows] = np.arange(len(rows))
        fns.append(fn)

    def mult(idx: np.ndarray) -> np.ndarray:
        M = np.ones((len(idx), D))
        pp = part[idx]
        for p, fn in enumerate(fns):
            if fn is not None:
                sel = np.flatnonzero(pp == p)
                if len(sel):
                    M[sel] = fn(row[idx[sel]])
        if uncertainty == "sampling":
            M[:] = np.median(M, axis=1, keepdims=True)
        return M

    return mult, part >= 0


def _power_sums(mult, cpue, order, cell, ptr, c0, c1, D, higher: bool):
    """Sums over the non-zero records of cells c0..c1 of y[d] = cpue * m[d] (and of y^2, y^3 and
    cpue * y when ``higher``), as (c1 - c0, D) arrays. ``order`` lists those records sorted by ``cell``; ``ptr``
    gives each cell's first position in it. Records are taken about 2^20 values at a time."""
    P = [np.zeros((c1 - c0, D)) for _ in range(4 if higher else 1)]
    a, b = int(ptr[c0]), int(ptr[c1])
    step = max(1, (1 << 20) // D)
    for s0 in range(a, b, step):
        idx = order[s0:min(s0 + step, b)]
        cl = cell[s0:min(s0 + step, b)] - c0
        st = np.flatnonzero(np.r_[True, cl[1:] != cl[:-1]])
        y = mult(idx)
        x = cpue[idx][:, None]
        y *= x
        P[0][cl[st]] += np.add.reduceat(y, st, axis=0)
        if higher:
            P[3][cl[st]] += np.add.reduceat(y * x, st, axis=0)
            y2 = y * y
            P[1][cl[st]] += np.add.reduceat(y2, st, axis=0)
            y2 *= y
            P[2][cl[st]] += np.add.reduceat(y2, st, axis=0)
    return P


def _pearson3_sum(K, z, mu, sd, g):
    """Sum of K picks with mean mu, sd and skewness g per pick, as a shifted gamma (Pearson type
    III) driven by the standard normal z: the transformation of :func:`_moment_matched_block`,
    with the exact gamma variate (shape below 2) taken as the gamma quantile of Phi(z), so
    correlated normals give correlated raw and converted sums (a Gaussian copula). Arrays
    broadcast; values kept >= 0."""
    from scipy.special import gammaincinv, ndtr

    K, z = np.asarray(K, dtype=float), np.asarray(z, dtype=float)
    mu, sd, g = (np.broadcast_to(np.asarray(v, dtype=float), K.shape) for v in (mu, sd, g))
    gam = np.abs(g) >= 1e-3
    gs = np.where(gam, g, 1.0)
    out = K * mu
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        b = np.abs(gs) / 6.0
        bt = np.where(K > 0, b / np.sqrt(np.where(K > 0, K, 1.0)), 0.0)
        t = 1.0 - bt * bt + z * bt
        wh = out + K * (2.0 * sd / gs) * (t * t * t - 1.0)
        shape = 4.0 * K / (gs * gs)
        small = gam & (shape < 2.0) & (K > 0)
        if small.any():
            G = gammaincinv(shape[small], ndtr(z[small]))
            wh[small] = out[small] + np.sign(gs[small]) * (sd[small] * np.abs(gs[small]) / 2.0) * (G - shape[small])
        out = np.where(gam, wh, out + np.sqrt(K) * sd * z)
    return np.maximum(out, 0.0)


def _central_moments(n, s1, s2, s3) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Mean, variance and third central moment (population, i.e. of the empirical distribution
    the bootstrap resamples) from counts and power sums; 0 where n = 0. A variance below
    1e-12 of the squared mean is rounding: the values are taken as equal (variance and third
    moment 0)."""
    with np.errstate(divide="ignore", invalid="ignore"):
        m = np.where(n > 0, s1 / n, 0.0)
        e2 = np.where(n > 0, s2 / n, 0.0)
        e3 = np.where(n > 0, s3 / n, 0.0)
    var = e2 - m * m
    m3 = e3 - 3.0 * m * e2 + 2.0 * m**3
    flat = var <= 1e-12 * m * m
    var[flat] = 0.0
    m3[flat] = 0.0
    return m, var, m3


def row_quantiles(values: np.ndarray, probs) -> np.ndarray:
    """Quantiles of each row, (len(probs), rows): numpy's default definition (linear between
    order statistics, definition 7 of Hyndman & Fan 1996, "Sample quantiles in statistical
    packages", The American Statistician 50), from one sort per row -- several times faster
    than np.quantile on many rows. Rows with a NaN give NaN."""
    x = np.sort(values, axis=1)
    n = x.shape[1]
    out = np.empty((len(probs), x.shape[0]))
    for i, p in enumerate(probs):
        h = (n - 1) * float(p)
        lo = int(np.floor(h))
        hi = min(lo + 1, n - 1)
        out[i] = x[:, lo] + (h - lo) * (x[:, hi] - x[:, lo])
    out[:, np.isnan(x[:, -1])] = np.nan  # np.sort puts NaN last
    return out


def _same_codes(a: pd.Series, b: pd.Series) -> bool:
    """Whether two columns hold the same values (cheap for categoricals: their codes)."""
    if isinstance(a.dtype, pd.CategoricalDtype) and isinstance(b.dtype, pd.CategoricalDtype) and \
            list(a.cat.categories) == list(b.cat.categories):
        return np.array_equal(a.cat.codes.to_numpy(), b.cat.codes.to_numpy())
    return bool((a.astype(str).to_numpy(dtype=object) == b.astype(str).to_numpy(dtype=object)).all())


def _lookup_unique(keys: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """np.unique(keys, return_inverse=True) for non-negative integer keys, without a sort when
    their range is small (a lookup table, O(len(keys) + range))."""
    if not len(keys):
        return keys[:0], keys[:0].astype(np.int64)
    top = int(keys.max()) + 1
    if keys.min() < 0 or top > max(4 * len(keys), 1 << 22):
        u, inv = np.unique(keys, return_inverse=True)
        return u, inv.reshape(-1)
    present = np.bincount(keys, minlength=top) > 0
    lut = np.cumsum(present) - 1  # intp: what np.bincount takes without a copy
    return np.flatnonzero(present), lut[keys]


def _exact_sums(rng, cpue, cell_of, unit_of_cell, ustart, n_u, nz_c, exact_c, D, mult=None, rm_c=None
                ) -> tuple[np.ndarray, np.ndarray | None]:
    """Exact bootstrap sums for the cells of small units: S[row, d] is the sum of the cpue of
    cell ``exact_c``-row's hauls in resample d of its unit.

    A resample of a unit's n hauls picks K[c, d] of cell c's non-zero hauls and the rest among
    the unit's zero catches; (K of the unit's cells, zeros) is multinomial(n, (nz_c / n, ...,
    zeros / n)), drawn by conditional binomials. Given K, the K picks are uniform among the
    cell's non-zero values and are summed. Cost O(cells x draws + picks), picks about
    (non-zero hauls) x draws, at most ``exact_max_hauls`` x units x draws.

    With ``mult`` (records' own multipliers, :func:`_bind_record_factors`) the second array holds,
    for the exact cells marked in ``rm_c``, the sums of the same picks' converted values
    cpue * m[d] of draw d (None without). Returns (S, Sh).
    """
    cells = np.flatnonzero(exact_c)
    units = np.unique(unit_of_cell[cells])
    # the exact units' cells (zero-only cells included: they hold part of the zero category)
    in_unit = np.isin(unit_of_cell, units)
    ucells = np.flatnonzero(in_unit)
    local_unit = np.searchsorted(units, unit_of_cell[ucells])
    local_start = np.flatnonzero(np.r_[True, local_unit[1:] != local_unit[:-1]])
    K_all = _gear_mix(rng, local_unit, local_start, n_u[units], nz_c[ucells], D)
    K = K_all[exact_c[ucells]]
    del K_all
    S = np.zeros((len(cells), D))
    rm_e = rm_c[cells] if mult is not None else np.zeros(len(cells), dtype=bool)
    Sh = np.zeros((int(rm_e.sum()), D)) if rm_e.any() else None
    sh_row = np.cumsum(rm_e) - 1
    sel = np.flatnonzero(exact_c[cell_of] & (cpue > 0))
    order = sel[np.argsort(cell_of[sel], kind="stable")]  # non-zero records of exact cells, by cell
    x = cpue[order]
    start = np.r_[0, np.cumsum(nz_c[cells])[:-1]]  # first value of each exact cell in x
    done = np.cumsum(K.sum(axis=1))  # picks up to and including each cell
    i = 0
    while i < len(cells):  # chunks of cells with at most _CHUNK picks (at least one cell)
        before = done[i - 1] if i else 0
        j = max(i + 1, int(np.searchsorted(done, before + _CHUNK, side="right")))
        k = K[i:j].reshape(-1)
        cd = np.repeat(np.arange(len(k)), k)  # (cell, draw) of each pick
        c = cd // D + i
        pos = start[c] + (rng.random(len(cd)) * nz_c[cells[c]]).astype(np.int64)
        S[i:j] = np.bincount(cd, weights=x[pos], minlength=len(k)).reshape(j - i, D)
        here = rm_e[i:j]
        if Sh is not None and here.any():  # the same picks, each with its record's multiplier of draw d
            a, b = start[i], start[j - 1] + nz_c[cells[j - 1]]
            M = mult(order[a:b])
            at = np.flatnonzero(here[c - i])
            w = x[pos[at]] * M[pos[at] - a, cd[at] % D]
            Sh[sh_row[i:j][here]] = np.bincount(cd[at], weights=w, minlength=len(k)).reshape(j - i, D)[here]
        i = j
    return S, Sh


def _moment_matched_block(S, rng, unit_of_cell, ustart, mm_unit, n_u, nz_c, mean, var, m3, Sh=None, rm=None,
                          harm=None) -> None:
    """Moment-matched resampled sums for the large units of one block (rows of S, in place).

    The picks of each cell's non-zero hauls, K = (K_c) with the unit's zeros as one more
    category, are multinomial(n, p); above the threshold every unit has more than
    ``exact_max_hauls`` non-zero hauls, and K is drawn from the normal with the multinomial's
    mean n p and covariance n (diag(p) - p p'), built from independent normals
    (K_c = n p_c + sqrt(n) (sqrt(p_c) Z_c - p_c T), T = sum over the unit's categories of
    sqrt(p_h) Z_h), kept >= 0. Given K, the sum of K draws from the cell's non-zero values
    (mean mu, sd sigma, skewness g) is a shifted gamma with the sum's mean K mu, variance
    K sigma^2 and skewness g / sqrt(K) (Pearson type III): K mu + sign(g) (sigma |g| / 2)
    (Gamma(k) - k) with shape k = 4 K / g^2, the gamma variate by the Wilson-Hilferty cube
    root of a normal z: Gamma(k) ~ k (1 - 1/(9k) + z / (3 sqrt k))^3 (Wilson & Hilferty 1931,
    "The distribution of chi-square", PNAS 17: 684-688; accurate to about the third moment for
    k >= 2 -- recalled from memory), an exact gamma variate where k < 2, a normal where
    |g| < 1e-3. Values are kept >= 0 (a sum of catch rates).

    With ``Sh`` (converted sums, in place), the rows marked in ``rm`` hold records with their own
    multipliers: their converted sum of draw d is the same construction with that draw's moments
    of the converted values y = cpue * m[d] (``harm``: mean, variance, third central moment and
    covariance with cpue, each (rows, D)), with the same K as the raw sum and a normal correlated
    with the raw sum's by rho = cov / (sd_x sd_y), the correlation of x and y over the cell's hauls,
    which is also that of the two sums of the same K picks (a Gaussian copula; rho = 1 when every
    record has the same multiplier). Other rows of ``Sh`` get the raw sums.
    """
    D = S.shape[1]
    rows = np.flatnonzero(mm_unit[unit_of_cell] & (nz_c > 0))
    if not len(rows):
        return
    u = unit_of_cell[rows]  # sorted: cells are grouped by unit
    first = np.flatnonzero(np.r_[True, u[1:] != u[:-1]])
    per_unit = np.diff(np.r_[first, len(rows)])
    # float32 for the draw-sized work: 7 significant digits are far below Monte Carlo error, and
    # the arithmetic runs about 1.6 times faster
    f4 = np.float32
    n = n_u[u].astype(float)
    p = nz_c[rows] / n
    K = rng.standard_normal((len(rows), D), dtype=f4)
    K *= np.sqrt(p).astype(f4)[:, None]  # sqrt(p_c) Z_c
    T = np.add.reduceat(K, first, axis=0)
    p0 = np.maximum(1.0 - np.add.reduceat(p, first), 0.0)  # share of zero catches in the unit
    T += np.sqrt(p0).astype(f4)[:, None] * rng.standard_normal((len(first), D), dtype=f4)
    K -= p.astype(f4)[:, None] * np.repeat(T, per_unit, axis=0)
    del T
    K *= np.sqrt(n).astype(f4)[:, None]
    K += (n * p).astype(f4)[:, None]
    np.maximum(K, 0.0, out=K)
    # a cell with few non-zero hauls in a large unit: its picks are far from normal, so the
    # unit's picks are drawn exactly (conditional binomials) instead
    few = np.zeros(len(n_u), dtype=bool)
    few[u[nz_c[rows] < FEW_NONZERO]] = True
    if few.any():
        sub = np.flatnonzero(few[unit_of_cell])  # every cell of those units (zero-only ones too)
        lu = np.searchsorted(np.flatnonzero(few), unit_of_cell[sub])
        exact_k = _gear_mix(rng, lu, np.flatnonzero(np.r_[True, lu[1:] != lu[:-1]]), n_u[few], nz_c[sub], D)
        at = np.flatnonzero(few[u])
        K[at] = exact_k[np.searchsorted(sub, rows[at])].astype(f4)

    mu = mean[rows].astype(f4)[:, None]
    sd = np.sqrt(np.maximum(var[rows], 0.0))
    with np.errstate(divide="ignore", invalid="ignore"):
        skew = np.where(sd > 0, m3[rows] / sd**3, 0.0)
    gam = np.abs(skew) >= 1e-3
    b = np.where(gam, np.abs(skew) / 6.0, 0.0).astype(f4)[:, None]
    c = np.where(gam, 2.0 * sd / np.where(gam, skew, 1.0), 0.0).astype(f4)[:, None]  # sign(g) 2 sigma / |g|
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        root = np.sqrt(K)
        bt = np.divide(b, root, out=np.zeros_like(K), where=root > 0)  # b / sqrt(K); 0 without picks
        del root
        t = rng.standard_normal(K.shape, dtype=f4)
        own = rm[rows] if Sh is not None else None
        if own is not None and own.any():
            z_own = t[own].astype(float)
        t -= bt
        t *= bt
        t += 1.0  # 1 - b^2/K + z b / sqrt(K)
        out = t * t
        out *= t
        out -= 1.0
        out *= c
        out += mu
        out *= K
    small = K < 18.0 * b * b  # gamma shape below 2 (and no picks): exact gamma variates
    small &= gam[:, None]
    if small.any():
        r, d = np.nonzero(small)
        shape = 4.0 * K[r, d] / skew[r] ** 2
        out[r, d] = K[r, d] * mean[rows][r] + np.sign(skew[r]) * (sd[r] * np.abs(skew[r]) / 2.0) * (
            rng.standard_gamma(shape) - shape)
    nor = ~gam & (sd > 0)
    if nor.any():
        out[nor] = K[nor] * mu[nor] + np.sqrt(K[nor]) * sd[nor].astype(f4)[:, None] * rng.standard_normal(
            (int(nor.sum()), D), dtype=f4)
    np.maximum(out, 0.0, out=out)
    if own is not None and own.any():
        r_own = rows[own]
        K_own = K[own].astype(float)
        out[own] = _pearson3_sum(K_own, z_own, mean[r_own][:, None], sd[own][:, None], skew[own][:, None])
        hm, hv, h3, hc = (np.asarray(a)[r_own] for a in harm)
        h_sd = np.sqrt(np.maximum(hv, 0.0))
        with np.errstate(divide="ignore", invalid="ignore"):
            h_skew = np.where(h_sd > 0, h3 / h_sd**3, 0.0)
            sdx = sd[own][:, None]
            rho = np.where((h_sd > 0) & (sdx > 0), hc / (sdx * h_sd), 1.0)
        rho = np.clip(rho, -1.0, 1.0)
        z_h = rho * z_own + np.sqrt(1.0 - rho * rho) * rng.standard_normal(z_own.shape)
        Sh[r_own] = _pearson3_sum(K_own, z_h, hm, h_sd, h_skew)
    S[rows] = out
    if Sh is not None:
        if own is not None and (~own).any():
            Sh[rows[~own]] = out[~own]


def _gear_mix(rng, unit_of_cell, ustart, n_u, nz_c, D) -> np.ndarray:
    """K[c, d]: picks of cell c's non-zero hauls in resample d of its unit: multinomial(n_u,
    (nz_c / n_u for the unit's cells, zeros / n_u)) by conditional binomials, one cell position
    at a time (every unit at once). The remainder are the unit's zero catches."""
    C = len(nz_c)
    pos = np.arange(C) - ustart[unit_of_cell]  # position of the cell within its unit
    p = nz_c / n_u[unit_of_cell]
    rem = np.repeat(n_u[:, None], D, axis=1).astype(np.int64)
    rem_p = np.ones(len(n_u))
    K = np.zeros((C, D), dtype=np.int64)
    for k in range(int(pos.max()) + 1 if C else 0):
        at = np.flatnonzero((pos == k) & (nz_c > 0))
        if not len(at):
            continue
        u = unit_of_cell[at]
        prob = np.clip(p[at] / np.maximum(rem_p[u], 1e-300), 0.0, 1.0)
        m = rng.binomial(rem[u], prob[:, None])
        K[at] = m
        rem[u] -= m
        rem_p[u] = np.maximum(rem_p[u] - p[at], 0.0)
    return K


# ----------------------------------------------------------------------------- result


@dataclass
class SeriesResult:
    """The harmonized series: one row per species x year x stratum, its draws and provenance.

    Attributes
    ----------
    table : the series.csv columns (``SERIES_COLUMNS``): species, year, stratum ('all' for the
        combined value), estimate / lower / upper (reference-gear cpue: median and equal-tailed
        ``interval`` of the paired draws), raw_estimate / raw_lower / raw_upper (the same
        estimator on the unconverted cpue, bootstrap only), interval, n_hauls, gears (gear:hauls),
        method (stratified_mean: area-weighted; haul_mean: plain mean over hauls), weight (the
        stratum's weight in the combined value), area_covered (share of the species' strata
        area sampled that year), complete, strata_missing, resampling (exact / moment-matched),
        n_domain_flagged, n_unconverged and flags (plain words).
    draws : the :class:`SeriesDraws` behind it.
    manifest : inputs, settings, counts, notes, versions, timestamp, series_id.
    notes : things the user should know.
    """

    table: pd.DataFrame
    draws: SeriesDraws
    manifest: dict
    notes: list[str] = field(default_factory=list)

    def draws_frame(self) -> pd.DataFrame:
        """The paired draws as the long table of series_draws.parquet."""
        t, d = self.draws.table, self.draws
        rows, D = len(t), len(d.draw)
        idx = np.repeat(np.arange(rows), D)
        def cat(col):
            codes, labels = pd.factorize(t[col])
            return pd.Categorical.from_codes(codes[idx], categories=pd.Index(labels, dtype="str"))

        return pd.DataFrame({"species": cat("species"), "year": t["year"].to_numpy()[idx],
                             "stratum": cat("stratum"), "draw": np.tile(d.draw, rows),
                             "value": d.value.reshape(-1), "raw_value": d.raw.reshape(-1)})

    def summary(self, max_rows: int = 40) -> str:
        """Plain-text account: what went in, the combined series per species, flags, caution."""
        m, t = self.manifest, self.table
        s = m["settings"]
        level = int(round(100 * s["interval"]))
        allr = t[t["stratum"] == ALL]
        lines = [f"Harmonized series from conversion {m.get('conversion_id') or '(in memory)'} "
                 f"(factor set {m.get('factor_set_id')})",
                 f"  {m['counts']['records']} records, {allr['species'].nunique()} species, "
                 f"{allr['year'].min()}-{allr['year'].max()}; "
                 f"{'stratified by ' + str(len(s['strata'])) + ' strata' if s['stratified'] else 'no strata'}",
                 f"  {s['draws_used']} paired draws (bootstrap resample d with factor draw d), "
                 f"uncertainty: {s['uncertainty']}; {level}% intervals",
                 f"  incomplete years: {m['counts']['incomplete_rows']}; unweighted (plain mean over hauls): "
                 f"{m['counts']['unweighted_rows']}",
                 "",
                 f"  {'species':<26} {'year':>4}  {'estimate':>9} {f'{level}% interval':>21}  {'raw':>9}  flags"]
        for r in allr.head(max_rows).itertuples():
            lines.append(f"  {r.species:<26} {r.year:>4}  {r.estimate:9.4g} {r.lower:10.4g} to {r.upper:<8.4g}  "
                         f"{r.raw_estimate:9.4g}  {'incomplete' if not r.complete else ''}")
        if len(allr) > max_rows:
            lines.append(f"  ... {len(allr) - max_rows} more rows in series.csv")
        for note in self.notes:
            lines.append(f"  note: {note}")
        lines.append("  " + CAUTION)
        return "\n".join(lines)

    def save(self, directory) -> Path:
        """Write series.csv, series_draws.parquet and manifest.json atomically into ``directory``.

        Refuses a directory holding the converted records it was built from (it would be replaced).
        """
        from calib.outputs import atomic_directory

        directory = Path(directory)
        protect = [(self.manifest.get("converted_dir"), "the converted records")]
        with atomic_directory(directory, protect=protect) as tmp:
            self.table.to_csv(tmp / "series.csv", index=False, float_format="%.6g")
            self.draws_frame().to_parquet(tmp / "series_draws.parquet", index=False)
            (tmp / "manifest.json").write_text(json.dumps(self.manifest, indent=2, default=str) + "\n")
        return directory


def _read_converted(converted, extra=()) -> tuple:
    """Records (only the columns series needs, plus ``extra`` ones where present), factor draws,
    the conversion manifest, names, input hashes and the :class:`RecordFactors` of records
    converted by length class or with their own covariates (None when there are none). A
    Conversion in memory is returned as it is, or as a records frame when it holds such records."""
    from calib.convert import Conversion

    wanted = list(REQUIRED) + list(OPTIONAL) + [c for c in extra if c not in REQUIRED + OPTIONAL]
    if isinstance(converted, Conversion):
        rf = RecordFactors.from_conversion(converted)
        records = converted
        if rf is not None:
            have = converted.store.columns
            records = converted.record_columns([c for c in dict.fromkeys(wanted + rf.columns) if c in have])
        return records, converted.factor_draws, converted.manifest, "converted records", "factor draws", {}, rf
    import pyarrow.parquet as pq

    from calib.factors import file_sha256

    d = Path(converted)
    missing = [f for f in ("records.parquet", "factor_draws.parquet", "manifest.json") if not (d / f).is_file()]
    if missing:
        raise InputError([Problem(str(d / f), None, None, "file not found in the converted directory",
                                  "point --converted at a directory written by `calib convert`", False)
                          for f in missing])
    rp, fp, mp = d / "records.parquet", d / "factor_draws.parquet", d / "manifest.json"
    try:
        manifest = json.loads(mp.read_text())
    except (OSError, ValueError) as err:
        raise InputError([Problem(str(d), None, None, f"the converted files cannot be read ({err})",
                                  "convert again into a new directory", False)]) from None
    rf = RecordFactors.from_directory(d, manifest)
    if rf is not None:
        wanted += [c for c in rf.columns if c not in wanted]
    try:
        names = pq.read_schema(rp).names
        records = pd.read_parquet(rp, columns=[c for c in wanted if c in names])
        factor_draws = pd.read_parquet(fp)
    except (OSError, ValueError) as err:
        raise InputError([Problem(str(d), None, None, f"the converted files cannot be read ({err})",
                                  "convert again into a new directory", False)]) from None
    files = [("records", rp), ("factor_draws", fp), ("manifest", mp)] + [
        (f.split(".")[0], d / f) for f in ("length_factor_draws.parquet", "record_lengths.csv",
                                           "covariate_term_draws.parquet") if rf is not None and (d / f).is_file()]
    inputs = {name: {"path": str(p), "sha256": file_sha256(p)} for name, p in files}
    return records, factor_draws, manifest, str(rp), str(fp), inputs, rf


def series(converted, *, draws: int | None = None, seed: int = 0, interval: float | None = None,
           by_stratum: bool = True, uncertainty: str = "both", exact_max_hauls: int = EXACT_MAX_HAULS,
           incomplete: str = "flag") -> SeriesResult:
    """Harmonized abundance series per species and year (and stratum), with paired uncertainty.

    Parameters
    ----------
    converted : a :class:`calib.convert.Conversion` or the directory ``calib convert`` wrote.
    draws : paired draws to use (default all factor draws); a seeded subset otherwise.
    seed : seed of the subset and the bootstrap resampling.
    interval : central interval level (default the conversion's, else 0.9).
    by_stratum, uncertainty, exact_max_hauls, incomplete : see :func:`series_draws`.

    Returns
    -------
    SeriesResult; ``.save(directory)`` writes series.csv, series_draws.parquet, manifest.json.
    Values are catch per unit of the reference gear's effort (its ``effort_unit``).
    """
    from calib.factors import software_versions, utc_timestamp

    records, factor_draws, conv_manifest, where, draws_where, inputs, rf = _read_converted(converted)
    if interval is None:
        interval = float(conv_manifest.get("interval", 0.9))
    if not 0 < interval < 1:
        raise ValueError(f"interval must be between 0 and 1 (e.g. 0.9), not {interval}")
    sd = series_draws(records, factor_draws, draws=draws, seed=seed, by_stratum=by_stratum, uncertainty=uncertainty,
                      exact_max_hauls=exact_max_hauls, incomplete=incomplete, where=where, draws_where=draws_where,
                      record_factors=rf)
    n_records = sd.settings["records"]
    units = sd.settings["effort_units"]
    del records
    lo_q, hi_q = (1 - interval) / 2, 1 - (1 - interval) / 2
    with np.errstate(all="ignore"):
        value_q = row_quantiles(sd.value, [lo_q, hi_q])
        raw_q = row_quantiles(sd.raw, [lo_q, hi_q])
    table = sd.table.copy()
    table["estimate"], table["lower"], table["upper"] = sd.estimate, value_q[0], value_q[1]
    table["raw_estimate"], table["raw_lower"], table["raw_upper"] = sd.raw_estimate, raw_q[0], raw_q[1]
    table["interval"] = interval
    table = table[SERIES_COLUMNS]

    notes = []
    counts = conv_manifest.get("counts", {})
    if counts.get("rejected"):
        notes.append(f"{counts['rejected']} records were rejected by convert and are in no series (see "
                     "rejected.csv); a gear's rejected hauls are missing from its strata and years")
    if sd.settings["records_with_own_factor"]:
        notes.append(f"{sd.settings['records_with_own_factor']} records converted "
                     f"{' or '.join({'length': 'by length class', 'covariate': 'with their own covariate values'}[k] for k in sd.settings['own_factor_kinds'])}"
                     ": each record's factor draws were rebuilt from the conversion's files, draw by draw")
    if sd.settings["strata_without_area"]:
        notes.append("strata without stratum_area: " + ", ".join(sd.settings["strata_without_area"])
                     + "; years with them are plain means over hauls (method haul_mean)")
    if not by_stratum:
        notes.append("strata ignored (by_stratum=False): one plain mean over hauls per year")
    if len(units) > 1:
        notes.append(f"effort units {', '.join(units)} differ between gears: the raw series mixes them, the "
                     "harmonized series is in reference-gear units")
    if sd.settings["draws_used"] < FEW_DRAWS:
        notes.append(f"only {sd.settings['draws_used']} paired draws: interval ends are rough "
                     f"(common practice, no source: use {FEW_DRAWS} or more)")
    if sd.settings["units_moment_matched"]:
        notes.append(f"{sd.settings['units_moment_matched']} species x stratum x year units with more than "
                     f"{exact_max_hauls} hauls with a catch were resampled by the moment-matched approximation")
    allr = table["stratum"] == ALL
    manifest = {
        "tool": "calib",
        "step": "series",
        "conversion_id": conv_manifest.get("conversion_id"),
        "factor_set_id": conv_manifest.get("factor_set_id"),
        "reference": conv_manifest.get("reference"),
        "reference_effort_unit": conv_manifest.get("reference_effort_unit"),
        "converted_dir": None if not inputs else str(Path(converted)),
        "inputs": inputs,
        "settings": {**sd.settings, "interval": float(interval)},
        "counts": {"records": int(n_records), "rows": int(len(table)), "combined_rows": int(allr.sum()),
                   "incomplete_rows": int((allr & ~table["complete"]).sum()),
                   "unweighted_rows": int((allr & (table["method"] == "haul_mean")).sum()),
                   "species": int(table["species"].nunique())},
        "notes": notes,
        "caution": CAUTION,
        "versions": software_versions(),
    }
    manifest["series_id"] = "sr-" + hashlib.sha256(json.dumps(manifest, sort_keys=True, default=str).encode()
                                                   ).hexdigest()[:16]
    manifest["timestamp"] = utc_timestamp()
    return SeriesResult(table=table, draws=sd, manifest=manifest, notes=notes)


# ----------------------------------------------------------------------------- command line


SERIES_DESCRIPTION = """\
Build harmonized abundance series from converted records (calib convert):
per species and year, the mean catch per unit effort in reference-gear units,
per stratum when the hauls have one, and combined over strata ('all'): the
area-weighted stratified mean when every stratum has a stratum_area, else the
plain mean over hauls (said in the method and flags columns). A year missing a
stratum sampled in other years is marked incomplete, not silently re-weighted.
Years without hauls are left out, not set to zero.

The interval carries sampling error and conversion error together: for each
posterior draw of the factors, the hauls are resampled (bootstrap within
stratum and year) and converted with that draw. The raw, unconverted series
is given beside it (raw_estimate, raw_lower, raw_upper) on the same resamples.

Records converted by length class (convert --lengths) or with their own
covariate values (factors fitted with --covariate) each have their own factor:
it is rebuilt draw by draw from the files convert wrote beside the records
(length_factor_draws.parquet and record_lengths.csv, or
covariate_term_draws.parquet), so keep them in the conversion folder.

Writes OUT/series.csv, OUT/series_draws.parquet (the paired draws) and
OUT/manifest.json."""


def _positive_int(text: str) -> int:
    try:
        value = int(text)
    except ValueError:
        value = 0
    if value < 1:
        raise argparse.ArgumentTypeError(f"must be a positive whole number, not {text!r}")
    return value


def add_series_parser(sub, formatter_class=argparse.RawDescriptionHelpFormatter) -> argparse.ArgumentParser:
    """Add the ``series`` subcommand to an argparse subparsers object; returns its parser."""
    p = sub.add_parser("series", formatter_class=formatter_class,
                       help="harmonized abundance series by year (and stratum), with uncertainty",
                       description=textwrap.dedent(SERIES_DESCRIPTION))
    p.add_argument("--converted", required=True, metavar="DIR", help="directory written by `calib convert`")
    p.add_argument("--out", required=True, metavar="DIR", help="directory to write the series to")
    p.add_argument("--draws", type=int, default=None, metavar="N",
                   help="paired draws to use (default: every factor draw of the conversion)")
    p.add_argument("--seed", type=int, default=0, help="seed of the bootstrap resampling and of --draws")
    p.add_argument("--interval", type=float, default=None,
                   help="central interval level for lower/upper (default: the conversion's)")
    add_resampling_options(p, incomplete_help="years missing a stratum: 'flag' gives the mean over the strata "
                                              "sampled, marked incomplete; 'blank' leaves the combined value empty")
    p.add_argument("--uncertainty", choices=UNCERTAINTY, default="both",
                   help="'both' carries sampling and conversion error; 'sampling' or 'conversion' alone are for "
                        "comparison only")
    return p


def add_resampling_options(p, *, incomplete_help: str) -> None:
    """Options of the shared series estimator, for every command that builds series draws."""
    p.add_argument("--ignore-strata", action="store_true",
                   help="treat each year as one unstratified sample (one plain mean over its hauls)")
    p.add_argument("--incomplete", choices=INCOMPLETE, default="flag", help=incomplete_help)
    p.add_argument("--exact-max-hauls", type=_positive_int, default=EXACT_MAX_HAULS, metavar="N",
                   help="species x stratum x year units with more hauls with a catch than this are resampled by a "
                        "moment-matched approximation instead of exactly")


def run_series_command(args) -> int:
    """Run ``calib series`` from parsed arguments; prints a summary; returns the exit code.

    Raises InputError on bad input (the caller prints it and exits 1).
    """
    result = series(args.converted, draws=args.draws, seed=args.seed, interval=args.interval,
                    by_stratum=not args.ignore_strata, uncertainty=args.uncertainty,
                    exact_max_hauls=args.exact_max_hauls, incomplete=args.incomplete)
    out = result.save(args.out)
    print(result.summary())
    print(f"\nWrote {out}/: series.csv, series_draws.parquet, manifest.json")
    return 0
