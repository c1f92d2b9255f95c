"""Stage 1: reading and validating input tables (design section 3).

Every error case must name the file, the row (and CSV line), the column, what is wrong
and the fix, and load_tables must collect all problems before raising.
"""

from __future__ import annotations

import csv
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from calib.errors import InputError, Problem
from calib.tables import Tables, complete_zeros, fit_problems, load_tables, read_table

HAULS_COLUMNS = ["haul_id", "gear", "date", "effort", "effort_unit", "pair_id", "site", "stratum",
                 "stratum_area", "latitude", "longitude", "source", "depth_m", "station", "habitat"]


def base_hauls() -> list[dict]:
    """Six hauls: three two-gear calibration groups and two survey hauls (invented)."""
    rows = [
        ("H1", "trawl_x", "2021-05-03", "100", "m2", "P1", "north", "S1", "12.5", "30.1000", "-81.2000", "alpha", "2.5", "001", "mud"),
        ("H2", "trawl_y", "2021-05-03", "120", "m2", "P1", "north", "S1", "12.5", "30.1005", "-81.2003", "alpha", "3", "002", "mud"),
        ("H3", "trawl_x", "2021-05-04", "90", "m2", "P2", "south", "S2", "8", "30.0500", "-81.2500", "alpha", "", "003", "sand"),
        ("H4", "trawl_y", "2021-05-04", "80", "m2", "P2", "south", "S2", "8", "30.0502", "-81.2501", "beta", "4", "004", "sand"),
        ("H5", "trawl_x", "2021-06-10", "95", "m2", "P3", "south", "S2", "8", "", "", "beta", "4.5", "005", "mud"),
        ("H6", "trawl_y", "2021-06-10", "110", "m2", "P3", "south", "S2", "8", "", "", "beta", "5", "006", "mud"),
        ("H7", "seine_a", "2022-07-01", "1", "haul", "", "east", "S1", "12.5", "30.2", "-81.1", "gamma", "1", "007", "marsh"),
        ("H8", "trawl_x", "2022-07-02", "100", "m2", "", "east", "S1", "12.5", "30.2", "-81.1", "gamma", "6", "008", "mud"),
    ]
    return [dict(zip(HAULS_COLUMNS, r)) for r in rows]


def base_catches() -> list[dict]:
    rows = [("H1", "pinfish", "12"), ("H2", "pinfish", "7"), ("H1", "blue crab", "3"),
            ("H3", "pinfish", "4"), ("H4", "blue crab", "1"), ("H5", "pinfish", "2"),
            ("H6", "pinfish", "9"), ("H7", "mummichog", "40"), ("H8", "pinfish", "5")]
    return [dict(zip(["haul_id", "species", "count"], r)) for r in rows]


def base_lengths() -> list[dict]:
    rows = [("H1", "pinfish", "45", "3"), ("H1", "pinfish", "50", "4"), ("H2", "pinfish", "55", "7"),
            ("H7", "mummichog", "38.5", "10")]
    return [dict(zip(["haul_id", "species", "length_mm", "n"], r)) for r in rows]


def write_csv(path: Path, rows: list[dict], columns: list[str] | None = None) -> Path:
    columns = columns or list(rows[0].keys())
    with open(path, "w", newline="", encoding="utf-8") as fh:
        w = csv.writer(fh)
        w.writerow(columns)
        for r in rows:
            w.writerow([r.get(c, "") for c in columns])
    return path


def load(tmp_path, hauls=None, catches=None, lengths=None, with_lengths=True) -> Tables:
    h = write_csv(tmp_path / "hauls.csv", hauls if hauls is not None else base_hauls())
    c = write_csv(tmp_path / "catches.csv", catches if catches is not None else base_catches())
    ln = None
    if with_lengths:
        ln = write_csv(tmp_path / "lengths.csv", lengths if lengths is not None else base_lengths())
    return load_tables(h, c, ln)


def load_problems(tmp_path, **kwargs) -> list[Problem]:
    with pytest.raises(InputError) as info:
        load(tmp_path, **kwargs)
    return info.value.problems


def find(problems, file, row, column, *words) -> Problem:
    """The one problem at file/row/column whose message contains every word; checks its text."""
    hits = [p for p in problems if Path(p.file).name == file and p.row == row and p.column == column
            and all(w.lower() in p.message.lower() for w in words)]
    assert hits, f"no problem {file} row {row} column {column} {words} in:\n" + "\n".join(map(str, problems))
    p = hits[0]
    text = str(p)
    assert file in text
    if row is not None:
        assert f"row {row} (line {row + 1})" in text
    if column is not None:
        assert f"column '{column}'" in text
    assert p.fix and "Fix:" in text
    return p


def with_cell(rows, index, **changes):
    rows = [dict(r) for r in rows]
    rows[index].update(changes)
    return rows


# ----------------------------------------------------------------------------- valid input


def test_valid_tables_load_with_types_and_derived_columns(tmp_path):
    t = load(tmp_path)
    h = t.hauls
    assert list(h["haul_id"]) == [f"H{i}" for i in range(1, 9)]
    assert h["date"].dtype == "datetime64[ns]"
    assert list(h["year"]) == [2021] * 6 + [2022] * 2 and h["year"].dtype == "int64"
    assert list(h["_row"]) == list(range(1, 9))
    assert h["effort"].dtype == float and h.loc[0, "effort"] == 100.0
    assert h.loc[0, "latitude"] == pytest.approx(30.1) and np.isnan(h.loc[4, "latitude"])
    assert h["pair_id"].isna().sum() == 2
    # extra columns kept: numbers where every value parses, codes with leading zeros stay text
    assert h["depth_m"].dtype == float and np.isnan(h.loc[2, "depth_m"]) and h.loc[1, "depth_m"] == 3.0
    assert list(h["station"][:2]) == ["001", "002"]
    assert h.loc[6, "habitat"] == "marsh"
    assert t.catches["count"].dtype == float and list(t.catches["_row"]) == list(range(1, 10))
    assert t.lengths["n"].dtype == "int64" and list(t.lengths["n"]) == [3, 4, 7, 10]
    assert t.lengths.loc[3, "length_mm"] == 38.5
    assert t.files == {"hauls": str(tmp_path / "hauls.csv"), "catches": str(tmp_path / "catches.csv"),
                       "lengths": str(tmp_path / "lengths.csv")}
    assert t.warnings == []


def test_optional_columns_may_be_absent(tmp_path):
    hauls = [{k: r[k] for k in ["haul_id", "gear", "date", "effort", "effort_unit"]} for r in base_hauls()]
    t = load(tmp_path, hauls=hauls, with_lengths=False)
    assert t.lengths is None
    for col in ["pair_id", "site", "stratum", "stratum_area", "latitude", "longitude", "source"]:
        assert col in t.hauls.columns and t.hauls[col].isna().all()


def test_integer_extra_column_becomes_int_and_mixed_becomes_text(tmp_path):
    hauls = base_hauls()
    for i, r in enumerate(hauls):
        r["tow_no"] = str(i + 1)
        r["note"] = "12" if i else "torn net"
    t = load(tmp_path, hauls=hauls)
    assert t.hauls["tow_no"].dtype == "int64"
    assert t.hauls.loc[0, "note"] == "torn net" and t.hauls.loc[1, "note"] == "12"


def test_text_cells_are_stripped_so_ids_match(tmp_path):
    catches = with_cell(base_catches(), 0, haul_id=" H1 ", species="pinfish ")
    t = load(tmp_path, catches=catches)
    assert t.catches.loc[0, "haul_id"] == "H1" and t.catches.loc[0, "species"] == "pinfish"


def test_byte_order_mark_is_accepted(tmp_path):
    path = write_csv(tmp_path / "hauls.csv", base_hauls())
    path.write_bytes(b"\xef\xbb\xbf" + path.read_bytes())
    c = write_csv(tmp_path / "catches.csv", base_catches())
    assert list(load_tables(path, c).hauls.columns[:1]) == ["haul_id"]


def test_date_with_time_is_accepted(tmp_path):
    t = load(tmp_path, hauls=with_cell(base_hauls(), 0, date="2021-05-03T14:30"))
    assert t.hauls.loc[0, "date"] == pd.Timestamp("2021-05-03 14:30") and t.hauls.loc[0, "year"] == 2021


def test_empty_rows_are_skipped_with_a_warning_and_rows_keep_their_numbers(tmp_path):
    hauls = base_hauls()
    hauls.insert(2, {c: "" for c in HAULS_COLUMNS})  # a ",,,," line from a spreadsheet
    t = load(tmp_path, hauls=hauls)
    assert len(t.hauls) == 8
    assert list(t.hauls["_row"]) == [1, 2, 4, 5, 6, 7, 8, 9]
    assert any("empty row" in w.message and "row 3" in w.message for w in t.warnings)
    # a problem after the empty row still names the row as in the file
    hauls[4]["effort"] = "-3"
    p = find(load_problems(tmp_path, hauls=hauls), "hauls.csv", 5, "effort", "greater than 0")
    assert "line 6" in str(p)


def test_csv_and_parquet_read_the_same(tmp_path):
    from_csv = load(tmp_path)
    typed = pd.DataFrame(base_hauls())
    typed["date"] = pd.to_datetime(typed["date"])
    for col in ["effort", "stratum_area", "latitude", "longitude", "depth_m"]:
        typed[col] = pd.to_numeric(typed[col].replace("", np.nan))
    typed["pair_id"] = typed["pair_id"].replace("", None)
    typed.to_parquet(tmp_path / "hauls.parquet")
    catches = pd.DataFrame(base_catches()).astype({"count": "int64"})
    catches.to_parquet(tmp_path / "catches.pq")
    lengths = pd.DataFrame(base_lengths()).astype({"length_mm": float, "n": "int64"})
    lengths.to_parquet(tmp_path / "lengths.parquet")
    from_pq = load_tables(tmp_path / "hauls.parquet", tmp_path / "catches.pq", tmp_path / "lengths.parquet")
    pd.testing.assert_frame_equal(from_pq.hauls, from_csv.hauls)
    pd.testing.assert_frame_equal(from_pq.catches, from_csv.catches)
    pd.testing.assert_frame_equal(from_pq.lengths, from_csv.lengths)


def test_parquet_problems_give_rows_without_csv_lines(tmp_path):
    frame = pd.DataFrame(base_hauls())
    frame.loc[2, "effort"] = "-1"
    frame.to_parquet(tmp_path / "hauls.parquet")
    write_csv(tmp_path / "catches.csv", base_catches())
    with pytest.raises(InputError) as info:
        load_tables(tmp_path / "hauls.parquet", tmp_path / "catches.csv")
    (p,) = info.value.problems
    assert (p.row, p.column, p.is_csv) == (3, "effort", False)
    assert "row 3, column 'effort'" in str(p) and "line" not in str(p)


def test_read_table_keeps_every_cell_as_text(tmp_path):
    path = write_csv(tmp_path / "t.csv", [{"a": "001", "b": ""}, {"a": "NA", "b": "2.50"}])
    frame = read_table(path)
    assert frame.to_dict("list") == {"a": ["001", "NA"], "b": ["", "2.50"]}


# ----------------------------------------------------------------------------- file-level errors


def test_unknown_suffix_and_missing_file(tmp_path):
    (tmp_path / "hauls.xlsx").write_bytes(b"PK")
    write_csv(tmp_path / "catches.csv", base_catches())
    with pytest.raises(InputError) as info:
        load_tables(tmp_path / "hauls.xlsx", tmp_path / "nope.csv")
    probs = info.value.problems
    assert len(probs) == 2
    assert "hauls.xlsx" in str(probs[0]) and "unknown file type" in probs[0].message and ".csv" in probs[0].fix
    assert "nope.csv" in str(probs[1]) and "not found" in probs[1].message


def test_not_utf8_names_the_line(tmp_path):
    path = write_csv(tmp_path / "hauls.csv", with_cell(base_hauls(), 3, site="pla\u00e7a"))
    path.write_bytes(path.read_bytes().replace("\u00e7".encode(), b"\xe7"))  # Latin-1 byte
    p = find(load_problems_from(path, write_csv(tmp_path / "catches.csv", base_catches())),
             "hauls.csv", 4, None, "not UTF-8", "line 5")
    assert "UTF-8" in p.fix


def load_problems_from(*paths) -> list[Problem]:
    with pytest.raises(InputError) as info:
        load_tables(*paths)
    return info.value.problems


def test_row_with_too_many_or_too_few_values(tmp_path):
    path = write_csv(tmp_path / "hauls.csv", base_hauls())
    lines = path.read_text().splitlines()
    lines[2] += ",extra"  # data row 2
    lines[4] = ",".join(lines[4].split(",")[:5])  # data row 4
    path.write_text("\n".join(lines) + "\n")
    probs = load_problems_from(path, write_csv(tmp_path / "catches.csv", base_catches()))
    find(probs, "hauls.csv", 2, None, "16 values", "header has 15")
    find(probs, "hauls.csv", 4, None, "5 values")


def test_duplicate_column_names(tmp_path):
    rows = base_catches()
    path = tmp_path / "catches.csv"
    with open(path, "w", newline="") as fh:
        w = csv.writer(fh)
        w.writerow(["haul_id", "species", "count", "count"])
        for r in rows:
            w.writerow([r["haul_id"], r["species"], r["count"], r["count"]])
    probs = load_problems_from(write_csv(tmp_path / "hauls.csv", base_hauls()), path)
    find(probs, "catches.csv", None, "count", "appears twice")


def test_semicolon_separated_file_is_explained(tmp_path):
    path = tmp_path / "catches.csv"
    path.write_text("haul_id;species;count\nH1;pinfish;3\n")
    probs = load_problems_from(write_csv(tmp_path / "hauls.csv", base_hauls()), path)
    p = next(p for p in probs if "semicolons" in p.message)
    assert "commas" in p.fix
    # one clear problem instead of every column reported missing
    assert [q for q in probs if Path(q.file).name == "catches.csv"] == [p]


def test_header_only_table(tmp_path):
    path = tmp_path / "catches.csv"
    path.write_text("haul_id,species,count\n")
    probs = load_problems_from(write_csv(tmp_path / "hauls.csv", base_hauls()), path)
    assert any("no data rows" in p.message and p.file == str(path) for p in probs)


def test_header_only_lengths_table_is_a_warning(tmp_path):
    path = tmp_path / "lengths.csv"
    path.write_text("haul_id,species,length_mm,n\n")
    t = load_tables(write_csv(tmp_path / "hauls.csv", base_hauls()),
                    write_csv(tmp_path / "catches.csv", base_catches()), path)
    assert len(t.lengths) == 0 and list(t.lengths.columns) == ["haul_id", "species", "length_mm", "n", "_row"]
    assert any("no data rows" in w.message for w in t.warnings)


# ----------------------------------------------------------------------------- column errors


@pytest.mark.parametrize("role,column", [
    ("hauls", "haul_id"), ("hauls", "gear"), ("hauls", "date"), ("hauls", "effort"), ("hauls", "effort_unit"),
    ("catches", "haul_id"), ("catches", "species"), ("catches", "count"),
    ("lengths", "haul_id"), ("lengths", "species"), ("lengths", "length_mm"), ("lengths", "n"),
])
def test_missing_required_column(tmp_path, role, column):
    tables = {"hauls": base_hauls(), "catches": base_catches(), "lengths": base_lengths()}
    tables[role] = [{k: v for k, v in r.items() if k != column} for r in tables[role]]
    probs = load_problems(tmp_path, **tables)
    p = find(probs, f"{role}.csv", None, column, "missing")
    assert f"'{column}'" in p.fix


def test_misnamed_column_suggests_the_rename(tmp_path):
    catches = [{("Haul_ID" if k == "haul_id" else k): v for k, v in r.items()} for r in base_catches()]
    p = find(load_problems(tmp_path, catches=catches), "catches.csv", None, "haul_id", "missing")
    assert "rename column 'Haul_ID'" in p.fix


@pytest.mark.parametrize("role,index,column", [
    ("hauls", 2, "haul_id"), ("hauls", 2, "gear"), ("hauls", 2, "date"), ("hauls", 2, "effort"),
    ("hauls", 2, "effort_unit"), ("catches", 4, "haul_id"), ("catches", 4, "species"),
    ("catches", 4, "count"), ("lengths", 1, "haul_id"), ("lengths", 1, "species"),
    ("lengths", 1, "length_mm"), ("lengths", 1, "n"),
])
def test_blank_required_value(tmp_path, role, index, column):
    tables = {"hauls": base_hauls(), "catches": base_catches(), "lengths": base_lengths()}
    tables[role] = with_cell(tables[role], index, **{column: "  "})
    find(load_problems(tmp_path, **tables), f"{role}.csv", index + 1, column, "blank")


def test_blank_optional_values_are_fine(tmp_path):
    hauls = with_cell(base_hauls(), 0, pair_id="", site="", stratum="", stratum_area="", latitude="",
                      longitude="", source="")
    assert load(tmp_path, hauls=hauls).hauls.loc[0, ["stratum_area", "latitude"]].isna().all()


def test_duplicate_haul_id_names_both_rows(tmp_path):
    hauls = with_cell(base_hauls(), 5, haul_id="H2")
    hauls = with_cell(hauls, 7, haul_id="H2")
    probs = load_problems(tmp_path, hauls=hauls)
    find(probs, "hauls.csv", 6, "haul_id", "duplicate haul_id 'H2'", "row 2")
    find(probs, "hauls.csv", 8, "haul_id", "duplicate haul_id 'H2'", "row 2")
    assert not [p for p in probs if p.row == 2 and p.column == "haul_id"]  # the first use is fine


@pytest.mark.parametrize("value", ["05/03/2021", "2021-13-01", "2021-02-30", "yesterday", "20210503", "2021-5-3"])
def test_unparseable_date(tmp_path, value):
    p = find(load_problems(tmp_path, hauls=with_cell(base_hauls(), 3, date=value)),
             "hauls.csv", 4, "date", "not an ISO 8601 date", value)
    assert "YYYY-MM-DD" in p.fix


def test_date_beyond_representable_years(tmp_path):
    find(load_problems(tmp_path, hauls=with_cell(base_hauls(), 3, date="3021-05-04")),
         "hauls.csv", 4, "date", "outside the years")


@pytest.mark.parametrize("role,index,column,value", [
    ("hauls", 1, "effort", "12 m2"), ("hauls", 1, "effort", "1,5"), ("hauls", 1, "stratum_area", "big"),
    ("hauls", 1, "latitude", "30N"), ("hauls", 1, "longitude", "81W"), ("catches", 2, "count", "few"),
    ("catches", 2, "count", "NA"), ("lengths", 2, "length_mm", "55mm"), ("lengths", 2, "n", "seven"),
])
def test_non_numeric_value(tmp_path, role, index, column, value):
    tables = {"hauls": base_hauls(), "catches": base_catches(), "lengths": base_lengths()}
    tables[role] = with_cell(tables[role], index, **{column: value})
    p = find(load_problems(tmp_path, **tables), f"{role}.csv", index + 1, column, f"'{value}' is not a number")
    if "," in value:
        assert "decimal separator" in p.fix


@pytest.mark.parametrize("role,column,value", [
    ("hauls", "effort", "inf"), ("hauls", "latitude", "nan"), ("catches", "count", "-Infinity"),
    ("catches", "count", "1e400"), ("lengths", "length_mm", "NaN"), ("lengths", "n", "inf"),
])
def test_non_finite_number(tmp_path, role, column, value):
    tables = {"hauls": base_hauls(), "catches": base_catches(), "lengths": base_lengths()}
    tables[role] = with_cell(tables[role], 1, **{column: value})
    probs = load_problems(tmp_path, **tables)
    find(probs, f"{role}.csv", 2, column, "not a finite number")
    assert len([p for p in probs if p.row == 2 and p.column == column]) == 1  # one problem per cell


@pytest.mark.parametrize("value", ["0", "-5", "0.0"])
def test_effort_must_be_positive(tmp_path, value):
    find(load_problems(tmp_path, hauls=with_cell(base_hauls(), 4, effort=value)),
         "hauls.csv", 5, "effort", "greater than 0", value)


def test_negative_count(tmp_path):
    find(load_problems(tmp_path, catches=with_cell(base_catches(), 6, count="-1")),
         "catches.csv", 7, "count", "at least 0", "-1")


def test_zero_and_non_integer_counts_are_accepted_at_load(tmp_path):
    catches = with_cell(base_catches(), 6, count="0")
    catches = with_cell(catches, 7, count="40.5")  # a raised count, fine for convert
    t = load(tmp_path, catches=catches)
    assert list(t.catches["count"][6:8]) == [0.0, 40.5]


@pytest.mark.parametrize("column,value,words", [
    ("latitude", "90.5", "outside [-90, 90]"), ("latitude", "-91", "outside [-90, 90]"),
    ("longitude", "181", "outside [-180, 180]"), ("longitude", "-270", "outside [-180, 180]"),
    ("stratum_area", "0", "greater than 0"), ("stratum_area", "-2", "greater than 0"),
])
def test_coordinates_and_stratum_area_in_range(tmp_path, column, value, words):
    find(load_problems(tmp_path, hauls=with_cell(base_hauls(), 0, **{column: value})),
         "hauls.csv", 1, column, words)


def test_given_year_must_match_date(tmp_path):
    hauls = base_hauls()
    for r in hauls:
        r["year"] = r["date"][:4]
    hauls[2]["year"] = "2020"
    find(load_problems(tmp_path, hauls=hauls), "hauls.csv", 3, "year", "does not match")
    hauls[2]["year"] = "2021"
    assert list(load(tmp_path, hauls=hauls).hauls["year"][:3]) == [2021] * 3


def test_reserved_column_name(tmp_path):
    hauls = [dict(r, _row="1") for r in base_hauls()]
    find(load_problems(tmp_path, hauls=hauls), "hauls.csv", None, "_row", "reserved")


# ----------------------------------------------------------------------------- cross-table errors


def test_catch_of_unknown_haul(tmp_path):
    p = find(load_problems(tmp_path, catches=with_cell(base_catches(), 3, haul_id="H33")),
             "catches.csv", 4, "haul_id", "'H33' is not in the hauls table")
    assert "add the haul" in p.fix


def test_duplicate_haul_species_in_catches_must_be_combined(tmp_path):
    catches = base_catches() + [{"haul_id": "H2", "species": "pinfish", "count": "2"}]
    p = find(load_problems(tmp_path, catches=catches), "catches.csv", 10, "species",
             "'H2'", "'pinfish'", "row 2")
    assert "combine" in p.fix


def test_lengths_for_species_not_in_catches(tmp_path):
    lengths = base_lengths() + [{"haul_id": "H2", "species": "silver perch", "length_mm": "80", "n": "1"},
                                {"haul_id": "H99", "species": "pinfish", "length_mm": "80", "n": "1"}]
    probs = load_problems(tmp_path, lengths=lengths)
    find(probs, "lengths.csv", 5, "species", "'H2'", "no catches row", "'silver perch'")
    find(probs, "lengths.csv", 6, "haul_id", "'H99' is not in the hauls table")


@pytest.mark.parametrize("value", ["0", "-10"])
def test_length_must_be_positive(tmp_path, value):
    find(load_problems(tmp_path, lengths=with_cell(base_lengths(), 2, length_mm=value)),
         "lengths.csv", 3, "length_mm", "greater than 0")


@pytest.mark.parametrize("value,words", [("2.5", "whole number"), ("0", "greater than 0"),
                                         ("-1", "greater than 0")])
def test_n_must_be_a_positive_whole_number(tmp_path, value, words):
    find(load_problems(tmp_path, lengths=with_cell(base_lengths(), 3, n=value)),
         "lengths.csv", 4, "n", words)


def test_whole_n_written_with_decimals_is_accepted(tmp_path):
    assert load(tmp_path, lengths=with_cell(base_lengths(), 3, n="10.0")).lengths.loc[3, "n"] == 10


def test_more_measured_than_counted(tmp_path):
    # H1 pinfish: catches counts 12, lengths rows 1 and 2 measure 3 + 10 = 13
    p = find(load_problems(tmp_path, lengths=with_cell(base_lengths(), 1, n="10")),
             "lengths.csv", 1, "n", "13 fish", "'pinfish'", "'H1'", "rows 1, 2", "catches row 1", "12")
    assert "more fish cannot be measured" in p.fix


def test_equal_measured_and_counted_is_fine(tmp_path):
    assert len(load(tmp_path, lengths=with_cell(base_lengths(), 1, n="9")).lengths) == 4


def test_invalid_values_are_not_reused_by_cross_table_rules(tmp_path):
    # the count is reported as negative; the lengths are not also blamed for exceeding it
    probs = load_problems(tmp_path, catches=with_cell(base_catches(), 0, count="-12"))
    assert [(Path(p.file).name, p.row, p.column) for p in probs] == [("catches.csv", 1, "count")]


def test_all_problems_in_all_tables_are_collected_at_once(tmp_path):
    hauls = with_cell(base_hauls(), 0, effort="0")
    hauls = with_cell(hauls, 1, date="3 May 2021")
    catches = with_cell(base_catches(), 2, count="-4")
    catches = with_cell(catches, 3, haul_id="H404")
    lengths = with_cell(base_lengths(), 0, length_mm="abc")
    lengths = with_cell(lengths, 3, n="1.5")
    with pytest.raises(InputError) as info:
        load(tmp_path, hauls=hauls, catches=catches, lengths=lengths)
    got = [(Path(p.file).name, p.row, p.column) for p in info.value.problems]
    assert got == [("hauls.csv", 1, "effort"), ("hauls.csv", 2, "date"), ("catches.csv", 3, "count"),
                   ("catches.csv", 4, "haul_id"), ("lengths.csv", 1, "length_mm"), ("lengths.csv", 4, "n")]
    assert str(info.value).startswith("6 problem(s) found")


def test_thousands_of_problems_are_all_kept(tmp_path):
    catches = [{"haul_id": "H1", "species": f"sp{i}", "count": "-1"} for i in range(1200)]
    with pytest.raises(InputError) as info:
        load(tmp_path, catches=catches, with_lengths=False)
    assert len(info.value.problems) == 1200
    assert "... and 1150 more" in str(info.value)


# ----------------------------------------------------------------------------- load warnings


def test_one_gear_with_two_effort_units_is_a_warning(tmp_path):
    t = load(tmp_path, hauls=with_cell(base_hauls(), 7, effort_unit="min"))
    (w,) = [w for w in t.warnings if w.column == "effort_unit"]
    assert "trawl_x" in w.message and "m2" in w.message and "min" in w.message and "row 8" in w.message


def test_reading_warnings(tmp_path):
    hauls = with_cell(base_hauls(), 6, gear="Seine_A ", longitude="")
    hauls = with_cell(hauls, 7, gear="seine_a", stratum_area="13", date="2250-01-01")
    catches = [dict(r, comment="x") for r in base_catches()]
    catches = with_cell(catches, 7, species="Mummichog")
    catches.append({"haul_id": "H8", "species": "mummichog", "count": "1", "comment": ""})
    lengths = base_lengths() + [{"haul_id": "H7", "species": "Mummichog", "length_mm": "38.5", "n": "2"}]
    lengths = with_cell(lengths, 3, species="Mummichog")
    t = load(tmp_path, hauls=hauls, catches=catches, lengths=lengths)
    text = "\n".join(str(w) for w in t.warnings)
    assert "'comment' are not used" in text
    assert "gear names 'Seine_A', 'seine_a' differ only in case" in text
    assert "species names 'Mummichog', 'mummichog' differ only in case" in text
    assert "only one of latitude and longitude (row 7)" in text
    assert "stratum 'S1' has 2 different stratum_area values (12.5, 13)" in text
    assert "dated in the future (row 8)" in text
    assert "repeat a haul, species and length already given (rows 4, 5)" in text


# ----------------------------------------------------------------------------- zero completion


def test_complete_zeros_fills_absent_species(tmp_path):
    t = load(tmp_path)
    z = complete_zeros(t)
    assert list(z.columns) == ["haul_id", "species", "count"]
    assert len(z) == 8 * 3
    got = z.set_index(["haul_id", "species"])["count"]
    assert got["H1", "pinfish"] == 12 and got["H1", "blue crab"] == 3 and got["H1", "mummichog"] == 0
    assert got["H4", "pinfish"] == 0 and got["H4", "blue crab"] == 1
    assert (got.loc["H7"] == pd.Series({"blue crab": 0.0, "mummichog": 40.0, "pinfish": 0.0})).all()
    assert z["count"].sum() == t.catches["count"].sum()


def test_complete_zeros_recorded_hook_fills_only_recorded_pairs(tmp_path):
    t = load(tmp_path)
    recorded = pd.DataFrame({"haul_id": ["H1", "H2"], "species": ["mummichog", "blue crab"]})
    z = complete_zeros(t, recorded=recorded)
    assert len(z) == len(t.catches) + 2
    keys = set(zip(z["haul_id"], z["species"]))
    assert ("H1", "mummichog") in keys and ("H2", "blue crab") in keys and ("H3", "mummichog") not in keys


@st.composite
def survey(draw):
    n_hauls = draw(st.integers(1, 12))
    species = draw(st.lists(st.sampled_from(["pinfish", "silver perch", "blue crab", "pink shrimp",
                                             "hogchoker"]), min_size=1, max_size=5, unique=True))
    pairs = [(h, s) for h in range(n_hauls) for s in species]
    present = draw(st.lists(st.sampled_from(pairs), min_size=1, max_size=len(pairs), unique=True))
    counts = draw(st.lists(st.integers(0, 500) | st.floats(0, 1e4, allow_nan=False),
                           min_size=len(present), max_size=len(present)))
    return n_hauls, present, counts


@settings(max_examples=60, deadline=None)
@given(survey())
def test_complete_zeros_property_rows_and_total(data):
    n_hauls, present, counts = data
    hauls = pd.DataFrame({"haul_id": [f"h{i}" for i in range(n_hauls)], "_row": range(1, n_hauls + 1)})
    catches = pd.DataFrame({"haul_id": [f"h{h}" for h, _ in present], "species": [s for _, s in present],
                            "count": np.asarray(counts, dtype=float)})
    t = Tables(hauls=hauls, catches=catches, lengths=None, files={"hauls": "h.csv", "catches": "c.csv"})
    z = complete_zeros(t)
    n_species = catches["species"].nunique()
    assert len(z) == n_hauls * n_species
    assert not z.duplicated(["haul_id", "species"]).any()
    assert z["count"].sum() == pytest.approx(catches["count"].sum())
    merged = catches.merge(z, on=["haul_id", "species"], suffixes=("_in", "_out"))
    assert len(merged) == len(catches) and (merged["count_in"] == merged["count_out"]).all()
    assert (z["count"] >= 0).all()


# ----------------------------------------------------------------------------- fit-only rules


def test_clean_tables_have_no_fit_problems(tmp_path):
    assert fit_problems(load(tmp_path), "trawl_x") == []


def test_fit_problem_non_integer_count_in_calibration_haul(tmp_path):
    catches = with_cell(base_catches(), 0, count="12.5")  # H1, calibration haul with lengths
    catches = with_cell(catches, 8, count="5.5")  # H8, survey haul: fine
    probs = fit_problems(load(tmp_path, catches=catches, lengths=with_cell(base_lengths(), 1, n="1")), "trawl_x")
    assert len(probs) == 1
    find(probs, "catches.csv", 1, "count", "12.5", "not a whole number", "lengths")


def test_fit_problem_group_with_one_gear(tmp_path):
    hauls = with_cell(base_hauls(), 3, gear="trawl_x")  # P2 now trawl_x only
    probs = fit_problems(load(tmp_path, hauls=hauls), "trawl_x")
    find(probs, "hauls.csv", 3, "pair_id", "'P2'", "one gear only", "rows 3, 4")


def test_fit_problem_reference_absent(tmp_path):
    t = load(tmp_path)
    p = find(fit_problems(t, "seine_a"), "hauls.csv", None, "gear", "'seine_a' fished in no calibration group")
    assert "trawl_x, trawl_y" in p.fix
    find(fit_problems(t, "beam_z"), "hauls.csv", None, "gear", "'beam_z' does not appear")


def test_fit_problem_gear_not_linked_to_reference(tmp_path):
    hauls = with_cell(base_hauls(), 4, gear="beam_a")
    hauls = with_cell(hauls, 5, gear="beam_b")  # P3 links beam_a and beam_b only
    probs = fit_problems(load(tmp_path, hauls=hauls), "trawl_x")
    find(probs, "hauls.csv", 5, "gear", "'beam_a'", "none links it to the reference")
    find(probs, "hauls.csv", 6, "gear", "'beam_b'")
    assert fit_problems(load(tmp_path, hauls=hauls), "trawl_y") != []


def test_fit_problem_linked_through_another_gear_is_fine(tmp_path):
    hauls = with_cell(base_hauls(), 4, gear="beam_a")  # P3: beam_a + trawl_y, and trawl_y meets trawl_x
    assert fit_problems(load(tmp_path, hauls=hauls), "trawl_x") == []


def test_fit_problem_mixed_effort_units_in_calibration(tmp_path):
    probs = fit_problems(load(tmp_path, hauls=with_cell(base_hauls(), 3, effort_unit="min")), "trawl_x")
    find(probs, "hauls.csv", 2, "effort_unit", "'trawl_y'", "2 units")
