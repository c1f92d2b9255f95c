"""``calib series``: harmonized series with paired bootstrap x posterior-draw uncertainty.

Inputs are built through ``calib.convert`` with KNOWN SYNTHETIC factor draws (a FactorSet
made by hand, never a fit); every expected value is computed here independently with numpy
from the conversion's factor draws and the survey tables.
"""

from __future__ import annotations

import argparse
import json
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import xarray as xr
from scipy import stats

from calib.convert import convert
from calib.errors import InputError
from calib.factors import FactorSet, factor_set_from_draws
from calib.series import (
    ALL,
    DRAW_COLUMNS,
    EXACT_MAX_HAULS,
    SERIES_COLUMNS,
    add_series_parser,
    run_series_command,
    series,
    series_draws,
)

REF, OTHER = "trawl_a", "trawl_b"


# ----------------------------------------------------------------------------- building inputs


def factor_set(species, theta, sd=0.2, n_draw=400, seed=5, center=None) -> FactorSet:
    """Known synthetic posterior: theta(OTHER, s) ~ Normal(center[s], sd) (center default the
    truth ``theta[s]``); the reference is 0. factor = exp(-theta)."""
    rng = np.random.default_rng(seed)
    center = theta if center is None else center
    th = np.zeros((1, n_draw, 2, len(species)))
    for j, s in enumerate(species):
        th[0, :, 1, j] = center[s] + sd * rng.standard_normal(n_draw)
    post = xr.DataArray(th, dims=("chain", "draw", "gear", "species"),
                        coords={"chain": [0], "draw": np.arange(n_draw), "gear": [REF, OTHER], "species": species},
                        name="theta")
    return factor_set_from_draws(post, reference=REF, factor_set_id="fs-series-test")


def write_tables(tmp_path: Path, hauls: pd.DataFrame, catches: pd.DataFrame) -> tuple[Path, Path]:
    tmp_path.mkdir(parents=True, exist_ok=True)
    h, c = tmp_path / "hauls.csv", tmp_path / "catches.csv"
    hauls.to_csv(h, index=False)
    catches[catches["count"] > 0].to_csv(c, index=False)
    return h, c


def layout(design, areas=None) -> pd.DataFrame:
    """Hauls from [(year, stratum, gear, n_hauls), ...]; effort 100 m2 (so cpue = count / 100)."""
    rows = []
    for year, stratum, gear, n in design:
        for k in range(n):
            rows.append({"haul_id": f"{year}-{stratum}-{gear}-{k:03d}", "gear": gear,
                         "date": f"{year}-06-{1 + k % 28:02d}", "effort": 100.0, "effort_unit": "m2", "stratum": stratum,
                         "stratum_area": (areas or {}).get(stratum, "")})
    return pd.DataFrame(rows)


def conversion(tmp_path, hauls, catches, species, theta, **kw):
    h, c = write_tables(tmp_path, hauls, catches)
    return convert(factor_set(species, theta, **kw), h, c)


def factor_draws_of(conv, species, gear) -> np.ndarray:
    d = conv.factor_draws
    d = d[(d["species"] == species) & (d["gear"] == gear)].sort_values("draw")
    return d["factor"].to_numpy()


def row(result, species, year, stratum=ALL) -> pd.Series:
    t = result.table
    sel = t[(t["species"] == species) & (t["year"] == year) & (t["stratum"] == stratum)]
    assert len(sel) == 1
    return sel.iloc[0]


@pytest.fixture
def two_strata(tmp_path):
    """Two strata with areas 1 and 3, both gears, random counts; pinfish theta 0.7."""
    rng = np.random.default_rng(1)
    hauls = layout([(2020, "north", REF, 6), (2020, "north", OTHER, 5), (2020, "south", REF, 4),
                    (2020, "south", OTHER, 7), (2021, "north", OTHER, 8), (2021, "south", REF, 9)],
                   areas={"north": 1.0, "south": 3.0})
    catches = pd.DataFrame({"haul_id": hauls["haul_id"], "species": "pinfish",
                            "count": rng.poisson(rng.gamma(1.0, 6.0, len(hauls)))})
    conv = conversion(tmp_path, hauls, catches, ["pinfish"], {"pinfish": 0.7})
    return hauls, catches, conv


# ----------------------------------------------------------------------------- the estimator


def test_stratified_mean_equals_a_hand_computation_of_cochrans_formula(two_strata):
    # Cochran 1977, Sampling Techniques (3rd ed.), ch. 5, eq. 5.1: ybar_st = sum_h W_h ybar_h,
    # W_h = N_h / N, here the stratum areas (1 and 3, so W = 1/4 and 3/4).
    hauls, catches, conv = two_strata
    res = series(conv, seed=3)
    f = factor_draws_of(conv, "pinfish", OTHER)
    cpue = catches["count"].to_numpy() / 100.0
    factor = np.where(hauls["gear"] == OTHER, 1.0, 0.0)[:, None] * f[None, :] + np.where(
        hauls["gear"] == REF, 1.0, 0.0)[:, None]
    converted = cpue[:, None] * factor  # (hauls, draws)
    years = pd.to_datetime(hauls["date"]).dt.year.to_numpy()
    strata = hauls["stratum"].to_numpy()
    for year in (2020, 2021):
        ybar = {h: converted[(years == year) & (strata == h)].mean(axis=0) for h in ("north", "south")}
        st_draws = 0.25 * ybar["north"] + 0.75 * ybar["south"]
        r = row(res, "pinfish", year)
        assert r["estimate"] == pytest.approx(np.median(st_draws), rel=1e-12)
        assert r["method"] == "stratified_mean" and r["complete"] and r["area_covered"] == 1.0
        for h, w in (("north", 0.25), ("south", 0.75)):
            rs = row(res, "pinfish", year, h)
            assert rs["estimate"] == pytest.approx(np.median(ybar[h]), rel=1e-12)
            assert rs["weight"] == pytest.approx(w)
        raw = {h: cpue[(years == year) & (strata == h)].mean() for h in ("north", "south")}
        assert r["raw_estimate"] == pytest.approx(0.25 * raw["north"] + 0.75 * raw["south"], rel=1e-12)
    assert row(res, "pinfish", 2020)["gears"] == f"{REF}:10; {OTHER}:12"


def test_all_factors_one_and_one_stratum_gives_the_plain_mean(tmp_path):
    # With factor 1 everywhere (theta 0 exactly, sd 0) and one stratum the stratified mean is
    # the plain mean of cpue per year (issue 3; Cochran 1977 eq. 5.1 with a single stratum).
    rng = np.random.default_rng(2)
    hauls = layout([(2019, "bay", REF, 7), (2019, "bay", OTHER, 5), (2022, "bay", OTHER, 9)])
    catches = pd.DataFrame({"haul_id": hauls["haul_id"], "species": "hogchoker", "count": rng.poisson(3.0, len(hauls))})
    conv = conversion(tmp_path, hauls, catches, ["hogchoker"], {"hogchoker": 0.0}, sd=0.0)
    res = series(conv)
    year = pd.to_datetime(hauls["date"]).dt.year
    for y in (2019, 2022):
        plain = catches["count"][year == y].mean() / 100.0
        r = row(res, "hogchoker", y)
        assert r["estimate"] == pytest.approx(plain, rel=1e-12)
        assert r["raw_estimate"] == pytest.approx(plain, rel=1e-12)
        assert row(res, "hogchoker", y, "bay")["estimate"] == pytest.approx(plain, rel=1e-12)
        # factor exactly 1: harmonized and raw draws are the same resamples
        i = np.flatnonzero((res.draws.table["year"] == y) & (res.draws.table["stratum"] == ALL))[0]
        np.testing.assert_allclose(res.draws.value[i], res.draws.raw[i], rtol=1e-12)


# ----------------------------------------------------------------------------- uncertainty


def test_interval_collapses_without_sampling_noise_and_with_a_fixed_factor(tmp_path):
    # Every haul of a stratum-year has the same catch: no sampling noise, so the interval is the
    # mean times the factor's own quantiles (the percentile interval of a constant times draws);
    # with the factor fixed too (posterior sd 0) it collapses to the point.
    hauls = layout([(2020, "north", OTHER, 6), (2020, "south", OTHER, 4)], areas={"north": 2.0, "south": 2.0})
    catches = pd.DataFrame({"haul_id": hauls["haul_id"], "species": "blue crab",
                            "count": np.where(hauls["stratum"] == "north", 4, 10)})
    conv = conversion(tmp_path / "a", hauls, catches, ["blue crab"], {"blue crab": -0.4})
    res = series(conv, interval=0.8)
    f = factor_draws_of(conv, "blue crab", OTHER)
    mean = 0.5 * 0.04 + 0.5 * 0.10
    r = row(res, "blue crab", 2020)
    assert (r["lower"], r["estimate"], r["upper"]) == pytest.approx(tuple(mean * np.quantile(f, [0.1, 0.5, 0.9])),
                                                                    rel=1e-9)
    assert r["raw_lower"] == pytest.approx(mean) and r["raw_upper"] == pytest.approx(mean)  # no sampling noise
    fixed = series(conversion(tmp_path / "b", hauls, catches, ["blue crab"], {"blue crab": -0.4}, sd=0.0))
    r = row(fixed, "blue crab", 2020)
    assert r["lower"] == pytest.approx(r["estimate"], rel=1e-12) == pytest.approx(r["upper"], rel=1e-12)
    assert r["estimate"] == pytest.approx(mean * np.exp(0.4), rel=1e-12)


def test_a_fixed_factor_gives_the_bootstrap_interval_times_the_factor(two_strata, tmp_path):
    # Conversion error off (posterior sd 0): every draw of the harmonized index is the raw
    # resample's value with factor exp(-theta) on the other gear's hauls; for a year fished by
    # that gear only, harmonized draws = factor x raw draws exactly.
    hauls = layout([(2021, "north", OTHER, 12), (2021, "south", OTHER, 9)], areas={"north": 1.0, "south": 1.0})
    rng = np.random.default_rng(4)
    catches = pd.DataFrame({"haul_id": hauls["haul_id"], "species": "pinfish", "count": rng.poisson(5.0, len(hauls))})
    res = series(conversion(tmp_path, hauls, catches, ["pinfish"], {"pinfish": 0.7}, sd=0.0), seed=9)
    np.testing.assert_allclose(res.draws.value, np.exp(-0.7) * res.draws.raw, rtol=1e-12)
    r = row(res, "pinfish", 2021)
    assert r["lower"] == pytest.approx(np.exp(-0.7) * r["raw_lower"], rel=1e-12)


def test_joint_interval_is_wider_than_sampling_only_or_conversion_only(two_strata):
    # Sampling and conversion errors are independent, so the variance of the paired draws is
    # about the sum of the two (law of total variance); the joint interval must be wider than
    # either alone, and ignoring conversion error (a point factor) is narrower (issue 3).
    _, _, conv = two_strata
    width = {}
    for mode in ("both", "sampling", "conversion"):
        res = series(conv, seed=11, uncertainty=mode)
        r = row(res, "pinfish", 2020)
        width[mode] = r["upper"] - r["lower"]
        var = res.draws.value[(res.draws.table["stratum"] == ALL).to_numpy()].var(axis=1)[0]
        width[mode + "_var"] = var
    assert width["both"] > width["sampling"] > 0 and width["both"] > width["conversion"] > 0
    # total variance close to the sum (Monte Carlo error of variances from 400 draws ~ 10 %)
    assert width["both_var"] == pytest.approx(width["sampling_var"] + width["conversion_var"], rel=0.3)


def test_bootstrap_variance_matches_the_plug_in_variance_of_the_stratified_mean(tmp_path):
    # The bootstrap variance of a mean of n resampled values is the plug-in variance
    # sum (x - xbar)^2 / n^2 (Efron & Tibshirani 1993, An Introduction to the Bootstrap, ch. 5 --
    # recalled from memory); resampling within strata gives Cochran's (1977, eq. 5.6) stratified
    # variance sum W_h^2 s_h^2 / n_h with that plug-in s_h^2 and no finite-population correction.
    rng = np.random.default_rng(6)
    hauls = layout([(2018, "north", REF, 20), (2018, "south", REF, 25)], areas={"north": 1.0, "south": 4.0})
    catches = pd.DataFrame({"haul_id": hauls["haul_id"], "species": "pinfish",
                            "count": rng.poisson(rng.gamma(1.5, 4.0, len(hauls)))})
    res = series(conversion(tmp_path, hauls, catches, ["pinfish"], {"pinfish": 0.0}, n_draw=20000))
    x = catches["count"].to_numpy() / 100.0
    var = 0.0
    for h, w in (("north", 0.2), ("south", 0.8)):
        xh = x[(hauls["stratum"] == h).to_numpy()]
        var += w**2 * xh.var() / len(xh)  # numpy var: divisor n (plug-in)
    draws = res.draws.raw[(res.draws.table["stratum"] == ALL).to_numpy()][0]
    # Monte Carlo: the sample variance of 20000 draws has relative sd about sqrt(2 / 20000) = 1 %
    # for a normal, a little more for these skewed draws; 4 % is about 3.5 sd
    assert draws.var() == pytest.approx(var, rel=0.04)
    assert draws.mean() == pytest.approx(row(res, "pinfish", 2018)["raw_estimate"], rel=0.01)


def test_harmonized_intervals_cover_the_true_means_at_the_nominal_rate(tmp_path):
    # Simulation with known truth (issue 3): reference-gear means per stratum and year; a gear
    # switch halfway (years 1-5 the other gear, true factor exp(-0.7)); the factor's posterior is
    # calibrated (centre = truth + N(0, sd) error, draws N(centre, sd)). Replicate datasets are
    # independent "species" of one conversion (species are resampled independently); each gives
    # one Bernoulli trial per year kind (before / after the switch), so count datasets, not years.
    # 90% intervals over R = 200 datasets: binomial sd sqrt(0.9 x 0.1 / 200) = 0.021; the band
    # 0.83-0.96 is 0.90 -0.07/+0.06 (about 3 sd), allowing the percentile bootstrap's known slight
    # undercoverage for small skewed samples (common practice, no source).
    R, sd, theta = 200, 0.15, 0.7
    rng = np.random.default_rng(20261202)
    years = np.arange(2011, 2021)
    density = {"north": 0.08 * np.exp(0.1 * np.arange(10)), "south": 0.03 * np.ones(10)}  # ref cpue per m2
    design = [(y, h, OTHER if y < 2016 else REF, 25) for y in years for h in ("north", "south")]
    hauls = layout(design, areas={"north": 1.0, "south": 2.0})
    year_of = pd.to_datetime(hauls["date"]).dt.year.to_numpy()
    lam = np.array([density[h][y - 2011] for y, h in zip(year_of, hauls["stratum"])]) * 100.0
    q = np.where(hauls["gear"] == OTHER, np.exp(theta), 1.0)
    species = [f"replicate {i:03d}" for i in range(R)]
    counts = rng.poisson(lam[None, :] * q[None, :] * rng.gamma(2.0, 0.5, (R, len(hauls))))
    catches = pd.DataFrame({"haul_id": np.tile(hauls["haul_id"].to_numpy(), R),
                            "species": np.repeat(species, len(hauls)), "count": counts.reshape(-1)})
    centre = {s: theta + sd * e for s, e in zip(species, rng.standard_normal(R))}
    h, c = write_tables(tmp_path, hauls, catches)
    conv = convert(factor_set(species, {s: theta for s in species}, sd=sd, center=centre), h, c)
    truth = {y: (1 * density["north"][y - 2011] + 2 * density["south"][y - 2011]) / 3 for y in years}
    res = series(conv, seed=1)
    sampling_only = series(conv, seed=1, uncertainty="sampling")
    t, ts = res.table.set_index(["species", "year", "stratum"]), sampling_only.table.set_index(
        ["species", "year", "stratum"])
    for year in (2013, 2018):  # before and after the switch
        rows, rows_s = t.xs((year, ALL), level=("year", "stratum")), ts.xs((year, ALL), level=("year", "stratum"))
        covered = ((rows["lower"] <= truth[year]) & (truth[year] <= rows["upper"])).mean()
        assert 0.83 <= covered <= 0.96, (year, covered)
        raw_covered = ((rows["raw_lower"] <= truth[year]) & (truth[year] <= rows["raw_upper"])).mean()
        if year < 2016:
            # the raw series shows the step: the other gear catches exp(0.7) = 2x, raw misses
            assert raw_covered < 0.1
            assert rows["raw_estimate"].median() > 1.6 * truth[year]
            # conversion error left out: intervals too narrow, coverage clearly below nominal
            sampling_cov = ((rows_s["lower"] <= truth[year]) & (truth[year] <= rows_s["upper"])).mean()
            assert sampling_cov < covered - 0.1
        else:
            assert raw_covered == covered  # reference gear: harmonized = raw


def test_moment_matched_resampling_agrees_with_exact_resampling_above_the_threshold(tmp_path):
    # Units with more than EXACT_MAX_HAULS non-zero hauls use the moment-matched approximation;
    # compare its quantiles with exact resampling of the same data (4000 paired draws each).
    # Monte Carlo error of a sample quantile, distribution-free: the order statistics at ranks
    # D p -+ sqrt(D p (1 - p)) bracket it with about 68 % probability (binomial count of draws
    # below the quantile; David & Nagaraja 2003, Order Statistics, section 7.1 -- recalled from
    # memory); the difference of two independent estimates then has sd sqrt(2) x that.
    rng = np.random.default_rng(8)
    design = [(2020, "north", REF, 30), (2020, "north", OTHER, 18), (2020, "south", REF, 50),
              (2020, "south", OTHER, 5), (2021, "north", OTHER, 45)]
    hauls = layout(design, areas={"north": 1.0, "south": 2.0})
    hauls["effort"] = rng.uniform(60.0, 300.0, len(hauls)).round(1)  # varying effort: cpue not on a lattice
    catches = pd.DataFrame({"haul_id": hauls["haul_id"], "species": "silver perch",
                            "count": rng.poisson(rng.gamma(0.8, 4.0, len(hauls)))})
    conv = conversion(tmp_path, hauls, catches, ["silver perch"], {"silver perch": -0.5}, n_draw=4000)
    approx = series_draws(conv, conv.factor_draws, seed=1)
    exact = series_draws(conv, conv.factor_draws, seed=2, exact_max_hauls=10**6)
    assert (approx.table["resampling"] == exact.table["resampling"]).sum() == 0  # all units above the threshold
    assert approx.settings["units_moment_matched"] == 3 and exact.settings["units_exact"] == 3
    probs = np.array([0.05, 0.25, 0.5, 0.75, 0.95])
    D = 4000
    for r in range(len(exact.table)):
        for kind in ("value", "raw"):
            e, a = getattr(exact, kind)[r], getattr(approx, kind)[r]
            s = np.sort(e)
            k = np.sqrt(D * probs * (1 - probs))
            se = (s[np.minimum(D * probs + k, D - 1).astype(int)] - s[np.maximum(D * probs - k, 0).astype(int)]) / 2
            z = (np.quantile(a, probs) - np.quantile(e, probs)) / (np.sqrt(2) * se)
            assert np.abs(z).max() < 4.0, (exact.table.iloc[r][["year", "stratum"]].tolist(), kind, z)
            # and as whole distributions (two-sample Kolmogorov-Smirnov, scipy)
            assert stats.ks_2samp(e, a).pvalue > 1e-3


# ----------------------------------------------------------------------------- what the rows say


def test_a_year_missing_a_stratum_is_marked_incomplete_not_silently_reweighted(tmp_path):
    hauls = layout([(2020, "north", REF, 4), (2020, "south", REF, 4), (2021, "north", REF, 5)],
                   areas={"north": 1.0, "south": 3.0})
    catches = pd.DataFrame({"haul_id": hauls["haul_id"], "species": "pinfish", "count": np.arange(len(hauls)) % 5})
    conv = conversion(tmp_path, hauls, catches, ["pinfish"], {"pinfish": 0.0})
    res = series(conv)
    r = row(res, "pinfish", 2021)
    assert not r["complete"] and r["strata_missing"] == "south"
    assert "incomplete: south not sampled" in r["flags"] and r["area_covered"] == pytest.approx(0.25)
    north = catches["count"].to_numpy()[8:].mean() / 100  # the 2021 hauls
    assert r["estimate"] == pytest.approx(north)  # the mean over the strata sampled, and said so
    assert row(res, "pinfish", 2020)["complete"]
    assert res.manifest["counts"]["incomplete_rows"] == 1
    blank = series(conv, incomplete="blank")
    r = row(blank, "pinfish", 2021)
    assert np.isnan(r["estimate"]) and np.isnan(r["lower"]) and "left blank" in r["flags"]
    assert row(blank, "pinfish", 2021, "north")["estimate"] == pytest.approx(north)


def test_years_without_hauls_are_absent_and_zero_catch_years_are_zero(tmp_path):
    hauls = layout([(2015, "bay", REF, 3), (2017, "bay", REF, 3), (2018, "bay", REF, 3)])
    catches = pd.DataFrame({"haul_id": hauls["haul_id"], "species": "pinfish",
                            "count": [1, 2, 3, 0, 0, 0, 4, 0, 1]})
    catches.loc[0, "species"] = "hogchoker"  # a second species, caught once: zeros completed elsewhere
    res = series(conversion(tmp_path, hauls, catches, ["hogchoker", "pinfish"], {"hogchoker": 0.0, "pinfish": 0.0}))
    all_rows = res.table[res.table["stratum"] == ALL]
    assert sorted(all_rows["year"].unique()) == [2015, 2017, 2018]  # 2016: no hauls, no row
    z = row(res, "pinfish", 2017)
    assert (z["estimate"], z["lower"], z["upper"]) == (0.0, 0.0, 0.0) and z["n_hauls"] == 3
    assert row(res, "hogchoker", 2018)["estimate"] == 0.0
    cube = res.draws.cube("estimate")
    assert cube.shape == (2, 3) and res.draws.species == ["hogchoker", "pinfish"]
    assert list(res.draws.years) == [2015, 2017, 2018]
    assert res.draws.cube("value").shape == (2, 3, 400)


def test_strata_without_areas_give_the_plain_mean_and_say_so(tmp_path):
    hauls = layout([(2020, "north", REF, 2), (2020, "south", REF, 6)])  # no stratum_area
    catches = pd.DataFrame({"haul_id": hauls["haul_id"], "species": "pinfish", "count": [8, 6, 1, 1, 1, 1, 1, 1]})
    res = series(conversion(tmp_path, hauls, catches, ["pinfish"], {"pinfish": 0.0}))
    r = row(res, "pinfish", 2020)
    assert r["method"] == "haul_mean" and "unweighted: no stratum_area for north, south" in r["flags"]
    assert r["estimate"] == pytest.approx(20 / 8 / 100)  # plain mean over hauls, not (7 + 1) / 2
    assert row(res, "pinfish", 2020, "north")["weight"] == pytest.approx(0.25)
    assert any("without stratum_area" in n for n in res.notes)


def test_single_hauls_unconverged_factors_and_domain_flags_are_said(tmp_path):
    hauls = layout([(2020, "north", OTHER, 1), (2020, "south", OTHER, 3)], areas={"north": 1.0, "south": 1.0})
    catches = pd.DataFrame({"haul_id": hauls["haul_id"], "species": "pinfish", "count": [3, 1, 2, 3]})
    h, c = write_tables(tmp_path, hauls, catches)
    fs = factor_set(["pinfish"], {"pinfish": 0.2})
    fs.table.loc[0, "status"] = "fail"
    res = series(convert(fs, h, c, allow_unconverged=True))
    r = row(res, "pinfish", 2020)
    assert "single haul in north" in r["flags"] and "unconverged factor used for 4 hauls" in r["flags"]
    assert r["n_unconverged"] == 4 and row(res, "pinfish", 2020, "north")["flags"].startswith("single haul")


def test_by_stratum_false_ignores_strata(two_strata):
    hauls, catches, conv = two_strata
    res = series(conv, by_stratum=False)
    assert set(res.table["stratum"]) == {ALL} and (res.table["method"] == "haul_mean").all()
    year = pd.to_datetime(hauls["date"]).dt.year
    r = row(res, "pinfish", 2021)
    assert r["raw_estimate"] == pytest.approx(catches["count"][year == 2021].mean() / 100)


def test_bad_strata_are_input_errors(tmp_path):
    hauls = layout([(2020, "north", REF, 2), (2020, "south", REF, 2)], areas={"north": 1.0, "south": 2.0})
    catches = pd.DataFrame({"haul_id": hauls["haul_id"], "species": "pinfish", "count": 1})
    blank = hauls.copy()
    blank.loc[0, "stratum"] = ""
    with pytest.raises(InputError, match="have no stratum while the others have one"):
        series(conversion(tmp_path / "a", blank, catches, ["pinfish"], {"pinfish": 0.0}))
    two = hauls.copy()
    two.loc[0, "stratum_area"] = 5.0
    conv = conversion(tmp_path / "b", two, catches, ["pinfish"], {"pinfish": 0.0})
    with pytest.raises(InputError, match="stratum 'north' has 2 different stratum_area values"):
        series(conv)
    conv.save(tmp_path / "b" / "converted")
    with pytest.raises(InputError, match="records.parquet, row 1.*stratum_area"):
        series(tmp_path / "b" / "converted")
    named = hauls.copy()
    named.loc[named["stratum"] == "south", "stratum"] = "all"
    with pytest.raises(InputError, match="named 'all'"):
        series(conversion(tmp_path / "c", named, catches, ["pinfish"], {"pinfish": 0.0}))
    with pytest.raises(InputError, match="file not found"):
        series(tmp_path / "nowhere")


# ----------------------------------------------------------------------------- draws and files


def test_draws_are_paired_seeded_and_the_same_from_memory_or_disk(two_strata, tmp_path):
    _, _, conv = two_strata
    a = series(conv, draws=100, seed=4)
    b = series(conv, draws=100, seed=4)
    np.testing.assert_array_equal(a.draws.value, b.draws.value)
    assert len(a.draws.draw) == 100 and len(set(a.draws.draw)) == 100
    c = series(conv, draws=100, seed=5)
    assert not np.array_equal(a.draws.draw, c.draws.draw)
    out = conv.save(tmp_path / "converted")
    d = series(out, draws=100, seed=4)
    np.testing.assert_allclose(d.draws.value, a.draws.value, rtol=1e-12)
    np.testing.assert_allclose(d.draws.raw, a.draws.raw, rtol=1e-12)
    pd.testing.assert_frame_equal(d.table, a.table)
    with pytest.raises(InputError, match="holds 400"):
        series(conv, draws=401)


def test_save_writes_every_file_atomically(two_strata, tmp_path, monkeypatch):
    _, _, conv = two_strata
    conv_dir = conv.save(tmp_path / "converted")
    res = series(conv_dir, draws=50, seed=2)
    out = res.save(tmp_path / "series")
    assert sorted(p.name for p in out.iterdir()) == ["manifest.json", "series.csv", "series_draws.parquet"]
    table = pd.read_csv(out / "series.csv", keep_default_na=False)
    assert list(table.columns) == SERIES_COLUMNS and len(table) == len(res.table)
    draws = pd.read_parquet(out / "series_draws.parquet")
    assert list(draws.columns) == DRAW_COLUMNS and len(draws) == len(res.table) * 50
    first = draws[(draws["year"] == 2020) & (draws["stratum"] == ALL)].sort_values("draw")
    np.testing.assert_allclose(first["value"], res.draws.value[0][np.argsort(res.draws.draw)])
    m = json.loads((out / "manifest.json").read_text())
    assert m["conversion_id"] == conv.manifest["conversion_id"] and m["series_id"].startswith("sr-")
    assert m["inputs"]["records"]["sha256"] and m["settings"]["draws_used"] == 50
    assert "management use" in m["caution"]
    with pytest.raises(InputError, match="holds the converted records"):
        res.save(conv_dir)
    import calib.series as cs

    monkeypatch.setattr(cs.SeriesResult, "draws_frame", lambda self: 1 / 0)
    with pytest.raises(ZeroDivisionError):
        res.save(tmp_path / "series2")
    assert not (tmp_path / "series2").exists() and not list(tmp_path.glob(".series2*"))


def test_command_line_wiring(two_strata, tmp_path, capsys):
    _, _, conv = two_strata
    conv_dir = conv.save(tmp_path / "converted")
    p = argparse.ArgumentParser(prog="calib")
    add_series_parser(p.add_subparsers(dest="command"))
    args = p.parse_args(["series", "--converted", str(conv_dir), "--out", str(tmp_path / "s"), "--draws", "40",
                         "--seed", "3"])
    assert run_series_command(args) == 0
    printed = capsys.readouterr().out
    assert "Harmonized series" in printed and "series_draws.parquet" in printed and "management use" in printed
    assert (tmp_path / "s" / "series.csv").exists()
    args = p.parse_args(["series", "--converted", str(conv_dir), "--out", str(tmp_path / "t"), "--ignore-strata",
                         "--incomplete", "blank", "--uncertainty", "sampling"])
    assert args.ignore_strata and args.incomplete == "blank" and args.uncertainty == "sampling"
    assert args.exact_max_hauls == EXACT_MAX_HAULS
    with pytest.raises(SystemExit):
        p.parse_args(["series", "--out", "x"])


def test_moment_matching_keeps_the_skew_of_patchy_catch_rates(tmp_path):
    # Catch rates are skewed; near the threshold a normal approximation of the resampled sums
    # (two moments) misses the skewness of the bootstrap distribution, which the three-moment
    # (shifted gamma) match keeps. Strongly skewed data: lognormal catch rates (sd 1.5 on the log
    # scale), 40 hauls, 20000 paired draws. The sample skewness of 20000 draws has standard error
    # about sqrt(6 / 20000) = 0.017 (e.g. Joanes & Gill 1998, "Comparing measures of sample
    # skewness and kurtosis", The Statistician 47 -- recalled from memory), so two estimates
    # differ by more than 0.075 (3 sd) rarely; a normal approximation in its place misses by
    # about 0.11 here (measured when the test was written).
    rng = np.random.default_rng(8)
    hauls = layout([(2020, "bay", REF, 28), (2020, "bay", OTHER, 12)])
    hauls["effort"] = (100.0 / np.exp(1.5 * rng.standard_normal(len(hauls)))).round(3)  # cpue = 1 / effort
    catches = pd.DataFrame({"haul_id": hauls["haul_id"], "species": "pinfish", "count": 1})
    conv = conversion(tmp_path, hauls, catches, ["pinfish"], {"pinfish": -0.7}, sd=0.0, n_draw=20000)
    approx = series_draws(conv, conv.factor_draws, seed=3, by_stratum=False)
    exact = series_draws(conv, conv.factor_draws, seed=4, by_stratum=False, exact_max_hauls=10**6)
    assert approx.table["resampling"].tolist() == ["moment-matched"] and exact.table["resampling"].tolist() == ["exact"]
    e, a = exact.value[0], approx.value[0]
    assert stats.skew(e) > 0.2  # the bootstrap distribution is visibly skewed
    assert stats.skew(a) == pytest.approx(stats.skew(e), abs=0.075)
    assert stats.ks_2samp(e, a).pvalue > 1e-3  # and the whole distribution agrees (scipy)


def test_row_quantiles_match_numpy():
    # The interval ends use numpy's default quantile (definition 7 of Hyndman & Fan 1996,
    # "Sample quantiles in statistical packages"), computed from one sort per row.
    from calib.series import row_quantiles

    rng = np.random.default_rng(3)
    for n in (1, 2, 5, 400, 1001):
        a = rng.gamma(0.7, 2.0, (30, n))
        probs = [0.0, 0.025, 0.05, 0.5, 0.95, 0.975, 1.0]
        np.testing.assert_allclose(row_quantiles(a, probs), np.quantile(a, probs, axis=1), rtol=1e-13)
    a[4] = np.nan
    assert np.isnan(row_quantiles(a, [0.5])[0, 4]) and np.isfinite(row_quantiles(a, [0.5])[0, 3])


def test_records_may_borrow_another_species_factor():
    # series_draws on a plain DataFrame (as trend passes subsets): the factor key is
    # (factor_species, factor_gear), so a record may use another species' factor.
    rec = pd.DataFrame({"species": ["striped killifish"] * 4 + ["mummichog"] * 4, "year": 2020, "gear": OTHER,
                        "cpue": [1.0, 2.0, 3.0, 4.0] * 2, "factor_species": "mummichog", "factor_gear": OTHER})
    fd = pd.DataFrame({"species": "mummichog", "gear": OTHER, "draw": np.arange(3), "factor": [2.0, 3.0, 4.0]})
    sd = series_draws(rec, fd, uncertainty="conversion")
    assert sd.species == ["mummichog", "striped killifish"]
    np.testing.assert_allclose(sd.value, np.tile([5.0, 7.5, 10.0], (2, 1)))  # mean 2.5 x each draw
    with pytest.raises(InputError, match="no factor draws for species 'mummichog' with gear 'seine'"):
        series_draws(rec.assign(factor_gear="seine"), fd)
