"""``calib convert``: survey records in reference-gear units, draw by draw (design section 4).

Conversion is tested with KNOWN SYNTHETIC factor draws (a FactorSet built by hand), not with
a fit: every expected value is computed here, independently, with numpy from those draws.
One end-to-end test converts the demo survey with a quick ``method='glm'`` fit.
"""

from __future__ import annotations

import argparse
import csv
import json
import tempfile
from pathlib import Path

import arviz as az
import numpy as np
import pandas as pd
import pytest
import xarray as xr
from hypothesis import given, settings
from hypothesis import strategies as st

from calib.convert import (
    ADDED_COLUMNS,
    REJECT_CODES,
    Conversion,
    add_convert_parser,
    calibration_domain,
    convert,
    run_convert_command,
)
from calib.errors import InputError
from calib.factors import FACTOR_COLUMNS, FactorSet, file_sha256
from calib.tables import complete_zeros, load_tables

REF = "trawl_a"
SPECIES = ["blue crab", "hogchoker", "pinfish"]
H_COLS = ["haul_id", "gear", "date", "effort", "effort_unit", "pair_id", "source", "depth_m", "habitat"]

# Calibration groups (trawl_a + trawl_b), months May-Aug, depth 1-5 m, habitats mud and sand.
CAL_HAULS = [
    ("C1", "trawl_a", "2021-05-03", "100", "m2", "P1", "trials", "1.0", "mud"),
    ("C2", "trawl_b", "2021-05-03", "100", "m2", "P1", "trials", "1.2", "mud"),
    ("C3", "trawl_a", "2021-06-20", "100", "m2", "P2", "trials", "5.0", "sand"),
    ("C4", "trawl_b", "2021-06-20", "100", "m2", "P2", "trials", "5.0", "sand"),
    ("C5", "trawl_a", "2021-07-20", "100", "m2", "P3", "trials", "3.0", "sand"),
    ("C6", "trawl_b", "2021-07-20", "100", "m2", "P3", "trials", "1.0", "sand"),
    ("C7", "trawl_a", "2021-08-20", "100", "m2", "P4", "trials", "2.0", "mud"),
    ("C8", "trawl_b", "2021-08-20", "100", "m2", "P4", "trials", "4.0", "mud"),
]
CAL_CATCHES = [("C1", "pinfish", "3"), ("C2", "pinfish", "5"), ("C4", "blue crab", "1")]

# Survey hauls, one per situation. Factors (see factor_set): trawl_b x pinfish ok,
# trawl_b x blue crab fail, trawl_b x hogchoker NaN draws; seine_c x pinfish only by length
# class; beam_d in factors.csv but not in posterior.nc; throw_e has no factor at all.
SURVEY_HAULS = [
    ("S1", "trawl_a", "2022-06-10", "100", "m2", "", "alpha", "20", "mud"),  # reference: never flagged
    ("S2", "trawl_b", "2022-06-11", "250", "m2", "", "alpha", "3", "sand"),  # inside the domain
    ("S3", "trawl_b", "2022-12-05", "80", "m2", "", "alpha", "9", "seagrass"),  # month, depth, habitat out
    ("S4", "trawl_b", "2022-07-01", "30", "min", "", "alpha", "3", "mud"),  # effort in another unit
    ("S5", "seine_c", "2022-07-01", "1", "haul", "", "alpha", "1", "mud"),
    ("S6", "beam_d", "2022-07-02", "50", "m2", "", "alpha", "2", "mud"),
    ("S7", "throw_e", "2022-07-03", "1", "m2", "", "alpha", "1", "mud"),
    ("S8", "trawl_b", "2023-06-01", "120", "m2", "", "gamma", "0.5", ""),  # gamma records pinfish only
    ("S9", "trawl_b", "2022-07-15", "100", "m2", "", "alpha", "", "mud"),  # depth unknown: not flagged
]
SURVEY_CATCHES = [
    ("S1", "pinfish", "10"), ("S2", "pinfish", "5"), ("S2", "blue crab", "3"), ("S3", "pinfish", "7"),
    ("S4", "pinfish", "4"), ("S5", "pinfish", "30"), ("S6", "pinfish", "2"), ("S7", "hogchoker", "1"),
    ("S8", "blue crab", "2"), ("S8", "pinfish", "1.5"), ("S9", "pinfish", "2"),
]
RECORDED = [("gamma", "pinfish", "", "")]

# What each survey record must become, worked out by hand from the comments above
# (rejection reasons are tested in the documented order).
EXPECTED = {
    ("S1", "blue crab"): "", ("S1", "hogchoker"): "", ("S1", "pinfish"): "",
    ("S2", "blue crab"): "factor_fail", ("S2", "hogchoker"): "draws_not_finite", ("S2", "pinfish"): "",
    ("S3", "blue crab"): "factor_fail", ("S3", "hogchoker"): "draws_not_finite", ("S3", "pinfish"): "",
    ("S4", "blue crab"): "factor_fail", ("S4", "hogchoker"): "draws_not_finite", ("S4", "pinfish"): "effort_unit",
    ("S5", "blue crab"): "no_factor", ("S5", "hogchoker"): "no_factor", ("S5", "pinfish"): "not_species_level",
    ("S6", "blue crab"): "no_draws", ("S6", "hogchoker"): "no_draws", ("S6", "pinfish"): "no_draws",
    ("S7", "blue crab"): "no_factor", ("S7", "hogchoker"): "no_factor", ("S7", "pinfish"): "no_factor",
    ("S8", "blue crab"): "not_recorded", ("S8", "pinfish"): "",  # no hogchoker row: not recorded, not caught
    ("S9", "blue crab"): "factor_fail", ("S9", "hogchoker"): "draws_not_finite", ("S9", "pinfish"): "",
}

THETA = {("trawl_b", "pinfish"): -0.5, ("trawl_b", "blue crab"): 0.3, ("trawl_b", "hogchoker"): 0.1,
         ("seine_c", "pinfish"): 0.8}


def write(path: Path, columns, rows) -> Path:
    with open(path, "w", newline="", encoding="utf-8") as fh:
        w = csv.writer(fh)
        w.writerow(columns)
        w.writerows(rows)
    return path


def theta_draws(gears, n_chain=2, n_draw=400, sd=0.25, seed=5, nan=()):
    """Known synthetic posterior: theta ~ Normal(THETA, sd), reference 0, chosen cells NaN."""
    rng = np.random.default_rng(seed)
    th = np.zeros((n_chain, n_draw, len(gears), len(SPECIES)))
    for gi, g in enumerate(gears):
        for si, s in enumerate(SPECIES):
            if g != REF:
                th[:, :, gi, si] = THETA.get((g, s), 0.0) + sd * rng.standard_normal((n_chain, n_draw))
            if (g, s) in nan:
                th[:, :, gi, si] = np.nan
    return xr.DataArray(th, dims=("chain", "draw", "gear", "species"),
                        coords={"chain": np.arange(n_chain), "draw": np.arange(n_draw), "gear": list(gears),
                                "species": SPECIES}, name="theta")


def factor_row(species, gear, status="ok", unit="m2", length_mm=np.nan, reason=""):
    row = {c: np.nan for c in FACTOR_COLUMNS}
    row.update(species=species, gear=gear, reference=REF, effort_unit=unit, length_mm=length_mm,
               covariate=np.nan, level=np.nan, factor_median=1.0, factor_lower=0.5, factor_upper=2.0,
               interval=0.9, n_groups=4, n_caught=8, status=status, reason=reason)
    return row


def factor_set(*, domain=None, inputs=None, rows=None, theta=None, manifest_extra=None) -> FactorSet:
    theta = theta if theta is not None else theta_draws([REF, "trawl_b", "seine_c"],
                                                        nan={("trawl_b", "hogchoker")})
    if rows is None:
        rows = [factor_row("pinfish", "trawl_b"),
                factor_row("blue crab", "trawl_b", status="fail", reason="R-hat 1.2 > 1.05"),
                factor_row("hogchoker", "trawl_b", status="fail", reason="not estimable: never caught"),
                factor_row("pinfish", "seine_c", unit="haul", length_mm=50.0)]
        rows += [factor_row(s, "beam_d") for s in SPECIES]
    manifest = {"factor_set_id": "fs-synthetic0001", "reference": REF, "reference_effort_unit": "m2",
                "method": "synthetic", "settings": {"interval": 0.9}, "inputs": inputs or {}}
    if domain is not None:
        manifest["domain"] = domain
    manifest.update(manifest_extra or {})
    idata = az.InferenceData(posterior=theta.to_dataset(name="theta"))
    table = pd.DataFrame(rows)[FACTOR_COLUMNS]
    return FactorSet(table=table, checks=table[["gear", "species", "rhat"]].copy(), idata=idata,
                     manifest=manifest)


@pytest.fixture
def files(tmp_path):
    d = {
        "cal_hauls": write(tmp_path / "cal_hauls.csv", H_COLS, CAL_HAULS),
        "cal_catches": write(tmp_path / "cal_catches.csv", ["haul_id", "species", "count"], CAL_CATCHES),
        "hauls": write(tmp_path / "hauls.csv", H_COLS, SURVEY_HAULS),
        "catches": write(tmp_path / "catches.csv", ["haul_id", "species", "count"], SURVEY_CATCHES),
        "recorded": write(tmp_path / "recorded.csv", ["source", "species", "year_from", "year_to"], RECORDED),
    }
    d["domain"] = calibration_domain(load_tables(d["cal_hauls"], d["cal_catches"]).hauls)
    return d


def run(files, fs=None, **kwargs) -> Conversion:
    fs = fs if fs is not None else factor_set(domain=files["domain"])
    return convert(fs, files["hauls"], files["catches"], species_recorded=files["recorded"], **kwargs)


def by_key(frame: pd.DataFrame) -> pd.DataFrame:
    return frame.set_index(["haul_id", "species"])


def factor_of(fs: FactorSet, gear: str, species: str) -> np.ndarray:
    """All draws of the factor, flattened chain-major, straight from the InferenceData."""
    th = fs.idata.posterior["theta"].sel(gear=gear, species=species).transpose("chain", "draw").values
    return np.exp(-th).reshape(-1)


# ----------------------------------------------------------------------------- values


def test_record_interval_is_cpue_times_the_factor_quantiles(files):
    fs = factor_set(domain=files["domain"])
    conv = run(files, fs)
    rec = by_key(conv.records)
    f = factor_of(fs, "trawl_b", "pinfish")
    lo, med, hi = np.quantile(f, [0.05, 0.5, 0.95])
    for hid, count, effort in (("S2", 5, 250), ("S3", 7, 80), ("S8", 1.5, 120), ("S9", 2, 100)):
        r = rec.loc[(hid, "pinfish")]
        cpue = count / effort
        assert r["cpue"] == pytest.approx(cpue, rel=1e-15)
        assert (r["cpue_ref_median"], r["cpue_ref_lower"], r["cpue_ref_upper"]) == pytest.approx(
            (cpue * med, cpue * lo, cpue * hi), rel=1e-12)
        # Draw by draw, materialised for this one record: the same numbers. (numpy's default
        # quantile is definition 7 of Hyndman & Fan 1996, "Sample quantiles in statistical
        # packages": linear between order statistics, so scaling by cpue >= 0 commutes with it.)
        assert np.quantile(cpue * f, [0.05, 0.5, 0.95]) == pytest.approx((r["cpue_ref_lower"], r["cpue_ref_median"],
                                                                          r["cpue_ref_upper"]), rel=1e-12)
    # true factor exp(0.5) = 1.65 lies inside the interval of a 0.25-sd posterior
    assert lo < np.exp(0.5) < hi
    assert set(conv.records["factor_id"]) == {"fs-synthetic0001"}
    assert (conv.records["factor_gear"] == conv.records["gear"]).all()
    assert (conv.records["factor_species"] == conv.records["species"]).all()


def test_interval_level_can_be_chosen(files):
    fs = factor_set(domain=files["domain"])
    rec = by_key(run(files, fs, interval=0.5).records)
    lo, hi = np.quantile(factor_of(fs, "trawl_b", "pinfish"), [0.25, 0.75])
    assert rec.loc[("S2", "pinfish"), "cpue_ref_lower"] == pytest.approx(0.02 * lo, rel=1e-12)
    assert rec.loc[("S2", "pinfish"), "cpue_ref_upper"] == pytest.approx(0.02 * hi, rel=1e-12)


def test_reference_gear_passes_through_with_factor_exactly_one(files):
    conv = run(files)
    ref = conv.records[conv.records["gear"] == REF]
    assert len(ref) == 3 and (ref["factor_status"] == "reference").all()
    for col in ("cpue_ref_median", "cpue_ref_lower", "cpue_ref_upper"):
        np.testing.assert_array_equal(ref[col].to_numpy(), ref["cpue"].to_numpy())
    d = conv.factor_draws[conv.factor_draws["gear"] == REF]
    assert set(d["species"]) == set(SPECIES) and (d["factor"] == 1.0).all() and len(d) == 3 * 800
    assert (ref["domain_flag"] == "").all()  # S1's depth 20 m is outside, but nothing is converted


def test_zero_counts_convert_to_zero(files):
    conv = run(files, allow_unconverged=True)
    zeros = conv.records[conv.records["count"] == 0]
    assert len(zeros) >= 3
    for col in ("cpue", "cpue_ref_median", "cpue_ref_lower", "cpue_ref_upper"):
        assert (zeros[col] == 0).all()


def test_non_integer_raised_counts_are_converted(files):
    r = by_key(run(files).records).loc[("S8", "pinfish")]
    assert r["count"] == 1.5 and r["cpue"] == pytest.approx(1.5 / 120)


# ----------------------------------------------------------------------------- accounting


def test_every_record_is_converted_or_rejected_with_its_reason(files):
    conv = run(files)
    got = {**{k: "" for k in zip(conv.records["haul_id"], conv.records["species"])},
           **dict(zip(zip(conv.rejected["haul_id"], conv.rejected["species"]), conv.rejected["reason_code"]))}
    assert got == EXPECTED
    # the dataset holds every species-level reason; the length reasons need a length factor set and
    # survey lengths (tests/test_length.py), the covariate reasons a covariate factor set
    # (tests/test_covariates.py)
    assert set(conv.rejected["reason_code"]) == set(REJECT_CODES) - {"no_lengths", "outside_length_range",
                                                                     "covariate_missing", "covariate_level"}
    assert conv.n_in == len(EXPECTED) == conv.n_converted + conv.n_rejected
    assert (conv.n_converted, conv.n_rejected) == (7, 19)
    tables = load_tables(files["hauls"], files["catches"], species_recorded=files["recorded"])
    assert conv.n_in == len(complete_zeros(tables))
    counts = conv.manifest["counts"]
    # reason_code is a categorical over every code; the manifest lists only the reasons that occur
    assert counts["rejected_by_reason"] == {k: v for k, v in conv.rejected["reason_code"].value_counts().items() if v}
    assert counts["reference_pass_through"] == 3
    # every hauls column is carried into both tables, in order, then convert's own columns
    hauls_cols = [c for c in tables.hauls.columns if c != "_row"]
    assert list(conv.records.columns) == hauls_cols + ADDED_COLUMNS
    assert list(conv.rejected.columns) == hauls_cols + ["species", "count", "cpue", "reason_code", "reason"]
    r = by_key(conv.rejected)
    assert r.loc[("S4", "pinfish"), "source"] == "alpha" and r.loc[("S4", "pinfish"), "depth_m"] == 3


def test_reasons_say_what_is_wrong_and_what_to_do(files):
    r = by_key(run(files).rejected)["reason"]
    assert "effort is in 'min'" in r["S4", "pinfish"] and "'m2'" in r["S4", "pinfish"]
    assert "status fail (R-hat 1.2 > 1.05)" in r["S2", "blue crab"] and "--allow-unconverged" in r["S2", "blue crab"]
    assert "not finite" in r["S2", "hogchoker"] and "never caught" in r["S2", "hogchoker"]
    assert "no factor for 'hogchoker' with gear 'throw_e'" in r["S7", "hogchoker"]
    assert "differs only in case" not in r["S7", "hogchoker"]
    assert "length- or covariate-specific" in r["S5", "pinfish"]
    assert "posterior.nc holds no draws" in r["S6", "pinfish"]
    assert "does not list 'blue crab' for source 'gamma' in 2023" in r["S8", "blue crab"]


def test_fail_factors_are_rejected_unless_allowed(files):
    strict = run(files)
    assert not (strict.records["factor_status"] == "fail").any()
    loose = run(files, allow_unconverged=True)
    rec = by_key(loose.records)
    assert rec.loc[("S2", "blue crab"), "factor_status"] == "fail"
    assert rec.loc[("S2", "blue crab"), "cpue_ref_median"] == pytest.approx(
        3 / 250 * np.median(factor_of(factor_set(), "trawl_b", "blue crab")), rel=1e-12)
    rej = dict(zip(zip(loose.rejected["haul_id"], loose.rejected["species"]), loose.rejected["reason_code"]))
    assert rej[("S4", "blue crab")] == "effort_unit"  # the next reason in line once fail is allowed
    assert rej[("S2", "hogchoker")] == "draws_not_finite"  # NaN draws are never converted
    assert loose.n_converted == strict.n_converted + 3  # S2, S3, S9 blue crab
    assert loose.manifest["counts"]["unconverged_converted"] == 3
    assert loose.n_in == loose.n_converted + loose.n_rejected


def test_effort_unit_of_the_reference_is_checked_too(files, tmp_path):
    hauls = SURVEY_HAULS + [("S10", "trawl_a", "2022-06-10", "15", "min", "", "alpha", "2", "mud")]
    write(files["hauls"], H_COLS, hauls)
    rej = by_key(run(files).rejected)
    assert (rej.loc["S10", "reason_code"] == "effort_unit").all() and len(rej.loc["S10"]) == 3


def test_species_recorded_limits_zeros_and_rejects_unrecorded_catches(files):
    conv = run(files)
    s8 = pd.concat([conv.records, conv.rejected])
    s8 = s8[s8["haul_id"] == "S8"]
    assert sorted(s8["species"]) == ["blue crab", "pinfish"]  # no hogchoker zero from gamma
    without = convert(factor_set(domain=files["domain"]), files["hauls"], files["catches"])
    assert without.n_in == 9 * 3  # every species assumed recorded: all haul x species
    assert ("S8", "hogchoker") in set(zip(without.records["haul_id"], without.records["species"])) | set(
        zip(without.rejected["haul_id"], without.rejected["species"]))


def test_a_near_miss_species_name_is_pointed_out(files):
    write(files["catches"], ["haul_id", "species", "count"], SURVEY_CATCHES + [("S2", "Pinfish ", "1")])
    r = by_key(run(files).rejected).loc[("S2", "Pinfish")]
    assert r["reason_code"] == "no_factor" and "the factor set has 'pinfish'" in r["reason"]


def test_species_names_are_applied_before_conversion(files, tmp_path):
    catches = [(h, "PINF" if s == "pinfish" else s, c) for h, s, c in SURVEY_CATCHES]
    write(files["catches"], ["haul_id", "species", "count"], catches)
    names = write(tmp_path / "names.csv", ["name", "accepted_name"], [("PINF", "pinfish")])
    conv = convert(factor_set(domain=files["domain"]), files["hauls"], files["catches"],
                   species_recorded=files["recorded"], species_names=names)
    assert "PINF" not in set(conv.records["species"]) | set(conv.rejected["species"])
    assert by_key(conv.records).loc[("S2", "pinfish"), "factor_status"] == "ok"
    assert conv.n_in == len(EXPECTED)
    assert "species_names" in conv.manifest["inputs"]


# ----------------------------------------------------------------------------- domain


def test_calibration_domain_per_gear(files):
    d = files["domain"]
    assert d["numeric"] == ["depth_m"] and d["categorical"] == ["habitat"]
    b = d["by_gear"]["trawl_b"]
    assert b["months"] == [5, 6, 7, 8] and b["numeric"]["depth_m"] == [1.0, 5.0]
    assert b["categorical"]["habitat"] == ["mud", "sand"] and b["n_hauls"] == 4
    json.dumps(d)  # stored in a manifest: must be plain JSON


def test_domain_flags_outside_and_not_inside(files):
    flag = by_key(run(files).records)["domain_flag"]
    assert flag["S2", "pinfish"] == ""  # June, 3 m, sand: inside
    assert flag["S9", "pinfish"] == ""  # July, depth unknown, mud
    parts = flag["S3", "pinfish"].split("; ")
    assert parts == ["month Dec outside the calibrated months (May-Aug)",
                     "depth_m above the calibrated range (1 to 5)",
                     "habitat 'seagrass' not in the calibration (mud, sand)"]
    assert flag["S8", "pinfish"] == "depth_m below the calibrated range (1 to 5)"  # blank habitat not flagged
    conv = run(files)
    assert conv.manifest["counts"]["domain_flagged"] == 2
    used = conv.factors.set_index(["gear", "species"])
    assert used.loc[("trawl_b", "pinfish"), "n_domain_flagged"] == 2


def test_domain_rebuilt_from_unchanged_calibration_files_else_a_note(files):
    inputs = {role: {"path": str(files[f"cal_{role}"]), "sha256": file_sha256(files[f"cal_{role}"])}
              for role in ("hauls", "catches")}
    conv = run(files, factor_set(inputs=inputs))
    assert by_key(conv.records).loc[("S3", "pinfish"), "domain_flag"].startswith("month Dec")
    assert any("rebuilt from the calibration hauls" in n for n in conv.notes)
    with open(files["cal_hauls"], "a") as fh:
        fh.write("C9,trawl_b,2021-12-01,100,m2,P5,trials,9,seagrass\n")
    conv = run(files, factor_set(inputs=inputs))
    assert (conv.records["domain_flag"] == "").all()
    assert any("changed since the fit" in n and "no record is flagged" in n for n in conv.notes)
    conv = run(files, factor_set())
    assert any("names no calibration hauls file" in n for n in conv.notes)


# ----------------------------------------------------------------------------- draws


def test_factor_draws_stored_once_per_factor_and_thinned_with_a_seed(files):
    fs = factor_set(domain=files["domain"])
    conv = run(files, fs, draws=100, seed=7)
    d = conv.factor_draws
    assert list(d.columns) == ["species", "gear", "draw", "factor", "posterior_chain", "posterior_draw"]
    assert set(zip(d["species"], d["gear"])) == {(s, REF) for s in SPECIES} | {("pinfish", "trawl_b")}
    assert (d.groupby(["species", "gear"]).size() == 100).all()
    # the same posterior samples for every factor (joint uncertainty across records)
    per = {k: g.sort_values("draw")[["posterior_chain", "posterior_draw"]].to_numpy()
           for k, g in d.groupby(["species", "gear"])}
    first = next(iter(per.values()))
    assert all((v == first).all() for v in per.values()) and len(np.unique(first, axis=0)) == 100
    b = d[d["gear"] == "trawl_b"].sort_values("draw")
    th = fs.idata.posterior["theta"].sel(gear="trawl_b", species="pinfish").values
    np.testing.assert_allclose(b["factor"], np.exp(-th[b["posterior_chain"], b["posterior_draw"]]), rtol=1e-15)
    rec = by_key(conv.records).loc[("S2", "pinfish")]
    assert rec["cpue_ref_median"] == pytest.approx(0.02 * np.median(b["factor"]), rel=1e-12)
    assert conv.manifest["draws"] == {"available": 800, "used": 100, "thinned": True, "seed": 7}
    again = run(files, fs, draws=100, seed=7).factor_draws
    pd.testing.assert_frame_equal(d, again)
    other = run(files, fs, draws=100, seed=8).factor_draws
    assert not np.array_equal(other["posterior_draw"].to_numpy(), d["posterior_draw"].to_numpy())


def test_more_draws_than_the_factor_set_holds_is_an_input_error(files):
    with pytest.raises(InputError, match="holds 800"):
        run(files, draws=801)


# ----------------------------------------------------------------------------- files


def test_save_writes_every_file_and_reads_back(files, tmp_path):
    fs_dir = factor_set(domain=files["domain"]).save(tmp_path / "factors")
    conv = convert(fs_dir, files["hauls"], files["catches"], species_recorded=files["recorded"], draws=50, seed=1)
    out = conv.save(tmp_path / "converted")
    names = sorted(p.name for p in out.iterdir())
    assert names == ["factor_draws.parquet", "factors_used.csv", "manifest.json", "records.csv",
                     "records.parquet", "rejected.csv"]
    pq = pd.read_parquet(out / "records.parquet")
    pd.testing.assert_frame_equal(pq, conv.records, check_dtype=False, check_categorical=False)
    csv_ = pd.read_csv(out / "records.csv", keep_default_na=False)
    assert list(csv_.columns) == list(conv.records.columns) and len(csv_) == conv.n_converted
    assert csv_.loc[0, "date"] == "2022-06-10"
    rej = pd.read_csv(out / "rejected.csv")
    assert len(rej) == conv.n_rejected and rej["reason"].notna().all()
    m = json.loads((out / "manifest.json").read_text())
    assert m["factor_set_id"] == "fs-synthetic0001" and m["counts"]["records_in"] == len(EXPECTED)
    assert m["inputs"]["hauls"]["sha256"] == file_sha256(files["hauls"]) and "timestamp" in m
    assert m["conversion_id"].startswith("cv-") and m["factor_set_dir"] == str(fs_dir)
    pd.testing.assert_frame_equal(pd.read_parquet(out / "factor_draws.parquet"), conv.factor_draws)


def test_nothing_rejected_still_writes_a_header(files, tmp_path):
    rows = [factor_row(s, "trawl_b") for s in SPECIES]
    theta = theta_draws([REF, "trawl_b"])
    hauls = [h for h in SURVEY_HAULS if h[1] in (REF, "trawl_b") and h[4] == "m2"]
    write(files["hauls"], H_COLS, hauls)
    write(files["catches"], ["haul_id", "species", "count"],
          [c for c in SURVEY_CATCHES if c[0] in {h[0] for h in hauls} and c[0] != "S8"])
    conv = convert(factor_set(rows=rows, theta=theta), files["hauls"], files["catches"])
    assert conv.n_rejected == 0 and conv.n_converted == conv.n_in == len(hauls) * 2
    out = conv.save(tmp_path / "out")
    assert (out / "rejected.csv").read_text().splitlines()[0].endswith("reason_code,reason")


def test_failed_save_leaves_nothing_and_inputs_are_protected(files, tmp_path, monkeypatch):
    conv = run(files)
    import calib.convert as cv

    def boom(frame):
        raise RuntimeError("disk full")

    monkeypatch.setattr(cv, "_csv_ready", boom)
    with pytest.raises(RuntimeError):
        conv.save(tmp_path / "out")
    assert not (tmp_path / "out").exists() and not list(tmp_path.glob(".out*"))
    monkeypatch.undo()
    with pytest.raises(InputError, match="holds an input"):
        conv.save(tmp_path)  # the folder holding hauls.csv would be replaced


def test_bad_input_raises_before_anything_is_written(files, tmp_path):
    write(files["catches"], ["haul_id", "species", "count"], SURVEY_CATCHES + [("S99", "pinfish", "1")])
    with pytest.raises(InputError, match="S99"):
        run(files)


# ----------------------------------------------------------------------------- command line


def parser():
    p = argparse.ArgumentParser(prog="calib")
    sub = p.add_subparsers(dest="command")
    add_convert_parser(sub)
    return p


def test_command_runs_and_prints_the_counts(files, tmp_path, capsys):
    fs_dir = factor_set(domain=files["domain"]).save(tmp_path / "factors")
    args = parser().parse_args(["convert", "--factors", str(fs_dir), "--hauls", str(files["hauls"]),
                                "--catches", str(files["catches"]), "--species-recorded", str(files["recorded"]),
                                "--out", str(tmp_path / "conv"), "--draws", "20", "--seed", "3"])
    assert run_convert_command(args) == 0
    out = capsys.readouterr().out
    assert f"rows in {len(EXPECTED)} = converted 7 + rejected 19" in out
    assert "effort unit differs from the factor's: 1" in out and "management use" in out
    assert (tmp_path / "conv" / "records.parquet").exists()
    args = parser().parse_args(["convert", "--factors", str(fs_dir), "--hauls", str(files["hauls"]),
                                "--catches", str(files["catches"]), "--out", str(tmp_path / "conv2"),
                                "--allow-unconverged"])
    assert args.allow_unconverged and args.draws is None and args.interval is None
    with pytest.raises(SystemExit):
        parser().parse_args(["convert", "--hauls", "h.csv"])
    assert "rejected.csv" in parser()._subparsers._group_actions[0].choices["convert"].format_help()


# ----------------------------------------------------------------------------- property


@st.composite
def survey_design(draw):
    n = draw(st.integers(1, 8))
    hauls = [(f"h{i}", draw(st.sampled_from([REF, "trawl_b", "seine_c", "throw_e"])),
              f"2022-{draw(st.integers(1, 12)):02d}-01", "10", draw(st.sampled_from(["m2", "m2", "min"])), "",
              draw(st.sampled_from(["alpha", "gamma"])) if i else "alpha", "", "") for i in range(n)]
    cells = draw(st.lists(st.tuples(st.integers(0, n - 1), st.sampled_from(SPECIES)), min_size=1, max_size=12,
                          unique=True))
    catches = [(f"h{h}", s, str(draw(st.sampled_from([0, 1, 2.5, 40])))) for h, s in cells]
    status = {s: draw(st.sampled_from(["ok", "warn", "fail"])) for s in SPECIES}
    nan = {("trawl_b", s) for s in SPECIES if draw(st.booleans())}
    recorded = draw(st.lists(st.tuples(st.just("gamma"), st.sampled_from(SPECIES), st.just(""), st.just("")),
                             max_size=2))
    return hauls, catches, status, nan, recorded, draw(st.booleans())


@settings(max_examples=40, deadline=None)
@given(survey_design())
def test_rows_in_equal_converted_plus_rejected_property(design):
    hauls, catches, status, nan, recorded, allow = design
    rows = [factor_row(s, "trawl_b", status=status[s]) for s in SPECIES]
    rows.append(factor_row("pinfish", "seine_c", unit="haul"))
    fs = factor_set(rows=rows, theta=theta_draws([REF, "trawl_b", "seine_c"], n_draw=50, nan=nan))
    with tempfile.TemporaryDirectory() as d:
        d = Path(d)
        h = write(d / "h.csv", H_COLS, hauls)
        c = write(d / "c.csv", ["haul_id", "species", "count"], catches)
        r = write(d / "r.csv", ["source", "species", "year_from", "year_to"], recorded) if recorded else None
        conv = convert(fs, h, c, species_recorded=r, allow_unconverged=allow)
        expected = complete_zeros(load_tables(h, c, species_recorded=r))
    keys_in = set(zip(expected["haul_id"], expected["species"]))
    converted = list(zip(conv.records["haul_id"], conv.records["species"]))
    rejected = list(zip(conv.rejected["haul_id"], conv.rejected["species"]))
    assert conv.n_in == len(expected) == conv.n_converted + conv.n_rejected
    assert len(set(converted)) == len(converted) and len(set(rejected)) == len(rejected)  # no duplicates
    assert set(converted) | set(rejected) == keys_in and not set(converted) & set(rejected)
    assert set(conv.rejected["reason_code"]) <= set(REJECT_CODES)
    assert conv.rejected["count"].sum() + conv.records["count"].sum() == pytest.approx(expected["count"].sum())
    if not allow:
        assert not (conv.records["factor_status"] == "fail").any()
    assert np.isfinite(conv.records[["cpue_ref_median", "cpue_ref_lower", "cpue_ref_upper"]].to_numpy()).all()


# ----------------------------------------------------------------------------- end to end


DEMO = Path(__file__).resolve().parent.parent / "demo_paired_tows"


@pytest.fixture(scope="module")
def demo_glm():
    from calib.fitting import fit

    return fit(DEMO / "hauls.csv", DEMO / "catches.csv", reference="otter_trawl_new", method="glm",
               progressbar=False)


def test_demo_survey_converts_end_to_end(demo_glm, tmp_path):
    fs_dir = demo_glm.save(tmp_path / "factors")
    conv = convert(fs_dir, DEMO / "hauls.csv", DEMO / "catches.csv", draws=200, seed=4)
    n_hauls = len(pd.read_csv(DEMO / "hauls.csv"))
    n_species = pd.read_csv(DEMO / "catches.csv")["species"].nunique()
    assert conv.n_in == n_hauls * n_species == conv.n_converted + conv.n_rejected
    assert conv.n_rejected == 0  # every demo gear is calibrated, all effort in m2, all factors estimable
    rec = conv.records
    ref = rec[rec["gear"] == "otter_trawl_new"]
    np.testing.assert_array_equal(ref["cpue_ref_median"].to_numpy(), ref["cpue"].to_numpy())
    # the old trawl's converted records are cpue times the quantiles of the same 200 draws
    d = conv.factor_draws
    old = d[(d["gear"] == "otter_trawl_old") & (d["species"] == "pinfish")]
    th = demo_glm.idata.posterior["theta"].sel(gear="otter_trawl_old", species="pinfish").values
    np.testing.assert_allclose(old["factor"], np.exp(-th[old["posterior_chain"], old["posterior_draw"]]), rtol=1e-12)
    r = rec[(rec["gear"] == "otter_trawl_old") & (rec["species"] == "pinfish") & (rec["count"] > 0)]
    np.testing.assert_allclose(r["cpue_ref_median"], r["cpue"] * np.median(old["factor"]), rtol=1e-12)
    # Domain (demo_paired_tows/README.md): the seine was calibrated May-October, but the creek
    # program seined in April too; those records, and only those, carry a month flag.
    seine = rec[rec["gear"] == "beach_seine"]
    april = seine["date"].dt.month == 4
    month_flag = seine["domain_flag"].str.contains("month")
    assert april.any() and (month_flag == april).all()
    assert not rec.loc[rec["gear"] == "otter_trawl_old", "domain_flag"].str.contains("month").any()
    out = conv.save(tmp_path / "converted")
    assert len(pd.read_parquet(out / "records.parquet")) == conv.n_converted
