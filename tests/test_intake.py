"""Partner intake tables (design section 3): species_names and species_recorded.

Names are mapped before anything else; zeros are completed only for species a haul's source
recorded in the haul's year; every problem names file, row, column and fix; ``check``
reports what the intake tables do not cover. Expected values are counted by hand or by a
plain loop written independently of the vectorised code.
"""

from __future__ import annotations

import csv
import tempfile
from pathlib import Path

import pandas as pd
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from calib.errors import InputError
from calib.inspect import NO_SPECIES_RECORDED_NOTE, summarize
from calib.tables import complete_zeros, load_tables, recorded_mask, recorded_pairs, unrecorded_catches

H_COLS = ["haul_id", "gear", "date", "effort", "effort_unit", "pair_id", "source"]
HAULS = [
    ("H1", "trawl_a", "2019-05-01", "100", "m2", "P1", "alpha"),
    ("H2", "trawl_b", "2019-05-01", "100", "m2", "P1", "alpha"),
    ("H3", "trawl_a", "2020-06-01", "100", "m2", "", "beta"),
    ("H4", "trawl_a", "2021-06-01", "100", "m2", "", "beta"),
    ("H5", "trawl_b", "2021-07-01", "100", "m2", "", "gamma"),  # gamma has no recording list
    ("H6", "trawl_b", "2021-07-02", "100", "m2", "", ""),  # blank source
]
CATCHES = [
    ("H1", "PINF", "3"), ("H1", "blue crab", "1"), ("H2", "pinfish", "4"),
    ("H3", "pinfish", "2"), ("H4", "blue crab", "5"), ("H5", "hogchoker", "1"), ("H6", "pinfish", "1"),
]
NAMES = [("PINF", "pinfish"), ("Lagodon rhomboides", "pinfish"), ("pinfish", "pinfish")]
RECORDED = [
    # alpha recorded everything it caught in 2019; beta recorded pinfish always, blue crab from 2021
    ("alpha", "pinfish", "2015", "2020"), ("alpha", "blue crab", "2015", "2020"), ("alpha", "hogchoker", "", ""),
    ("beta", "pinfish", "", ""), ("beta", "blue crab", "2021", ""),
]


def write(path: Path, columns, rows) -> Path:
    with open(path, "w", newline="", encoding="utf-8") as fh:
        w = csv.writer(fh)
        w.writerow(columns)
        w.writerows(rows)
    return path


def load(tmp_path, hauls=HAULS, catches=CATCHES, names=NAMES, recorded=RECORDED, lengths=None,
         h_cols=H_COLS, r_cols=("source", "species", "year_from", "year_to"), n_cols=("name", "accepted_name")):
    h = write(tmp_path / "hauls.csv", h_cols, hauls)
    c = write(tmp_path / "catches.csv", ["haul_id", "species", "count"], catches)
    ln = write(tmp_path / "lengths.csv", ["haul_id", "species", "length_mm", "n"], lengths) if lengths else None
    r = write(tmp_path / "recorded.csv", r_cols, recorded) if recorded is not None else None
    n = write(tmp_path / "names.csv", n_cols, names) if names is not None else None
    return load_tables(h, c, ln, species_recorded=r, species_names=n)


def problems_of(tmp_path, **kwargs):
    with pytest.raises(InputError) as info:
        load(tmp_path, **kwargs)
    return info.value.problems


def one(problems, file, row, column, *words):
    hits = [p for p in problems if Path(p.file).name == file and p.row == row and p.column == column
            and all(w in str(p) for w in words)]
    assert len(hits) == 1, f"no single problem at {file} row {row} column {column} with {words}: " + "\n".join(
        str(p) for p in problems)
    assert "Fix:" in str(hits[0]) and hits[0].fix
    return hits[0]


# ----------------------------------------------------------------------------- species_names


def test_names_are_mapped_in_catches_and_lengths_before_other_rules(tmp_path):
    # lengths written with the synonym must match the catches row written with the code:
    # this only passes the lengths -> catches rule if both are mapped first.
    t = load(tmp_path, lengths=[("H1", "Lagodon rhomboides", "50", "2")])
    assert "PINF" not in set(t.catches["species"]) and "Lagodon rhomboides" not in set(t.lengths["species"])
    got = t.catches.set_index(["haul_id", "species"])["count"]
    assert got["H1", "pinfish"] == 3 and got["H2", "pinfish"] == 4
    assert list(t.lengths["species"]) == ["pinfish"]
    ren = t.renamed.set_index(["table", "name"])
    assert ren.loc[("catches", "PINF"), "accepted_name"] == "pinfish" and ren.loc[("catches", "PINF"), "n_rows"] == 1
    assert ren.loc[("lengths", "Lagodon rhomboides"), "n_rows"] == 1
    assert len(ren) == 2  # the identity row pinfish -> pinfish renames nothing
    assert list(t.species_names.columns) == ["name", "accepted_name", "_row"] and len(t.species_names) == 3


def test_rows_that_become_one_name_are_summed_with_a_warning(tmp_path):
    catches = CATCHES + [("H1", "pinfish", "2"), ("H1", "Lagodon rhomboides", "5")]
    t = load(tmp_path, catches=catches)
    h1 = t.catches[(t.catches["haul_id"] == "H1") & (t.catches["species"] == "pinfish")]
    assert len(h1) == 1 and h1["count"].iloc[0] == 3 + 2 + 5 and h1["_row"].iloc[0] == 1
    assert not t.catches.duplicated(["haul_id", "species"]).any()
    (w,) = [w for w in t.warnings if "are summed" in w.message]
    assert "'pinfish'" in w.message and "rows 1, 8, 9" in w.message and "'Lagodon rhomboides'" in w.message
    assert t.catches["count"].sum() == sum(float(c[2]) for c in catches)


def test_a_repeated_written_name_is_still_a_duplicate(tmp_path):
    probs = problems_of(tmp_path, catches=CATCHES + [("H1", "PINF", "2")])
    one(probs, "catches.csv", 8, "species", "already have a row")


def test_name_mapped_to_two_accepted_names(tmp_path):
    probs = problems_of(tmp_path, names=NAMES + [("PINF", "pink shrimp")])
    p = one(probs, "names.csv", 4, "accepted_name", "'PINF'", "'pinfish' in row 1", "'pink shrimp'")
    assert "line 5" in str(p)


def test_chained_names_are_refused(tmp_path):
    names = [("PINF", "Lagodon"), ("Lagodon", "pinfish")]
    probs = problems_of(tmp_path, names=names)
    one(probs, "names.csv", 1, "accepted_name", "'Lagodon'", "itself mapped to 'pinfish'", "directly")


def test_unknown_and_missing_columns_and_blanks_in_names(tmp_path):
    probs = problems_of(tmp_path, names=[("PINF", "pinfish", "x"), ("", "blue crab", "")],
                        n_cols=("name", "acceptedname", "comment"))
    one(probs, "names.csv", None, "acceptedname", "not a species_names column", "accepted_name")
    one(probs, "names.csv", None, "comment", "not a species_names column")
    one(probs, "names.csv", None, "accepted_name", "missing")
    one(probs, "names.csv", 2, "name", "blank")


def test_intake_problems_are_collected_with_the_other_tables(tmp_path):
    hauls = [h if h[0] != "H3" else h[:3] + ("-5",) + h[4:] for h in HAULS]
    probs = problems_of(tmp_path, hauls=hauls, names=NAMES + [("PINF", "hogchoker")],
                        recorded=RECORDED + [("beta", "hogchoker", "2022", "2020")])
    one(probs, "hauls.csv", 3, "effort", "greater than 0")
    one(probs, "names.csv", 4, "accepted_name", "mapped to")
    one(probs, "recorded.csv", 6, "year_to", "year_from 2022 is after year_to 2020")
    files = [Path(p.file).name for p in probs]
    assert files == sorted(files, key=["names.csv", "hauls.csv", "catches.csv", "recorded.csv"].index)


# ----------------------------------------------------------------------------- species_recorded


@pytest.mark.parametrize("value,words", [("2020.5", "whole number"), ("20x0", "not a number"),
                                         ("3000", "outside")])
def test_years_must_be_whole_years(tmp_path, value, words):
    probs = problems_of(tmp_path, recorded=RECORDED + [("beta", "hogchoker", value, "")])
    one(probs, "recorded.csv", 6, "year_from", words)


def test_recorded_table_rules(tmp_path):
    probs = problems_of(tmp_path, recorded=[("beta", "", "2020", "2019", "x")],
                        r_cols=("source", "species", "year_from", "year_to", "notes"))
    one(probs, "recorded.csv", None, "notes", "not a species_recorded column")
    one(probs, "recorded.csv", 1, "species", "blank")
    one(probs, "recorded.csv", 1, "year_to", "after year_to")


def test_recorded_table_needs_a_source_in_hauls(tmp_path):
    hauls = [h[:6] for h in HAULS]
    probs = problems_of(tmp_path, hauls=hauls, h_cols=H_COLS[:6])
    one(probs, "hauls.csv", None, "source", "no source column")
    probs = problems_of(tmp_path, hauls=[h[:6] + ("",) for h in HAULS])
    one(probs, "hauls.csv", None, "source", "every haul's source is blank")


def test_year_columns_may_be_left_out(tmp_path):
    t = load(tmp_path, recorded=[("beta", "pinfish")], r_cols=("source", "species"))
    assert t.species_recorded["year_from"].isna().all() and t.species_recorded["year_to"].isna().all()
    assert recorded_mask(t, ["H3", "H4", "H3"], ["pinfish", "pinfish", "blue crab"]).tolist() == [True, True, False]


def test_zeros_only_where_the_source_recorded_the_species(tmp_path):
    t = load(tmp_path)
    z = complete_zeros(t)
    keys = set(zip(z["haul_id"], z["species"]))
    species = {"pinfish", "blue crab", "hogchoker"}
    # Counted by hand from RECORDED:
    #   H1, H2 (alpha, 2019): all three species listed for 2019 -> 3 rows each
    #   H3 (beta, 2020): pinfish only (blue crab from 2021, hogchoker never) -> 1 row
    #   H4 (beta, 2021): pinfish, blue crab -> 2 rows
    #   H5 (gamma: no list), H6 (blank source): every species -> 3 rows each
    expected = ({("H1", s) for s in species} | {("H2", s) for s in species} | {("H3", "pinfish")}
                | {("H4", "pinfish"), ("H4", "blue crab")} | {("H5", s) for s in species}
                | {("H6", s) for s in species})
    assert keys == expected and len(z) == len(expected)
    assert z["count"].sum() == pytest.approx(t.catches["count"].sum())
    # the same pairs through the public helper, and unchanged behaviour without the table
    assert set(map(tuple, recorded_pairs(t).to_numpy())) == expected
    plain = load(tmp_path, recorded=None)
    assert recorded_pairs(plain) is None and len(complete_zeros(plain)) == 6 * 3


def test_catches_of_unrecorded_species_are_kept_and_listed(tmp_path):
    recorded = [r for r in RECORDED if r[:2] != ("beta", "blue crab")]
    t = load(tmp_path, recorded=recorded)
    bad = unrecorded_catches(t)
    assert list(zip(bad["haul_id"], bad["species"])) == [("H4", "blue crab")]
    z = complete_zeros(t).set_index(["haul_id", "species"])["count"]
    assert z["H4", "blue crab"] == 5  # an observation is never dropped by zero completion
    assert unrecorded_catches(load(tmp_path, recorded=None)).empty


def test_overlapping_recording_periods_are_a_union(tmp_path):
    recorded = [("beta", "blue crab", "2018", "2020"), ("beta", "blue crab", "2021", "2021"),
                ("beta", "pinfish", "", "")]
    t = load(tmp_path, recorded=recorded)
    assert recorded_mask(t, ["H3", "H4"], ["blue crab", "blue crab"]).tolist() == [True, True]


def test_recorded_species_names_are_mapped_too(tmp_path):
    t = load(tmp_path, recorded=[("beta", "PINF", "", "")])
    assert list(t.species_recorded["species"]) == ["pinfish"]
    assert recorded_mask(t, ["H3"], ["pinfish"]).tolist() == [True]


def test_parquet_intake_tables_read_like_csv(tmp_path):
    from_csv = load(tmp_path)
    pd.DataFrame(RECORDED, columns=["source", "species", "year_from", "year_to"]).to_parquet(tmp_path / "r.parquet")
    pd.DataFrame(NAMES, columns=["name", "accepted_name"]).to_parquet(tmp_path / "n.parquet")
    from_pq = load_tables(tmp_path / "hauls.csv", tmp_path / "catches.csv",
                          species_recorded=tmp_path / "r.parquet", species_names=tmp_path / "n.parquet")
    pd.testing.assert_frame_equal(complete_zeros(from_csv), complete_zeros(from_pq))
    pd.testing.assert_frame_equal(from_csv.species_recorded, from_pq.species_recorded)


def test_load_warnings_about_the_recording_list(tmp_path):
    recorded = RECORDED + [("omega", "pinfish", "", ""), ("beta", "Hogchoker", "", ""), ("beta", "star drum", "", "")]
    t = load(tmp_path, recorded=recorded)
    text = "\n".join(str(w) for w in t.warnings)
    assert "source(s) 'omega' of species_recorded have no hauls" in text
    assert "species 'Hogchoker' is not in catches, but 'hogchoker' is" in text and "row 7" in text
    assert "species 'star drum' of species_recorded never appear in catches" in text


# ----------------------------------------------------------------------------- calib check


def kinds(summary, kind):
    return [w for k, w in zip(summary.warning_kinds, summary.warnings) if k == kind]


def test_check_reports_sources_without_lists_unrecorded_catches_and_one_source_species(tmp_path):
    recorded = [r for r in RECORDED if r[:2] != ("beta", "blue crab")]
    s = summarize(load(tmp_path, recorded=recorded))
    no_list = sorted(w.message.split(":")[0] for w in kinds(s, "no recording list"))
    assert no_list == ["1 haul(s) have a blank source", "source 'gamma' (1 haul) has no rows in species_recorded"]
    (unrec,) = kinds(s, "not recorded")
    assert "'blue crab' from source 'beta' in year(s) 2021" in unrec.message and unrec.row == 5
    one_source = {w.message.split("'")[1]: w.message for w in kinds(s, "one source only")}
    # hogchoker: gamma only; blue crab: alpha (H1) and beta (H4); pinfish: alpha, beta and blank
    assert set(one_source) == {"hogchoker"} and "('gamma', 1 catches row(s))" in one_source["hogchoker"]
    assert NO_SPECIES_RECORDED_NOTE not in s.notes
    (note,) = [n for n in s.notes if n.startswith("species_recorded:")]
    assert "recording lists for 2 source(s)" in note
    # of 6 hauls x 3 species, not filled (beta now lists pinfish only): H3 blue crab,
    # H3 hogchoker, H4 hogchoker (H4's blue crab is a catch and is kept) -> 3
    assert "(3 haul x species zero(s) not filled)" in note
    (names_note,) = [n for n in s.notes if n.startswith("species_names:")]
    assert "1 name(s) as written mapped to 1 accepted name(s) (1 catches row(s) renamed)" in names_note
    text = s.text()
    assert f"species_recorded {tmp_path / 'recorded.csv'} (4 rows)" in text
    assert f"species_names    {tmp_path / 'names.csv'} (3 rows)" in text
    assert s.as_dict()["n_species_recorded_rows"] == 4


def test_check_without_intake_tables_says_every_species_is_assumed_recorded(tmp_path):
    s = summarize(load(tmp_path, names=None, recorded=None, catches=[c for c in CATCHES if c[1] != "PINF"]))
    assert NO_SPECIES_RECORDED_NOTE in s.notes
    assert "every species is assumed recorded by every source" in s.text()
    assert kinds(s, "no recording list") == [] and kinds(s, "not recorded") == []
    assert s.n_species_recorded_rows is None and s.n_species_names_rows is None


def test_check_reports_unmapped_names_differing_in_case_or_spacing(tmp_path):
    catches = CATCHES + [("H5", "Blue  Crab", "2")]
    s = summarize(load(tmp_path, catches=catches))
    near = [w for w in s.warnings if "differ only in case or spacing" in w.message]
    assert len(near) == 1 and "'Blue  Crab', 'blue crab'" in near[0].message and "species_names" in near[0].message
    # mapping the odd spelling removes the warning
    s = summarize(load(tmp_path, catches=catches, names=NAMES + [("Blue  Crab", "blue crab")]))
    assert not any("differ only in case" in w.message for w in s.warnings)


# ----------------------------------------------------------------------------- property


@st.composite
def recording_design(draw):
    n_hauls = draw(st.integers(1, 8))
    sources = ["s1", "s2", "s3", ""]
    # the first haul has a source: a recording list with every source blank is an input error
    hauls = [(f"h{i}", "g", f"{draw(st.integers(2000, 2004))}-06-01", "1", "m2", "",
              draw(st.sampled_from(sources[:3] if i == 0 else sources))) for i in range(n_hauls)]
    species = ["pinfish", "blue crab", "hogchoker"]
    caught = draw(st.lists(st.tuples(st.integers(0, n_hauls - 1), st.sampled_from(species)),
                           min_size=1, max_size=10, unique=True))
    catches = [(f"h{h}", s, str(draw(st.integers(0, 9)))) for h, s in caught]
    rows = draw(st.lists(st.tuples(st.sampled_from(["s1", "s2"]), st.sampled_from(species),
                                   st.sampled_from(["", "2000", "2001", "2002"]),
                                   st.sampled_from(["", "2002", "2003", "2004"])), min_size=1, max_size=6))
    return hauls, catches, rows


@settings(max_examples=40, deadline=None)
@given(recording_design())
def test_zero_completion_matches_a_plain_loop(design):
    hauls, catches, rows = design
    with tempfile.TemporaryDirectory() as d:
        t = load(Path(d), hauls=hauls, catches=catches, names=None, recorded=rows)
    z = complete_zeros(t)
    species = sorted({c[1] for c in catches})
    listed = {r[0] for r in rows}
    expected = set()
    for hid, _, date, _, _, _, source in hauls:
        year = int(date[:4])
        for s in species:
            if source not in listed:
                expected.add((hid, s))  # no recording list (or blank source): every species
            elif any(r[0] == source and r[1] == s and (r[2] == "" or int(r[2]) <= year)
                     and (r[3] == "" or year <= int(r[3])) for r in rows):
                expected.add((hid, s))
    expected |= {(c[0], c[1]) for c in catches}  # observations are always kept
    assert set(zip(z["haul_id"], z["species"])) == expected and len(z) == len(expected)
    assert z["count"].sum() == pytest.approx(sum(float(c[2]) for c in catches))
