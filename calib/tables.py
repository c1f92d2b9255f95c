"""Stage 1: read and validate the input tables (hauls, catches, lengths, and the
partner intake tables species_recorded and species_names).

This is the only module that checks input. Everything downstream trusts a
:class:`Tables` object. Formats are fixed by docs/data-formats.md (design section 3).

INTERFACE (implemented by the tables work; other stages rely on exactly this):

    read_table(path) -> pandas.DataFrame               # CSV or Parquet by suffix, every cell as text
    load_tables(hauls, catches, lengths=None, species_recorded=None, species_names=None) -> Tables
                                                        # raises calib.errors.InputError with all problems
    complete_zeros(tables, recorded=None) -> DataFrame  # one row per haul x species, zeros filled
                                                        # (only where recorded, see species_recorded)
    recorded_pairs(tables) -> DataFrame | None          # haul_id x species a haul's source recorded
    zero_grid(tables) -> (haul_pos, species_code, species, count)  # complete_zeros as positions
    unrecorded_catches(tables) -> DataFrame             # catches rows of species their source did not record
    fit_problems(tables, reference) -> list[Problem]    # rules only fitting needs (errors for fit,
                                                        # warnings for check)

``Tables`` fields:
    hauls:    DataFrame, one row per haul. Columns: haul_id (str), gear (str),
              date (datetime64[ns]), year (int64, derived from date), effort (float > 0),
              effort_unit (str), pair_id (str; missing as NaN, test with ``.isna()``), and any
              optional/extra columns as given (site, stratum, source: str; stratum_area,
              latitude, longitude: float, NaN when blank; other columns: numbers when every
              non-blank value parses as a number, else text).
              Index: RangeIndex; column ``_row`` holds the 1-based data row in the file.
    catches:  DataFrame: haul_id (str), species (str), count (float >= 0), ``_row``.
              Unique per haul_id x species. Counts may be non-integer (raised counts).
    lengths:  DataFrame or None: haul_id, species, length_mm (float > 0), n (int64 > 0), ``_row``.
              Every haul_id x species is in catches and sum(n) <= count.
    files:    dict role -> path string as given ("hauls", "catches", "lengths",
              "species_recorded", "species_names").
    warnings: list[calib.errors.Warning_] found while reading (do not stop the command).
    species_recorded: DataFrame or None: source, species (accepted name), year_from, year_to
              (float; NaN when blank = open-ended), ``_row``.
    species_names: DataFrame or None: name, accepted_name, ``_row``.
    renamed:  DataFrame: table ("catches", "lengths", "species_recorded"), name (as written),
              accepted_name, n_rows -- what species_names changed (empty when nothing).

Partner intake (design section 3). ``species_names`` maps names as written (exact text after
stripping spaces) to one accepted name; it is applied to the species of catches, lengths and
species_recorded before any other rule, so every later stage sees accepted names only. When two
catches rows of one haul become the same accepted name, their counts are summed (with a warning
naming the rows). ``species_recorded`` lists, per source, the species it recorded and the years
(year_from, year_to inclusive; a blank end is open). Zero completion then fills zeros only for
species a haul's source recorded in the haul's year; a source with no row in the table (or a
haul with a blank source) is taken to have recorded every species, and ``check`` says so.
Unknown columns in these two tables are errors (they are short, hand-made tables, where an
unknown column is almost always a misspelt one).

Text cells are stripped of leading/trailing spaces. Completely empty rows (e.g. the
",,,," lines spreadsheets leave behind) are not records: they are skipped with a warning.
Extra columns of catches and lengths are not used; a warning names them.

Column-level rules (required columns, blanks, numbers, ranges, ISO dates, uniqueness)
are pandera schemas run lazily on the text frame, so every failing cell is reported;
the cross-table rules are written out below.
"""

from __future__ import annotations

import csv
import datetime as _dt
import io
import re
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd
import pandera.pandas as pa

from calib.errors import InputError, Problem, ProblemList, Warning_

CSV_SUFFIXES = {".csv"}
PARQUET_SUFFIXES = {".parquet", ".pq"}
_NAN_WORDS = {"nan", "+nan", "-nan"}
_YEARS = (1678, 2261)  # the years datetime64[ns] can hold
_ISO_DATE = re.compile(r"^\d{4}-\d{2}-\d{2}(?:[T ]\d{2}:\d{2}(?::\d{2}(?:\.\d+)?)?)?$")


# ----------------------------------------------------------------------------- column rules


@dataclass(frozen=True)
class _Col:
    """One column's rules. ``kind``: text, number, whole (positive whole number) or date."""

    name: str
    kind: str = "text"
    required: bool = True  # the column must be present and no cell may be blank
    gt: float | None = None  # value must be > gt
    ge: float | None = None  # value must be >= ge
    between: tuple[float, float] | None = None
    blank_fix: str = ""
    range_fix: str = ""


HAULS_COLUMNS = [
    _Col("haul_id", blank_fix="give every haul a haul_id that is unique in the table"),
    _Col("gear", blank_fix="write the gear (method) used for this haul"),
    _Col("date", "date", blank_fix="write the day of the haul as YYYY-MM-DD"),
    _Col("effort", "number", gt=0, blank_fix="write the haul's effort in its effort_unit",
         range_fix="effort must be positive to give a catch per unit effort; correct it, or remove "
                   "the haul from hauls and catches if it was not fished"),
    _Col("effort_unit", blank_fix="write the unit of the effort, e.g. m2, min or haul"),
    _Col("pair_id", required=False),
    _Col("site", required=False),
    _Col("stratum", required=False),
    _Col("stratum_area", "number", required=False, gt=0,
         range_fix="write the stratum's area (> 0) or leave the cell blank"),
    _Col("latitude", "number", required=False, between=(-90.0, 90.0),
         range_fix="write decimal degrees north (WGS84), between -90 and 90; check that latitude "
                   "and longitude are not swapped"),
    _Col("longitude", "number", required=False, between=(-180.0, 180.0),
         range_fix="write decimal degrees east (WGS84), between -180 and 180; west is negative"),
    _Col("source", required=False),
]
CATCHES_COLUMNS = [
    _Col("haul_id", blank_fix="write the haul_id of the haul (as in hauls)"),
    _Col("species", blank_fix="write the species name"),
    _Col("count", "number", ge=0, blank_fix="write the number caught; species not caught need no row",
         range_fix="counts cannot be negative; write the number caught"),
]
LENGTHS_COLUMNS = [
    _Col("haul_id", blank_fix="write the haul_id of the haul (as in hauls)"),
    _Col("species", blank_fix="write the species name (as in catches)"),
    _Col("length_mm", "number", gt=0, blank_fix="write the length in mm",
         range_fix="lengths must be positive, in mm; correct the measurement"),
    _Col("n", "whole", gt=0, blank_fix="write how many fish were measured at this length",
         range_fix="n counts measured fish: write a whole number of 1 or more, or remove the row"),
]
SPECIES_RECORDED_COLUMNS = [
    _Col("source", blank_fix="write the source (partner dataset) as written in the hauls table's source column"),
    _Col("species", blank_fix="write the species the source recorded"),
    _Col("year_from", "whole", required=False, between=(1678.0, 2261.0),
         range_fix="write the first year the source recorded the species (four digits), or leave it "
                   "blank if it always did"),
    _Col("year_to", "whole", required=False, between=(1678.0, 2261.0),
         range_fix="write the last year the source recorded the species (four digits), or leave it "
                   "blank if it still does"),
]
SPECIES_NAMES_COLUMNS = [
    _Col("name", blank_fix="write the species name as the partner wrote it in catches"),
    _Col("accepted_name", blank_fix="write the accepted species name the name stands for"),
]
SPECS = {"hauls": HAULS_COLUMNS, "catches": CATCHES_COLUMNS, "lengths": LENGTHS_COLUMNS,
         "species_recorded": SPECIES_RECORDED_COLUMNS, "species_names": SPECIES_NAMES_COLUMNS}
ROLE_ORDER = {"species_names": 0, "hauls": 1, "catches": 2, "lengths": 3, "species_recorded": 4}
INTAKE_ROLES = ("species_recorded", "species_names")


# Several checks of one column parse the same text; pandera hands every check the same
# array, so parse it once per validation. Entries keep the array alive (ids stay unique)
# and the cache is emptied after each validation.
_PARSE_CACHE: dict[int, tuple[object, pd.Series]] = {}


def _numbers(text: pd.Series) -> pd.Series:
    """Parse stripped text to float; NaN where blank or not a number."""
    hit = _PARSE_CACHE.get(id(text.array))
    if hit is not None and hit[0] is text.array and hit[1].index.equals(text.index):
        return hit[1]
    parsed = pd.to_numeric(text.where(text != ""), errors="coerce").astype(float)
    _PARSE_CACHE[id(text.array)] = (text.array, parsed)
    return parsed


def _dates(text: pd.Series, *, any_year: bool = False) -> pd.Series:
    """Parse stripped text as ISO 8601 dates (optionally with a time); NaT where not.

    Years outside 1678-2261 (what datetime64[ns] holds) give NaT unless ``any_year``.
    """
    ok = text.str.match(_ISO_DATE)
    parsed = pd.to_datetime(text.where(ok), format="ISO8601", errors="coerce")
    if any_year:
        return parsed
    parsed = parsed.where((parsed.dt.year >= _YEARS[0]) & (parsed.dt.year <= _YEARS[1]))
    return parsed.astype("datetime64[ns]")


def _valued(text: pd.Series) -> pd.Series:
    """Finite parsed numbers (NaN otherwise), for range checks that skip other failures."""
    v = _numbers(text)
    return v.where(np.isfinite(v))


def _checks(col: _Col) -> list[pa.Check]:
    checks = []
    if col.required:
        checks.append(pa.Check(lambda s: s != "", name="not_blank"))
    if col.kind in ("number", "whole"):
        checks.append(pa.Check(
            lambda s: (s == "") | _numbers(s).notna() | s.str.lower().isin(_NAN_WORDS), name="is_number"))
        checks.append(pa.Check(
            lambda s: ~(s.str.lower().isin(_NAN_WORDS) | np.isinf(_numbers(s))), name="is_finite"))
    if col.kind == "whole":
        checks.append(pa.Check(lambda s: ~(_valued(s) % 1 != 0) | _valued(s).isna(), name="is_whole"))
    if col.gt is not None:
        checks.append(pa.Check(lambda s, gt=col.gt: ~(_valued(s) <= gt), name="greater_than"))
    if col.ge is not None:
        checks.append(pa.Check(lambda s, ge=col.ge: ~(_valued(s) < ge), name="at_least"))
    if col.between is not None:
        lo, hi = col.between
        checks.append(pa.Check(lambda s, lo=lo, hi=hi: ~((_valued(s) < lo) | (_valued(s) > hi)),
                               name="in_range"))
    if col.kind == "date":
        checks.append(pa.Check(lambda s: (s == "") | _dates(s).notna(), name="iso_date"))
    return checks


def _schema(role: str) -> pa.DataFrameSchema:
    columns = {
        c.name: pa.Column(
            checks=_checks(c), required=c.required, nullable=False,
            unique=(role == "hauls" and c.name == "haul_id"), report_duplicates="all",
        )
        for c in SPECS[role]
    }
    unique = ["haul_id", "species"] if role == "catches" else None
    return pa.DataFrameSchema(columns, unique=unique, report_duplicates="all")


def _describe(col: _Col, check: str, value: str) -> tuple[str, str]:
    """(message, fix) for one failing cell."""
    if check == "not_blank":
        return "blank value in a required column", col.blank_fix
    if check == "is_number":
        fix = "write a plain number such as 12.5 (no units, no thousands separators)"
        if "," in value:
            fix = "use a point as the decimal separator (12.5, not 12,5) and no thousands separators"
        if not col.required:
            fix += ", or leave the cell blank if unknown"
        return f"'{value}' is not a number", fix
    if check == "is_finite":
        return f"'{value}' is not a finite number", "write the measured value" + (
            "" if col.required else ", or leave the cell blank if unknown")
    if check == "is_whole":
        if col.name == "n":
            return f"n must be a whole number of fish (found {value})", col.range_fix
        return f"{col.name} must be a whole number (found {value})", col.range_fix
    if check == "greater_than":
        return f"{col.name} must be greater than {col.gt:g} (found {value})", col.range_fix
    if check == "at_least":
        return f"{col.name} must be at least {col.ge:g} (found {value})", col.range_fix
    if check == "in_range":
        lo, hi = col.between
        return f"{col.name} {value} is outside [{lo:g}, {hi:g}]", col.range_fix
    if check == "iso_date":
        if _dates(pd.Series([value], dtype="str"), any_year=True).notna().all():
            return (f"date {value} is outside the years {_YEARS[0]}-{_YEARS[1]}", "check the year")
        return (f"'{value}' is not an ISO 8601 date",
                "write dates as YYYY-MM-DD, e.g. 2021-05-03 (a time may follow: 2021-05-03T14:30)")
    raise AssertionError(f"no description for check {check!r}")  # pragma: no cover


# ----------------------------------------------------------------------------- reading


def _csv_problem(path: str, message: str, fix: str, row=None, column=None) -> Problem:
    return Problem(path, row, column, message, fix, is_csv=True)


def read_table(path) -> pd.DataFrame:
    """Read a CSV (``.csv``) or Parquet (``.parquet``, ``.pq``) table with every cell as text.

    Blank cells are kept as ``""`` (nothing is turned into NaN), so blanks can be
    reported. The index is a RangeIndex: data row r (1-based) is index r - 1. Empty
    lines are kept as rows of blanks so row numbers match the file.

    Raises InputError (with a Problem naming the file) when the file is missing, has an
    unknown suffix, is not UTF-8, has duplicate column names, or has rows with more or
    fewer fields than the header.
    """
    path_str = str(path)
    p = Path(path)
    suffix = p.suffix.lower()
    if suffix not in CSV_SUFFIXES | PARQUET_SUFFIXES:
        raise InputError([Problem(path_str, None, None, f"unknown file type '{p.suffix or '(none)'}'",
                                  "give a .csv file (UTF-8, comma-separated) or a .parquet/.pq file",
                                  is_csv=False)])
    if not p.exists():
        raise InputError([Problem(path_str, None, None, "file not found",
                                  "check the path and file name", is_csv=suffix in CSV_SUFFIXES)])
    if p.is_dir():
        raise InputError([Problem(path_str, None, None, "this is a folder, not a file",
                                  "give the path of the table file itself", is_csv=suffix in CSV_SUFFIXES)])
    if suffix in PARQUET_SUFFIXES:
        return _read_parquet(p, path_str)
    return _read_csv(p, path_str)


def _read_csv(p: Path, path_str: str) -> pd.DataFrame:
    raw = p.read_bytes()
    try:
        text = raw.decode("utf-8-sig")  # a byte-order mark (spreadsheet "CSV UTF-8") is fine
    except UnicodeDecodeError as err:
        start = 3 if raw.startswith(b"\xef\xbb\xbf") else 0
        line = raw[: err.start + start].count(b"\n") + 1
        raise InputError([_csv_problem(
            path_str, f"the file is not UTF-8 text (undecodable byte on line {line})",
            "save the table as 'CSV UTF-8' (in a spreadsheet: Save as > CSV UTF-8)",
            row=line - 1 if line > 1 else None)]) from None
    rows = list(csv.reader(io.StringIO(text, newline="")))
    if not rows or not any(cell.strip() for cell in rows[0]):
        raise InputError([_csv_problem(path_str, "the file is empty or its first line is blank",
                                       "the first line must be the header with the column names")])
    header = [h.strip() for h in rows[0]]
    problems = ProblemList()
    if len(header) == 1 and (";" in header[0] or "\t" in header[0]):
        sep = "semicolons" if ";" in header[0] else "tabs"
        problems.add(path_str, None, None, f"the header is one column '{header[0][:60]}': the file "
                     f"seems separated by {sep}", "save the table with commas between the values", True)
    seen: dict[str, int] = {}
    for i, name in enumerate(header):
        if name in seen:
            problems.add(path_str, None, name or f"(blank, position {i + 1})",
                         f"column name appears twice (positions {seen[name] + 1} and {i + 1})",
                         "give each column its own name, or remove the copy", True)
        seen.setdefault(name, i)
    width = len(header)
    data = rows[1:]
    for r, fields in enumerate(data, start=1):
        if len(fields) != width and any(f.strip() for f in fields):
            problems.add(path_str, r, None, f"row has {len(fields)} values but the header has {width}",
                         "quote values that contain commas (\"a, b\") and remove stray separators", True)
    problems.raise_if_any()
    padded = [(f + [""] * width)[:width] for f in data]
    frame = pd.DataFrame(padded, columns=header, dtype="str") if padded else pd.DataFrame(
        {h: pd.Series([], dtype="str") for h in header})
    return frame.reset_index(drop=True)


def _read_parquet(p: Path, path_str: str) -> pd.DataFrame:
    try:
        frame = pd.read_parquet(p)
    except Exception as err:  # pyarrow raises many kinds; all mean "cannot read this file"
        raise InputError([Problem(path_str, None, None, f"cannot be read as Parquet ({err})",
                                  "write the table again as Parquet, or give it as CSV", is_csv=False)]) from None
    frame = frame.reset_index(drop=True)
    out = {}
    for name in frame.columns:
        col = frame[name]
        if pd.api.types.is_datetime64_any_dtype(col):
            text = col.dt.strftime("%Y-%m-%dT%H:%M:%S").str.replace("T00:00:00", "", regex=False)
        else:
            text = col.map(lambda v: "" if _is_missing(v) else (v.isoformat() if isinstance(v, _dt.date) else str(v)))
        out[str(name)] = text.fillna("").astype("str")
    return pd.DataFrame(out, index=frame.index)


def _is_missing(value) -> bool:
    try:
        return bool(pd.isna(value))
    except (TypeError, ValueError):
        return False


# ----------------------------------------------------------------------------- loading


@dataclass
class Tables:
    """Validated input tables (see the module docstring for the columns)."""

    hauls: pd.DataFrame
    catches: pd.DataFrame
    lengths: pd.DataFrame | None
    files: dict[str, str]
    warnings: list[Warning_] = field(default_factory=list)
    species_recorded: pd.DataFrame | None = None
    species_names: pd.DataFrame | None = None
    renamed: pd.DataFrame = field(default_factory=lambda: pd.DataFrame(
        {"table": pd.Series(dtype="str"), "name": pd.Series(dtype="str"),
         "accepted_name": pd.Series(dtype="str"), "n_rows": pd.Series(dtype="int64")}))

    def is_csv(self, role: str) -> bool:
        return Path(self.files[role]).suffix.lower() in CSV_SUFFIXES


@dataclass
class _Raw:
    """One table as read: stripped text plus where it came from."""

    role: str
    path: str
    is_csv: bool
    text: pd.DataFrame  # index = data row - 1


def _row_list(rows, limit: int = 5) -> str:
    """'3, 8, 9' (at most ``limit`` shown, then 'and N more')."""
    rows = sorted(int(r) for r in rows)
    shown = ", ".join(str(r) for r in rows[:limit])
    return shown + (f" and {len(rows) - limit} more" if len(rows) > limit else "")


def _rows(rows) -> str:
    """'row 3' or 'rows 3, 8'."""
    rows = list(rows)
    return ("row " if len(rows) == 1 else "rows ") + _row_list(rows)


def _read_role(role: str, path, problems: ProblemList, warnings: list[Warning_]) -> _Raw | None:
    path_str = str(path)
    try:
        frame = read_table(path)
    except InputError as err:
        problems.extend(err.problems)
        return None
    is_csv = Path(path_str).suffix.lower() in CSV_SUFFIXES
    text = frame.apply(lambda s: s.astype("str").str.strip()) if len(frame.columns) else frame
    blank = (text == "").all(axis=1) if len(text.columns) else pd.Series(True, index=text.index)
    if blank.any():
        warnings.append(Warning_(
            f"{int(blank.sum())} empty row(s) skipped ({_rows(text.index[blank] + 1)})", path_str))
        text = text[~blank]
    if text.empty and role == "lengths":
        warnings.append(Warning_("the lengths table has no data rows: no lengths are used", path_str))
    elif text.empty and role in INTAKE_ROLES:
        warnings.append(Warning_(f"the {role} table has no data rows: it changes nothing", path_str))
    elif text.empty:
        problems.add(path_str, None, None, f"the {role} table has no data rows",
                     "check that this is the right file and that it has rows under the header", is_csv)
    if "_row" in text.columns:
        problems.add(path_str, None, "_row", "column name '_row' is reserved by calib",
                     "rename or remove that column", is_csv)
    if role in ("catches", "lengths"):
        known = {c.name for c in SPECS[role]}
        extra = [c for c in text.columns if c not in known]
        if extra:
            warnings.append(Warning_(
                f"column(s) {', '.join(repr(c) for c in extra)} are not used by calib and are ignored "
                f"(hauls carries extra columns; {role} holds only {', '.join(sorted(known))})", path_str))
    if role in INTAKE_ROLES:
        known = [c.name for c in SPECS[role]]
        for name in text.columns:
            if name not in known and name != "_row":
                problems.add(path_str, None, name, f"column '{name}' is not a {role} column",
                             _unknown_column_fix(name, known), is_csv)
    return _Raw(role, path_str, is_csv, text)


def _unknown_column_fix(name: str, known: list[str]) -> str:
    import difflib

    close = difflib.get_close_matches(name.strip().lower(), known, n=1, cutoff=0.6)
    listed = ", ".join(known)
    if close:
        return f"rename it to '{close[0]}' if that is what it holds, or remove it (columns: {listed})"
    return f"remove it (the columns are: {listed})"


def _missing_column_fix(name: str, columns) -> str:
    def norm(s):
        return re.sub(r"[\s_\-]+", "_", s.strip().lower())

    close = [c for c in columns if norm(c) == norm(name)]
    if close:
        return f"rename column '{close[0]}' to '{name}' (column names are fixed, lower case)"
    return f"add a column named '{name}' (see the data formats in the docs)"


def _column_problems(raw: _Raw) -> list[Problem]:
    """Run the role's pandera schema lazily and turn each failure case into a Problem."""
    specs = {c.name: c for c in SPECS[raw.role]}
    try:
        _schema(raw.role).validate(raw.text, lazy=True)
        return []
    except pa.errors.SchemaErrors as err:
        cases = err.failure_cases
    finally:
        _PARSE_CACHE.clear()
    out: list[Problem] = []
    text = raw.text
    dup_rows: dict[tuple, set[int]] = {}
    for case in cases.itertuples(index=False):
        check = str(case.check)
        if check == "column_in_dataframe":
            name = str(case.failure_case)
            out.append(Problem(raw.path, None, name, f"required column '{name}' is missing",
                               _missing_column_fix(name, text.columns), raw.is_csv))
        elif check in ("field_uniqueness", "multiple_fields_uniqueness"):
            key_cols = ("haul_id",) if check == "field_uniqueness" else ("haul_id", "species")
            if not set(key_cols) <= set(text.columns):
                continue  # a key column is missing (reported); pandera then checks the rest alone
            idx = int(case.index)
            key = tuple(text.at[idx, c] for c in key_cols)
            if "" not in key:  # blank keys are reported as blanks
                dup_rows.setdefault((check, key), set()).add(idx)
        elif check in ("dtype('str')", "not_nullable") or _is_missing(case.index):
            # every cell is text and blanks are "", so these do not arise; never hide one
            out.append(Problem(raw.path, None, None if pd.isna(case.column) else str(case.column),
                               f"table check '{check}' failed ({case.failure_case})",
                               "correct the table", raw.is_csv))
        else:
            idx = int(case.index)
            col = specs[str(case.column)]
            message, fix = _describe(col, check, str(text.at[idx, col.name]))
            out.append(Problem(raw.path, idx + 1, col.name, message, fix, raw.is_csv))
    for (check, key), idxs in dup_rows.items():
        first, *later = sorted(idxs)
        for idx in later:
            if check == "field_uniqueness":
                out.append(Problem(
                    raw.path, idx + 1, "haul_id", f"duplicate haul_id '{key[0]}' (also in row {first + 1})",
                    "give each haul its own haul_id; if both rows are the same haul, keep one", raw.is_csv))
            else:
                out.append(Problem(
                    raw.path, idx + 1, "species",
                    f"haul '{key[0]}' and species '{key[1]}' already have a row (row {first + 1})",
                    "combine the rows into one with the summed count (one row per haul and species)",
                    raw.is_csv))
    return out


def _coerce(raw: _Raw, bad_cells: set[tuple[int, str]]) -> pd.DataFrame:
    """Typed frame from validated text: failing cells become NaN (problems already recorded).

    ``bad_cells`` holds (data row, column) of cells with a problem, so that cross-table
    rules never use a value already reported as wrong.
    """
    text = raw.text
    out = pd.DataFrame(index=text.index)
    specs = {c.name: c for c in SPECS[raw.role]}
    for name in text.columns:
        s = text[name]
        col = specs.get(name)
        if col is None:
            if raw.role != "hauls":
                continue  # extra catches/lengths columns are not used (warned when read)
            out[name] = _extra_column(s)
        elif col.kind == "date":
            out[name] = _dates(s)
        elif col.kind in ("number", "whole"):
            out[name] = _valued(s)
        else:
            out[name] = s.where(s != "")
    for col in SPECS[raw.role]:  # optional columns absent from the file
        if col.name not in out.columns and not col.required:
            out[col.name] = (pd.Series(np.nan, index=text.index, dtype=float) if col.kind in ("number", "whole")
                             else pd.Series(np.nan, index=text.index, dtype="str"))
    out["_row"] = (text.index + 1).astype("int64")
    for row, name in bad_cells:
        if name in out.columns and (row - 1) in out.index:
            out.loc[row - 1, name] = np.nan
    return out


def _extra_column(s: pd.Series) -> pd.Series:
    """Numbers when every non-blank value parses as a finite number, else text.

    Codes with leading zeros ("007") stay text so they are not turned into 7.
    """
    filled = s[s != ""]
    values = _valued(s)
    leading_zero = filled.str.match(r"^[+-]?0\d").any()
    if len(filled) and values[s != ""].notna().all() and not leading_zero:
        if (values.notna().all()) and (values % 1 == 0).all():
            return values.astype("int64")
        return values
    return s.where(s != "")


def _cross_problems(raws: dict[str, _Raw], typed: dict[str, pd.DataFrame]) -> list[Problem]:
    """Rules across tables: catches refer to hauls, lengths to catches, sum(n) <= count."""
    out: list[Problem] = []
    hauls, catches, lengths = raws.get("hauls"), raws.get("catches"), raws.get("lengths")
    haul_ids = None
    if hauls is not None and "haul_id" in hauls.text.columns:
        haul_ids = set(hauls.text["haul_id"]) - {""}
    if catches is not None and haul_ids is not None and "haul_id" in catches.text.columns:
        c = catches.text["haul_id"]
        unknown = (c != "") & ~c.isin(haul_ids)
        for idx, hid in c[unknown].items():
            out.append(Problem(catches.path, idx + 1, "haul_id", f"haul_id '{hid}' is not in the hauls table",
                               "add the haul to hauls, or correct the haul_id (spelling, spaces, case)",
                               catches.is_csv))
    if lengths is None or catches is None:
        return out
    need = {"haul_id", "species"}
    if not need <= set(lengths.text.columns) or not need <= set(catches.text.columns):
        return out
    lt, ct = lengths.text, catches.text
    catch_keys = set(zip(ct["haul_id"], ct["species"]))
    for idx, hid, sp in zip(lt.index, lt["haul_id"], lt["species"]):
        if hid == "" or sp == "" or (hid, sp) in catch_keys:
            continue
        if haul_ids is not None and hid not in haul_ids:
            msg = f"haul_id '{hid}' is not in the hauls table (nor in catches)"
            col, fix = "haul_id", "correct the haul_id, or add the haul to hauls and its catch to catches"
        else:
            msg = f"haul '{hid}' has no catches row for species '{sp}'"
            col, fix = "species", "add the species' count for this haul to catches, or correct the species name"
        out.append(Problem(lengths.path, idx + 1, col, msg, fix, lengths.is_csv))
    # more fish measured than counted
    if "lengths" in typed and "catches" in typed:
        tl = typed["lengths"].dropna(subset=["n"])
        measured = tl.groupby(["haul_id", "species"], sort=False)["n"].sum().rename("n").to_frame()
        tc = typed["catches"].dropna(subset=["count"]).drop_duplicates(["haul_id", "species"])
        both = measured.join(tc.set_index(["haul_id", "species"])[["count", "_row"]], how="inner")
        over = both[both["n"] > both["count"] + 1e-9]
        if len(over):
            key = pd.MultiIndex.from_frame(tl[["haul_id", "species"]])
            rows_of = tl["_row"][key.isin(over.index)].groupby(
                [tl["haul_id"], tl["species"]]).agg(list)
        for (hid, sp), r in over.iterrows():
            rows = rows_of.loc[(hid, sp)]
            out.append(Problem(
                lengths.path, int(min(rows)), "n",
                f"{int(r['n'])} fish of '{sp}' measured in haul '{hid}' ({_rows(rows)}) but "
                f"catches row {int(r['_row'])} counts only {r['count']:g}",
                "correct n here or the count in catches: more fish cannot be measured than were caught",
                lengths.is_csv))
    return out


def _year_problems(raw: _Raw, hauls: pd.DataFrame) -> list[Problem]:
    """A given 'year' column must agree with the date (calib derives year itself)."""
    if "year" not in raw.text.columns or "date" not in hauls.columns:
        return []
    given = _valued(raw.text["year"])
    derived = hauls["date"].dt.year
    bad = raw.text["year"].ne("") & hauls["date"].notna() & ~(given == derived)
    return [Problem(raw.path, idx + 1, "year",
                    f"year '{raw.text.at[idx, 'year']}' does not match the date {hauls.at[idx, 'date']:%Y-%m-%d}",
                    "correct the date or the year, or remove the year column (calib derives year from date)",
                    raw.is_csv) for idx in raw.text.index[bad]]


def _load_warnings(hauls: pd.DataFrame, catches: pd.DataFrame | None, lengths: pd.DataFrame | None,
                   files: dict[str, str]) -> list[Warning_]:
    out: list[Warning_] = []
    hf = files["hauls"]
    for gear, unit_rows in hauls.groupby("gear")["effort_unit"]:
        units = unit_rows.value_counts()
        if len(units) > 1:
            parts = [f"{u} ({n} haul{'s' if n > 1 else ''}, e.g. row {int(hauls.loc[unit_rows.index[unit_rows == u][0], '_row'])})"
                     for u, n in units.items()]
            out.append(Warning_(f"gear '{gear}' has effort in {len(units)} units: {', '.join(parts)}; "
                                "factors and cpue need one unit per gear (label the gears apart, or "
                                "convert the effort)", hf, None, "effort_unit"))
    out += _near_duplicate_names(hauls["gear"], "gear", hf)
    if catches is not None:
        out += _near_duplicate_names(catches["species"], "species", files["catches"])
    lat, lon = hauls["latitude"], hauls["longitude"]
    half = lat.isna() != lon.isna()
    if half.any():
        out.append(Warning_(f"{int(half.sum())} haul(s) have only one of latitude and longitude ("
                            f"{_rows(hauls.loc[half, '_row'])}); their position is not used", hf, None,
                            "latitude"))
    if hauls["stratum"].notna().any():
        areas = hauls.dropna(subset=["stratum", "stratum_area"]).groupby("stratum")["stratum_area"].nunique()
        for stratum in areas[areas > 1].index:
            vals = sorted(hauls.loc[hauls["stratum"] == stratum, "stratum_area"].dropna().unique())
            out.append(Warning_(f"stratum '{stratum}' has {len(vals)} different stratum_area values "
                                f"({', '.join(f'{v:g}' for v in vals[:5])}); give one area per stratum",
                                hf, None, "stratum_area"))
    future = hauls["date"] > pd.Timestamp.today().normalize() + pd.Timedelta(days=1)
    if future.any():
        out.append(Warning_(f"{int(future.sum())} haul(s) dated in the future ("
                            f"{_rows(hauls.loc[future, '_row'])}): check the year", hf, None, "date"))
    if lengths is not None:
        dup = lengths.duplicated(["haul_id", "species", "length_mm"], keep=False)
        if dup.any():
            out.append(Warning_(f"{int(dup.sum())} rows repeat a haul, species and length already given "
                                f"(rows {_row_list(lengths.loc[dup, '_row'])}); all are used, their n add "
                                "up; remove copies if they are duplicates", files["lengths"], None, "length_mm"))
    return out


def _near_duplicate_names(names: pd.Series, column: str, file: str) -> list[Warning_]:
    """Names that differ only in case or spacing are probably one thing written two ways."""
    distinct = pd.Series(names.dropna().unique())
    key = distinct.str.lower().str.replace(r"[\s_\-]+", " ", regex=True)
    out = []
    for _, group in distinct.groupby(key.to_numpy()):
        if len(group) > 1:
            shown = ", ".join(f"'{g}'" for g in sorted(group))
            hint = " (or map them to one accepted name in a species_names table)" if column == "species" else ""
            out.append(Warning_(f"{column} names {shown} differ only in case or spacing and are treated "
                                f"as different; write them one way if they are the same{hint}", file, None, column))
    return out


def load_tables(hauls, catches, lengths=None, species_recorded=None, species_names=None) -> Tables:
    """Read and validate the hauls, catches and optional lengths and partner intake tables.

    Parameters
    ----------
    hauls, catches, lengths : paths (str or Path) to CSV or Parquet files (design section 3).
    species_recorded : optional path to a table (source, species, year_from, year_to): which
        species each source recorded in which years; zeros are completed only for those.
    species_names : optional path to a table (name, accepted_name) mapping names as written
        by partners to one accepted name; applied to catches, lengths and species_recorded
        before anything else.

    Returns
    -------
    Tables with typed frames (see the module docstring).

    Raises
    ------
    InputError listing every problem found in all tables (file, row, column, what, fix).
    """
    problems = ProblemList()
    warnings: list[Warning_] = []
    files = {"hauls": str(hauls), "catches": str(catches)}
    if lengths is not None:
        files["lengths"] = str(lengths)
    if species_recorded is not None:
        files["species_recorded"] = str(species_recorded)
    if species_names is not None:
        files["species_names"] = str(species_names)
    raws: dict[str, _Raw] = {}
    for role, path in files.items():
        raw = _read_role(role, path, problems, warnings)
        if raw is not None:
            raws[role] = raw
    typed: dict[str, pd.DataFrame] = {}
    written: dict[str, pd.Series] = {}  # species as written, before species_names
    mapping: dict[str, str] = {}
    for role in sorted(raws, key=lambda r: ROLE_ORDER[r]):  # species_names first: it renames the others
        raw = raws[role]
        found = _column_problems(raw)
        problems.extend(found)
        if mapping and role in ("catches", "lengths", "species_recorded") and "species" in raw.text.columns:
            # Rules on single cells were checked on the names as written (so messages quote the
            # file); every rule from here on sees accepted names only.
            written[role] = raw.text["species"]
            raw.text = raw.text.assign(species=raw.text["species"].map(lambda v: mapping.get(v, v)))
        if {c.name for c in SPECS[role] if c.required} <= set(raw.text.columns):
            typed[role] = _coerce(raw, {(p.row, p.column) for p in found if p.row is not None})
            if role == "species_names":
                mapping = _name_mapping(typed[role])
    if "hauls" in typed:
        problems.extend(_year_problems(raws["hauls"], typed["hauls"]))
    problems.extend(_cross_problems(raws, typed))
    problems.extend(_intake_problems(raws, typed))
    if problems.problems:
        problems.problems.sort(key=lambda p: (ROLE_ORDER.get(_role_of(p.file, files), 9),
                                              -1 if p.row is None else p.row, _column_rank(p)))
        raise InputError(problems.problems)

    h = typed["hauls"]
    h["year"] = h["date"].dt.year.astype("int64")
    h = h[[c for c in h.columns if c not in ("year", "_row")] + ["year", "_row"]]
    c = typed["catches"][["haul_id", "species", "count", "_row"]]
    if "catches" in written:
        c, summed = _sum_renamed_duplicates(c, written["catches"], files["catches"])
        warnings += summed
    ln = typed["lengths"][["haul_id", "species", "length_mm", "n", "_row"]] if "lengths" in typed else None
    if ln is not None:
        ln = ln.assign(n=ln["n"].astype("int64"))
    h, c = h.reset_index(drop=True), c.reset_index(drop=True)
    ln = ln.reset_index(drop=True) if ln is not None else None
    sr = nm = None
    if "species_recorded" in typed:
        sr = typed["species_recorded"][["source", "species", "year_from", "year_to", "_row"]].reset_index(drop=True)
    if "species_names" in typed:
        nm = typed["species_names"][["name", "accepted_name", "_row"]].reset_index(drop=True)
    warnings += _load_warnings(h, c, ln, files)
    warnings += _intake_warnings(h, c, sr, files)
    tables = Tables(hauls=h, catches=c, lengths=ln, files=files, warnings=warnings,
                    species_recorded=sr, species_names=nm)
    if written:
        tables.renamed = _renamed_summary(written, raws)
    return tables


# ----------------------------------------------------------------------------- partner intake


def _name_mapping(names: pd.DataFrame) -> dict[str, str]:
    """name -> accepted_name from a typed species_names frame (first row wins on conflicts,
    which are reported as problems)."""
    ok = names.dropna(subset=["name", "accepted_name"])
    ok = ok.drop_duplicates("name", keep="first")
    return dict(zip(ok["name"], ok["accepted_name"]))


def _intake_problems(raws: dict[str, _Raw], typed: dict[str, pd.DataFrame]) -> list[Problem]:
    """Rules of the species_names and species_recorded tables (and how they meet hauls)."""
    out: list[Problem] = []
    if "species_names" in typed:
        raw, t = raws["species_names"], typed["species_names"].dropna(subset=["name", "accepted_name"])
        first: dict[str, tuple[str, int]] = {}
        for name, accepted, row in zip(t["name"], t["accepted_name"], t["_row"]):
            if name in first and first[name][0] != accepted:
                out.append(Problem(
                    raw.path, int(row), "accepted_name",
                    f"name '{name}' is mapped to '{first[name][0]}' in row {first[name][1]} and to "
                    f"'{accepted}' here", "keep one accepted name per name: correct or delete one of the rows",
                    raw.is_csv))
            first.setdefault(name, (accepted, int(row)))
        for name, accepted, row in zip(t["name"], t["accepted_name"], t["_row"]):
            onward = first.get(accepted)
            if onward is not None and onward[0] != accepted and accepted != name:
                out.append(Problem(
                    raw.path, int(row), "accepted_name",
                    f"accepted name '{accepted}' of '{name}' is itself mapped to '{onward[0]}' (row {onward[1]})",
                    f"map '{name}' directly to the final accepted name '{onward[0]}' (names are mapped "
                    "once, not in chains)", raw.is_csv))
    if "species_recorded" in typed:
        raw, t = raws["species_recorded"], typed["species_recorded"]
        backwards = t["year_from"] > t["year_to"]  # NaN (blank or bad) compares False
        for row, lo, hi in zip(t.loc[backwards, "_row"], t.loc[backwards, "year_from"], t.loc[backwards, "year_to"]):
            out.append(Problem(raw.path, int(row), "year_to", f"year_from {lo:.0f} is after year_to {hi:.0f}",
                               "write the first year in year_from and the last in year_to", raw.is_csv))
        hauls = raws.get("hauls")
        if hauls is not None and "source" not in hauls.text.columns:
            out.append(Problem(hauls.path, None, "source",
                               "a species_recorded table is given but hauls has no source column",
                               "add a source column to hauls naming each haul's partner dataset, or leave "
                               "out species_recorded", hauls.is_csv))
        elif hauls is not None and (hauls.text["source"] == "").all() and len(hauls.text):
            out.append(Problem(hauls.path, None, "source",
                               "a species_recorded table is given but every haul's source is blank",
                               "write each haul's partner dataset in the source column, or leave out "
                               "species_recorded", hauls.is_csv))
    return out


def _sum_renamed_duplicates(catches: pd.DataFrame, written: pd.Series, file: str):
    """Sum catches rows that species_names made into one haul x species (with a warning)."""
    dup = catches.duplicated(["haul_id", "species"], keep=False)
    if not dup.any():
        return catches, []
    out = []
    d = catches[dup].assign(_written=written.reindex(catches.index[dup]).to_numpy())
    for sp, g in d.groupby("species", sort=True):
        pairs = g.groupby("haul_id", sort=False)
        hid, first = next(iter(pairs))
        names = ", ".join(f"'{w}'" for w in sorted(set(g["_written"])))
        out.append(Warning_(
            f"{pairs.ngroups} haul(s) have several catches rows that species_names maps to '{sp}' "
            f"(written {names}; e.g. haul '{hid}', {_rows(first['_row'])}); their counts are summed",
            file, None, "species"))
    summed = catches.groupby(["haul_id", "species"], sort=False, as_index=False).agg(
        count=("count", "sum"), _row=("_row", "min"))
    return summed, out


def _renamed_summary(written: dict[str, pd.Series], raws: dict[str, _Raw]) -> pd.DataFrame:
    rows = []
    for role, before in written.items():
        after = raws[role].text["species"]
        changed = before != after
        if changed.any():
            counts = pd.DataFrame({"name": before[changed], "accepted_name": after[changed]}).value_counts(sort=False)
            for (name, accepted), n in counts.sort_index().items():
                rows.append((role, name, accepted, int(n)))
    frame = pd.DataFrame(rows, columns=["table", "name", "accepted_name", "n_rows"])
    return frame.astype({"table": "str", "name": "str", "accepted_name": "str", "n_rows": "int64"})


def _name_key(names: pd.Series) -> pd.Series:
    """Case- and spacing-blind key: names with equal keys differ only in case or spacing."""
    return names.str.lower().str.replace(r"[\s_\-]+", " ", regex=True).str.strip()


def _intake_warnings(hauls: pd.DataFrame, catches: pd.DataFrame, recorded: pd.DataFrame | None,
                     files: dict[str, str]) -> list[Warning_]:
    if recorded is None:
        return []
    out: list[Warning_] = []
    rf = files["species_recorded"]
    sources = set(hauls["source"].dropna())
    missing = sorted(set(recorded["source"]) - sources)
    if missing:
        out.append(Warning_(f"source(s) {', '.join(repr(s) for s in missing)} of species_recorded have no "
                            "hauls: their rows are not used; check the spelling against hauls' source column",
                            rf, None, "source"))
    caught = pd.Series(sorted(catches["species"].unique()), dtype="str")
    by_key = dict(zip(_name_key(caught), caught))
    absent = recorded[~recorded["species"].isin(set(caught))].drop_duplicates("species")
    plain = []
    for sp, key, row in zip(absent["species"], _name_key(absent["species"]), absent["_row"]):
        if key in by_key:
            out.append(Warning_(f"species '{sp}' is not in catches, but '{by_key[key]}' is: the names differ "
                                "only in case or spacing and are treated as different; write them one way or "
                                "map them in species_names", rf, int(row), "species"))
        else:
            plain.append(sp)
    if plain:
        shown = ", ".join(f"'{s}'" for s in plain[:10]) + (f" and {len(plain) - 10} more" if len(plain) > 10 else "")
        out.append(Warning_(f"species {shown} of species_recorded never appear in catches: no records of them "
                            "(they were never caught)", rf, None, "species"))
    return out


def _role_of(file: str, files: dict[str, str]) -> str:
    for role, path in files.items():
        if path == file:
            return role
    return ""


def _column_rank(p: Problem) -> int:
    names = [c.name for specs in SPECS.values() for c in specs]
    return names.index(p.column) if p.column in names else len(names)


# ----------------------------------------------------------------------------- zeros


def recorded_by_occasion(tables: Tables, species: list[str]) -> tuple[np.ndarray, np.ndarray] | None:
    """Which species each haul's source recorded in the haul's year, per (source, year) occasion.

    Returns ``(occasion, recorded)``: ``occasion`` (n_hauls,) int index of each haul's
    (source, year), and ``recorded`` (n_occasions, len(species)) bool. Haul h recorded
    species s when ``recorded[occasion[h], s]``. None when there is no species_recorded
    table. A source with no row in the table (or a blank source) recorded every species.
    Work is O(hauls + occasions x species), so it stays cheap for millions of records.
    """
    sr = tables.species_recorded
    if sr is None:
        return None
    h = tables.hauls
    occasion = h.groupby(["source", "year"], dropna=False, sort=False).ngroup().to_numpy()
    first = h.drop_duplicates(["source", "year"])[["source", "year"]]  # same order as ngroup(sort=False)
    sindex = {s: i for i, s in enumerate(species)}
    recorded = np.ones((len(first), len(species)), dtype=bool)
    listed = set(sr["source"])
    lo = sr["year_from"].fillna(-np.inf).to_numpy()
    hi = sr["year_to"].fillna(np.inf).to_numpy()
    rows_of = {src: np.flatnonzero((sr["source"] == src).to_numpy()) for src in listed}
    for o, (src, year) in enumerate(zip(first["source"], first["year"])):
        if pd.isna(src) or src not in listed:
            continue
        recorded[o] = False
        rows = rows_of[src]
        inside = rows[(lo[rows] <= year) & (year <= hi[rows])]
        for sp in sr["species"].to_numpy()[inside]:
            if sp in sindex:
                recorded[o, sindex[sp]] = True
    return occasion, recorded


def recorded_mask(tables: Tables, haul_id, species) -> np.ndarray:
    """For each (haul_id, species) given, whether the haul's source recorded that species in
    the haul's year according to ``tables.species_recorded``.

    True everywhere when there is no species_recorded table; True for hauls whose source has
    no row in the table (or is blank): such sources are taken to record every species.
    ``haul_id`` and ``species`` are equal-length sequences; haul ids must be in the hauls table.
    """
    haul_id = np.asarray(haul_id, dtype=object)
    species = np.asarray(species, dtype=object)
    if tables.species_recorded is None or not len(haul_id):
        return np.ones(len(haul_id), dtype=bool)
    pos = pd.Index(tables.hauls["haul_id"]).get_indexer(haul_id)
    if (pos < 0).any():
        raise KeyError(f"haul_id '{haul_id[pos < 0][0]}' is not in the hauls table")
    names = sorted(set(species))
    occasion, recorded = recorded_by_occasion(tables, names)
    return recorded[occasion[pos], pd.Index(names).get_indexer(species)]


def _positions(values, labels) -> np.ndarray:
    """Position (int64) of each value in the unique ``labels``; -1 where absent.

    Arrow's hash lookup on the text as stored (pandas' Arrow-backed strings), without a
    Python object per value: several times faster and far smaller than ``Index.get_indexer``
    on millions of rows.
    """
    import pyarrow as pa
    import pyarrow.compute as pc

    v = pa.array(pd.Series(values, dtype="str"), type=pa.large_string())
    s = pa.array(pd.Series(labels, dtype="str"), type=pa.large_string())
    return pc.index_in(v, value_set=s).fill_null(-1).to_numpy(zero_copy_only=False).astype(np.int64)


def zero_grid(tables: Tables, recorded: pd.DataFrame | None = None):
    """Positions behind :func:`complete_zeros`, for code that must scale to millions of records.

    Returns ``(haul_pos, species_code, species, count)``: for each completed record, the
    position of its haul in ``tables.hauls``, the index of its species in the sorted list
    ``species``, and its count (float). Order: hauls' order, then species.
    ``recorded`` as in :func:`complete_zeros`.
    """
    hauls, catches = tables.hauls, tables.catches
    species = sorted(catches["species"].unique())
    n_h, n_s = len(hauls), len(species)
    haul_index = pd.Index(hauls["haul_id"])
    flat = _positions(catches["haul_id"], hauls["haul_id"]) * n_s + _positions(catches["species"], species)
    counts = np.full(n_h * n_s, np.nan)
    counts[flat] = catches["count"].to_numpy(dtype=float)
    if recorded is not None:
        wh = haul_index.get_indexer(recorded["haul_id"].astype("str")).astype(np.int64)
        ws = pd.Index(species).get_indexer(recorded["species"].astype("str"))
        keep = ~np.isnan(counts)
        known = (wh >= 0) & (ws >= 0)  # pairs of hauls or species not in the tables add nothing
        keep[wh[known] * n_s + ws[known]] = True
        idx = np.flatnonzero(keep)
    elif getattr(tables, "species_recorded", None) is not None:
        occasion, rec = recorded_by_occasion(tables, species)
        keep = ~np.isnan(counts) | rec[occasion].reshape(-1)
        idx = np.flatnonzero(keep)
    else:
        idx = np.arange(n_h * n_s)
    count = counts[idx]
    count[np.isnan(count)] = 0.0
    return idx // max(n_s, 1), idx % max(n_s, 1), species, count


def recorded_pairs(tables: Tables) -> pd.DataFrame | None:
    """The haul_id x species pairs whose species the haul's source recorded (in the haul's year).

    None when there is no species_recorded table (every species recorded in every haul).
    Species are those of the catches table.
    """
    if tables.species_recorded is None:
        return None
    species = sorted(tables.catches["species"].unique())
    occasion, rec = recorded_by_occasion(tables, species)
    hp, sc = np.nonzero(rec[occasion])
    return pd.DataFrame({"haul_id": tables.hauls["haul_id"].to_numpy()[hp],
                         "species": np.asarray(species, dtype=object)[sc]}).astype("str")


def unrecorded_catches(tables: Tables) -> pd.DataFrame:
    """Catches rows whose species the haul's source did not record in the haul's year.

    Such rows are kept by :func:`complete_zeros` (they are observations), but without the
    zeros of that source a mean over them would be biased upward; ``convert`` rejects them
    and ``check`` warns. Empty when there is no species_recorded table.
    """
    c = tables.catches
    if tables.species_recorded is None:
        return c.iloc[:0]
    return c[~recorded_mask(tables, c["haul_id"], c["species"])]


def complete_zeros(tables: Tables, recorded: pd.DataFrame | None = None) -> pd.DataFrame:
    """One row per haul x species with the count, zeros filled where the species is absent.

    A species missing from a listed haul is a true zero (design section 3), but only where
    the species was recorded (species_recorded). Species are every species in the catches
    table. Rows follow the hauls' order, species sorted.

    Parameters
    ----------
    recorded : optional DataFrame with columns haul_id, species listing the pairs for
        which the species was recorded (looked for) in that haul. Zeros are then filled
        only for those pairs; rows present in catches are always kept. None (default)
        means: the pairs of the tables' species_recorded table when one was loaded
        (:func:`recorded_mask`), else every species recorded in every haul.

    Returns
    -------
    DataFrame with columns haul_id (str), species (str), count (float, fish).
    """
    hp, sc, species, count = zero_grid(tables, recorded)
    return pd.DataFrame({
        "haul_id": pd.array(tables.hauls["haul_id"].to_numpy(dtype=object), dtype="str").take(hp),
        "species": pd.array(species, dtype="str").take(sc),
        "count": count,
    })


# ----------------------------------------------------------------------------- fit-only rules


def fit_problems(tables: Tables, reference: str | None) -> list[Problem]:
    """Rules that only fitting needs: ``fit`` treats them as errors, ``check`` as warnings.

    - a count in a calibration haul (non-blank pair_id) that is not a whole number
      (the message also says when that haul x species has lengths);
    - a calibration group with hauls of one gear only;
    - a gear with more than one effort_unit among calibration hauls;
    - the reference gear in no calibration group (skipped when ``reference`` is None);
    - a gear in calibration groups with no chain of groups to the reference.
    """
    from calib.cells import calibration_hauls, connected_to, gear_graph

    hauls, catches = tables.hauls, tables.catches
    hf, cf = tables.files["hauls"], tables.files["catches"]
    h_csv, c_csv = tables.is_csv("hauls"), tables.is_csv("catches")
    out: list[Problem] = []
    cal = calibration_hauls(hauls)
    cal_ids = set(cal["haul_id"])

    in_cal = catches["haul_id"].isin(cal_ids)
    fractional = in_cal & (catches["count"] % 1 != 0)
    with_lengths = set()
    if tables.lengths is not None:
        with_lengths = set(zip(tables.lengths["haul_id"], tables.lengths["species"]))
    bad = catches[fractional]
    for hid, sp, count, row in zip(bad["haul_id"], bad["species"], bad["count"], bad["_row"]):
        extra = " (its lengths cannot give a measured fraction either)" if (hid, sp) in with_lengths else ""
        out.append(Problem(cf, int(row), "count",
                           f"count {count:g} of '{sp}' in calibration haul '{hid}' is not a "
                           f"whole number{extra}",
                           "fitting needs the observed (unraised) number of fish: write the count as caught",
                           c_csv))

    for pid, group in cal.groupby("pair_id", sort=True):
        gears = group["gear"].unique()
        if len(gears) == 1:
            out.append(Problem(hf, int(group["_row"].min()), "pair_id",
                               f"calibration group '{pid}' has hauls of one gear only ('{gears[0]}', "
                               f"{_rows(group['_row'])})",
                               "give the other gear's hauls of this group the same pair_id, or blank the "
                               "pair_id if these are plain survey hauls", h_csv))

    for gear, units in cal.groupby("gear")["effort_unit"]:
        if units.nunique() > 1:
            rows = cal.loc[units.index, "_row"]
            out.append(Problem(hf, int(rows.min()), "effort_unit",
                               f"gear '{gear}' has effort in {units.nunique()} units among calibration hauls "
                               f"({', '.join(sorted(units.unique()))})",
                               "use one effort unit per gear (convert the effort), or give the gear a "
                               "different label for each unit", h_csv))

    if reference is None:
        return out
    cal_gears = sorted(cal["gear"].unique())
    if reference not in set(hauls["gear"]):
        out.append(Problem(hf, None, "gear", f"reference gear '{reference}' does not appear in the hauls",
                           f"choose one of the gears in calibration groups: {', '.join(cal_gears) or '(none)'}",
                           h_csv))
        return out
    if reference not in cal_gears:
        out.append(Problem(hf, None, "gear", f"reference gear '{reference}' fished in no calibration group",
                           f"choose one of the gears in calibration groups: {', '.join(cal_gears) or '(none)'}",
                           h_csv))
        return out
    linked = connected_to(reference, gear_graph(hauls))
    for gear in cal_gears:
        if gear not in linked:
            first = int(cal.loc[cal["gear"] == gear, "_row"].min())
            out.append(Problem(hf, first, "gear",
                               f"gear '{gear}' is in calibration groups, but none links it to the reference "
                               f"'{reference}' (directly or through other gears)",
                               "add calibration groups where it fished with a gear linked to the reference, "
                               "or leave its hauls out of this fit", h_csv))
    return out


def _is_blank(value) -> bool:
    return _is_missing(value) or str(value).strip() == ""


def side_by_side_problems(tables: Tables, reference: str | None, period_by: str = "auto") -> list[Problem]:
    """Rules that ``fit --design side-by-side`` needs (errors for that fit).

    Every haul is used (``pair_id`` is ignored) and placed in its site x period
    (:mod:`calib.site_periods`), so:

    - the hauls table needs a ``site`` column, filled for every haul;
    - with ``period_by="column"`` (or ``auto`` when the table has one) a ``period`` column filled
      for every haul;
    - every count is a whole number (the observed, unraised number of fish);
    - one effort_unit per gear;
    - the reference gear fished, and shared at least one site-period with another gear;
    - every gear shares a site-period with the reference, directly or through other gears.
    """
    from calib.cells import connected_to
    from calib.site_periods import PERIOD_COLUMN, resolve_period_by, site_period_gear_graph, site_period_keys

    hauls, catches = tables.hauls, tables.catches
    hf, cf = tables.files["hauls"], tables.files["catches"]
    h_csv, c_csv = tables.is_csv("hauls"), tables.is_csv("catches")
    out: list[Problem] = []
    if "site" not in hauls.columns or hauls["site"].map(_is_blank).all():
        out.append(Problem(hf, None, "site", "the side-by-side design places hauls by site and period, but the "
                           "hauls table has no 'site' column (or it is empty)",
                           "add a 'site' column naming where each haul was made (hauls at the same site in the "
                           "same period are compared), or fit paired groups without --design side-by-side", h_csv))
    else:
        blank = hauls[hauls["site"].map(_is_blank)]
        for row, hid in zip(blank["_row"], blank["haul_id"]):
            out.append(Problem(hf, int(row), "site", f"haul '{hid}' has no site; the side-by-side design "
                               "compares gears by site and period", "write the site of the haul, or remove the "
                               "haul (and its catches) from the tables of this fit", h_csv))
    rule = resolve_period_by(hauls, period_by)
    if rule == "column":
        if PERIOD_COLUMN not in hauls.columns:
            out.append(Problem(hf, None, PERIOD_COLUMN, "periods were asked to come from a 'period' column, but "
                               "the hauls table has none", "add a 'period' column (e.g. 2024-spring), or choose "
                               "--period-by month, season or year to take the period from the date", h_csv))
        else:
            blank = hauls[hauls[PERIOD_COLUMN].map(_is_blank)]
            for row, hid in zip(blank["_row"], blank["haul_id"]):
                out.append(Problem(hf, int(row), PERIOD_COLUMN, f"haul '{hid}' has no period",
                                   "write the period of every haul, or choose --period-by month, season or "
                                   "year to take the period from the date instead of the 'period' column", h_csv))

    bad = catches[catches["count"] % 1 != 0]
    for hid, sp, count, row in zip(bad["haul_id"], bad["species"], bad["count"], bad["_row"]):
        out.append(Problem(cf, int(row), "count", f"count {count:g} of '{sp}' in haul '{hid}' is not a whole number",
                           "fitting needs the observed (unraised) number of fish: write the count as caught", c_csv))
    for gear, units in hauls.groupby("gear")["effort_unit"]:
        if units.nunique() > 1:
            rows = hauls.loc[units.index, "_row"]
            out.append(Problem(hf, int(rows.min()), "effort_unit",
                               f"gear '{gear}' has effort in {units.nunique()} units ({', '.join(sorted(units.unique()))})",
                               "use one effort unit per gear (convert the effort), or give the gear a different "
                               "label for each unit", h_csv))
    if out or reference is None:
        return out

    gears = sorted(hauls["gear"].unique())
    if reference not in set(gears):
        out.append(Problem(hf, None, "gear", f"reference gear '{reference}' does not appear in the hauls",
                           f"choose one of the gears in the hauls: {', '.join(gears)}", h_csv))
        return out
    keys = site_period_keys(hauls, rule)
    graph = site_period_gear_graph(hauls, keys)
    if not graph.get(reference):
        out.append(Problem(hf, None, "gear", f"reference gear '{reference}' shares no site and period with another "
                           "gear, so no factor can be estimated",
                           "choose a reference that fished the same sites in the same periods as the other gears, "
                           "or check the site names and dates (a coarser --period-by, e.g. season, groups more "
                           "hauls together)", h_csv))
        return out
    linked = connected_to(reference, graph)
    for gear in gears:
        if gear not in linked:
            first = int(hauls.loc[hauls["gear"] == gear, "_row"].min())
            out.append(Problem(hf, first, "gear",
                               f"gear '{gear}' never fished a site in a period where a gear linked to the "
                               f"reference '{reference}' fished (site-periods by {rule})",
                               "add hauls where it fished beside the reference (or a gear linked to it), check "
                               "its site names and dates, or leave its hauls out of this fit", h_csv))
    return out
