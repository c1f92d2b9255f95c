"""`calib demo` end to end on the bundled demo data (one shared fit, see conftest.demo_run)."""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
from scipy.stats import binom

from calib.factors import FACTOR_COLUMNS, FactorSet


def test_demo_writes_everything_and_says_where(demo_run):
    out = demo_run["out"]
    printed = demo_run["printed"]
    for name in ("factors.csv", "checks.csv", "posterior.nc", "manifest.json"):
        assert (out / "factors" / name).exists()
        assert str(out / "factors") in printed
    assert (out / "check.txt").exists()
    assert "What the demo found" in printed
    table = pd.read_csv(out / "factors" / "factors.csv")
    assert list(table.columns) == FACTOR_COLUMNS
    manifest = json.loads((out / "factors" / "manifest.json").read_text())
    assert manifest["reference"] == "otter_trawl_new"
    assert manifest["divergences"] is not None


def test_demo_factors_recover_the_simulated_truth(demo_run):
    """The demo's true factors (demo_paired_tows/truth/factors.csv) lie inside most 90% intervals.

    24 factors (12 species x 2 gears) from one dataset share errors (the hierarchy and the
    shared kappa), so this is a sanity check, not a coverage study (tests/test_model_recovery.py
    holds that). If each interval covered independently with probability 0.9, fewer than 18 of 24
    would happen with probability binom.cdf(17, 24, 0.9) = 0.0075.
    """
    fs = FactorSet.load(demo_run["out"] / "factors")
    truth = pd.read_csv(demo_run["data_dir"] / "truth" / "factors.csv")
    merged = fs.table.merge(truth, on=["species", "gear"], how="inner")
    assert len(merged) == 24
    covered = (merged["factor_lower"] <= merged["factor"]) & (merged["factor"] <= merged["factor_upper"])
    assert binom.cdf(17, 24, 0.9) < 0.01
    assert covered.sum() >= 18, merged.loc[~covered, ["species", "gear", "factor", "factor_lower", "factor_upper"]]
    # Log errors are small relative to the spread of the true factors (they span a factor of 30).
    log_err = np.log(merged["factor_median"]) - np.log(merged["factor"])
    assert np.abs(log_err).median() < 0.25


def test_demo_fit_converged(demo_run):
    fs = FactorSet.load(demo_run["out"] / "factors")
    assert fs.table["rhat"].max() < 1.05
    assert (fs.table["status"] != "fail").sum() >= 20


def test_demo_converts_every_record_or_says_why(demo_run):
    conv_dir = demo_run["out"] / "converted"
    manifest = json.loads((conv_dir / "manifest.json").read_text())
    counts = manifest["counts"]
    records = pd.read_parquet(conv_dir / "records.parquet")
    rejected = pd.read_csv(conv_dir / "rejected.csv")
    assert counts["records_in"] == len(records) + len(rejected) == counts["converted"] + counts["rejected"]
    hauls = pd.read_csv(demo_run["data_dir"] / "hauls.csv")
    assert set(records["haul_id"]) | set(rejected["haul_id"]) == set(hauls["haul_id"])
    assert (records["factor_id"] == manifest["factor_set_id"]).all()
    ref = records[records["gear"] == "otter_trawl_new"]
    assert np.allclose(ref["cpue_ref_median"], ref["cpue"])


def test_demo_builds_the_harmonized_series(demo_run):
    table = pd.read_csv(demo_run["out"] / "series" / "series.csv")
    assert {"species", "year", "stratum", "estimate", "lower", "upper", "raw_estimate"} <= set(table.columns)
    combined = table[table["stratum"] == "all"]
    assert combined["year"].between(2004, 2025).all()
    assert (combined["lower"] <= combined["estimate"]).all() and (combined["estimate"] <= combined["upper"]).all()
    assert str(demo_run["out"] / "series") in demo_run["printed"]


def test_demo_attributes_trends(demo_run):
    """The demo's true trends (demo_paired_tows/README.md): southern flounder declines
    (-5%/year, about -65% over 2004-2025), pink shrimp rises (+3%/year); the rest are flat."""
    table = pd.read_csv(demo_run["out"] / "trend" / "trend.csv")
    assert set(table["species"]) >= {"southern flounder", "pink shrimp", "pinfish"}
    assert (demo_run["out"] / "trend" / "summary.md").read_text().strip()
    flounder = table.set_index("species").loc["southern flounder"]
    assert flounder["harmonized_change_upper"] < 0


def test_demo_shows_gear_mix_and_partners(demo_run):
    trend_dir = demo_run["out"] / "trend"
    mix = pd.read_csv(trend_dir / "gear_mix.csv")
    assert np.allclose(mix.groupby("year")["haul_share"].sum(), 1.0)
    # the channel survey's switch (demo_paired_tows/README.md): no legacy trawl after 2014
    assert mix.loc[mix["year"] > 2014, "gear"].ne("otter_trawl_old").all()
    sources = set(pd.read_csv(trend_dir / "source_series.csv")["source"])
    assert {"channel_trawl_survey", "shore_seine_survey", "tidal_creek_survey"} <= sources
    agreement = pd.read_csv(trend_dir / "source_agreement.csv")
    assert set(agreement["agreement"]) <= {"agree", "differ", "not comparable"}
    for name in ("raw_vs_harmonized.png", "artifact.png", "gear_mix.png", "source_series.png"):
        assert (trend_dir / "figures" / name).stat().st_size > 10_000
    assert "pairs of sources agree once converted" in demo_run["printed"]


def test_demo_includes_a_small_study_plan(demo_run):
    """The demo plans a further seine calibration for a few species and says where the plan is."""
    from calib.demo import PLAN_SPECIES
    from calib.plan import PLAN_COLUMNS

    plan_dir = demo_run["out"] / "plan"
    for name in ("plan.csv", "curve.csv", "plan_curves.png", "plan.md", "manifest.json"):
        assert (plan_dir / name).exists(), name
    assert str(plan_dir) in demo_run["printed"]
    table = pd.read_csv(plan_dir / "plan.csv")
    assert list(table.columns) == PLAN_COLUMNS
    assert set(table["species"]) == set(PLAN_SPECIES)
    assert set(table["verdict"]) <= {"reachable", "at most the smallest size", "not reachable", "no catch"}
    assert "Planning a further seine calibration" in demo_run["printed"]
