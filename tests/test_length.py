"""Length-dependent factors: cells by length class, the P-spline model, convert by length, figures.

One session fit (through the command line, so the CLI, fit, save and load are exercised once) of a
small simulated study: two gears with known logistic retention curves, two species, 30 groups,
20-mm classes, PyMC NUTS 2 chains x (250 tune + 250 draws). Convert tests feed known synthetic
draws instead of fitting (DEVELOPERS.md: keeping the suite fast).
"""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest
import xarray as xr

from calib.cells import build_length_cells, check_length_bin
from calib.errors import InputError
from calib.simulate import LengthSpec, logistic_retention, simulate_calibration
from calib.tables import complete_zeros, load_tables

GEARS = ["seine", "trawl"]
SPECIES = ["pinfish", "mummichog"]
# Retention curves (l50, sr) in mm: the usual logistic selection curve (Millar & Fryer 1999,
# Reviews in Fish Biology and Fisheries 9, "Estimating the size-selection curves of towed gears,
# traps, nets and hooks"). The seine keeps nearly everything above 25 mm; the trawl lets small fish
# through (l50 50 mm, selection range 25 mm).
RETENTION = {"seine": (25, 10), "trawl": (50, 25)}
FIT_SETTINGS = ["--draws", "250", "--tune", "250", "--chains", "2", "--seed", "5", "--quiet"]


def _study(n_groups=30, n_measured=100_000, bin_mm=20, seed=3):
    spec = LengthSpec(median_mm=[70, 90], cv=0.25, n_measured=n_measured, bin_mm=bin_mm,
                      patchiness_level="length_class", retention=RETENTION)
    return simulate_calibration(n_groups=n_groups, gears=GEARS, theta={"trawl": [0.0, 0.3]},
                                log_density_mean=[3.5, 3.2], kappa=5.0, seed=seed, species=SPECIES,
                                lengths=spec, effort={"seine": (0.8, 1.2), "trawl": (0.8, 1.2)})


def _write(study, d):
    d.mkdir(parents=True, exist_ok=True)
    study.hauls.to_csv(d / "hauls.csv", index=False)
    study.catches.to_csv(d / "catches.csv", index=False)
    study.lengths.to_csv(d / "lengths.csv", index=False)
    return d / "hauls.csv", d / "catches.csv", d / "lengths.csv"


@pytest.fixture(scope="session")
def length_fit(tmp_path_factory):
    """(study, FactorSet loaded from disk, output dir, exit code) of one `calib fit --length-bin 20`."""
    from calib.cli import main
    from calib.factors import FactorSet

    study = _study()
    d = tmp_path_factory.mktemp("length_fit")
    h, c, ln = _write(study, d)
    out = d / "factors"
    code = main(["fit", "--hauls", str(h), "--catches", str(c), "--lengths", str(ln), "--reference", "seine",
                 "--length-bin", "20", "--length-min-fish", "5", "--out", str(out), *FIT_SETTINGS])
    return study, FactorSet.load(out), out, code


# ----------------------------------------------------------------------------- simulator


def test_logistic_retention_matches_its_definition():
    # Millar & Fryer 1999: r(l50) = 0.5, r(l75) = 0.75, r(l25) = 0.25 with l75 - l25 = sr.
    r = logistic_retention([50.0, 50 + 12.5, 50 - 12.5], 50.0, 25.0)
    np.testing.assert_allclose(r, [0.5, 0.75, 0.25], atol=1e-12)


def test_simulator_truth_is_the_retention_ratio():
    """theta_length differs between classes exactly by log r_trawl - log r_seine (at mid-points)."""
    st = _study(n_groups=3)
    tl = st.theta_length[(st.theta_length.gear == "trawl") & (st.theta_length.species == "pinfish")]
    mid = tl["length_mm"].to_numpy(dtype=float) + 10.0
    log_ratio = np.log(logistic_retention(mid, *RETENTION["trawl"])) - np.log(logistic_retention(mid, *RETENTION["seine"]))
    np.testing.assert_allclose(np.diff(tl["theta"].to_numpy()), np.diff(log_ratio), atol=1e-10)


# ----------------------------------------------------------------------------- cells


def _tiny_tables(tmp_path, lengths_rows, catches_rows=None):
    hauls = pd.DataFrame({
        "haul_id": ["P1-A", "P1-B", "P2-A", "P2-B"], "gear": ["A", "B", "A", "B"],
        "date": "2024-05-01", "effort": [1.0, 2.0, 1.0, 1.0], "effort_unit": "m2", "pair_id": ["P1", "P1", "P2", "P2"]})
    catches = pd.DataFrame(catches_rows or [
        ("P1-A", "pinfish", 100), ("P1-B", "pinfish", 40), ("P2-A", "pinfish", 10), ("P2-B", "pinfish", 8)],
        columns=["haul_id", "species", "count"])
    lengths = pd.DataFrame(lengths_rows, columns=["haul_id", "species", "length_mm", "n"])
    hauls.to_csv(tmp_path / "h.csv", index=False)
    catches.to_csv(tmp_path / "c.csv", index=False)
    lengths.to_csv(tmp_path / "l.csv", index=False)
    return load_tables(tmp_path / "h.csv", tmp_path / "c.csv", tmp_path / "l.csv")


def test_cells_never_finer_than_input_classes(tmp_path):
    """Lengths recorded in 5-mm classes: a 2-mm or a 7-mm fit class would split them (error naming
    the file, row and column); 10 mm is accepted and keeps every measured fish."""
    rows = [("P1-A", "pinfish", 40, 10), ("P1-A", "pinfish", 45, 15), ("P1-B", "pinfish", 50, 20),
            ("P2-A", "pinfish", 40, 5), ("P2-A", "pinfish", 55, 5), ("P2-B", "pinfish", 45, 8)]
    t = _tiny_tables(tmp_path, rows)
    res, problems = check_length_bin(t.lengths, 10.0, "l.csv")
    assert res == {"pinfish": 5.0} and problems == []
    for bad in (2.0, 7.0):
        with pytest.raises(InputError) as err:
            build_length_cells(t.hauls, complete_zeros(t), t.lengths, "A", bad, lengths_file="l.csv")
        p = err.value.problems[0]
        assert p.column == "length_mm" and "5-mm" in p.message and p.file == "l.csv" and p.row is not None
    lc = build_length_cells(t.hauls, complete_zeros(t), t.lengths, "A", 10.0)
    assert lc.cells.counts.sum() == sum(r[3] for r in rows)
    assert set(lc.stratum_length) == {40.0, 50.0}
    assert lc.input_resolution == {"pinfish": 5.0}


def test_measured_fraction_multiplies_the_weight(tmp_path):
    """A subsampled haul's weight is relative effort x measured fraction (design sections 3, 5).

    P1: A effort 1 caught 100 and measured 25 (f = 0.25); B effort 2 caught 40 and measured all
    (f = 1); group mean effort 1.5. So w_A = 1/1.5 * 0.25, w_B = 2/1.5 * 1."""
    rows = [("P1-A", "pinfish", 41, 25), ("P1-B", "pinfish", 43, 40),
            ("P2-A", "pinfish", 42, 10), ("P2-B", "pinfish", 44, 8)]
    t = _tiny_tables(tmp_path, rows)
    lc = build_length_cells(t.hauls, complete_zeros(t), t.lengths, "A", 10.0)
    cells = lc.cells
    p1 = cells.groups.index("P1")
    i = int(np.flatnonzero(cells.cell_group == p1)[0])
    np.testing.assert_allclose(cells.weight[i], [0.25 / 1.5, 2.0 / 1.5])
    np.testing.assert_array_equal(cells.counts[i], [25, 40])
    p2 = int(np.flatnonzero(cells.cell_group == cells.groups.index("P2"))[0])
    np.testing.assert_allclose(cells.weight[p2], [1.0, 1.0])  # fully measured: f = 1


def test_haul_without_lengths_is_left_out_and_counted(tmp_path):
    """P1-B caught 40 pinfish but has no lengths: its gear is masked in P1 (P1 then has one gear
    and no split), and the report counts one haul x species and 40 fish."""
    rows = [("P1-A", "pinfish", 41, 25), ("P2-A", "pinfish", 42, 10), ("P2-B", "pinfish", 44, 8)]
    t = _tiny_tables(tmp_path, rows)
    lc = build_length_cells(t.hauls, complete_zeros(t), t.lengths, "A", 10.0)
    assert lc.report["no_lengths_haul_species"] == 1
    assert lc.report["no_lengths_fish"] == 40
    assert lc.report["no_lengths_by_species"] == {"pinfish": 1}
    assert [lc.cells.groups[g] for g in lc.cells.cell_group] == ["P2"]  # P1 left out of the length model


# ----------------------------------------------------------------------------- fit


def test_length_fit_recovers_the_retention_ratio(length_fit):
    """The fitted factor-by-length band covers the true curve over most of the range.

    Truth: factor(l) = exp(-theta(l)) with theta the log ratio of the two logistic retention curves
    (Millar & Fryer 1999) plus the species level (simulator docstring). "Most" = at least 75 % of
    the species x classes inside the calibrated range are covered by the 90 % interval (a rule of
    thumb, no source: smoothing pulls the steep small-length end toward its neighbours, so full
    nominal coverage is not expected at the edges; the slow study below measures average coverage).
    """
    study, fs, _, code = length_fit
    assert code == 0
    t = fs.table.merge(study.theta_length[study.theta_length.gear == "trawl"][["species", "length_mm", "factor"]],
                       on=["species", "length_mm"], how="left", suffixes=("", "_true"))
    assert t["factor"].notna().all()
    covered = (t["factor_lower"] <= t["factor"]) & (t["factor"] <= t["factor_upper"])
    print(f"length recovery: {int(covered.sum())} of {len(t)} classes covered by the 90 % band")
    assert len(t) >= 10
    assert covered.mean() >= 0.75, t[["species", "length_mm", "factor_median", "factor_lower", "factor_upper",
                                      "factor"]].to_string()
    # the length effect is found where small fish are common (pinfish, median 70 mm): the smallest
    # class's interval lies wholly above the interval of the class holding the median (truth 2.9 vs 0.85)
    part = t[t.species == "pinfish"].sort_values("length_mm")
    at_median = part[part["length_mm"] == 60.0]
    assert part["factor_lower"].iloc[0] > at_median["factor_upper"].iloc[0]


def test_length_factor_set_layout(length_fit):
    """factors.csv: one row per species x gear x class inside the calibrated range; posterior theta
    has a length dimension; manifest records the bins and the range; every row has a status."""
    study, fs, out, _ = length_fit
    m = json.loads((out / "manifest.json").read_text())
    L = m["lengths"]
    assert L["bin_mm"] == 20.0 and set(L["calibrated_range_mm"]) == set(SPECIES)
    assert L["input_resolution_mm"] == {"pinfish": 1.0, "mummichog": 1.0}
    for sp in SPECIES:
        rows = fs.table[fs.table.species == sp]
        lo, hi = L["calibrated_range_mm"][sp]
        assert rows["length_mm"].min() == lo and rows["length_mm"].max() == hi - 20.0
        assert list(rows["length_mm"]) == L["classes_mm"][sp]
    assert set(fs.table["gear"]) == {"trawl"}
    assert fs.table["status"].isin(["ok", "warn", "fail"]).all()
    assert fs.table[["rhat", "ess_bulk", "prior_ratio", "n_groups", "n_caught"]].notna().all().all()
    theta = fs.idata.posterior["theta"]
    assert theta.dims == ("chain", "draw", "gear", "species", "length")
    for sp in SPECIES:  # NaN exactly outside the species' classes
        finite = np.isfinite(theta.sel(gear="trawl", species=sp).values).all(axis=(0, 1))
        assert list(theta["length"].values[finite]) == L["classes_mm"][sp]
    from calib.length_fit import length_theta_draws

    classes, th = length_theta_draws(fs, "pinfish", "trawl")
    rows = fs.table[fs.table.species == "pinfish"]
    np.testing.assert_allclose(np.median(np.exp(-th), axis=0), rows["factor_median"], rtol=1e-5)
    assert "log_likelihood" in fs.idata.groups() and "split" in fs.idata.log_likelihood
    assert (out / "length_split.csv").is_file()


def test_length_figures_read_results(length_fit):
    from calib.plots import plot_factor_by_length, plot_split_by_length

    study, fs, _, _ = length_fit
    fig = plot_factor_by_length(fs.table, truth=study.theta_length)
    assert len([a for a in fig.axes if a.get_visible()]) == 2
    assert fig.axes[0].get_yscale() == "log"
    split = fs.extra_tables["length_split"]
    assert {"observed_share", "fitted_median"} <= set(split.columns)
    # shares of the gears in a class add to 1 (observed and fitted medians, up to draw noise)
    sums = split.groupby(["species", "length_mm"])["observed_share"].sum()
    np.testing.assert_allclose(sums, 1.0, atol=1e-5)  # written with 6 significant digits
    fig2 = plot_split_by_length(split)
    assert len([a for a in fig2.axes if a.get_visible()]) == 2


# ----------------------------------------------------------------------------- convert


def _synthetic_length_set(status="ok"):
    """Known draws: trawl factor 2 at 40 mm, 1 at 60 mm, 0.5 at 80 mm for pinfish (x draw noise)."""
    from calib.length_fit import factor_set_from_length_draws

    rng = np.random.default_rng(0)
    D = 400
    base = np.log(np.array([2.0, 1.0, 0.5]))
    noise = 0.1 * rng.standard_normal((D, 3))
    th = np.zeros((1, D, 2, 1, 3))
    th[0, :, 1, 0, :] = -(base + noise)  # theta = -log factor
    theta = xr.DataArray(th, dims=("chain", "draw", "gear", "species", "length"),
                         coords={"chain": [0], "draw": np.arange(D), "gear": GEARS, "species": ["pinfish"],
                                 "length": [40.0, 60.0, 80.0]})
    return factor_set_from_length_draws(theta, reference="seine", bin_mm=20.0, factor_set_id="fs-length-test",
                                        status=status), np.exp(-th[0, :, 1, 0, :])


def _survey(tmp_path, lengths_rows, catches_rows):
    hauls = pd.DataFrame({"haul_id": ["S1", "S2", "S3", "S4", "S5"], "gear": ["trawl"] * 4 + ["seine"],
                          "date": "2015-06-01", "effort": [2.0, 1.0, 1.0, 1.0, 1.0], "effort_unit": "m2"})
    hauls.to_csv(tmp_path / "sh.csv", index=False)
    pd.DataFrame(catches_rows, columns=["haul_id", "species", "count"]).to_csv(tmp_path / "sc.csv", index=False)
    pd.DataFrame(lengths_rows, columns=["haul_id", "species", "length_mm", "n"]).to_csv(tmp_path / "sl.csv",
                                                                                       index=False)
    return tmp_path / "sh.csv", tmp_path / "sc.csv", tmp_path / "sl.csv"


CATCHES = [("S1", "pinfish", 100), ("S2", "pinfish", 30), ("S3", "pinfish", 12), ("S5", "pinfish", 7)]
LENGTHS = [("S1", "pinfish", 45, 10), ("S1", "pinfish", 71, 15),  # S1: 25 of 100 measured
           ("S2", "pinfish", 50, 5), ("S2", "pinfish", 150, 1),  # S2: one fish beyond 100 mm
           ("S5", "pinfish", 60, 7)]  # S3 (12 caught) has no lengths; S4 caught none


def test_convert_by_length_class(tmp_path):
    """S1: 100 caught, 25 measured (10 at 40-60 mm, 15 at 60-80 mm); effort 2. Raised class counts
    40 and 60; cpue_ref draw d = (40 * factor_40[d] + 60 * factor_60[d]) / 2, summarised by quantiles
    (computed here independently with numpy)."""
    from calib.convert import convert

    fs, f = _synthetic_length_set()
    h, c, ln = _survey(tmp_path, LENGTHS, CATCHES)
    cv = convert(fs, h, c, lengths=ln)
    rec = cv.records.set_index("haul_id")
    want = (40 * f[:, 0] + 60 * f[:, 1]) / 2.0
    q = np.quantile(want, [0.05, 0.5, 0.95])
    np.testing.assert_allclose(rec.loc["S1", ["cpue_ref_lower", "cpue_ref_median", "cpue_ref_upper"]].to_numpy(
        dtype=float), q, rtol=1e-10)
    assert rec.loc["S4", "cpue_ref_median"] == 0.0  # a zero converts to zero
    assert rec.loc["S5", "cpue_ref_median"] == 7.0  # reference gear passes through
    rl = cv.record_lengths
    np.testing.assert_allclose(rl[rl.haul_id == "S1"]["raised_count"].sum(), 100.0)
    # the class draws are stored once per class, not per record
    assert len(cv.length_factor_draws) == 3 * 400
    rej = cv.rejected.set_index("haul_id")
    assert rej.loc["S2", "reason_code"] == "outside_length_range"
    assert "--outside-lengths nearest" in rej.loc["S2", "reason"]
    assert rej.loc["S3", "reason_code"] == "no_lengths"
    assert cv.n_in == cv.n_converted + cv.n_rejected == 5


def test_convert_nearest_class_flags(tmp_path):
    """With outside_lengths="nearest" the 150-mm fish of S2 takes the 80-mm class's factor and the
    record is flagged: cpue_ref[d] = 30 * (5/6 factor_40[d] + 1/6 factor_80[d])."""
    from calib.convert import convert

    fs, f = _synthetic_length_set()
    h, c, ln = _survey(tmp_path, LENGTHS, CATCHES)
    cv = convert(fs, h, c, lengths=ln, outside_lengths="nearest")
    rec = cv.records.set_index("haul_id")
    want = 30 * (5 / 6 * f[:, 0] + 1 / 6 * f[:, 2])
    np.testing.assert_allclose(rec.loc["S2", "cpue_ref_median"], np.quantile(want, 0.5), rtol=1e-10)
    assert "nearest class" in rec.loc["S2", "domain_flag"]
    assert rec.loc["S1", "domain_flag"] == ""
    assert list(cv.rejected["reason_code"]) == ["no_lengths"]
    assert cv.n_in == cv.n_converted + cv.n_rejected
    out = cv.save(tmp_path / "conv")
    assert (out / "length_factor_draws.parquet").is_file() and (out / "record_lengths.csv").is_file()
    # series rebuilds each record's draws from these files: the same series from memory and from
    # the directory (tests/test_series_record_factors.py checks the values)
    from calib.series import series

    a, b = series(cv, seed=1), series(out, seed=1)
    np.testing.assert_allclose(a.draws.value, b.draws.value, rtol=1e-6)  # record_lengths.csv: 6 digits
    assert a.table["n_domain_flagged"].iloc[0] == 1  # S2, converted with the nearest class


def test_convert_rejects_fail_classes_and_coarse_survey_lengths(tmp_path):
    from calib.convert import convert

    fs, _ = _synthetic_length_set(status={("pinfish", "trawl", 60.0): "fail"})
    h, c, ln = _survey(tmp_path, LENGTHS, CATCHES)
    cv = convert(fs, h, c, lengths=ln)
    assert cv.rejected.set_index("haul_id").loc["S1", "reason_code"] == "factor_fail"  # S1 uses 60-80 mm
    cv2 = convert(fs, h, c, lengths=ln, allow_unconverged=True)
    assert cv2.records.set_index("haul_id").loc["S1", "factor_status"] == "fail"
    # survey lengths in 40-mm classes cannot be given one 20-mm class factor
    coarse = [("S1", "pinfish", 40, 10), ("S1", "pinfish", 80, 15), ("S2", "pinfish", 120, 1)]
    h, c, ln = _survey(tmp_path, coarse, CATCHES)
    with pytest.raises(InputError) as err:
        convert(fs, h, c, lengths=ln)
    assert err.value.problems[0].column == "length_mm"


def test_convert_cli_options(tmp_path, capsys):
    from calib.cli import main

    fs, _ = _synthetic_length_set()
    fs.save(tmp_path / "fs")
    h, c, ln = _survey(tmp_path, LENGTHS, CATCHES)
    code = main(["convert", "--factors", str(tmp_path / "fs"), "--hauls", str(h), "--catches", str(c),
                 "--lengths", str(ln), "--outside-lengths", "nearest", "--out", str(tmp_path / "o")])
    assert code == 0
    printed = capsys.readouterr().out
    assert "length class by length class" in printed
    assert pd.read_csv(tmp_path / "o" / "rejected.csv")["reason_code"].tolist() == ["no_lengths"]


# ----------------------------------------------------------------------------- slow study


@pytest.mark.slow
def test_length_recovery_coverage_study(tmp_path):
    """Average coverage of the 90 % band over 4 simulated studies (40 groups, 10-mm classes, all
    fish measured) is at least 0.8. Measured 2026-12-02: 0.89, 0.88, 0.81, 0.96 (mean 0.885; 9.4 min
    on the shared 2-core machine). The CI subset is the single 20-mm study above (power: one study of
    about 15 classes detects a gross miscalibration, e.g. coverage near 0.5, not a modest one)."""
    from calib.fitting import fit

    cover = []
    for seed in range(4):
        st = _study(n_groups=40, bin_mm=10, seed=100 + seed)
        h, c, ln = _write(st, tmp_path / f"s{seed}")
        fs = fit(h, c, lengths=ln, reference="seine", length_bin=10, length_min_fish=5, draws=500, tune=500,
                 chains=2, seed=seed, progressbar=False)
        t = fs.table.merge(st.theta_length[st.theta_length.gear == "trawl"][["species", "length_mm", "factor"]],
                           on=["species", "length_mm"], suffixes=("", "_true"))
        cover.append(((t.factor_lower <= t.factor) & (t.factor <= t.factor_upper)).mean())
        print(f"seed {seed}: {len(t)} classes, coverage {cover[-1]:.2f}, divergences {fs.manifest['divergences']}")
    assert np.mean(cover) >= 0.8, cover


def test_fit_cli_length_usage_errors(tmp_path, capsys):
    """--length-bin without --lengths, with a non-positive width or with a baseline is a usage error
    (exit 2) before anything is read; --help explains the option."""
    from calib.cli import main

    base = ["fit", "--hauls", "h.csv", "--catches", "c.csv", "--reference", "seine", "--out", str(tmp_path / "o")]
    for extra in (["--length-bin", "10"], ["--length-bin", "0", "--lengths", "l.csv"],
                  ["--length-bin", "10", "--lengths", "l.csv", "--method", "ratio"]):
        with pytest.raises(SystemExit) as err:
            main(base + extra)
        assert err.value.code == 2
    assert "--length-bin" in capsys.readouterr().err
    with pytest.raises(SystemExit):
        main(["fit", "--help"])
    text = capsys.readouterr().out
    assert "--length-bin" in text and "--length-min-fish" in text


def test_measured_fraction_offset_recovers_theta_from_subsampled_hauls():
    """Subsampled hauls: each seine haul's fish are measured with probability 0.25, each trawl haul's
    with 0.5 or 1 (coin flip per haul). Binomial thinning of Poisson counts gives Poisson counts with
    mean f times the original (Poisson thinning; Kingman 1993, "Poisson Processes", recalled from
    memory), so the split of the measured fish is multinomial with weights w * f exactly, and the
    conditional-logit maximum likelihood fit (equal to the Poisson GLM with group fixed effects:
    Baker 1994, The Statistician 43) on the length cells must recover every class's theta: Wald
    z-scores centred on 0 and 90 % Wald intervals covering about 90 %. The same cells with the
    measured fraction left out of the weights are off by about log(0.25 / 0.75) on average, which
    the z-scores show plainly."""
    from calib.baselines import fit_glm

    st = simulate_calibration(
        n_groups=150, gears=GEARS, theta={"trawl": [0.2]}, log_density_mean=[4.0], patchiness="none", seed=8,
        species=["pinfish"], effort={"seine": (0.8, 1.2), "trawl": (0.8, 1.2)},
        lengths=LengthSpec(median_mm=[80], cv=0.3, n_measured=10**9, bin_mm=20, patchiness_level="length_class",
                           retention=RETENTION))
    rng = np.random.default_rng(1)
    gear_of = dict(zip(st.hauls["haul_id"], st.hauls["gear"]))
    f_haul = {h: (0.25 if g == "seine" else rng.choice([0.5, 1.0])) for h, g in gear_of.items()}
    ln = st.lengths.copy()
    ln["n"] = rng.binomial(ln["n"].to_numpy(), ln["haul_id"].map(f_haul).to_numpy())
    ln = ln[ln["n"] > 0]
    hauls = st.hauls.assign(date=pd.to_datetime(st.hauls["date"]))
    counts = pd.MultiIndex.from_product([hauls["haul_id"], ["pinfish"]], names=["haul_id", "species"]).to_frame(
        index=False).merge(st.catches, how="left").fillna({"count": 0})
    lc = build_length_cells(hauls, counts, ln, "seine", 20.0, min_class_fish=30)
    truth = st.theta_length[st.theta_length.gear == "trawl"].set_index("length_mm")["theta"]

    def z_scores(cells):
        point = fit_glm(cells, interval=0.9, n_draws=10, seed=0).point
        lengths = lc.stratum_frame().set_index("stratum")["length_mm"]
        est = point.set_index("species")
        t = truth.loc[lengths.loc[est.index].to_numpy()].to_numpy()
        return (est["theta"].to_numpy() - t) / est["theta_se"].to_numpy(), \
            (est["theta_lower"].to_numpy() <= t) & (t <= est["theta_upper"].to_numpy())

    z, covered = z_scores(lc.cells)
    assert len(z) >= 6
    assert abs(z.mean()) < 3 / np.sqrt(len(z)) + 0.3  # mean of ~N(0,1) z-scores: within 3 se (+ slack)
    assert covered.mean() >= 0.6  # nominal 0.9; >= 0.6 fails with probability < 1 % for 8 classes
    # without the measured fraction (weights = relative effort only) the fit is clearly off
    from dataclasses import replace

    eff = lc.cells.effort
    mean_e = eff.sum(axis=1) / lc.cells.present.sum(axis=1)
    no_f = replace(lc.cells, weight=np.where(lc.cells.present, eff / mean_e[:, None], 0.0))
    z_bad, _ = z_scores(no_f)
    print(f"classes {len(z)}: mean z {z.mean():.2f}, coverage {covered.mean():.2f}; without f: mean z {z_bad.mean():.1f}")
    assert abs(z_bad.mean()) > 5


def test_species_never_measured_gets_no_classes(tmp_path):
    """A species caught in the calibration but never measured has no calibrated range (no factor rows
    would be written for it), is named in the report, and its catches count as left out."""
    rows = [("P1-A", "pinfish", 41, 25), ("P1-B", "pinfish", 43, 40), ("P2-A", "pinfish", 42, 10),
            ("P2-B", "pinfish", 44, 8)]
    catches = [("P1-A", "pinfish", 100), ("P1-B", "pinfish", 40), ("P2-A", "pinfish", 10), ("P2-B", "pinfish", 8),
               ("P1-A", "mummichog", 3), ("P2-B", "mummichog", 5)]
    t = _tiny_tables(tmp_path, rows, catches)
    lc = build_length_cells(t.hauls, complete_zeros(t), t.lengths, "A", 10.0)
    assert lc.report["species_without_range"] == ["mummichog"]
    assert "mummichog" not in lc.classes and set(lc.stratum_frame()["species"]) == {"pinfish"}
    assert lc.report["no_lengths_by_species"] == {"mummichog": 2} and lc.report["no_lengths_fish"] == 8


# ----------------------------------------------------------------------------- model pieces


def test_spline_basis_is_a_partition_of_unity():
    """B-splines sum to 1 at every point of their range (de Boor 1978, "A Practical Guide to
    Splines", recalled from memory), so constant coefficients give a constant factor; fewer than 4
    classes get one coefficient per class."""
    from calib.length_model import spline_basis

    lowers = np.arange(20.0, 200.0, 10.0)  # 18 classes
    B = spline_basis(lowers, 10.0, max_basis=12)
    assert B.shape == (18, 12)
    np.testing.assert_allclose(B.sum(axis=1), 1.0, atol=1e-12)
    np.testing.assert_allclose(B @ np.full(12, -0.7), -0.7, atol=1e-12)
    np.testing.assert_array_equal(spline_basis([40.0, 60.0, 80.0], 20.0), np.eye(3))
    assert spline_basis(lowers[:6], 10.0).shape == (6, 6)


def test_centred_coefficient_prior_matches_the_random_walk_density():
    """The centred form writes the prior of the coefficients as a density: mean(beta) ~ Normal(mu,
    tau) and every step beta_k - beta_(k-1) ~ Normal(0, sigma). Checked against scipy.stats.norm at a
    random point, and the numpy prior draws used for prior_ratio have those moments."""
    from scipy import stats

    from calib.length_fit import prior_theta_class
    from calib.length_model import LengthModelSpec, _basis_blocks, build_length_model

    st = _study(n_groups=6)
    hauls = st.hauls.assign(date=pd.to_datetime(st.hauls["date"]))
    counts = pd.MultiIndex.from_product([hauls["haul_id"], SPECIES], names=["haul_id", "species"]).to_frame(
        index=False).merge(st.catches, how="left").fillna({"count": 0})
    lc = build_length_cells(hauls, counts, st.lengths, "seine", 20.0)
    spec = LengthModelSpec(parametrization="centred")
    m = build_length_model(lc, spec)
    _, n_basis, k_max = _basis_blocks(lc, spec)
    rng = np.random.default_rng(4)
    point = m.initial_point()
    beta = rng.normal(0, 0.7, size=point["beta"].shape)
    point.update(beta=beta, mu=np.array([[0.3]]), tau_log__=np.log([0.6]), sigma_rw_log__=np.log([0.4]))
    names = ["mu", "tau_log__", "sigma_rw_log__", "beta"]
    values = {v.name: v for v in m.value_vars}
    f = m.compile_fn(m.potentiallogp, inputs=[values[n] for n in names], point_fn=False)  # its only potential
    got = float(f(*[point[n] for n in names]))
    want = 0.0
    for s in range(len(lc.species)):
        b = beta[0, s, : n_basis[s]]
        want += stats.norm.logpdf(b.mean(), 0.3, 0.6) + stats.norm.logpdf(np.diff(b), 0, 0.4).sum()
        want += stats.norm.logpdf(beta[0, s, n_basis[s]:], 0, 1).sum()  # unused padding: N(0, 1)
    np.testing.assert_allclose(got, want, rtol=1e-10)
    # numpy prior draws (prior_ratio's denominator): theta constant when the walk has no steps
    flat = prior_theta_class(lc, LengthModelSpec(rw_sd=1e-9), n_draws=50, seed=0)
    per_species = [flat[:, 0, lc.stratum_species == s] for s in range(len(lc.species))]
    assert all(np.ptp(x, axis=1).max() < 1e-6 for x in per_species)


def test_spectral_components_have_the_random_walk_prior():
    """The default forms write the centred random walk of the coefficients in its eigen-coordinates
    (calib.length_model.spectral_basis). Same prior: with r_1 = 0 and steps ~ N(0, 1), the centred
    walk c = (I - 11'/K) r has covariance P^+ (P = D'D, D first differences), so theta's covariance
    B Cov(c) B' must equal Phi Phi' for Phi = spectral_basis(B) (linear algebra of the first-order
    random walk; Rue & Held 2005, "Gaussian Markov Random Fields", ch. 3, recalled from memory)."""
    from calib.length_model import spectral_basis, spline_basis

    for n_classes, max_basis in ((18, 12), (7, 12), (3, 12), (12, 4)):
        B = spline_basis(np.arange(n_classes) * 10.0 + 20.0, 10.0, max_basis)
        k = B.shape[1]
        walk = np.tril(np.ones((k, k)), -1)[:, : k - 1]        # r = walk @ steps, r_1 = 0
        centre = np.eye(k) - np.ones((k, k)) / k
        cov_walk = B @ centre @ walk @ walk.T @ centre.T @ B.T
        phi = spectral_basis(B)
        assert phi.shape == (n_classes, k - 1)
        np.testing.assert_allclose(phi @ phi.T, cov_walk, atol=1e-10)
        # the components are the walk's deviations from its mean: they never move the level
        np.testing.assert_allclose(np.linalg.lstsq(B, phi, rcond=None)[0].sum(axis=0), 0.0, atol=1e-10)


def test_default_and_non_centred_forms_have_the_same_prior_on_theta():
    """"auto" (levels centred where the data are informative) and "non-centred" are the same model:
    their prior draws of theta_class agree (two-sample KS test, scipy.stats.ks_2samp, p > 0.001 for
    every stratum), and on the data-rich test study "auto" centres the levels while a 2-group study
    keeps them non-centred (calib.model.centred_entries' rule applied per species)."""
    import pymc as pm
    from scipy import stats

    from calib.length_model import LengthModelSpec, build_length_model, level_centring

    def length_cells(n_groups, n_measured):
        st = _study(n_groups=n_groups, n_measured=n_measured)
        hauls = st.hauls.assign(date=pd.to_datetime(st.hauls["date"]))
        counts = pd.MultiIndex.from_product([hauls["haul_id"], SPECIES], names=["haul_id", "species"]).to_frame(
            index=False).merge(st.catches, how="left").fillna({"count": 0})
        return build_length_cells(hauls, counts, st.lengths, "seine", 20.0)

    rich = length_cells(30, 100_000)
    assert level_centring(rich, LengthModelSpec()).all()
    assert not level_centring(rich, LengthModelSpec(parametrization="non-centred")).any()
    sparse = length_cells(2, 10)
    assert not level_centring(sparse, LengthModelSpec()).any()
    draws = {}
    for form in ("auto", "non-centred"):
        with build_length_model(rich, LengthModelSpec(parametrization=form)):
            prior = pm.sample_prior_predictive(draws=3000, var_names=["theta_class"], random_seed=11).prior
        draws[form] = prior["theta_class"].values[0, :, 1, :]
    p_values = [stats.ks_2samp(draws["auto"][:, j], draws["non-centred"][:, j]).pvalue
                for j in range(draws["auto"].shape[1])]
    assert min(p_values) > 0.001, p_values


def test_length_model_cell_log_likelihood_is_the_beta_binomial():
    """The pointwise log-likelihood ``split`` (what LOO reads) is the full normalised probability of
    each cell's split: with two gears the Dirichlet-multinomial split is the beta-binomial
    (scipy.stats.betabinom; Johnson, Kemp & Kotz 2005, "Univariate Discrete Distributions", recalled
    from memory), y_other | n ~ BetaBinomial(n, kappa w_other exp(theta), kappa w_ref). Guards the
    parameter-free terms that the model takes as precomputed data."""
    from scipy import stats

    from calib.length_model import build_length_model

    st = _study(n_groups=6)
    hauls = st.hauls.assign(date=pd.to_datetime(st.hauls["date"]))
    counts = pd.MultiIndex.from_product([hauls["haul_id"], SPECIES], names=["haul_id", "species"]).to_frame(
        index=False).merge(st.catches, how="left").fillna({"count": 0})
    lc = build_length_cells(hauls, counts, st.lengths, "seine", 20.0)
    m = build_length_model(lc)
    rng = np.random.default_rng(8)
    point = {k: v + rng.normal(0.0, 0.5, size=np.shape(v)) for k, v in m.initial_point().items()}
    logp = m.compile_fn(m.logp(vars=m.observed_RVs, sum=False)[0], inputs=m.value_vars,
                        on_unused_input="ignore")(point)
    outs = m.replace_rvs_by_values([m["theta_class"], m["log_kappa"]])
    theta, log_kappa = m.compile_fn(outs, inputs=m.value_vars, on_unused_input="ignore")(point)
    c = lc.cells
    kappa = np.exp(log_kappa[c.cell_combo, lc.stratum_species[c.cell_species]])
    y, w = np.asarray(c.counts), np.asarray(c.weight)
    want = stats.betabinom.logpmf(y[:, 1], y.sum(axis=1), kappa * w[:, 1] * np.exp(theta[1, c.cell_species]),
                                  kappa * w[:, 0])
    assert c.n_cells > 50
    np.testing.assert_allclose(logp, want, rtol=1e-10, atol=1e-10)
