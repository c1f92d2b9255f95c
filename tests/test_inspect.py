"""The summary `calib check` prints, on a small hand-made dataset counted by hand."""

from __future__ import annotations

import csv
import json

import numpy as np
import pytest

from calib.inspect import EARTH_RADIUS_KM, haversine_km, summarize
from calib.tables import load_tables

H_COLS = ["haul_id", "gear", "date", "effort", "effort_unit", "pair_id", "latitude", "longitude"]

# Gears: trawl_x (reference), trawl_y, beam_c, seine_d, seine_e; throw_f fished survey hauls only.
HAULS = [
    ("H1", "trawl_x", "2021-05-03", "100", "m2", "P1", "30.0000", "-81.0000"),
    ("H2", "trawl_y", "2021-05-03", "120", "m2", "P1", "30.0010", "-81.0010"),  # ~0.15 km from H1
    ("H3", "trawl_x", "2021-05-04", "100", "m2", "P2", "", ""),
    ("H4", "trawl_y", "2021-05-04", "60", "m2", "P2", "", ""),
    ("H5", "trawl_y", "2021-05-04", "60", "m2", "P2", "", ""),  # second trawl_y haul: summed
    ("H6", "trawl_x", "2021-05-05", "100", "m2", "P3", "", ""),
    ("H7", "trawl_y", "2021-05-06", "100", "m2", "P3", "", ""),  # a day later
    ("H8", "trawl_y", "2021-06-01", "100", "m2", "P4", "30.0000", "-81.0000"),
    ("H9", "beam_c", "2021-06-01", "50", "m2", "P4", "30.0450", "-81.0000"),  # 5.0 km north
    ("H10", "trawl_x", "2021-06-02", "100", "m2", "P5", "", ""),  # a group of one gear
    ("H11", "seine_d", "2021-07-01", "1", "haul", "P6", "", ""),
    ("H12", "seine_e", "2021-07-01", "1", "haul", "P6", "", ""),  # linked to each other only
    ("H13", "throw_f", "2021-07-02", "1", "m2", "", "", ""),
    ("H14", "throw_f", "2021-07-03", "1", "trap", "", "", ""),  # two effort units
    ("H15", "trawl_x", "2021-08-01", "100", "m2", "", "", ""),
]
CATCHES = [
    ("H1", "pinfish", "5"), ("H2", "pinfish", "3"), ("H3", "pinfish", "2"), ("H5", "pinfish", "1"),
    ("H7", "pinfish", "4"), ("H11", "pinfish", "1"), ("H10", "pinfish", "7"),
    ("H9", "blue crab", "2"), ("H13", "blue crab", "10"), ("H8", "hogchoker", "0"),
]


def write(path, columns, rows):
    with open(path, "w", newline="") as fh:
        w = csv.writer(fh)
        w.writerow(columns)
        w.writerows(rows)
    return path


def tables_of(tmp_path, hauls=HAULS, catches=CATCHES):
    return load_tables(write(tmp_path / "hauls.csv", H_COLS, hauls),
                       write(tmp_path / "catches.csv", ["haul_id", "species", "count"], catches))


@pytest.fixture
def summary(tmp_path):
    return summarize(tables_of(tmp_path), reference="trawl_x", min_groups=3)


def test_counts_per_gear(summary):
    gears = {g["gear"]: g for g in summary.gears}
    assert summary.n_hauls == 15 and summary.n_calibration_hauls == 12
    assert {g: (v["n_hauls"], v["n_calibration_hauls"]) for g, v in gears.items()} == {
        "trawl_x": (5, 4), "trawl_y": (5, 5), "beam_c": (1, 1), "seine_d": (1, 1), "seine_e": (1, 1),
        "throw_f": (2, 0)}
    assert gears["throw_f"]["effort_units"] == ["m2", "trap"]
    assert (gears["trawl_x"]["first_date"], gears["trawl_x"]["last_date"]) == ("2021-05-03", "2021-08-01")


def test_groups_per_gear_combination(summary):
    assert summary.n_groups == 6 and summary.n_usable_groups == 5
    assert {c["label"]: c["n_groups"] for c in summary.combos} == {
        "trawl_x + trawl_y": 3, "beam_c + trawl_y": 1, "seine_d + seine_e": 1, "trawl_x only": 1}
    assert summary.groups_with_summed_hauls == 1  # P2
    text = summary.text()
    assert "trawl_x + trawl_y: 3 groups" in text
    assert "trawl_x only: 1 group (one gear only" in text
    assert "groups where several hauls of one gear were summed: 1" in text


def test_species_catch_and_groups(summary):
    sp = {s["species"]: s for s in summary.species}
    # pinfish: 5+3+2+1+4+1+7 = 23 in all; 16 in usable groups (P5's 7 is a one-gear group)
    assert sp["pinfish"]["total_catch"] == 23 and sp["pinfish"]["calibration_catch"] == 16
    assert sp["pinfish"]["n_groups"] == 4  # P1, P2, P3, P6
    assert sp["pinfish"]["by_gear"] == {"trawl_x": 2, "trawl_y": 3, "seine_d": 1, "seine_e": 0}
    assert (sp["blue crab"]["total_catch"], sp["blue crab"]["calibration_catch"], sp["blue crab"]["n_groups"]) == (12, 2, 1)
    assert sp["blue crab"]["by_gear"] == {"beam_c": 1, "trawl_y": 0}
    assert (sp["hogchoker"]["n_groups"], sp["hogchoker"]["by_gear"]) == (0, {})
    # the printed table: species, catch, catch in groups, groups, then beam_c seine_d seine_e trawl_x trawl_y
    row = next(line.split() for line in summary.text().splitlines() if line.strip().startswith("pinfish"))
    assert row == ["pinfish", "23", "16", "4", "0", "1", "0", "2", "3"]


def test_notes(summary):
    assert any("no species_recorded table: every species is assumed recorded by every source" in n
               for n in summary.notes)
    assert summary.hauls_without_catches == 5  # H4, H6, H12, H14, H15
    assert "no species_recorded table" in summary.text()


def warnings_of(summary, kind):
    return [w for k, w in zip(summary.warning_kinds, summary.warnings) if k == kind]


def test_each_warning_is_raised(summary):
    rare = warnings_of(summary, "rare species")
    assert sorted(w.message.split("'")[1] for w in rare) == ["blue crab", "hogchoker"]
    assert "fewer than 3" in rare[0].message
    (dates,) = warnings_of(summary, "different dates")
    assert "'P3'" in dates.message and "2021-05-05, 2021-05-06" in dates.message and dates.row == 6
    (far,) = warnings_of(summary, "far apart")
    assert "'P4'" in far.message and "5.0 km" in far.message and far.row == 8
    (nogroup,) = warnings_of(summary, "gear in no group")
    assert "'throw_f'" in nogroup.message
    (units,) = warnings_of(summary, "table")
    assert "throw_f" in units.message and "trap" in units.message
    fit = warnings_of(summary, "fit will stop")
    assert any("'P5'" in w.message and "one gear only" in w.message and w.row == 10 for w in fit)
    unlinked = sorted(w.message.split("'")[1] for w in fit if "none links it" in w.message)
    assert unlinked == ["seine_d", "seine_e"]
    assert len(summary.warnings) == 2 + 1 + 1 + 1 + 1 + 3
    text = summary.text()
    assert "Warnings (9)" in text and "fit stops on this" in text


def test_without_reference_reports_connected_sets(tmp_path):
    s = summarize(tables_of(tmp_path), min_groups=3)
    assert s.connected_sets == [["beam_c", "trawl_x", "trawl_y"], ["seine_d", "seine_e"]]
    (w,) = warnings_of(s, "unlinked gears")
    assert "2 sets" in w.message and "beam_c, trawl_x, trawl_y | seine_d, seine_e" in w.message
    assert not any("none links it" in w.message for w in s.warnings)  # needs a reference
    assert "set 2: seine_d, seine_e" in s.text()


def test_min_groups_threshold_is_an_argument(tmp_path):
    s = summarize(tables_of(tmp_path), reference="trawl_x", min_groups=5)
    assert "pinfish" in {w.message.split("'")[1] for w in warnings_of(s, "rare species")}
    s = summarize(tables_of(tmp_path), reference="trawl_x", min_groups=1)
    assert [w.message.split("'")[1] for w in warnings_of(s, "rare species")] == ["hogchoker"]


def test_distance_threshold_is_an_argument(tmp_path):
    assert warnings_of(summarize(tables_of(tmp_path), max_distance_km=6.0), "far apart") == []
    assert len(warnings_of(summarize(tables_of(tmp_path), max_distance_km=0.1), "far apart")) == 2


def test_non_integer_count_in_a_group_is_a_check_warning(tmp_path):
    catches = [c if c[0] != "H3" else ("H3", "pinfish", "2.5") for c in CATCHES]
    s = summarize(tables_of(tmp_path, catches=catches), reference="trawl_x", min_groups=3)
    hits = [w for w in warnings_of(s, "fit will stop") if "not a whole number" in w.message]
    assert len(hits) == 1 and hits[0].row == 3 and hits[0].column == "count"


def test_mixed_units_in_groups_reported_once(tmp_path):
    hauls = [h if h[0] != "H4" else h[:4] + ("min",) + h[5:] for h in HAULS]
    s = summarize(tables_of(tmp_path, hauls=hauls), reference="trawl_x", min_groups=3)
    about = [w for w in s.warnings if "trawl_y" in w.message and "units" in w.message]
    assert len(about) == 1 and "fit stops" in about[0].message


def test_unknown_reference_is_a_warning(tmp_path):
    s = summarize(tables_of(tmp_path), reference="beam_zz")
    assert any("'beam_zz' does not appear" in w.message for w in s.warnings)


def test_clean_design_has_no_warnings(tmp_path):
    hauls = [(f"H{i}{g}", gear, "2022-05-0" + str(i), "100", "m2", f"P{i}", "", "")
             for i in range(1, 4) for g, gear in (("a", "trawl_x"), ("b", "trawl_y"))]
    catches = [(h[0], "pinfish", "3") for h in hauls]
    s = summarize(tables_of(tmp_path, hauls=hauls, catches=catches), reference="trawl_x", min_groups=3)
    assert s.warnings == [] and "Warnings: none" in s.text()
    assert s.species[0]["by_gear"] == {"trawl_x": 3, "trawl_y": 3}


def test_many_warnings_of_one_kind_are_counted_not_dropped(tmp_path):
    hauls = []
    for i in range(25):
        hauls += [(f"A{i}", "trawl_x", "2021-05-01", "1", "m2", f"P{i}", "", ""),
                  (f"B{i}", "trawl_y", "2021-05-02", "1", "m2", f"P{i}", "", "")]
    s = summarize(tables_of(tmp_path, hauls=hauls, catches=[("A0", "pinfish", "1")]), min_groups=0)
    assert len(warnings_of(s, "different dates")) == 25
    text = s.text(max_per_kind=20)
    assert text.count("has hauls on 2 days") == 20
    assert "... and 5 more warnings of the kind 'different dates'" in text


def test_as_dict_is_json_ready(summary):
    d = json.loads(json.dumps(summary.as_dict()))
    assert d["n_groups"] == 6 and d["reference"] == "trawl_x"
    assert len(d["warnings"]) == len(summary.warnings) and d["warnings"][0]["kind"] == "rare species"


def test_haversine_against_spherical_geometry():
    # One degree of latitude on a sphere is R * pi / 180 (geometry of the sphere).
    assert haversine_km(30.0, -81.0, 31.0, -81.0) == pytest.approx(EARTH_RADIUS_KM * np.pi / 180, rel=1e-12)
    # Independent formula: angle between unit vectors, computed with arctan2 (numerically stable).
    rng = np.random.default_rng(7)
    lat1, lat2 = rng.uniform(-80, 80, 200), rng.uniform(-80, 80, 200)
    lon1, lon2 = rng.uniform(-180, 180, 200), rng.uniform(-180, 180, 200)

    def unit(lat, lon):
        la, lo = np.radians(lat), np.radians(lon)
        return np.stack([np.cos(la) * np.cos(lo), np.cos(la) * np.sin(lo), np.sin(la)], axis=-1)

    u, v = unit(lat1, lon1), unit(lat2, lon2)
    angle = np.arctan2(np.linalg.norm(np.cross(u, v), axis=-1), (u * v).sum(axis=-1))
    np.testing.assert_allclose(haversine_km(lat1, lon1, lat2, lon2), EARTH_RADIUS_KM * angle, rtol=1e-9)
