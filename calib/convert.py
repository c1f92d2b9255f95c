"""Stage 5: express survey records in reference-gear units (``calib convert``).

Reads a factor set (posterior draws of theta = log(q_gear / q_ref), factor = exp(-theta))
and survey tables, and gives every haul x species record (zeros completed where the
species was recorded) its catch per unit effort in reference-gear units:

    cpue        = count / effort                       (per effort unit of the haul's gear)
    cpue_ref[d] = cpue x factor[d]                     for every posterior draw d used

Because one species x gear has one factor, the record's median and equal-tailed interval
are cpue times the factor's quantiles: the sample quantile numpy computes by default
(linear interpolation between order statistics, definition 7 of Hyndman & Fan 1996,
"Sample quantiles in statistical packages", The American Statistician 50) commutes with
multiplication by a non-negative constant, since scaling keeps the order of the draws. So
records x draws is never built: cost O(records + factors x draws).
The draws used are stored once per factor (``factor_draws.parquet``: species, gear, draw,
factor); draw d of every factor comes from the same posterior sample, so a later step can
carry conversion uncertainty jointly across species and gears. Reference-gear records pass
through with factor exactly 1 (stored as draws of 1); a zero count converts to zero.

Records that cannot be converted go to ``rejected.csv`` with a reason; none is dropped:
rows in = rows converted + rows rejected (checked on every run). Reasons, in the order
they are tested (a record gets the first that applies):

    not_recorded        the catches row is of a species its source did not record that year
                        (species_recorded); without that source's zeros it would bias a mean
    no_factor           the factor set has no factor for that species x gear
    not_species_level   only length- or covariate-specific factors exist for it (converting
                        by length class or covariate level is not supported yet)
    no_draws            the factor table lists it but posterior.nc holds no draws for it
    draws_not_finite    its draws are not finite (e.g. a baseline could not estimate it)
    factor_fail         its status is ``fail`` (converted, with factor_status 'fail', when
                        ``allow_unconverged``)
    effort_unit         the haul's effort unit differs from the one the factor was fitted with
    no_lengths          (length factor sets) the catch is > 0 but the haul x species has no lengths
    outside_length_range (length factor sets) measured fish outside the species' calibrated length
                        range (converted with the nearest class and flagged when
                        ``outside_lengths="nearest"``)
    covariate_missing   (covariate factor sets) a covariate the factors depend on is blank or missing
                        in the haul
    covariate_level     (covariate factor sets) the haul's level of a categorical covariate was not
                        calibrated

With a factor set fitted by length (``calib fit --length-bin``) and the survey's ``lengths`` table,
records are converted per length class and summed per haul x species (:mod:`calib.length_convert`).
With a factor set fitted with ``--covariate``, each record uses its haul's own covariate values
(:mod:`calib.covariate_convert`); a numeric value outside the calibration groups' range is
converted and flagged in ``domain_flag``.

A zero of a species x gear without a usable factor is rejected too, not passed as zero:
keeping that gear's zeros while rejecting its catches would bias any mean downward.

Records outside the calibration's domain are converted and flagged in ``domain_flag``
(blank when inside): months of the year the gear's calibration groups never fished,
numeric covariates outside the range the gear's calibration hauls covered, and levels of
categorical covariates those hauls never had. Legacy years are expected to lie outside
it and are not rejected. The domain comes from the factor set's manifest (``"domain"``,
written at fit time by :func:`calibration_domain`); for older factor sets it is rebuilt
from the calibration tables named in the manifest when they are unchanged, else no
record is flagged and the conversion says so.
"""

from __future__ import annotations

import argparse
import calendar
import hashlib
import json
import os
import textwrap
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd

from calib.errors import InputError, Problem

# Hauls columns that describe where, when and how a haul was made, not the conditions it
# sampled: they are never domain covariates.
STRUCTURAL_COLUMNS = ("haul_id", "gear", "date", "effort", "effort_unit", "pair_id", "site", "stratum",
                      "stratum_area", "latitude", "longitude", "source", "year", "_row")
# A text column with more distinct values than this among the calibration hauls is taken for
# an identifier (station code, crew, notes) rather than a covariate (common practice, no source).
MAX_DOMAIN_LEVELS = 20
CSV_MAX_ROWS = 1_000_000  # records.csv is written too when there are at most this many records

ADDED_COLUMNS = ["species", "count", "cpue", "cpue_ref_median", "cpue_ref_lower", "cpue_ref_upper",
                 "factor_id", "factor_gear", "factor_species", "factor_status", "domain_flag"]
REJECT_CODES = ("not_recorded", "no_factor", "not_species_level", "no_draws", "draws_not_finite",
                "factor_fail", "effort_unit", "no_lengths", "outside_length_range", "covariate_missing",
                "covariate_level")
REJECT_LABELS = {
    "not_recorded": "species not recorded by the haul's source that year",
    "no_factor": "no factor for that species x gear",
    "not_species_level": "only length- or covariate-specific factors",
    "no_draws": "no draws in posterior.nc",
    "draws_not_finite": "factor draws not finite",
    "factor_fail": "factor status fail",
    "effort_unit": "effort unit differs from the factor's",
    "no_lengths": "catch > 0 without lengths (length factors)",
    "outside_length_range": "lengths outside the calibrated length range",
    "covariate_missing": "covariate blank or missing (covariate factors)",
    "covariate_level": "covariate level not calibrated",
}
_CODE = {name: i + 1 for i, name in enumerate(REJECT_CODES)}
DRAW_COLUMNS = ["species", "gear", "draw", "factor", "posterior_chain", "posterior_draw"]

CAUTION = (
    "Converted values hold only as far as the conversion factors do: for the gears, sizes, "
    "habitats and seasons of the calibration study (see domain_flag). Defer to the survey "
    "program's own standards and to qualified review before any management use."
)


# ----------------------------------------------------------------------------- domain


def _usable_calibration_hauls(hauls: pd.DataFrame) -> pd.DataFrame:
    """Calibration hauls in groups where two or more gears fished (the groups a fit uses)."""
    from calib.cells import calibration_hauls

    cal = calibration_hauls(hauls)
    n_gears = cal.groupby("pair_id")["gear"].transform("nunique")
    return cal[n_gears >= 2]


def calibration_domain(hauls: pd.DataFrame, columns: list[str] | None = None,
                       max_levels: int = MAX_DOMAIN_LEVELS) -> dict:
    """What the calibration groups covered, per gear: months, covariate ranges and levels.

    Parameters
    ----------
    hauls : validated hauls table (``Tables.hauls``) of the calibration data; only hauls in
        calibration groups with two or more gears count.
    columns : covariate columns to describe; default every hauls column that is not
        structural (haul_id, gear, date, effort, effort_unit, pair_id, site, stratum,
        stratum_area, latitude, longitude, source, year), skipping text columns with more
        than ``max_levels`` distinct values (identifiers, not covariates).

    Returns
    -------
    JSON-ready dict::

        {"numeric": [col, ...], "categorical": [col, ...], "skipped": {col: why},
         "by_gear": {gear: {"n_hauls": int, "months": [1..12],
                            "numeric": {col: [min, max]}, "categorical": {col: [level, ...]}}}}

    Store it in the factor set manifest under ``"domain"`` at fit time.
    """
    cal = _usable_calibration_hauls(hauls)
    skipped: dict[str, str] = {}
    if columns is None:
        candidates = [c for c in hauls.columns if c not in STRUCTURAL_COLUMNS]
    else:
        missing = [c for c in columns if c not in hauls.columns]
        if missing:
            raise ValueError(f"domain column(s) {missing} are not in the hauls table")
        candidates = list(columns)
    numeric, categorical = [], []
    for col in candidates:
        values = cal[col].dropna()
        if pd.api.types.is_bool_dtype(cal[col]):
            categorical.append(col)
        elif pd.api.types.is_numeric_dtype(cal[col]):
            numeric.append(col)
        elif values.nunique() > max_levels and columns is None:
            skipped[col] = (f"{values.nunique()} distinct values in the calibration hauls (more than "
                            f"{max_levels}): taken for an identifier, not a covariate")
        else:
            categorical.append(col)
    by_gear = {}
    for gear, g in cal.groupby("gear", sort=True):
        entry = {"n_hauls": int(len(g)),
                 "months": sorted(int(m) for m in g["date"].dt.month.dropna().unique()),
                 "numeric": {}, "categorical": {}}
        for col in numeric:
            v = g[col].dropna().astype(float)
            if len(v):
                entry["numeric"][col] = [float(v.min()), float(v.max())]
        for col in categorical:
            levels = sorted(str(x) for x in g[col].dropna().unique())
            if levels:
                entry["categorical"][col] = levels
        by_gear[str(gear)] = entry
    return {"numeric": numeric, "categorical": categorical, "skipped": skipped, "by_gear": by_gear}


def _months_text(months: list[int]) -> str:
    """[4, 5, 6, 9] -> 'Apr-Jun, Sep'."""
    if not months:
        return "none"
    runs, start, prev = [], months[0], months[0]
    for m in months[1:] + [None]:
        if m is not None and m == prev + 1:
            prev = m
            continue
        a, b = calendar.month_abbr[start], calendar.month_abbr[prev]
        runs.append(a if start == prev else f"{a}-{b}")
        if m is not None:
            start = prev = m
    return ", ".join(runs)


def _domain_from_inputs(manifest: dict) -> tuple[dict | None, str]:
    """Rebuild the domain from the calibration tables a factor set names, if unchanged."""
    from calib.factors import file_sha256
    from calib.tables import load_tables

    inputs = manifest.get("inputs") or {}
    h, c = inputs.get("hauls"), inputs.get("catches")
    if not h or not c:
        return None, "the factor set names no calibration hauls file"
    paths = {role: Path(v["path"]) for role, v in (("hauls", h), ("catches", c))}
    for role, p in paths.items():
        if not p.is_file():
            return None, f"the calibration {role} file named in the factor set ({p}) was not found"
        want = inputs[role].get("sha256")
        if want and file_sha256(p) != want:
            return None, f"the calibration {role} file {p} changed since the fit (its hash differs)"
    try:
        cal_tables = load_tables(paths["hauls"], paths["catches"])
    except InputError:
        return None, f"the calibration tables {paths['hauls']} could not be read"
    return calibration_domain(cal_tables.hauls), f"rebuilt from the calibration hauls {paths['hauls']}"


def _domain_flags(hauls: pd.DataFrame, domain: dict, reference: str) -> tuple[np.ndarray, list[str]]:
    """Text flag per haul ('' inside the domain) and notes on columns that could not be checked.

    Everything the domain looks at (gear, date, covariates) belongs to the haul, so flags are
    worked out once per haul and handed to the haul's records (O(hauls), not O(records)).
    Reference-gear hauls are never flagged: their records are not converted.
    """
    n = len(hauls)
    flag = np.full(n, "", dtype=object)
    notes: list[str] = []
    if n == 0:
        return flag, notes

    def add(mask: np.ndarray, text) -> None:
        if not mask.any():
            return
        old = flag[mask]
        new = text if isinstance(text, str) else np.asarray(text, dtype=object)
        flag[mask] = np.where(old == "", new, old + "; " + new)

    numeric_cols = domain.get("numeric", [])
    for col in numeric_cols + domain.get("categorical", []):
        if col not in hauls.columns:
            notes.append(f"domain covariate '{col}' is not in the survey hauls: not checked")
        elif col in numeric_cols and not pd.api.types.is_numeric_dtype(hauls[col]):
            notes.append(f"domain covariate '{col}' is numeric in the calibration but text in the survey "
                         "hauls: not checked")
    gear = hauls["gear"]
    month = hauls["date"].dt.month.to_numpy(dtype=float)
    for g, d in domain.get("by_gear", {}).items():
        if g == reference:
            continue
        sel = (gear == g).to_numpy()
        if not sel.any():
            continue
        months = d.get("months", [])
        out = sel & ~np.isnan(month) & ~np.isin(month, months)
        if out.any():
            label = _months_text(months)
            text = np.array([""] + [f"month {calendar.month_abbr[m]} outside the calibrated months ({label})"
                                    for m in range(1, 13)], dtype=object)
            add(out, text[month[out].astype(int)])
        for col, (lo, hi) in d.get("numeric", {}).items():
            if col not in hauls.columns or not pd.api.types.is_numeric_dtype(hauls[col]):
                continue
            v = hauls[col].to_numpy(dtype=float)
            add(sel & (v < lo), f"{col} below the calibrated range ({lo:g} to {hi:g})")
            add(sel & (v > hi), f"{col} above the calibrated range ({lo:g} to {hi:g})")
        for col, levels in d.get("categorical", {}).items():
            if col not in hauls.columns:
                continue
            values = hauls[col].astype("string")
            out = sel & values.notna().to_numpy() & ~values.isin(levels).fillna(False).to_numpy(dtype=bool)
            if out.any():
                listed = ", ".join(levels)
                odd = values[out]
                text = {v: f"{col} '{v}' not in the calibration ({listed})" for v in odd.unique()}
                add(out, odd.map(text).to_numpy(dtype=object))
    return flag, notes


# ----------------------------------------------------------------------------- result


@dataclass
class Conversion:
    """Survey records in reference-gear units, what was rejected, and the draws used.

    Attributes
    ----------
    records : one row per converted haul x species: every hauls column, then species,
        count (fish, may be raised), cpue (count / effort, per effort unit of the haul),
        cpue_ref_median / cpue_ref_lower / cpue_ref_upper (reference-gear cpue: cpue times
        the factor's median and equal-tailed ``interval`` quantiles over the draws used),
        factor_id (the factor set's id), factor_gear and factor_species (the key of the
        factor used in ``factor_draws``), factor_status (ok / warn / fail / reference) and
        domain_flag ('' inside the calibration's domain, else why not). Text columns are
        pandas categoricals (a small code per record; dictionary-encoded in records.parquet),
        so millions of records stay small.
    rejected : every record not converted: the hauls columns, species, count, cpue,
        reason_code (one of ``REJECT_CODES``) and reason (what is wrong and the fix).
    factor_draws : long table species, gear, draw (0..n-1), factor, posterior_chain,
        posterior_draw: the draws used, once per factor used (reference factors are 1).
    factors : one row per factor used: species, gear, factor_status, effort_unit,
        factor_median, factor_lower, factor_upper (over the draws used), n_records,
        n_domain_flagged.
    manifest : factor_set_id, input hashes, counts, draws, interval, domain, timestamp, ...
    notes : things the user should know about this conversion.
    length_factor_draws, record_lengths : (length factor sets) the class draws once per class and
        each record's raised class counts (calib.length_convert).
    covariate_factor_draws, covariate_term_draws : (covariate factor sets) the draws per
        categorical level combination, and the draws of every term of theta (calib.covariate_convert).
    Series and trend rebuild the draws of records converted by length or covariates from these.

    The converted records are held lean (haul position, species, count and factor per
    record, the hauls once) and ``records`` is built on first use; ``record_columns``
    builds only the columns asked for, and ``save`` writes records.parquet in slices, so
    millions of records never need every hauls column in memory at once.
    """

    rejected: pd.DataFrame
    factor_draws: pd.DataFrame
    factors: pd.DataFrame
    manifest: dict
    notes: list[str] = field(default_factory=list)
    store: "_RecordStore | None" = field(default=None, repr=False)
    length_factor_draws: pd.DataFrame | None = None
    covariate_factor_draws: pd.DataFrame | None = None
    record_lengths: pd.DataFrame | None = None
    covariate_term_draws: pd.DataFrame | None = None  # see calib.covariate_convert.CovariateConversion.terms
    _records: pd.DataFrame | None = field(default=None, init=False, repr=False)

    @property
    def records(self) -> pd.DataFrame:
        """The converted records as one DataFrame (built on first use, then kept)."""
        if self._records is None:
            self._records = self.store.frame()
        return self._records

    @property
    def n_records(self) -> int:
        return len(self.store)

    def record_columns(self, columns: list[str]) -> pd.DataFrame:
        """Only the named columns of ``records`` (cheap: the others are never built)."""
        if self._records is not None:
            return self._records[list(columns)]
        return self.store.frame(columns)

    def lean_records(self) -> dict:
        """The converted records without building any record column (for code that must scale).

        Keys: ``hauls`` (the survey hauls, one row each, as validated, without ``_row``);
        per record ``haul`` (position in ``hauls``), ``species`` (index into
        ``species_labels``), ``count`` (fish) and ``factor`` (index into ``factor_status``);
        ``species_labels``; ``factor_status`` (status of each species x gear factor used);
        ``haul_flag`` (domain_flag text per haul, '' inside). A record's cpue is
        ``count / hauls.effort[haul]``; its factor_species and factor_gear are its species and
        its haul's gear.
        """
        if self.manifest["counts"].get("covariate_converted") or self.manifest["counts"].get("length_converted"):
            raise ValueError("this conversion holds records converted by length class or with their own covariate "
                             "values: they have no single species x gear factor; use record_columns and "
                             "calib.series.RecordFactors.from_conversion (series_draws does so itself)")
        st = self.store
        return {"hauls": st.hauls, "haul": st.haul, "species": st.species_code, "count": st.count,
                "factor": st.factor, "species_labels": list(st.species), "factor_status": list(st.factor_status),
                "haul_flag": st.haul_flag}

    @property
    def n_in(self) -> int:
        return self.manifest["counts"]["records_in"]

    @property
    def n_converted(self) -> int:
        return self.manifest["counts"]["converted"]

    @property
    def n_rejected(self) -> int:
        return self.manifest["counts"]["rejected"]

    def summary(self) -> str:
        """Plain-text account of the conversion: counts in, converted, rejected (by reason)."""
        m, c = self.manifest, self.manifest["counts"]
        d = m["draws"]
        lines = [
            f"Conversion with factor set {m['factor_set_id']} (reference gear: {m['reference']})",
            f"  records in (haul x species, zeros completed where recorded): {c['records_in']}",
            f"  converted: {c['converted']} ({c['reference_pass_through']} reference-gear records passed "
            "through with factor 1)",
            f"  rejected:  {c['rejected']}",
        ]
        for code, n in c["rejected_by_reason"].items():
            lines.append(f"    {REJECT_LABELS[code]}: {n}")
        lines.append(f"  outside the calibration's domain (flagged in domain_flag, still converted): "
                     f"{c['domain_flagged']}")
        if c.get("covariate_converted"):
            lines.append(f"  converted with their haul's own covariate values: {c['covariate_converted']}")
        if c.get("length_converted"):
            lines.append(f"  converted length class by length class (factors by length, "
                         f"{m['length_bin_mm']:g}-mm classes): {c['length_converted']}")
        if c.get("unconverged_converted"):
            lines.append(f"  converted with a 'fail' factor (--allow-unconverged): {c['unconverged_converted']}")
        thinning = f"a random subset, seed {d['seed']}" if d["thinned"] else "all of them"
        lines.append(f"  draws per factor: {d['used']} of {d['available']} ({thinning}); "
                     f"interval {m['interval']:g}")
        for note in self.notes:
            lines.append(f"  note: {note}")
        lines.append("  " + CAUTION)
        return "\n".join(lines)

    def __repr__(self) -> str:
        return (f"<Conversion {self.manifest['factor_set_id']}: {self.n_in} in, {self.n_converted} converted, "
                f"{self.n_rejected} rejected>")

    def save(self, directory: str | os.PathLike) -> Path:
        """Write the conversion atomically into ``directory``.

        Files: records.parquet (always), records.csv (when at most 1,000,000 records),
        rejected.csv (always, header only when nothing was rejected), factor_draws.parquet,
        factors_used.csv and manifest.json. Refuses a directory that holds the factor set
        or an input table (it would be replaced).
        """
        from calib.outputs import atomic_directory

        directory = Path(directory)
        protect = [(p, "an input") for p in [self.manifest.get("factor_set_dir")]
                   + [v["path"] for v in self.manifest["inputs"].values()]]
        with atomic_directory(directory, protect=protect) as tmp:
            if self.n_records <= CSV_MAX_ROWS:
                self.records.to_parquet(tmp / "records.parquet", index=False)
                _csv_ready(self.records).to_csv(tmp / "records.csv", index=False, float_format="%.6g")
            else:
                self.store.write_parquet(tmp / "records.parquet")
            _csv_ready(self.rejected).to_csv(tmp / "rejected.csv", index=False, float_format="%.6g")
            self.factor_draws.to_parquet(tmp / "factor_draws.parquet", index=False)
            self.factors.to_csv(tmp / "factors_used.csv", index=False, float_format="%.6g")
            if self.length_factor_draws is not None:
                self.length_factor_draws.to_parquet(tmp / "length_factor_draws.parquet", index=False)
                self.record_lengths.to_csv(tmp / "record_lengths.csv", index=False, float_format="%.6g")
            if self.covariate_factor_draws is not None:
                self.covariate_factor_draws.to_parquet(tmp / "covariate_factor_draws.parquet", index=False)
            if self.covariate_term_draws is not None:
                self.covariate_term_draws.to_parquet(tmp / "covariate_term_draws.parquet", index=False)
            (tmp / "manifest.json").write_text(json.dumps(self.manifest, indent=2, default=str) + "\n")
        return directory


PARQUET_SLICE_ROWS = 1_000_000  # records built and written per slice when saving many records


@dataclass(eq=False)
class _RecordStore:
    """Converted records, lean: per record the haul's position, the species, the count and the
    factor used; the hauls once. Any column of ``Conversion.records`` is built from these on
    demand (hauls columns by position, cpue = count / effort, cpue_ref_* = cpue x the factor's
    quantiles), so memory is O(records) small numbers, not O(records x hauls columns)."""

    hauls: pd.DataFrame  # survey hauls as validated (no _row)
    haul: np.ndarray  # (n,) position in hauls
    species_code: np.ndarray  # (n,) index in species
    species: list[str]
    count: np.ndarray  # (n,) fish
    factor: np.ndarray  # (n,) index of the species x gear factor in factor_quantiles / factor_status
    factor_quantiles: np.ndarray  # (k, 3) lower, median, upper of each factor over the draws used
    factor_status: list[str]  # (k,)
    factor_id: str
    haul_flag: np.ndarray  # (n_hauls,) domain flag text of each haul ('' inside)
    record_flag: np.ndarray | None = None  # (n,) extra flag text per record ('' none), e.g. nearest length class
    _haul_columns: dict = field(default_factory=dict, repr=False)  # column -> haul-level codes or array

    def __len__(self) -> int:
        return len(self.haul)

    @property
    def columns(self) -> list[str]:
        return list(self.hauls.columns) + ADDED_COLUMNS

    def _haul_column(self, col: str):
        """Haul-level form of a hauls column, made once: ("cat", codes, categories) for text
        (records store it as a categorical, as ``_categorical_text`` does), else ("array", values)."""
        if col not in self._haul_columns:
            if col == "domain_flag":
                codes, uniq = pd.factorize(np.asarray(self.haul_flag, dtype=object))
                self._haul_columns[col] = ("cat", codes, pd.Index(uniq, dtype="str"))
            else:
                s = self.hauls[col]
                if _is_text(s):
                    cat = s.astype("category")
                    self._haul_columns[col] = ("cat", cat.cat.codes.to_numpy(), cat.cat.categories)
                else:
                    self._haul_columns[col] = ("array", s.array)
        return self._haul_columns[col]

    def _from_hauls(self, col: str, hp: np.ndarray):
        kind, *data = self._haul_column(col)
        if kind == "cat":
            codes, categories = data
            return pd.Categorical.from_codes(codes[hp], categories=categories, validate=False)
        return data[0].take(hp)

    def frame(self, columns: list[str] | None = None, start: int = 0, stop: int | None = None) -> pd.DataFrame:
        """Records start:stop with the given columns (default all, in the documented order)."""
        columns = self.columns if columns is None else list(columns)
        unknown = [c for c in columns if c not in self.columns]
        if unknown:
            raise KeyError(f"no record column(s) {unknown}")
        sl = slice(start, stop)
        hp = self.haul[sl]
        n = len(hp)
        j = self.factor[sl]
        cpue = None
        out = {}
        for c in columns:
            if c in self.hauls.columns:
                out[c] = self._from_hauls(c, hp)
            elif c in ("species", "factor_species"):
                out[c] = pd.Categorical.from_codes(self.species_code[sl], validate=False,
                                                   categories=pd.Index(self.species, dtype="str"))
            elif c == "count":
                out[c] = self.count[sl]
            elif c == "cpue" or c.startswith("cpue_ref_"):
                if cpue is None:
                    cpue = self.count[sl] / self.hauls["effort"].to_numpy(dtype=float)[hp]
                q = {"cpue": None, "cpue_ref_lower": 0, "cpue_ref_median": 1, "cpue_ref_upper": 2}[c]
                out[c] = cpue if q is None else cpue * self.factor_quantiles[j, q]
            elif c == "factor_id":
                out[c] = _categories(np.zeros(n, dtype=np.int64), [self.factor_id])
            elif c == "factor_gear":
                out[c] = self._from_hauls("gear", hp)
            elif c == "factor_status":
                out[c] = _categories(j, self.factor_status)
            elif c == "domain_flag":
                out[c] = self._from_hauls("domain_flag", hp)
                if self.record_flag is not None:
                    extra = self.record_flag[sl]
                    base = np.asarray(out[c], dtype=object)
                    both = (base != "") & (extra != "")
                    merged = np.where(both, base + "; " + extra, np.where(extra != "", extra, base))
                    out[c] = pd.Categorical(merged)
        return pd.DataFrame(out, index=pd.RangeIndex(n), copy=False)  # no consolidating copy

    def write_parquet(self, path: Path, rows: int = PARQUET_SLICE_ROWS) -> None:
        """Write every record to one Parquet file, ``rows`` records at a time."""
        import pyarrow as pa
        import pyarrow.parquet as pq

        writer = None
        try:
            for start in range(0, max(len(self), 1), rows):
                table = pa.Table.from_pandas(self.frame(start=start, stop=start + rows), preserve_index=False)
                if writer is None:
                    writer = pq.ParquetWriter(path, table.schema)
                writer.write_table(table)
        finally:
            if writer is not None:
                writer.close()


def _csv_ready(frame: pd.DataFrame) -> pd.DataFrame:
    """Dates as ISO text (YYYY-MM-DD, with the time only where one was given)."""
    out = frame.copy(deep=False)
    for col in out.columns:
        if pd.api.types.is_datetime64_any_dtype(out[col]):
            s = out[col]
            has_time = (s.dropna() != s.dropna().dt.normalize()).any()
            out[col] = s.dt.strftime("%Y-%m-%dT%H:%M:%S" if has_time else "%Y-%m-%d")
    return out


# ----------------------------------------------------------------------------- convert


def _categories(codes: np.ndarray, labels: list[str]) -> pd.Categorical:
    """labels[codes] as a pandas Categorical (labels may repeat; they are merged)."""
    remap, uniq = pd.factorize(np.asarray(labels, dtype=object))  # hashing: cheap for a million labels
    return pd.Categorical.from_codes(remap[codes] if len(codes) else codes.astype(np.int64),
                                     categories=pd.Index(uniq, dtype="str"))


def _is_text(s: pd.Series) -> bool:
    return not (pd.api.types.is_numeric_dtype(s) or pd.api.types.is_datetime64_any_dtype(s)
                or pd.api.types.is_bool_dtype(s))


def _categorical_text(hauls: pd.DataFrame) -> pd.DataFrame:
    """Text columns of hauls as categoricals: records repeat each haul once per species, and a
    categorical stores a small code per record instead of the text (dictionary-encoded in Parquet)."""
    out = hauls.copy()
    for col in out.columns:
        if _is_text(out[col]):
            out[col] = out[col].astype("category")
    return out


def _blank(s: pd.Series) -> pd.Series:
    return s.isna() | (s.astype("string").str.strip() == "")


def _select_draws(n_total: int, draws: int | None, seed: int, where: str) -> np.ndarray:
    if draws is None:
        return np.arange(n_total)
    if draws > n_total:
        raise InputError([Problem(where, None, None,
                                  f"{draws} draws asked for, but the factor set holds {n_total}",
                                  f"give --draws {n_total} or fewer, or leave it out to use all")])
    rng = np.random.default_rng(seed)
    return np.sort(rng.choice(n_total, size=draws, replace=False))


def _input_hashes(files: dict[str, str]) -> dict:
    from calib.factors import file_sha256

    return {role: {"path": str(p), "sha256": file_sha256(p)} for role, p in files.items()
            if p is not None and Path(p).is_file()}


def convert(factors, hauls, catches=None, *, species_recorded=None, species_names=None,
            draws: int | None = None, allow_unconverged: bool = False, interval: float | None = None,
            seed: int = 0, lengths=None, outside_lengths: str = "reject") -> Conversion:
    """Express survey records in reference-gear units, draw by draw.

    Parameters
    ----------
    factors : a :class:`calib.factors.FactorSet` or the directory one was saved in.
    hauls, catches : paths to the survey tables (CSV or Parquet; design section 3), or a
        ``calib.tables.Tables`` as ``hauls`` (then ``catches`` and the intake tables are
        ignored). Plain survey hauls (blank pair_id) and calibration hauls are both converted.
        Non-integer (raised) counts are accepted.
    species_recorded, species_names : optional paths to the partner intake tables.
    draws : number of posterior draws to use per factor; None (default) uses all, otherwise
        a seeded random subset of that size (the same draws for every factor).
    allow_unconverged : convert with factors whose status is ``fail`` (flagged in
        factor_status) instead of rejecting their records.
    interval : central interval level of cpue_ref_lower/upper; default the factor set's.
    seed : seed of the draw subset.
    lengths : optional path to the survey's lengths table (haul_id, species, length_mm, n). With a
        factor set fitted by length, records are converted per length class (module docstring).
    outside_lengths : "reject" (default: records with fish outside a species' calibrated length
        range go to rejected.csv) or "nearest" (converted with the nearest class, flagged).

    Returns
    -------
    Conversion (see its docstring). ``conversion.n_in == n_converted + n_rejected`` always.

    Raises
    ------
    InputError for unreadable or invalid tables or factor set, or more draws than it holds.
    """
    from calib.factors import FactorSet, software_versions, utc_timestamp
    from calib.tables import Tables, load_tables, recorded_by_occasion, zero_grid

    factor_dir = None
    if not isinstance(factors, FactorSet):
        factor_dir = str(factors)
        factors = FactorSet.load(factors)
    fs = factors
    if interval is None:
        interval = float(fs.manifest.get("settings", {}).get("interval", 0.9))
    if not 0 < interval < 1:
        raise ValueError(f"interval must be between 0 and 1 (e.g. 0.9), not {interval}")
    if draws is not None and (int(draws) != draws or draws < 1):
        raise ValueError(f"draws must be a positive whole number, not {draws}")
    from calib.length_convert import OUTSIDE

    if outside_lengths not in OUTSIDE:
        raise ValueError(f"outside_lengths must be one of {OUTSIDE}, not {outside_lengths!r}")
    tables = hauls if isinstance(hauls, Tables) else load_tables(
        hauls, catches, lengths, species_recorded=species_recorded, species_names=species_names)
    by_length = "length" in fs.idata.posterior["theta"].dims
    by_cov = bool(fs.manifest.get("covariates")) and not by_length
    if by_length and tables.lengths is not None:
        from calib.length_convert import survey_length_problems

        problems = survey_length_problems(tables.lengths, float(fs.manifest["lengths"]["bin_mm"]),
                                          tables.files.get("lengths") or "lengths")
        if problems:
            raise InputError(problems)
    reference = fs.reference
    posterior_file = str(Path(factor_dir) / "posterior.nc") if factor_dir else "factor set posterior"

    h = tables.hauls.drop(columns=["_row"])
    clash = [c for c in h.columns if c in ADDED_COLUMNS or c in ("reason", "reason_code")]
    if clash:
        raise InputError([Problem(tables.files["hauls"], None, c,
                                  f"hauls column '{c}' has the name of a column convert adds",
                                  "rename that column", tables.is_csv("hauls")) for c in clash])

    # --- records: every haul x species, zeros where recorded, as positions (no string lookups)
    hp, sc, species_all, count = zero_grid(tables)
    hp, sc = _small_int(hp, max(len(h), 1)), _small_int(sc, max(len(species_all), 1))  # halves the passes below
    n_in = len(hp)
    n_sp = max(len(species_all), 1)
    occasions = recorded_by_occasion(tables, species_all)
    effort = h["effort"].to_numpy(dtype=float)

    # --- draws: one subset of posterior samples, shared by every factor
    theta = fs.idata.posterior["theta"]
    n_chain, n_draw = theta.sizes["chain"], theta.sizes["draw"]
    n_total = n_chain * n_draw
    idx = _select_draws(n_total, draws, seed, posterior_file)
    if by_length:  # length classes only: no species-level draws (see calib.length_convert)
        theta_all = None
    else:
        theta = theta.transpose("chain", "draw", "gear", "species")
        theta_all = theta.values.reshape(n_total, theta.sizes["gear"], theta.sizes["species"])
    gpos = {str(g): i for i, g in enumerate(theta.coords["gear"].values)}
    post_species = [str(s) for s in theta.coords["species"].values]
    spos = {s: i for i, s in enumerate(post_species)}
    probs = [(1 - interval) / 2, 0.5, 1 - (1 - interval) / 2]

    table = fs.table
    species_level = table[_blank(table["length_mm"]) & _blank(table["covariate"])] if len(table) else table
    dup = species_level.duplicated(["species", "gear"], keep=False)
    if dup.any():
        r = species_level[dup].iloc[0]
        raise InputError([Problem(f"{factor_dir or 'factor set'}/factors.csv", None, None,
                                  f"the factor table has several species-level factors for '{r['species']}' "
                                  f"with '{r['gear']}'", "use a factor set written by `calib fit`")])
    row_of = {(s, g): r for s, g, r in zip(species_level["species"], species_level["gear"],
                                          species_level.to_dict("records"))}
    any_row = set(zip(table["species"], table["gear"]))
    ref_unit = fs.manifest.get("reference_effort_unit") or None

    # --- one decision per species x gear present in the records
    g_h, gears_all = _text_codes(h["gear"])
    u_h, units_all = _text_codes(h["effort_unit"])
    key = g_h.astype(np.int32 if len(gears_all) * n_sp < 2**31 else np.int64)[hp]
    key *= n_sp
    key += sc
    ucombo, inv = _small_unique(key, len(gears_all) * n_sp)
    del key
    k = len(ucombo)
    c_code = np.zeros(k, dtype=np.int8)  # 0: convertible, else 1 + index in REJECT_CODES
    c_unit = np.full(k, None, dtype=object)
    c_need = np.full(k, -1, dtype=np.int64)  # unit code the records must have; -1: not checked
    c_status = np.full(k, "", dtype=object)
    c_q = np.full((k, 3), np.nan)
    c_why = np.full(k, "", dtype=object)  # the factor table's reason, quoted in rejections
    c_key = []
    c_length = np.zeros(k, dtype=bool)  # converted per length class (calib.length_convert)
    c_cov = np.zeros(k, dtype=bool)  # converted with the record's covariates (calib.covariate_convert)
    used_draws: dict[int, np.ndarray] = {}
    for j, cc in enumerate(ucombo):
        g, s = gears_all[cc // n_sp], species_all[cc % n_sp]
        c_key.append((s, g))
        if g == reference:
            c_status[j], c_unit[j] = "reference", ref_unit
            c_q[j] = 1.0
            used_draws[j] = np.ones(len(idx))
        else:
            row = row_of.get((s, g))
            if row is None:
                c_code[j] = _CODE["not_species_level" if (s, g) in any_row else "no_factor"]
                if (by_length or by_cov) and (s, g) in any_row:
                    c_length[j], c_cov[j] = by_length, by_cov
                    units = table.loc[(table["species"] == s) & (table["gear"] == g), "effort_unit"].dropna()
                    c_unit[j] = str(units.iloc[0]) if len(units) else None
                    if c_unit[j] is not None:
                        c_need[j] = units_all.index(c_unit[j]) if c_unit[j] in units_all else len(units_all)
                continue
            c_status[j] = str(row["status"])
            c_why[j] = "" if pd.isna(row.get("reason")) else str(row.get("reason"))
            unit = row.get("effort_unit")
            c_unit[j] = None if pd.isna(unit) or str(unit).strip() == "" else str(unit)
            if g not in gpos or s not in spos:
                c_code[j] = _CODE["no_draws"]
                continue
            f_all = np.exp(-theta_all[:, gpos[g], spos[s]])
            if not np.isfinite(f_all).all():
                c_code[j] = _CODE["draws_not_finite"]
                continue
            if c_status[j] == "fail" and not allow_unconverged:
                c_code[j] = _CODE["factor_fail"]
                continue
            used_draws[j] = f_all[idx]
            c_q[j] = np.quantile(used_draws[j], probs)
        if c_unit[j] is not None:
            c_need[j] = units_all.index(c_unit[j]) if c_unit[j] in units_all else len(units_all)

    code = np.zeros(n_in, dtype=np.int8)
    if occasions is not None:
        occasion, recorded = occasions
        code[~recorded[occasion[hp], sc]] = _CODE["not_recorded"]
    if c_code.any():
        combo_code = c_code[inv]
        fill = (code == 0) & (combo_code != 0)
        code[fill] = combo_code[fill]
        del combo_code, fill
    # records of species x gears with length-class factors only: converted per length class
    cand = np.flatnonzero(c_length[inv] & (code == _CODE["not_species_level"])) if c_length.any() else np.zeros(0, int)
    lconv = None
    if len(cand) and tables.lengths is not None:
        from calib.length_convert import convert_by_length

        lconv = convert_by_length(fs, tables, h, hp[cand], sc[cand], species_all, count[cand], idx, probs,
                                  allow_unconverged=allow_unconverged, outside=outside_lengths)
        code[cand] = np.array([0 if c == "" else _CODE[c] for c in lconv.code], dtype=np.int8)
    # records of species x gears with covariate factors only: converted with their own covariates
    ccand = np.flatnonzero(c_cov[inv] & (code == _CODE["not_species_level"])) if c_cov.any() else np.zeros(0, int)
    cconv = None
    if len(ccand):
        from calib.covariate_convert import convert_by_covariate

        cconv = convert_by_covariate(fs, h, hp[ccand], sc[ccand], species_all, count[ccand], idx, probs,
                                     allow_unconverged=allow_unconverged)
        code[ccand] = np.array([0 if c == "" else _CODE[c] for c in cconv.code], dtype=np.int8)
    # effort units: a record-level check only when some gear has hauls in a unit its factor was
    # not fitted with (decided on the few gear x unit pairs present)
    n_units = max(len(units_all), 1)
    present = np.flatnonzero(np.bincount(g_h.astype(np.int64) * n_units + u_h, minlength=len(gears_all) * n_units))
    pairs = {(int(x // n_units), int(x % n_units)) for x in present}
    combo_gear = ucombo // n_sp
    if any(c_need[j] >= 0 and any(g == combo_gear[j] and u != c_need[j] for g, u in pairs) for j in range(k)):
        need = c_need[inv]
        code[(code == 0) & (need >= 0) & (u_h[hp] != need)] = _CODE["effort_unit"]
        del need
    ok = code == 0
    all_ok = bool(ok.all())
    n_combos = k  # species x gear entries; length-converted records get one entry each after them
    record_flag = None
    rflag = None
    for conv_, cand_ in ((lconv, cand), (cconv, ccand)):
        if conv_ is None:
            continue
        # Each length-converted record has its own effective factor (its length composition's mix
        # of class factors; or its own covariate values), so it gets its own row in the store's
        # quantile table; the class draws themselves are kept once per class (lconv.draws).
        orig = inv[cand_].astype(np.int64)
        inv = inv.astype(np.int64)
        inv[cand_] = k + np.arange(len(cand_))
        c_q = np.vstack([c_q, conv_.quantiles])
        c_status = np.concatenate([c_status, conv_.status.astype(object)])
        c_key = c_key + [c_key[j] for j in orig]
        c_unit = np.concatenate([c_unit, c_unit[orig]])
        c_why = np.concatenate([c_why, c_why[orig]])
        k = k + len(cand_)
        if rflag is None:
            rflag = np.full(n_in, "", dtype=object)
        rflag[cand_] = conv_.flag
    if rflag is not None:
        record_flag = rflag[ok]
        if not any(record_flag):
            record_flag = None

    # --- converted records (kept lean; columns are built on demand, see _RecordStore)
    hp_ok, j_ok = (hp, inv) if all_ok else (hp[ok], inv[ok])
    counts_used = np.bincount(j_ok, minlength=k)
    used = np.flatnonzero(counts_used)

    domain = fs.manifest.get("domain")
    notes: list[str] = []
    if domain:
        domain_source = "factor set manifest"
    else:
        domain, domain_source = _domain_from_inputs(fs.manifest)
        if domain is None:
            notes.append(f"no calibration domain: {domain_source}; no record is flagged in domain_flag")
        else:
            notes.append(f"calibration domain {domain_source} (the factor set does not store one)")
    if domain:
        flag_h, dnotes = _domain_flags(h, domain, reference)
        notes += dnotes
        for col, why in (domain.get("skipped") or {}).items():
            notes.append(f"column '{col}' not used as a domain covariate: {why}")
    else:
        flag_h = np.full(len(h), "", dtype=object)
    flagged_h = flag_h != ""
    converted_gears = {c_key[j][1] for j in used} - {reference}
    if domain:
        for g in sorted(converted_gears - set(domain.get("by_gear", {}))):
            notes.append(f"the calibration domain has no entry for gear '{g}': its records are not checked "
                         "against it (domain_flag blank)")
    no_unit = sorted({c_key[j][1] for j in used if c_unit[j] is None})
    if no_unit:
        notes.append(f"the factor set gives no effort unit for {', '.join(repr(g) for g in no_unit)}: "
                     "effort units of those records were not checked")
    flagged = flagged_h[hp_ok]
    store = _RecordStore(hauls=h, haul=hp_ok, species_code=sc if all_ok else sc[ok],
                         species=list(species_all), count=count if all_ok else count[ok], factor=_small_int(j_ok, k),
                         factor_quantiles=c_q, factor_status=[str(x) for x in c_status], factor_id=fs.id,
                         haul_flag=flag_h, record_flag=record_flag)
    if record_flag is not None:
        flagged = flagged | (record_flag != "")

    # --- rejected records, each with its reason
    bad = ~ok
    hp_bad = hp[bad]
    rej = _categorical_text(h.take(hp_bad).reset_index(drop=True))
    rej["species"] = _categories(sc[bad], species_all)
    rej["count"] = count[bad]
    rej["cpue"] = count[bad] / effort[hp_bad]
    rej["reason_code"] = _categories(code[bad].astype(np.int64) - 1, list(REJECT_CODES))
    rej["reason"] = _reason_texts(h, hp_bad, code[bad], inv[bad], c_key, c_unit, c_why, u_h, units_all,
                                  occasions, fs.id, sorted(set(table["species"]) | set(post_species)),
                                  fs.manifest.get("covariates"))

    # --- factors used and their draws
    rows, draw_frames = [], []
    flagged_used = np.bincount(j_ok[flagged], minlength=k)
    for j in np.flatnonzero(counts_used[:n_combos]):
        s, g = c_key[j]
        rows.append({"species": s, "gear": g, "factor_status": c_status[j], "effort_unit": c_unit[j] or "",
                     "factor_median": c_q[j, 1], "factor_lower": c_q[j, 0], "factor_upper": c_q[j, 2],
                     "n_draws": len(idx), "n_records": int(counts_used[j]),
                     "n_domain_flagged": int(flagged_used[j])})
        draw_frames.append(pd.DataFrame({"species": s, "gear": g, "draw": np.arange(len(idx)),
                                         "factor": used_draws[j], "posterior_chain": idx // n_draw,
                                         "posterior_draw": idx % n_draw}))
    if lconv is not None and len(lconv.draws):
        # length classes: one row per species x gear x class with its factor over the draws used
        cq = lconv.draws.groupby(["species", "gear", "length_mm"])["factor"].quantile(probs).unstack()
        st_of = fs.table.set_index(["species", "gear", "length_mm"])[["status", "effort_unit"]]
        for s_, g_, L, n_rec in lconv.class_use.itertuples(index=False):
            if (s_, g_, L) not in cq.index or n_rec == 0:
                continue
            st_row = st_of.loc[(s_, g_, L)] if (s_, g_, L) in st_of.index else None
            rows.append({"species": s_, "gear": g_, "length_mm": L,
                         "factor_status": "" if st_row is None else st_row["status"],
                         "effort_unit": "" if st_row is None else st_row["effort_unit"],
                         "factor_median": cq.loc[(s_, g_, L)].iloc[1], "factor_lower": cq.loc[(s_, g_, L)].iloc[0],
                         "factor_upper": cq.loc[(s_, g_, L)].iloc[2], "n_draws": len(idx), "n_records": n_rec,
                         "n_domain_flagged": np.nan})
    used_columns = ["species", "gear", "length_mm", "factor_status", "effort_unit", "factor_median", "factor_lower",
                    "factor_upper", "n_draws", "n_records", "n_domain_flagged"]
    if cconv is not None and len(cconv.use):
        # covariates: one row per species x gear x covariate values used (key text in 'covariates')
        unit_of = fs.table.groupby(["species", "gear"])["effort_unit"].first()
        for r in cconv.use.to_dict("records"):
            rows.append({**r, "effort_unit": unit_of.get((r["species"], r["gear"]), ""), "n_draws": len(idx),
                         "n_domain_flagged": np.nan})
        used_columns.insert(3, "covariates")
    factors_used = pd.DataFrame(rows, columns=used_columns)
    factor_draws = (pd.concat(draw_frames, ignore_index=True) if draw_frames
                    else pd.DataFrame({c: pd.Series(dtype="float" if c == "factor" else "int64")
                                       for c in DRAW_COLUMNS}).astype({"species": "str", "gear": "str"}))
    factor_draws = factor_draws[DRAW_COLUMNS]

    length_draws = lconv.draws if lconv is not None else None
    record_lengths = lconv.record_lengths if lconv is not None else None
    if not by_length and tables.lengths is not None:
        notes.append("lengths were given but the factor set's factors do not depend on length: the lengths "
                     "were checked and not used")
    if by_length and tables.lengths is None:
        notes.append("the factor set's factors depend on length but no survey lengths were given (--lengths): "
                     "its species x gears cannot be converted")
    n_conv, n_rej = len(store), len(rej)
    if n_conv + n_rej != n_in:  # pragma: no cover - an internal error, never expected
        raise AssertionError(f"records in {n_in} != converted {n_conv} + rejected {n_rej}")
    by_reason = np.bincount(code[bad].astype(np.int64), minlength=len(REJECT_CODES) + 1)
    per_status = {st: int(counts_used[c_status == st].sum()) for st in ("reference", "fail")}
    manifest = {
        "tool": "calib",
        "step": "convert",
        "factor_set_id": fs.id,
        "factor_set_dir": factor_dir,
        "reference": reference,
        "reference_effort_unit": ref_unit,
        "inputs": _input_hashes(tables.files),
        "counts": {
            "records_in": int(n_in),
            "converted": int(n_conv),
            "rejected": int(n_rej),
            "rejected_by_reason": {c: int(by_reason[_CODE[c]]) for c in REJECT_CODES if by_reason[_CODE[c]]},
            "reference_pass_through": per_status["reference"],
            "unconverged_converted": per_status["fail"],
            "domain_flagged": int(flagged.sum()),
            "length_converted": int((ok[cand]).sum()) if lconv is not None else 0,
            "covariate_converted": int((ok[ccand]).sum()) if cconv is not None else 0,
        },
        "draws": {"available": int(n_total), "used": int(len(idx)), "thinned": draws is not None,
                  "seed": int(seed) if draws is not None else None},
        "interval": float(interval),
        "allow_unconverged": bool(allow_unconverged),
        "outside_lengths": outside_lengths if by_length else None,
        "length_bin_mm": float(fs.manifest["lengths"]["bin_mm"]) if by_length else None,
        "domain": {"source": domain_source if domain else None, **(domain or {})},
        "notes": notes,
        "versions": software_versions(),
    }
    manifest["conversion_id"] = "cv-" + hashlib.sha256(
        json.dumps(manifest, sort_keys=True, default=str).encode()).hexdigest()[:16]
    manifest["timestamp"] = utc_timestamp()
    if cconv is not None:
        manifest["covariates"] = fs.manifest.get("covariates")
    return Conversion(rejected=rej, factor_draws=factor_draws, factors=factors_used, manifest=manifest,
                      notes=notes, store=store, length_factor_draws=length_draws, record_lengths=record_lengths,
                      covariate_factor_draws=cconv.draws if cconv is not None else None,
                      covariate_term_draws=cconv.terms if cconv is not None else None)


def _text_codes(values: pd.Series) -> tuple[np.ndarray, list[str]]:
    """Codes (int32) of a text column into its sorted distinct values (hash-based factorize:
    fast on Arrow-backed text), for columns without missing values."""
    codes, uniq = pd.factorize(values, use_na_sentinel=False)
    labels = [str(u) for u in uniq]
    order = sorted(range(len(labels)), key=lambda i: labels[i])
    rank = np.empty(len(labels), dtype=np.int32)
    rank[order] = np.arange(len(labels), dtype=np.int32)
    return rank[codes], [labels[i] for i in order]


def _small_unique(keys: np.ndarray, n_keys: int) -> tuple[np.ndarray, np.ndarray]:
    """np.unique(keys, return_inverse=True) for integer keys in [0, n_keys): a lookup table
    instead of a sort, O(len(keys) + n_keys)."""
    present = np.bincount(keys, minlength=n_keys) > 0
    uniq = np.flatnonzero(present)
    lut = np.cumsum(present) - 1
    return uniq, lut[keys]


def _small_int(values: np.ndarray, bound: int) -> np.ndarray:
    """Integer positions in [0, bound) in the smallest dtype that holds them."""
    for dtype in (np.int8, np.int16, np.int32):
        if bound <= np.iinfo(dtype).max:
            return values.astype(dtype)
    return values.astype(np.int64)


def _reason_texts(h: pd.DataFrame, hp: np.ndarray, code: np.ndarray, j: np.ndarray, c_key, c_unit, c_why,
                  u_h: np.ndarray, units_all: list[str], occasions, factor_id: str, known_species: list[str],
                  covariates: dict | None = None):
    """One readable reason (what is wrong and what to do) per rejected record.

    Reasons depend only on (reason, species x gear, effort unit, source x year), so each
    distinct text is written once and handed to its records.
    """
    if not len(hp):
        return _categories(np.zeros(0, dtype=np.int64), [])
    code = code.astype(np.int64)
    is_unrec = code == _CODE["not_recorded"]
    unit = np.where(code == _CODE["effort_unit"], u_h[hp], 0)
    occ = np.zeros(len(hp), dtype=np.int64)
    if occasions is not None:
        occ = np.where(is_unrec, occasions[0][hp] + 1, 0)
    n_occ = int(occ.max()) + 1
    key = ((code * (len(c_key) + 1) + j) * (len(units_all) + 1) + unit) * n_occ + occ
    ukey, kinv = np.unique(key, return_inverse=True)
    first = np.unique(kinv.reshape(-1), return_index=True)[1]  # one record standing for each text
    from calib.tables import _name_key

    known_key = dict(zip(_name_key(pd.Series(known_species, dtype="str")), known_species))
    texts = []
    for r in first:
        s, g = c_key[j[r]]
        why = f" ({c_why[j[r]]})" if c_why[j[r]] else ""
        name = REJECT_CODES[code[r] - 1]
        if name == "not_recorded":
            source, year = h["source"].iloc[hp[r]], h["year"].iloc[hp[r]]
            src = "this source (blank)" if pd.isna(source) else f"source '{source}'"
            t = (f"species_recorded does not list '{s}' for {src} in {year}: without that source's zeros "
                 "this count would bias a mean upward; add the species and years to species_recorded if "
                 "the source did record it")
        elif name == "no_factor":
            t = (f"no factor for '{s}' with gear '{g}' in factor set {factor_id}: fit one from calibration "
                 f"groups where '{g}' fished beside a gear linked to the reference")
            near = known_key.get(_name_key(pd.Series([s], dtype="str")).iloc[0])
            if near is not None and near != s:
                t += (f" (the factor set has '{near}', which differs only in case or spacing: map the name "
                      "in species_names)")
        elif name == "not_species_level":
            t = (f"factor set {factor_id} has only length- or covariate-specific factors for '{s}' with "
                 f"'{g}'; converting by length class or covariate level is not supported yet")
        elif name == "no_draws":
            t = f"factors.csv lists '{s}' with '{g}' but posterior.nc holds no draws for it: refit the factor set"
        elif name == "draws_not_finite":
            t = f"the factor draws for '{s}' with '{g}' are not finite numbers{why}: no conversion is possible"
        elif name == "factor_fail":
            t = (f"the factor for '{s}' with '{g}' has status fail{why}; fix the fit, or convert anyway with "
                 "--allow-unconverged (the records are then marked factor_status 'fail')")
        elif name == "no_lengths":
            t = (f"the factors for '{s}' with '{g}' depend on length, but this haul has no lengths for it: "
                 "add its measured fish to the lengths table (--lengths)")
        elif name in ("covariate_missing", "covariate_level"):
            from calib.covariate_convert import covariate_reason

            t = covariate_reason(name, s, g, covariates or {}, factor_id)
        elif name == "outside_length_range":
            t = (f"some measured '{s}' lie outside the length range the factors for '{g}' were calibrated on "
                 f"(factor set {factor_id}, manifest 'lengths'): convert with --outside-lengths nearest to use "
                 "the nearest class (flagged in domain_flag), or calibrate over those lengths")
        else:  # effort_unit
            want, have = c_unit[j[r]], units_all[u_h[hp[r]]]
            t = (f"effort is in '{have}' but the factor for gear '{g}' was fitted with effort in '{want}': "
                 f"convert the effort to {want}, or give hauls in another unit a gear label of their own")
        texts.append(t)
    return _categories(kinv.reshape(-1), texts)


# ----------------------------------------------------------------------------- command line


CONVERT_DESCRIPTION = """\
Express survey records in reference-gear units, with uncertainty. Every haul x
species (zeros completed where the species was recorded) gets cpue = count /
effort and its value in reference-gear units (cpue_ref_median, cpue_ref_lower,
cpue_ref_upper): cpue times each posterior draw of the factor, summarised by the
median and central interval. Reference-gear records pass through unchanged.
Records outside the calibration's months or covariate ranges are converted and
marked in domain_flag. Records that cannot be converted (no factor, factor
status fail, effort in another unit, species not recorded by its source) go to
rejected.csv with the reason; the counts in, converted and rejected are printed.

Writes OUT/records.parquet (and records.csv up to 1,000,000 rows),
OUT/rejected.csv, OUT/factor_draws.parquet (the draws used, once per factor),
OUT/factors_used.csv and OUT/manifest.json."""


def add_convert_parser(sub, formatter_class=argparse.RawDescriptionHelpFormatter) -> argparse.ArgumentParser:
    """Add the ``convert`` subcommand to an argparse subparsers object; returns its parser."""
    p = sub.add_parser("convert", formatter_class=formatter_class,
                       help="express survey records in reference-gear units, with uncertainty",
                       description=textwrap.dedent(CONVERT_DESCRIPTION))
    p.add_argument("--factors", required=True, metavar="DIR", help="factor set directory written by `calib fit`")
    p.add_argument("--hauls", required=True, metavar="FILE",
                   help="hauls table (CSV or Parquet) of the records to convert")
    p.add_argument("--catches", required=True, metavar="FILE",
                   help="catches table: one row per haul and species caught (missing species = zero)")
    p.add_argument("--species-recorded", metavar="FILE", default=None,
                   help="optional table (source, species, year_from, year_to): zeros are completed only for "
                        "species a source recorded that year")
    p.add_argument("--species-names", metavar="FILE", default=None,
                   help="optional table (name, accepted_name): partners' names mapped to accepted names first")
    p.add_argument("--out", required=True, metavar="DIR", help="directory to write the converted records to")
    p.add_argument("--draws", type=int, default=None, metavar="N",
                   help="use a random subset of N posterior draws per factor (default: all draws)")
    p.add_argument("--seed", type=int, default=0, help="seed of the --draws subset")
    p.add_argument("--interval", type=float, default=None,
                   help="central interval level for cpue_ref_lower/upper (default: the factor set's)")
    p.add_argument("--lengths", metavar="FILE", default=None,
                   help="optional lengths table of the survey records (haul_id, species, length_mm, n). Needed "
                        "when the factors depend on length (fitted with --length-bin): each record is converted "
                        "length class by length class, the measured fish raised to the whole catch")
    p.add_argument("--outside-lengths", choices=["reject", "nearest"], default="reject",
                   help="records with measured fish outside the lengths the factors were calibrated on: "
                        "'reject' sends them to rejected.csv; 'nearest' converts those fish with the factor of "
                        "the nearest calibrated length class and notes it in domain_flag")
    p.add_argument("--allow-unconverged", action="store_true",
                   help="convert with factors whose status is fail instead of rejecting their records "
                        "(they are marked factor_status 'fail')")
    return p


def run_convert_command(args) -> int:
    """Run ``calib convert`` from parsed arguments; prints the counts; returns the exit code.

    Raises InputError on bad input (the caller prints it and exits 1).
    """
    conversion = convert(args.factors, args.hauls, args.catches, species_recorded=args.species_recorded,
                         species_names=args.species_names, draws=args.draws,
                         allow_unconverged=args.allow_unconverged, interval=args.interval, seed=args.seed,
                         lengths=args.lengths, outside_lengths=args.outside_lengths)
    out = conversion.save(args.out)
    print(conversion.summary())
    written = ["records.parquet"] + (["records.csv"] if conversion.n_records <= CSV_MAX_ROWS else []) + [
        "rejected.csv", "factor_draws.parquet", "factors_used.csv", "manifest.json"] + (
        ["length_factor_draws.parquet", "record_lengths.csv"] if conversion.length_factor_draws is not None else []) + (
        ["covariate_factor_draws.parquet", "covariate_term_draws.parquet"]
        if conversion.covariate_term_draws is not None else [])
    print(f"\nrows in {conversion.n_in} = converted {conversion.n_converted} + rejected {conversion.n_rejected}")
    print(f"Wrote {out}/: {', '.join(written)}")
    return 0
