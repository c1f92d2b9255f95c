"""``calib trend``: raw vs harmonized log-linear trends and the method artifact between them.

Inputs are built through ``calib.convert`` with KNOWN SYNTHETIC factor draws (a FactorSet made
by hand, never a fit), from invented survey hauls with a known true abundance.
"""

from __future__ import annotations

import argparse
import json

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
import xarray as xr

from calib.convert import convert
from calib.factors import FactorSet, factor_set_from_draws
from calib.trend import DRAW_COLUMNS, TREND_COLUMNS, add_trend_parser, loglinear_slope, run_trend_command, trend

REF, OTHER = "trawl_a", "trawl_b"
SPECIES = ["pinfish", "blue crab", "hogchoker", "silver perch"]
THETA = {"pinfish": 0.7, "blue crab": -0.6, "hogchoker": 0.9, "silver perch": 0.5}  # log(q_other / q_ref)
YEARS = list(range(2004, 2014))


def factor_set(species, theta, sd=0.1, n_draw=400, seed=5) -> FactorSet:
    """Known synthetic posterior: theta(OTHER, s) ~ Normal(theta[s], sd); reference 0; factor exp(-theta)."""
    rng = np.random.default_rng(seed)
    th = np.zeros((1, n_draw, 2, len(species)))
    for j, s in enumerate(species):
        th[0, :, 1, j] = theta[s] + sd * rng.standard_normal(n_draw)
    post = xr.DataArray(th, dims=("chain", "draw", "gear", "species"),
                        coords={"chain": [0], "draw": np.arange(n_draw), "gear": [REF, OTHER], "species": species},
                        name="theta")
    return factor_set_from_draws(post, reference=REF, factor_set_id="fs-trend-test")


def survey(tmp_path, gears_of_year, density_of_year, seed, year_sd=0.15, kappa=3.0, theta_used=None):
    """Hauls (effort 100 m2) and gamma-Poisson counts with a known reference-gear density.

    gears_of_year(year) -> {gear: n_hauls} or {(gear, source): n_hauls}; density_of_year(species,
    year) -> expected reference cpue (per m2); each year also carries a lognormal year effect
    (sd ``year_sd``) per species: the animals' year-to-year scatter around the trend, shared by
    every source. ``theta_used``: the thetas of the factor set used to convert (default the true ones).
    """
    rng = np.random.default_rng(seed)
    tmp_path.mkdir(parents=True, exist_ok=True)
    hauls, catches = [], []
    for year in YEARS:
        year_effect = {s: np.exp(year_sd * rng.standard_normal()) for s in SPECIES}
        for key, n in gears_of_year(year).items():
            gear, source = key if isinstance(key, tuple) else (key, None)
            for k in range(n):
                hid = f"{year}-{gear}-{source or ''}-{k:03d}"
                hauls.append({"haul_id": hid, "gear": gear, "date": f"{year}-06-{1 + k % 28:02d}", "effort": 100.0,
                              "effort_unit": "m2", **({"source": source} if source else {})})
                for s in SPECIES:
                    q = np.exp(THETA[s]) if gear == OTHER else 1.0
                    mean = 100.0 * density_of_year(s, year) * year_effect[s] * q
                    count = rng.poisson(mean * rng.gamma(kappa, 1 / kappa))
                    if count:
                        catches.append({"haul_id": hid, "species": s, "count": count})
    h, c = tmp_path / "hauls.csv", tmp_path / "catches.csv"
    pd.DataFrame(hauls).to_csv(h, index=False)
    pd.DataFrame(catches).to_csv(c, index=False)
    return convert(factor_set(SPECIES, THETA if theta_used is None else theta_used), h, c)


@pytest.fixture(scope="module")
def gear_switch(tmp_path_factory):
    """Flat true abundance; OTHER alone until 2008, REF alone from 2009."""
    return survey(tmp_path_factory.mktemp("switch"), lambda y: {OTHER: 20} if y < 2009 else {REF: 20},
                  lambda s, y: 0.2, seed=11)


TRUE_SLOPE = -0.08  # per year: exp(-0.08 * 9) - 1 = -51% over 2004-2013


@pytest.fixture(scope="module")
def real_decline(tmp_path_factory):
    """True decline of 8% a year (log scale), the same gear mix (10 + 10 hauls) every year."""
    return survey(tmp_path_factory.mktemp("decline"), lambda y: {REF: 10, OTHER: 10},
                  lambda s, y: 0.3 * np.exp(TRUE_SLOPE * (y - YEARS[0])), seed=12)


# ----------------------------------------------------------------------------- the slope


def test_loglinear_slope_matches_statsmodels_quasi_poisson_glm():
    # Reference: statsmodels GLM, Poisson family, log link, scale="X2" (Pearson chi2 / df: the
    # quasi-Poisson dispersion; McCullagh & Nelder 1989, Generalized Linear Models, 2nd ed., ch. 9,
    # recalled from memory). Non-integer index values and zero years included.
    years = np.arange(2001, 2011)
    rng = np.random.default_rng(3)
    ys = [np.array([3.1, 0.0, 2.4, 1.2, 0.0, 0.8, 0.5, 0.2, 0.9, 0.1]),
          rng.gamma(2.0, 1.0, 10) * np.exp(0.1 * (years - 2001)),
          np.array([0.0, 0.0, 5.0, 0.0, 1.0, 0.0, 0.0, 2.0, 0.0, 0.0])]
    slope, se, ok = loglinear_slope(np.vstack(ys), years)
    assert ok.all()
    X = sm.add_constant(years.astype(float))
    for k, y in enumerate(ys):
        ref = sm.GLM(y, X, family=sm.families.Poisson()).fit(scale="X2")
        assert slope[k] == pytest.approx(ref.params[1], rel=1e-7, abs=1e-10)
        assert se[k] == pytest.approx(ref.bse[1], rel=1e-6)
    # the slope does not depend on the unit of the index
    s2, se2, _ = loglinear_slope(1000.0 * np.vstack(ys), years)
    np.testing.assert_allclose(s2, slope, rtol=1e-8)
    np.testing.assert_allclose(se2, se, rtol=1e-6)


def test_loglinear_slope_flags_series_without_a_finite_slope():
    # All zero, or a catch only in the last year: the Poisson MLE of the slope is infinite.
    years = np.arange(2001, 2007)
    y = np.array([[0.0] * 6, [0, 0, 0, 0, 0, 4.0], [1.0, 2.0, 1.5, 1.0, 0.5, 0.7]])
    slope, se, ok = loglinear_slope(y, years)
    assert list(ok) == [False, False, True]
    assert np.isnan(slope[:2]).all() and np.isfinite(slope[2])


# ----------------------------------------------------------------------------- attribution


def test_flat_abundance_with_a_gear_switch_is_mostly_method_artifact(gear_switch):
    # Known property of the design (constructed here): the true abundance is flat, so the whole
    # raw trend comes from the switch from OTHER to REF; the harmonized change should cover 0
    # and the artifact share should be near 1.
    res = trend(gear_switch, seed=1)
    t = res.table.set_index("species")
    assert set(t.index) == set(SPECIES)
    covers = (t["harmonized_change_lower"] <= 0) & (t["harmonized_change_upper"] >= 0)
    assert covers.sum() >= 3, t[["harmonized_change_lower", "harmonized_change_upper"]]
    # every raw change is large here (factor 2 to 2.5 between the gears), so every share is given
    assert t["artifact_share"].notna().all()
    # "near 1": each share within 1 +- 0.5 (still "mostly" artifact), their mean within 0.2 of 1;
    # the spread comes from the year effects (sd 0.15) the harmonized slope keeps (tolerances:
    # common practice, no source)
    assert (t["artifact_share"] - 1).abs().max() < 0.5, t["artifact_share"]
    assert abs(t["artifact_share"].mean() - 1) < 0.2, t["artifact_share"]
    assert (~((t["artifact_lower"] <= 0) & (t["artifact_upper"] >= 0))).all()  # artifact excludes 0
    assert (t.loc[covers[covers].index, "verdict"] == "mostly method artifact").all()
    # the raw series falls where OTHER caught more (theta > 0) and rises where it caught less
    assert t.loc["pinfish", "raw_change_pct"] < -30 and t.loc["blue crab", "raw_change_pct"] > 30


def test_real_decline_without_gear_change_is_recovered_and_has_no_artifact(real_decline):
    # Known value from the simulation: true change exp(-0.08 * 9) - 1 = -51.3% over 2004-2013,
    # with the same gear mix every year, so no artifact.
    res = trend(real_decline, seed=2)
    t = res.table.set_index("species")
    true_pct = 100 * np.expm1(TRUE_SLOPE * 9)
    covers_truth = (t["harmonized_change_lower"] <= true_pct) & (true_pct <= t["harmonized_change_upper"])
    assert covers_truth.sum() >= 3, t[["harmonized_change_lower", "harmonized_change_upper"]]
    assert (t["harmonized_change_pct"] - true_pct).abs().max() < 15
    artifact_covers_0 = (t["artifact_lower"] <= 0) & (t["artifact_upper"] >= 0)
    assert artifact_covers_0.sum() >= 3, t[["artifact_lower", "artifact_upper"]]
    assert t["artifact_pct"].abs().max() < 10
    assert (t.loc[covers_truth[covers_truth].index, "verdict"] == "real decline").all()


def test_changes_multiply_and_the_residual_term_widens_the_interval(real_decline):
    res = trend(real_decline, seed=2)
    t = res.table
    lhs = 1 + t["raw_change_pct"] / 100
    rhs = (1 + t["harmonized_change_pct"] / 100) * (1 + t["artifact_pct"] / 100)
    np.testing.assert_allclose(lhs, rhs, rtol=1e-10)
    d = res.draws
    assert list(d.columns) == DRAW_COLUMNS
    for s, g in d.groupby("species"):
        span = 9
        without = np.quantile(g["harmonized_slope"], [0.05, 0.95])
        row = t[t["species"] == s].iloc[0]
        width_with = row["harmonized_change_upper"] - row["harmonized_change_lower"]
        width_without = 100 * (np.expm1(without[1] * span) - np.expm1(without[0] * span))
        assert width_with > width_without
        # the artifact draws are the paired differences
        np.testing.assert_allclose(g["artifact_slope"], g["raw_slope"] - g["harmonized_slope"])


def test_share_is_blank_with_a_reason_below_the_threshold(real_decline):
    res = trend(real_decline, seed=2, change_threshold=0.9)  # |raw change| ~51% < 90%
    t = res.table
    assert t["artifact_share"].isna().all()
    assert t["share_reason"].str.contains("no change to apportion").all()


def test_year_window_and_too_few_years(real_decline):
    res = trend(real_decline, year_from=2006, year_to=2010, seed=2)
    assert (res.table["year_from"] == 2006).all() and (res.table["year_to"] == 2010).all()
    short = trend(real_decline, year_from=2012, seed=2)
    assert (short.table["verdict"] == "not estimable").all()
    assert short.table["verdict_reason"].str.contains("a trend needs 3").all()
    with pytest.raises(ValueError, match="after"):
        trend(real_decline, year_from=2010, year_to=2006)


def test_save_summary_and_command_line(gear_switch, tmp_path):
    conv_dir = gear_switch.save(tmp_path / "converted")
    parser = argparse.ArgumentParser()
    sub = parser.add_subparsers(dest="command")
    add_trend_parser(sub)
    args = parser.parse_args(["trend", "--converted", str(conv_dir), "--out", str(tmp_path / "trend"),
                              "--draws", "200", "--seed", "4"])
    assert run_trend_command(args) == 0
    out = tmp_path / "trend"
    assert sorted(p.name for p in out.iterdir()) == ["figures", "gear_mix.csv", "manifest.json",
                                                     "source_agreement.csv", "source_series.csv", "summary.md",
                                                     "trend.csv", "trend_draws.parquet", "trend_series.csv"]
    # one source only: the figures of the series, the artifact and the gear mix, no per-source figure
    assert sorted(p.name for p in (out / "figures").iterdir()) == ["artifact.png", "gear_mix.png",
                                                                   "raw_vs_harmonized.png"]
    table = pd.read_csv(out / "trend.csv")
    assert list(table.columns) == TREND_COLUMNS and len(table) == len(SPECIES)
    assert (table["draws_used"] == 200).all()
    summary = (out / "summary.md").read_text()
    pin = table[table["species"] == "pinfish"].iloc[0]
    assert f"Pinfish: merged records fall {abs(pin['raw_change_pct']):.0f}% from 2004 to 2013" in summary
    assert "90% interval" in summary and "qualified review" in summary
    manifest = json.loads((out / "manifest.json").read_text())
    assert manifest["step"] == "trend" and manifest["trend_id"].startswith("tr-")
    assert len(pd.read_parquet(out / "trend_draws.parquet")) == 200 * len(SPECIES)
    # refusing to write over the converted records leaves them intact
    from calib.errors import InputError
    res = trend(conv_dir, draws=50)
    with pytest.raises(InputError):
        res.save(conv_dir)
    assert (conv_dir / "records.parquet").is_file()


def test_missing_converted_directory_is_a_clear_input_error(tmp_path):
    from calib.errors import InputError
    with pytest.raises(InputError, match="records.parquet"):
        trend(tmp_path / "nowhere")
    assert not (tmp_path / "out").exists()


@pytest.mark.slow
def test_interval_coverage_over_replicates(tmp_path):
    # Recovering known values from simulated data (rules: coverage near nominal). 40 replicates x 4
    # species of each design, 90% intervals. Measured on this code (2026-12-02): harmonized
    # interval covers the true decline in 0.919 of 160 cases (0.97 before the residual term was
    # reduced to the excess over the bootstrap's sampling variance), the artifact interval covers
    # 0 in 1.00 (the gear mix is the same every year, so there is no artifact to find), and under
    # the gear switch the harmonized interval covers 0 in 0.99: conservative there because the
    # synthetic factor draws are centred on the true factors, so their spread is all margin.
    # Bounds: at least nominal minus 2.5 binomial standard errors (0.9 - 2.5 * 0.024 = 0.84), and
    # the harmonized coverage at most 0.97 (0.9 + 3 binomial standard errors), so a return of the
    # double count fails.
    true_pct = 100 * np.expm1(TRUE_SLOPE * 9)
    covers, artifact_covers, flat_covers = [], [], []
    for rep in range(40):
        (tmp_path / f"d{rep}").mkdir()
        (tmp_path / f"s{rep}").mkdir()
        t = trend(survey(tmp_path / f"d{rep}", lambda y: {REF: 10, OTHER: 10},
                         lambda s, y: 0.3 * np.exp(TRUE_SLOPE * (y - YEARS[0])), seed=100 + rep), seed=rep).table
        covers += list((t["harmonized_change_lower"] <= true_pct) & (true_pct <= t["harmonized_change_upper"]))
        artifact_covers += list((t["artifact_lower"] <= 0) & (0 <= t["artifact_upper"]))
        t = trend(survey(tmp_path / f"s{rep}", lambda y: {OTHER: 20} if y < 2009 else {REF: 20},
                         lambda s, y: 0.2, seed=200 + rep), seed=rep).table
        flat_covers += list((t["harmonized_change_lower"] <= 0) & (0 <= t["harmonized_change_upper"]))
    assert np.mean(covers) >= 0.84 and np.mean(artifact_covers) >= 0.84 and np.mean(flat_covers) >= 0.84
    assert np.mean(covers) <= 0.97


# ----------------------------------------------------------------------------- gear mix and partners


def two_partners(tmp_path, theta_used=None, seed=21):
    """Two sources sampling the same animals (same true decline, same year effects): 'dock_trawl'
    fishes the reference gear every year; 'creek_crew' fishes OTHER until 2008 and the reference
    from 2009."""
    def gears(year):
        return {(REF, "dock_trawl"): 15, (OTHER if year < 2009 else REF, "creek_crew"): 15}

    return survey(tmp_path, gears, lambda s, y: 0.3 * np.exp(TRUE_SLOPE * (y - YEARS[0])), seed=seed,
                  theta_used=theta_used)


@pytest.fixture(scope="module")
def partners(tmp_path_factory):
    return trend(two_partners(tmp_path_factory.mktemp("partners")), draws=300, seed=2)


def test_gear_mix_matches_a_pandas_crosstab_of_the_hauls(gear_switch):
    from calib.trend import MIX_COLUMNS, gear_mix, survey_hauls

    hauls = survey_hauls(gear_switch)
    assert len(hauls) == 20 * len(YEARS)  # every haul once, however many species records it has
    mix = gear_mix(hauls)
    assert list(mix.columns) == MIX_COLUMNS
    # reference: pandas' own row-normalised cross-tabulation of the hauls
    expected = pd.crosstab(hauls["year"], hauls["gear"].astype(str), normalize="index")
    got = mix.pivot_table(index="year", columns="gear", values="haul_share").fillna(0.0)
    pd.testing.assert_frame_equal(got, expected, check_names=False, check_dtype=False)
    assert np.allclose(mix.groupby(["year", "effort_unit"])["effort_share"].sum(), 1.0)
    assert (mix.loc[mix["year"] < 2009, "gear"] == OTHER).all() and (mix.loc[mix["year"] >= 2009, "gear"] == REF).all()


def test_effort_shares_never_add_different_units():
    from calib.trend import gear_mix

    hauls = pd.DataFrame({"year": [2010] * 4, "gear": ["seine", "seine", "trawl", "trap"],
                          "effort": [300.0, 100.0, 1200.0, 5.0], "effort_unit": ["m2", "m2", "m2", "set"]})
    mix = gear_mix(hauls).set_index(["gear", "effort_unit"])
    assert mix.loc[("seine", "m2"), "hauls"] == 2 and mix.loc[("seine", "m2"), "haul_share"] == 0.5
    assert mix.loc[("seine", "m2"), "effort_share"] == pytest.approx(400 / 1600)
    assert mix.loc[("trap", "set"), "effort_share"] == 1.0  # alone in its unit


def test_fitted_trend_curves_match_statsmodels(gear_switch):
    # Reference library: statsmodels GLM (Poisson family, log link) fitted values on the same index.
    res = trend(gear_switch, draws=100, seed=1)
    for sp in SPECIES:
        d = res.series[res.series["species"] == sp].sort_values("year")
        X = sm.add_constant(d["year"].to_numpy(dtype=float) - 2008.5)
        for col, fit_col in (("estimate", "harmonized_fit"), ("raw_estimate", "raw_fit")):
            ref = sm.GLM(d[col].to_numpy(), X, family=sm.families.Poisson()).fit(scale="X2")
            assert np.allclose(d[fit_col].to_numpy(), ref.fittedvalues, rtol=1e-6)
    # the series behind the trend is the combined index: its lower <= estimate <= upper
    s = res.series
    assert ((s["lower"] <= s["estimate"] * (1 + 1e-9)) & (s["estimate"] <= s["upper"] * (1 + 1e-9))).all()


def test_partner_outputs_and_summary(partners):
    a = partners.agreement
    assert len(a) == len(SPECIES) and set(a["source"]) == {"creek_crew"} and set(a["other_source"]) == {"dock_trawl"}
    assert (a["n_years"] == len(YEARS)).all() and set(a["agreement"]) <= {"agree", "differ"}
    ss = partners.source_series
    assert set(ss["source"]) == {"creek_crew", "dock_trawl"}
    assert len(ss) == 2 * len(SPECIES) * len(YEARS)
    text = partners.summary()
    assert "Do the partners agree once converted?" in text and "pairs of sources agree once converted" in text


def test_partner_agreement_holds_with_right_factors_and_fails_with_wrong_ones(tmp_path):
    # Recovering known values from simulated data: both sources sample the same declining
    # animals, one switched gear in 2009. With the true factors the 90% interval of the
    # difference of changes should cover 0 about 90% of the time; converted with factors of 1
    # (theta 0, |true theta| 0.5-0.9) the switching source keeps its step and should "differ".
    # 8 replicate surveys x 4 species = 32 comparisons each. Measured (2026-12-02, 12 replicates):
    # agree 0.90 with the right factors, differ 0.94 with the wrong ones. Power of the bounds
    # (scipy.stats.binom): P(agree < 24 of 32 | rate 0.9) = 0.003; P(differ >= 24 | rate 0.5) = 0.004.
    agree, differ = [], []
    for k in range(8):
        right = trend(two_partners(tmp_path / f"r{k}", seed=100 + k), draws=300, seed=k)
        agree += list(right.agreement["agreement"] == "agree")
        wrong = trend(two_partners(tmp_path / f"w{k}", theta_used={s: 0.0 for s in SPECIES}, seed=100 + k),
                      draws=300, seed=k)
        differ += list(wrong.agreement["agreement"] == "differ")
        # the step goes the way theta says: OTHER catches more of pinfish (theta > 0), so the
        # unconverted switching source falls faster; less of blue crab (theta < 0), so it falls slower
        a = wrong.agreement.set_index("species")
        assert a.loc["pinfish", "difference_pct"] < 0 < a.loc["blue crab", "difference_pct"]
    assert sum(agree) >= 24, f"right factors: {sum(agree)} of 32 agree"
    assert sum(differ) >= 24, f"wrong factors: {sum(differ)} of 32 differ"


def test_source_series_equals_the_series_of_that_source_alone(partners, tmp_path):
    # The per-source series is the shared series estimator on that source's records: its point
    # estimate of a reference-only source is the plain mean cpue of its hauls (no conversion).
    conv = two_partners(tmp_path)
    rec = conv.records
    rec = rec[rec["source"] == "dock_trawl"]
    plain = rec.groupby(["species", "year"], observed=True)["cpue"].mean()
    ss = partners.source_series
    got = ss[ss["source"] == "dock_trawl"].set_index(["species", "year"])["estimate"]
    assert np.allclose(got.sort_index().to_numpy(), plain.sort_index().to_numpy())


def test_trend_figures_are_drawn_from_the_tables(partners, tmp_path):
    from calib import plots

    for fig, n_axes in ((plots.plot_series_bands(partners.series), len(SPECIES)),
                        (plots.plot_source_series(partners.source_series), len(SPECIES)),
                        (plots.plot_artifact_bars(partners.table), 1),
                        (plots.plot_gear_mix(partners.gear_mix), 2)):
        assert sum(ax.get_visible() for ax in fig.axes) == n_axes
        png = plots.figure_png(fig)
        assert png[:8] == b"\x89PNG\r\n\x1a\n" and len(png) > 10_000
    made = partners.save_figures(tmp_path / "figs")
    assert sorted(p.name for p in made) == sorted(["raw_vs_harmonized.png", "artifact.png", "gear_mix.png",
                                                   "source_series.png"])
    assert all(p.stat().st_size > 10_000 for p in made)
