"""``calib series`` / ``calib trend`` on records converted by length class (each record its own
mix of class factors), draw by draw.

Inputs are built through ``calib.convert`` with KNOWN SYNTHETIC length-class factor draws (a
factor set made by hand, never a fit); expected values are computed here independently with
numpy / pandas from the files convert wrote. The covariate case (records converted with their own
covariate values) is tested in tests/test_covariates.py on that module's fitted factor set.
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import xarray as xr
from scipy import stats

from calib.convert import convert
from calib.factors import factor_set_from_draws
from calib.length_fit import factor_set_from_length_draws
from calib.series import ALL, RecordFactors, series, series_draws

REF, OTHER = "seine", "trawl"
CLASSES = [40.0, 60.0, 80.0]  # 20-mm classes: 40-60, 60-80, 80-100 mm


def class_theta(D: int, seed: int = 0, same: bool = False) -> np.ndarray:
    """(D, 3) theta draws of the trawl per class: factors about 2, 1, 0.5 with draw noise that
    differs between classes (or one theta for every class when ``same``)."""
    rng = np.random.default_rng(seed)
    if same:
        return np.repeat((-np.log(1.4) + 0.15 * rng.standard_normal(D))[:, None], 3, axis=1)
    return -(np.log([2.0, 1.0, 0.5]) + 0.15 * rng.standard_normal((D, 3)))


def length_set(th: np.ndarray, status="ok"):
    D = th.shape[0]
    t = np.zeros((1, D, 2, 1, 3))
    t[0, :, 1, 0, :] = th
    theta = xr.DataArray(t, dims=("chain", "draw", "gear", "species", "length"),
                         coords={"chain": [0], "draw": np.arange(D), "gear": [REF, OTHER], "species": ["pinfish"],
                                 "length": CLASSES})
    return factor_set_from_length_draws(theta, reference=REF, bin_mm=20.0, factor_set_id="fs-len-series",
                                        status=status)


def species_set(th: np.ndarray):
    """An ordinary (species-level) factor set with the trawl's theta draws ``th`` (D,)."""
    D = len(th)
    t = np.zeros((1, D, 2, 1))
    t[0, :, 1, 0] = th
    post = xr.DataArray(t, dims=("chain", "draw", "gear", "species"),
                        coords={"chain": [0], "draw": np.arange(D), "gear": [REF, OTHER], "species": ["pinfish"]},
                        name="theta")
    return factor_set_from_draws(post, reference=REF, factor_set_id="fs-species-series")


def survey(tmp: Path, design, seed: int = 1, measure: int = 15, mean=6.0, shape=0.8, gear_lengths=None,
           large=(60, 100)):
    """Survey tables from [(year, stratum, gear, n_hauls), ...] (strata areas 1 and 2; effort
    varies). Counts negative binomial (gamma-Poisson); every haul with a catch has up to
    ``measure`` fish measured, lengths 40-99 mm, the mix of lengths varying from haul to haul
    (a random share of small fish), so length-converted records have different multipliers.
    ``mean`` may be a dict gear -> mean count; ``gear_lengths`` gear -> share of small fish;
    large fish are uniform over ``large`` mm."""
    rng = np.random.default_rng(seed)
    hauls, catches, lengths = [], [], []
    for year, stratum, gear, n in design:
        for k in range(n):
            hid = f"{year}-{stratum}-{gear}-{k:03d}"
            hauls.append({"haul_id": hid, "gear": gear, "date": f"{year}-06-{1 + k % 28:02d}",
                          "effort": round(float(rng.uniform(50, 200)), 1), "effort_unit": "m2",
                          "stratum": stratum, "stratum_area": {"north": 1.0, "south": 2.0}.get(stratum, 1.0)})
            mu = mean[gear] if isinstance(mean, dict) else mean
            count = int(rng.poisson(rng.gamma(shape, mu / shape)))
            if count == 0:
                continue
            catches.append({"haul_id": hid, "species": "pinfish", "count": count})
            small = rng.beta(1.5, 1.5) if gear_lengths is None else gear_lengths[gear]
            m = min(count, measure)
            mm = np.where(rng.uniform(size=m) < small, rng.integers(40, 60, m), rng.integers(*large, m))
            for L, c in zip(*np.unique(mm, return_counts=True)):
                lengths.append({"haul_id": hid, "species": "pinfish", "length_mm": int(L), "n": int(c)})
    tmp.mkdir(parents=True, exist_ok=True)
    paths = tmp / "hauls.csv", tmp / "catches.csv", tmp / "lengths.csv"
    pd.DataFrame(hauls).to_csv(paths[0], index=False)
    pd.DataFrame(catches).to_csv(paths[1], index=False)
    pd.DataFrame(lengths).to_csv(paths[2], index=False)
    return paths


DESIGN = [(2016, "north", REF, 6), (2016, "north", OTHER, 8), (2016, "south", OTHER, 9),
          (2017, "north", OTHER, 7), (2017, "south", REF, 5), (2017, "south", OTHER, 6),
          (2018, "north", REF, 4), (2018, "south", OTHER, 10)]


@pytest.fixture(scope="module")
def by_length(tmp_path_factory):
    """A saved length conversion of DESIGN with class factors that differ (400 draws)."""
    tmp = tmp_path_factory.mktemp("bylength")
    h, c, ln = survey(tmp, DESIGN)
    cv = convert(length_set(class_theta(400)), h, c, lengths=ln)
    out = cv.save(tmp / "converted")
    return cv, out


def expected_multipliers(out: Path, records: pd.DataFrame) -> np.ndarray:
    """(records, draws) multipliers computed here with pandas from the saved files: the raised
    class counts of each record times its class's factor draws, over its raised count."""
    rl = pd.read_csv(out / "record_lengths.csv", dtype={"haul_id": str})
    fd = pd.read_parquet(out / "length_factor_draws.parquet")
    wide = fd.pivot_table(index="length_mm", columns="draw", values="factor")  # one species x gear here
    num = (rl.groupby(["haul_id", "factor_length_mm"])["raised_count"].sum().unstack(fill_value=0.0)
           .reindex(columns=wide.index, fill_value=0.0))
    m = (num.to_numpy() @ wide.to_numpy()) / num.to_numpy().sum(axis=1)[:, None]
    m = pd.DataFrame(m, index=num.index)
    return m.reindex(records["haul_id"].astype(str)).fillna(0.0).to_numpy()


def test_rebuilt_record_draws_reproduce_converts_own_summaries(by_length):
    """Each length-converted record's draws, rebuilt from length_factor_draws.parquet and
    record_lengths.csv, give back the median and interval convert wrote in records.csv."""
    cv, out = by_length
    manifest = json.loads((out / "manifest.json").read_text())
    rf = RecordFactors.from_directory(out, manifest)
    records = pd.read_csv(out / "records.csv", dtype={"haul_id": str})
    rows = np.flatnonzero((records["gear"] == OTHER).to_numpy())
    assert len(rows) > 30 and manifest["counts"]["length_converted"] == len(rows)
    fn, has = rf.parts[0].bind(records, rows, np.arange(400))
    M = fn(np.arange(len(rows)))
    cpue = records["cpue"].to_numpy()[rows]
    q = np.quantile(cpue[:, None] * M, [0.05, 0.5, 0.95], axis=1).T
    want = records.iloc[rows][["cpue_ref_lower", "cpue_ref_median", "cpue_ref_upper"]].to_numpy(dtype=float)
    np.testing.assert_allclose(q, want, rtol=2e-5, atol=1e-9)  # records.csv holds 6 significant digits
    assert (has == (cpue > 0)).all()  # zero catches have no lengths and convert to zero
    # and the same multipliers from an independent pandas computation
    np.testing.assert_allclose(M, expected_multipliers(out, records.iloc[rows]), rtol=1e-6)


def test_conversion_draws_share_the_factor_draw_across_records(by_length):
    """uncertainty="conversion" (observed hauls, no resampling): the series draw d is the mean
    over the year's hauls of cpue x m_i[d], every record's m_i taken at the SAME draw d (so records
    converted with the same classes move together); computed here with numpy from the files."""
    cv, out = by_length
    records = pd.read_csv(out / "records.csv", dtype={"haul_id": str})
    sd = series_draws(cv, cv.factor_draws, uncertainty="conversion", by_stratum=False)
    M = np.ones((len(records), 400))
    trawl = (records["gear"] == OTHER).to_numpy()
    M[trawl] = expected_multipliers(out, records[trawl])
    conv = (records["count"] / records["effort"]).to_numpy()[:, None] * M  # records.csv rounds cpue
    for r, year in enumerate(sd.table["year"]):
        want = conv[(records["year"] == year).to_numpy()].mean(axis=0)
        np.testing.assert_allclose(sd.value[r], want, rtol=1e-6)
        # draws shuffled between records would be independent and give a narrower interval
        rng = np.random.default_rng(r)
        shuffled = np.array([rng.permutation(row) for row in conv[(records["year"] == year).to_numpy()]]).mean(0)
        assert np.std(want) > 1.2 * np.std(shuffled)
    # the same from the saved directory
    from calib.series import _read_converted

    rec, fd, _, _, _, _, rf = _read_converted(out)
    sd2 = series_draws(rec, fd, uncertainty="conversion", by_stratum=False, record_factors=rf)
    np.testing.assert_allclose(sd2.value, sd.value, rtol=1e-6)  # record_lengths.csv: 6 significant digits


@pytest.mark.parametrize("exact_max_hauls", [10**6, 3])
def test_one_factor_for_every_class_gives_the_ordinary_series(tmp_path, exact_max_hauls):
    """Every class with the same factor draws: the length conversion's series equals the series of
    an ordinary conversion with that factor, same seed. Exact resampling draws the same picks, so
    the draws agree to rounding; the moment-matched path (threshold 3) uses the same normals, and
    its rare exact-gamma entries a different variate, so intervals agree within Monte Carlo error
    (quantiles of 2000 paired draws: a few percent, common practice, no source)."""
    D = 2000
    th = class_theta(D, same=True)
    h, c, ln = survey(tmp_path, DESIGN, seed=4)
    by_len = convert(length_set(th), h, c, lengths=ln)
    plain = convert(species_set(th[:, 0]), h, c)
    assert by_len.n_converted == plain.n_converted and by_len.manifest["counts"]["length_converted"] > 0
    a = series(by_len, seed=9, exact_max_hauls=exact_max_hauls)
    b = series(plain, seed=9, exact_max_hauls=exact_max_hauls)
    cols = ["species", "year", "stratum", "n_hauls", "gears", "resampling"]
    pd.testing.assert_frame_equal(a.table[cols], b.table[cols])
    np.testing.assert_allclose(a.table["estimate"], b.table["estimate"], rtol=1e-9)
    np.testing.assert_allclose(a.table[["raw_estimate"]], b.table[["raw_estimate"]], rtol=1e-12)
    if exact_max_hauls > 100:
        np.testing.assert_allclose(a.draws.value, b.draws.value, rtol=1e-9)
        np.testing.assert_allclose(a.draws.raw, b.draws.raw, rtol=1e-12)
    else:
        assert (a.table["resampling"].str.contains("moment-matched")).any()
        for col in ("lower", "upper", "raw_lower", "raw_upper"):
            np.testing.assert_allclose(a.table[col], b.table[col], rtol=0.03)


@pytest.mark.parametrize("factors, noise", [((2.0, 1.0, 0.5), 0.15), ((4.0, 1.0, 0.25), 0.01)])
def test_moment_matched_converted_sums_agree_with_exact_resampling(tmp_path, factors, noise):
    """Above the threshold the length-converted sums are moment matched draw by draw (each draw's
    moments of cpue x m[d]), correlated with the raw sums through the correlation of cpue and
    cpue x m[d] over the hauls; compare with exact resampling of the same data, 3000 paired draws
    each: quantiles within 4 Monte Carlo standard errors (order-statistic bracket, David &
    Nagaraja 2003, Order Statistics, section 7.1 -- recalled from memory, as in
    tests/test_series.py) and two-sample Kolmogorov-Smirnov (scipy), for the converted series, the
    raw series, their difference and their ratio (the pairing trend relies on). The second case
    has almost no conversion error and very different class factors, so the spread of the ratio
    comes from the hauls' different length mixes: driving both sums with the same normal (perfect
    correlation) made its 90 % interval about half as wide as exact resampling's (KS p ~ 1e-45 when
    measured)."""
    D = 3000
    h, c, ln = survey(tmp_path, [(2016, "bay", REF, 40), (2016, "bay", OTHER, 60), (2017, "bay", OTHER, 80)],
                      seed=6, measure=25, shape=0.4, mean=10.0)
    th = -(np.log(factors) + noise * np.random.default_rng(2).standard_normal((D, 3)))
    cv = convert(length_set(th), h, c, lengths=ln)
    approx = series_draws(cv, cv.factor_draws, seed=1)
    exact = series_draws(cv, cv.factor_draws, seed=2, exact_max_hauls=10**6)
    assert set(approx.table["resampling"]) == {"moment-matched"} and set(exact.table["resampling"]) == {"exact"}
    probs = np.array([0.05, 0.25, 0.5, 0.75, 0.95])
    k = np.sqrt(D * probs * (1 - probs))
    for r in range(len(exact.table)):
        for kind, e, a in (("value", exact.value[r], approx.value[r]), ("raw", exact.raw[r], approx.raw[r]),
                           ("difference", exact.value[r] - exact.raw[r], approx.value[r] - approx.raw[r]),
                           ("ratio", exact.value[r] / exact.raw[r], approx.value[r] / approx.raw[r])):
            s = np.sort(e)
            se = (s[np.minimum(D * probs + k, D - 1).astype(int)] - s[np.maximum(D * probs - k, 0).astype(int)]) / 2
            z = (np.quantile(a, probs) - np.quantile(e, probs)) / (np.sqrt(2) * se)
            assert np.abs(z).max() < 4.0, (r, kind, z)
            assert stats.ks_2samp(e, a).pvalue > 1e-3, (r, kind)


def test_rejected_flagged_and_unconverged_records_are_handled_as_for_ordinary_ones(tmp_path):
    """Records convert rejects (no lengths; fish outside the calibrated range) are in no series and
    the series says how many (rejected.csv has the reasons); records converted with the nearest
    class are counted as outside the domain, and records using a 'fail' class (with
    --allow-unconverged) as unconverged."""
    h, c, ln = survey(tmp_path, [(2016, "bay", OTHER, 12), (2016, "bay", REF, 4)], seed=3)
    lengths = pd.read_csv(ln)
    catches = pd.read_csv(c)
    trawl = [x for x in catches["haul_id"] if OTHER in x]
    lengths = lengths[lengths["haul_id"] != trawl[0]]  # a catch without lengths: rejected (no_lengths)
    lengths.loc[lengths.index[lengths["haul_id"] == trawl[1]][0], "length_mm"] = 130  # outside 40-100 mm
    lengths.to_csv(ln, index=False)
    status = {("pinfish", OTHER, 80.0): "fail"}
    cv = convert(length_set(class_theta(300), status=status), h, c, lengths=ln, allow_unconverged=True)
    reasons = set(cv.rejected["reason_code"].astype(str))
    assert reasons == {"no_lengths", "outside_length_range"}
    result = series(cv)
    allr = result.table[result.table["stratum"] == ALL].iloc[0]
    assert allr["n_hauls"] == cv.n_converted
    assert any("rejected by convert" in n for n in result.notes)
    used_fail = (cv.records["factor_status"].astype(str) == "fail").sum()
    assert used_fail > 0 and allr["n_unconverged"] == used_fail
    near = convert(length_set(class_theta(300)), h, c, lengths=ln, outside_lengths="nearest")
    assert set(near.rejected["reason_code"].astype(str)) == {"no_lengths"}
    r2 = series(near).table
    assert r2[r2["stratum"] == ALL].iloc[0]["n_domain_flagged"] == 1  # the haul with the 130-mm fish


def test_trend_command_runs_end_to_end_on_a_length_conversion(tmp_path, capsys):
    """calib convert --lengths, then calib series and calib trend on its folder (the command line).
    Constant true abundance; the reference seine alone until 2017, the trawl alone after, catching
    small fish at half the seine's rate and large ones at twice (class factors 2, 1, 0.5), so its
    raw catches are 25 % higher. Length-converted, the harmonized change interval covers 0 and the
    artifact interval covers the true artifact (one seeded survey, 90 % intervals; measured when
    written: artifact 39 % [28, 53] against 36 %, harmonized change -15 % [-41, 25])."""
    from calib.cli import main

    years = range(2012, 2024)
    design = [(y, "bay", REF if y < 2018 else OTHER, 20) for y in years]
    # Seine: half small (40-60 mm), half large (80-100 mm). The trawl catches small fish at half
    # and large ones at twice the seine's rate (class factors 2 and 0.5): its mean catch is
    # 0.5 x 0.5 + 2 x 0.5 = 1.25 times the seine's, of which 0.25 / 1.25 = 20 % small.
    h, c, ln = survey(tmp_path, design, seed=8, mean={REF: 20.0, OTHER: 25.0}, shape=3.0,
                      gear_lengths={REF: 0.5, OTHER: 0.2}, large=(80, 100))
    noise = 0.05 * np.random.default_rng(1).standard_normal((400, 3))
    length_set(-np.log(np.tile([2.0, 1.0, 0.5], (400, 1))) + noise).save(tmp_path / "factors")
    hauls = pd.read_csv(h)
    hauls["source"] = np.where(np.arange(len(hauls)) % 2, "creek_partner", "channel_partner")  # two partners
    hauls.to_csv(h, index=False)
    assert main(["convert", "--factors", str(tmp_path / "factors"), "--hauls", str(h), "--catches", str(c),
                 "--lengths", str(ln), "--out", str(tmp_path / "conv")]) == 0
    assert main(["series", "--converted", str(tmp_path / "conv"), "--out", str(tmp_path / "series")]) == 0
    assert main(["trend", "--converted", str(tmp_path / "conv"), "--out", str(tmp_path / "trend")]) == 0
    capsys.readouterr()
    tr = pd.read_csv(tmp_path / "trend" / "trend.csv").iloc[0]
    s = pd.read_csv(tmp_path / "series" / "series.csv")
    s = s[s["stratum"] == ALL]
    assert len(s) == len(years) and s["lower"].le(s["estimate"]).all() and s["estimate"].le(s["upper"]).all()
    # true artifact: the log-linear slope of a step of log(1.25) from 2018, over 2012-2023
    t = np.arange(len(years))
    slope = np.polyfit(t, np.log(np.where(np.array(years) >= 2018, 1.25, 1.0)), 1)[0]
    true_artifact = 100 * (np.exp(slope * t[-1]) - 1)  # about 36 %
    assert tr["artifact_lower"] < true_artifact < tr["artifact_upper"]
    assert tr["harmonized_change_lower"] < 0 < tr["harmonized_change_upper"]
    assert tr["verdict"] == "mostly method artifact"
    manifest = json.loads((tmp_path / "trend" / "manifest.json").read_text())
    assert "record_lengths" in manifest["inputs"] and "length_factor_draws" in manifest["inputs"]
    # each partner's series goes through the same per-record draws
    src = pd.read_csv(tmp_path / "trend" / "source_series.csv")
    assert set(src["source"]) == {"creek_partner", "channel_partner"} and len(src) == 2 * len(years)


def test_missing_or_mismatched_files_are_clear_input_errors(by_length, tmp_path, capsys):
    """Without record_lengths.csv the records' factors cannot be rebuilt: exit 1, the file named,
    no output; class draws from other posterior samples than factor_draws.parquet are refused."""
    import shutil

    from calib.cli import main
    from calib.errors import InputError

    _, out = by_length
    broken = tmp_path / "broken"
    shutil.copytree(out, broken)
    (broken / "record_lengths.csv").unlink()
    assert main(["series", "--converted", str(broken), "--out", str(tmp_path / "s")]) == 1
    said = capsys.readouterr()
    assert "record_lengths.csv" in said.err + said.out
    assert not (tmp_path / "s").exists()
    other = tmp_path / "other"
    shutil.copytree(out, other)
    fd = pd.read_parquet(other / "length_factor_draws.parquet")
    fd["posterior_draw"] = (fd["posterior_draw"] + 1) % 400  # the same draws numbered, other samples
    fd.to_parquet(other / "length_factor_draws.parquet", index=False)
    with pytest.raises(InputError, match="not the same posterior draws"):
        series(other)
    # a records frame without haul_id cannot be matched to record_lengths.csv
    from calib.series import _read_converted

    rec, fd, _, _, _, _, rf = _read_converted(out)
    with pytest.raises(InputError, match="haul_id"):
        series_draws(rec.drop(columns="haul_id"), fd, record_factors=rf)
