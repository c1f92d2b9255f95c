"""The simulator generates what its docstring says, and the bundled demo is its exact output."""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from calib import simulate as sm

DEMO_DIR = Path(__file__).resolve().parents[1] / "demo_paired_tows"
ALLOWED_TAXA = {
    "pinfish": "Lagodon rhomboides",
    "silver perch": "Bairdiella chrysoura",
    "mummichog": "Fundulus heteroclitus",
    "striped killifish": "Fundulus majalis",
    "striped mullet": "Mugil cephalus",
    "Atlantic silverside": "Menidia menidia",
    "Atlantic menhaden": "Brevoortia tyrannus",
    "spotted seatrout": "Cynoscion nebulosus",
    "southern flounder": "Paralichthys lethostigma",
    "hogchoker": "Trinectes maculatus",
    "star drum": "Stellifer lanceolatus",
    "blue crab": "Callinectes sapidus",
    "daggerblade grass shrimp": "Palaemon pugio",
    "pink shrimp": "Penaeus duorarum",
}


# ---------------------------------------------------------------------------------------------
# Helpers
# ---------------------------------------------------------------------------------------------


def split_chi_square(k: np.ndarray, n: np.ndarray, pmf, totals=range(2, 31), min_expected=5.0):
    """Pearson chi-square of the split k | n against ``pmf(n) -> probabilities of 0..n``.

    Groups are taken by their total n (each total is its own multinomial sample); adjacent
    outcomes are merged until every bin expects >= 5 (Cochran's rule: common practice, no source).
    Returns (statistic, degrees of freedom, p-value).
    """
    stat, df = 0.0, 0
    for total in totals:
        sel = n == total
        n_groups = int(sel.sum())
        if n_groups < 20:
            continue
        observed = np.bincount(k[sel], minlength=total + 1).astype(float)
        expected = n_groups * pmf(total)
        obs_bins, exp_bins, o, e = [], [], 0.0, 0.0
        for ob, ex in zip(observed, expected):
            o, e = o + ob, e + ex
            if e >= min_expected:
                obs_bins.append(o)
                exp_bins.append(e)
                o, e = 0.0, 0.0
        if e > 0:  # leftover tail goes into the last bin
            if exp_bins:
                obs_bins[-1] += o
                exp_bins[-1] += e
            else:
                obs_bins, exp_bins = [o], [e]
        if len(exp_bins) < 2:
            continue
        obs_bins, exp_bins = np.array(obs_bins), np.array(exp_bins)
        stat += float(((obs_bins - exp_bins) ** 2 / exp_bins).sum())
        df += len(exp_bins) - 1
    return stat, df, float(stats.chi2.sf(stat, df))


def two_gear_study(patchiness: str, seed: int, n_groups: int = 20000):
    return sm.simulate_calibration(
        n_groups,
        ["A", "B"],
        {"B": [0.6]},
        [math.log(8.0)],
        kappa=[1.5],
        patchiness=patchiness,
        effort={"A": 1000.0, "B": 2500.0},
        seed=seed,
        log_density_sd=0.8,
    )


# ---------------------------------------------------------------------------------------------
# Gamma patchiness gives the Dirichlet-multinomial split
# ---------------------------------------------------------------------------------------------
# Source: Mosimann, J.E. (1962) "On the compound multinomial distribution, the multivariate
# beta-distribution, and correlations among proportions", Biometrika 49: 65-82 (the
# Dirichlet-multinomial; for two categories the beta-binomial). Independent Poisson counts with
# gamma rates of a common rate parameter, given their sum, are Dirichlet-multinomial with the
# gamma shapes as concentrations (gamma-Poisson mixture = negative binomials with a common
# probability; recalled from memory). Level of every goodness-of-fit test below: 0.001.


def test_gamma_split_of_two_gears_is_beta_binomial():
    study = two_gear_study("gamma", seed=11)
    k = study.counts[:, 1, 0]
    n = study.counts[:, :, 0].sum(axis=1)
    w = study.group_effort / study.group_effort.mean(axis=1, keepdims=True)
    assert np.allclose(w[:, 0], 1000 / 1750) and np.allclose(w[:, 1], 2500 / 1750)
    alpha_a, alpha_b = 1.5 * w[0, 0], 1.5 * w[0, 1] * math.exp(0.6)
    stat, df, p = split_chi_square(k, n, lambda t: stats.betabinom.pmf(np.arange(t + 1), t, alpha_b, alpha_a))
    assert df > 100  # many totals contribute: the test has power
    assert p > 0.001, (stat, df)


def test_split_test_rejects_a_binomial_split():
    # Same design without patchiness: the split is binomial, far from the beta-binomial above,
    # so the goodness-of-fit check is not vacuous.
    study = two_gear_study("none", seed=12)
    k = study.counts[:, 1, 0]
    n = study.counts[:, :, 0].sum(axis=1)
    alpha_a, alpha_b = 1.5 * 1000 / 1750, 1.5 * 2500 / 1750 * math.exp(0.6)
    _, _, p = split_chi_square(k, n, lambda t: stats.betabinom.pmf(np.arange(t + 1), t, alpha_b, alpha_a))
    assert p < 1e-10
    # ... and the binomial it is does fit.
    p_b = 2500 * math.exp(0.6) / (1000 + 2500 * math.exp(0.6))
    _, _, p_ok = split_chi_square(k, n, lambda t: stats.binom.pmf(np.arange(t + 1), t, p_b))
    assert p_ok > 0.001


def test_three_gear_split_aggregates_and_summed_hauls_keep_it_exact():
    # Gear B fishes two hauls per group (summed); its count against the other two gears, given the
    # group total, is beta-binomial(n, alpha_B, alpha_A + alpha_C): the Dirichlet-multinomial's
    # aggregation property (Mosimann 1962, recalled from memory).
    theta = {"B": [-0.4], "C": [0.5]}
    study = sm.simulate_calibration(
        15000, ["A", "B", "C"], theta, [math.log(6.0)], kappa=[2.0],
        effort={"A": 1200.0, "B": 400.0, "C": 800.0}, hauls_per_gear={"B": 2}, seed=13,
    )
    assert (study.hauls["gear"] == "B").sum() == 2 * 15000
    assert np.allclose(study.group_effort[:, 1], 800.0)
    ebar = (1200 + 800 + 800) / 3
    alpha = 2.0 * np.array([1200 / ebar, 800 / ebar * math.exp(-0.4), 800 / ebar * math.exp(0.5)])
    counts = study.counts[:, :, 0]
    n = counts.sum(axis=1)
    for g in range(3):
        rest = alpha.sum() - alpha[g]
        _, df, p = split_chi_square(
            counts[:, g], n, lambda t, a=alpha[g], b=rest: stats.betabinom.pmf(np.arange(t + 1), t, a, b)
        )
        assert df > 60
        assert p > 0.001, (g, p)


def test_networks_without_a_direct_link_mask_absent_gears():
    groups = [("A", "B")] * 50 + [("B", "C")] * 50
    study = sm.simulate_calibration(100, ["A", "B", "C"], {"B": [0.2, 0.0], "C": [1.0, -1.0]},
                                    [2.0, 1.0], group_gears=groups, seed=3)
    assert not study.present[:50, 2].any() and not study.present[50:, 0].any()
    assert (study.counts[:50, 2] == 0).all() and (study.counts[50:, 0] == 0).all()
    pairs = study.hauls.groupby("pair_id")["gear"].apply(lambda g: "+".join(sorted(g)))
    assert set(pairs) == {"A+B", "B+C"}
    assert study.factors.loc["C", "species_1"] == pytest.approx(math.exp(-1.0))


def test_theta_offset_shifts_the_split_only_where_applied():
    offset = np.zeros((4000, 2))
    offset[:2000, 1] = 1.0  # e.g. gear B at night
    study = sm.simulate_calibration(4000, ["A", "B"], {"B": [0.0]}, [math.log(10.0)], kappa=[3.0],
                                    theta_offset=offset, seed=8)
    share = lambda c: c[:, 1, 0].sum() / c[:, :, 0].sum()  # noqa: E731
    # Ratio-of-sums share of B has expectation alpha_B / (alpha_A + alpha_B) (Dirichlet-multinomial mean).
    assert share(study.counts[:2000]) == pytest.approx(math.e / (1 + math.e), abs=0.02)
    assert share(study.counts[2000:]) == pytest.approx(0.5, abs=0.02)
    assert study.theta.loc["B", "species_1"] == 0.0  # the truth reported is theta without offset


# ---------------------------------------------------------------------------------------------
# Marginal moments of each patchiness
# ---------------------------------------------------------------------------------------------


def _within(sample: np.ndarray, expected: float, z: float = 4.0):
    se = sample.std(ddof=1) / math.sqrt(len(sample))
    assert abs(sample.mean() - expected) < z * se, (sample.mean(), expected, se)


def _fixed_density(patchiness: str, seed: int, **kw):
    return sm.simulate_calibration(
        40000, ["A", "B"], {"B": [-0.5]}, [math.log(5.0)], patchiness=patchiness,
        log_density_sd=0.0, seed=seed, **kw,
    )


def test_lognormal_tow_effect_moments():
    # y ~ Poisson(m * exp(eps)), eps ~ N(0, s): E[y] = m exp(s^2/2), E[y(y-1)] = m^2 exp(2 s^2)
    # (lognormal moments; Poisson factorial moment E[y(y-1) | L] = L^2).
    s = 0.7
    study = _fixed_density("lognormal", seed=21, tow_sd=s)
    for g, m in ((0, 5.0), (1, 5.0 * math.exp(-0.5))):
        y = study.counts[:, g, 0].astype(float)
        _within(y, m * math.exp(s**2 / 2))
        _within(y * (y - 1), m**2 * math.exp(2 * s**2))
    ya, yb = study.counts[:, 0, 0], study.counts[:, 1, 0]
    assert abs(np.corrcoef(ya, yb)[0, 1]) < 4 / math.sqrt(len(ya))  # independent tow effects
    assert math.isnan(study.kappa.iloc[0])


def test_no_patchiness_is_poisson():
    study = _fixed_density("none", seed=22)
    y = study.counts[:, 1, 0].astype(float)
    m = 5.0 * math.exp(-0.5)
    _within(y, m)
    dispersion = y.var(ddof=1) / y.mean()
    assert abs(dispersion - 1) < 4 * math.sqrt(2 / len(y))  # sd of the Poisson dispersion index
    assert np.isinf(study.kappa.iloc[0])


def test_gamma_patchiness_marginal_is_negative_binomial():
    # y ~ Poisson(lam * G), G ~ Gamma(shape a, rate kappa), a = kappa * w * exp(theta):
    # E[y] = lam a / kappa, E[y(y-1)] = lam^2 a (a + 1) / kappa^2.
    kappa = 1.3
    study = _fixed_density("gamma", seed=23, kappa=[kappa])
    for g, th in ((0, 0.0), (1, -0.5)):
        a = kappa * math.exp(th)
        y = study.counts[:, g, 0].astype(float)
        _within(y, 5.0 * a / kappa)
        _within(y * (y - 1), 25.0 * a * (a + 1) / kappa**2)


def test_counts_scale_with_effort_and_density_unit():
    study = sm.simulate_calibration(
        30000, ["A", "B"], {"B": [0.0]}, [math.log(2.0)], patchiness="none", log_density_sd=0.0,
        effort={"A": 3000.0, "B": 500.0}, density_effort=1000.0, seed=24,
    )
    _within(study.counts[:, 0, 0].astype(float), 6.0)
    _within(study.counts[:, 1, 0].astype(float), 1.0)
    assert set(study.hauls["effort_unit"]) == {"m2"}


def test_theta_of_the_reference_must_be_zero_and_gears_known():
    with pytest.raises(ValueError, match="reference"):
        sm.simulate_calibration(5, ["A", "B"], np.array([[0.1], [0.2]]), [1.0])
    with pytest.raises(ValueError, match="not in gears"):
        sm.simulate_calibration(5, ["A", "B"], {"Z": [0.2]}, [1.0])
    with pytest.raises(ValueError, match="patchiness"):
        sm.simulate_calibration(5, ["A", "B"], {"B": [0.2]}, [1.0], patchiness="beta")


def test_same_seed_same_tables_other_seed_other_tables():
    a = two_gear_study("gamma", seed=5, n_groups=300)
    b = two_gear_study("gamma", seed=5, n_groups=300)
    c = two_gear_study("gamma", seed=6, n_groups=300)
    pd.testing.assert_frame_equal(a.catches, b.catches)
    assert not a.catches.equals(c.catches)


def test_catches_hold_only_positive_counts_that_match_the_arrays():
    study = two_gear_study("gamma", seed=7, n_groups=500)
    assert (study.catches["count"] > 0).all()
    gear_of = study.hauls.set_index("haul_id")["gear"]
    by_gear = study.catches.groupby(study.catches["haul_id"].map(gear_of))["count"].sum()
    assert by_gear["A"] == study.counts[:, 0, 0].sum() and by_gear["B"] == study.counts[:, 1, 0].sum()
    cells = study.to_cells()
    assert cells.n_cells == int((study.counts.sum(axis=1)[:, 0] > 0).sum())


# ---------------------------------------------------------------------------------------------
# Lengths
# ---------------------------------------------------------------------------------------------


def _length_study(level: str, seed: int, n_groups: int = 3000, n_measured: int = 30):
    spec = sm.LengthSpec(median_mm=[60.0], cv=[0.3], slope_per_10mm={"B": [-0.5]}, n_measured=n_measured,
                         bin_mm=5, patchiness_level=level)
    return sm.simulate_calibration(n_groups, ["A", "B"], {"B": [0.4]}, [math.log(20.0)], kappa=[2.0],
                                   seed=seed, lengths=spec, log_density_sd=0.5)


def test_measured_subsample_is_at_most_n_measured_and_never_more_than_caught():
    study = _length_study("species", seed=31)
    measured = study.lengths.groupby(["haul_id", "species"])["n"].sum()
    caught = study.catches.set_index(["haul_id", "species"])["count"]
    joined = pd.concat([caught, measured], axis=1, keys=["count", "n"]).fillna(0)
    assert (joined["n"] == np.minimum(joined["count"], 30)).all()
    assert (study.lengths["length_mm"] > 0).all()
    assert (joined["count"] > 30).any()  # subsampling actually happened


def test_lengths_follow_each_gears_catch_at_length_distribution():
    study = _length_study("species", seed=32)
    tl = study.theta_length
    # Normalisation: the species-level ratio of expected counts is exp(theta) (simulate.LengthSpec).
    b = tl[tl["gear"] == "B"]
    assert (b["share"] * np.exp(b["theta"])).sum() == pytest.approx(math.exp(0.4))
    gear_of = study.hauls.set_index("haul_id")["gear"]
    lens = study.lengths.assign(gear=study.lengths["haul_id"].map(gear_of))
    for gear in ("A", "B"):
        t = tl[tl["gear"] == gear]
        pi = t["share"].to_numpy() * np.exp(t["theta"].to_numpy())
        pi = pi / pi.sum()
        cls = ((lens.loc[lens["gear"] == gear, "length_mm"] - t["length_mm"].min()) // 5).astype(int)
        observed = np.bincount(cls, weights=lens.loc[lens["gear"] == gear, "n"], minlength=len(pi))
        expected = observed.sum() * pi
        keep = expected >= 5
        o, e = observed[keep], expected[keep]
        if expected[~keep].sum() > 0:  # pool the sparse tail classes into one bin
            o, e = np.append(o, observed[~keep].sum()), np.append(e, expected[~keep].sum())
        p = stats.chisquare(o, e).pvalue
        assert p > 0.001, (gear, p)
    # The selectivity is visible: gear B (negative slope) catches smaller individuals.
    mean_len = lens.groupby("gear").apply(lambda d: np.average(d["length_mm"], weights=d["n"]), include_groups=False)
    assert mean_len["B"] < mean_len["A"] - 2


def test_length_class_patchiness_gives_the_class_level_split_mean():
    # Under patchiness_level="length_class" each class's split is Dirichlet-multinomial with
    # alpha_g = kappa w_g exp(theta_g(l)); its mean share of gear B is alpha_B / (alpha_A + alpha_B).
    # Every individual is measured here, so lengths.csv holds the full class counts.
    study = _length_study("length_class", seed=33, n_groups=4000, n_measured=10**9)
    tl = study.theta_length
    m = study.lengths.merge(study.hauls[["haul_id", "gear", "pair_id"]], on="haul_id")
    assert m["n"].sum() == study.catches["count"].sum()
    m = m.assign(cls=(m["length_mm"] - tl["length_mm"].min()) // 5)
    per = m.pivot_table(index=["pair_id", "cls"], columns="gear", values="n", aggfunc="sum", fill_value=0)
    tb = tl[tl["gear"] == "B"].reset_index(drop=True)
    checked = 0
    for cls, d in per.groupby(level="cls"):
        if d.values.sum() < 400:
            continue
        expected = math.exp(tb.loc[int(cls), "theta"]) / (1 + math.exp(tb.loc[int(cls), "theta"]))
        share = d["B"].sum() / d.values.sum()
        # Standard error of a ratio of sums over groups (ratio estimator, Cochran 1977 "Sampling
        # Techniques" ch. 6; recalled from memory).
        tot = d.sum(axis=1).to_numpy()
        resid = d["B"].to_numpy() - share * tot
        se = math.sqrt((resid**2).sum() * len(tot) / (len(tot) - 1)) / tot.sum()
        assert abs(share - expected) < 4 * se, (cls, share, expected, se)
        checked += 1
    assert checked >= 5


# ---------------------------------------------------------------------------------------------
# The bundled demo
# ---------------------------------------------------------------------------------------------


@pytest.fixture(scope="module")
def demo():
    return sm._demo_all()


def test_committed_demo_files_equal_simulator_output():
    texts = sm.demo_csv_texts()
    for name, text in texts.items():
        path = DEMO_DIR / name
        assert path.exists(), f"{path} missing: run calib.simulate.write_demo('demo_paired_tows')"
        assert path.read_bytes() == text.encode("utf-8"), f"{name} differs from write_demo() output"
    committed = {p.relative_to(DEMO_DIR).as_posix() for p in DEMO_DIR.rglob("*.csv")}
    assert committed == set(texts)
    total = sum((DEMO_DIR / n).stat().st_size for n in texts)
    assert total < 5_000_000


def test_demo_csvs_read_back_as_the_frames(demo):
    hauls = pd.read_csv(DEMO_DIR / "hauls.csv", dtype={"pair_id": "string"})
    assert list(hauls.columns) == list(demo["hauls"].columns)
    assert (hauls["haul_id"] == demo["hauls"]["haul_id"]).all()
    assert np.array_equal(hauls["effort"].to_numpy(), demo["hauls"]["effort"].to_numpy())
    catches = pd.read_csv(DEMO_DIR / "catches.csv")
    assert catches["count"].sum() == demo["catches"]["count"].sum()
    assert set(catches["haul_id"]) <= set(hauls["haul_id"])


def test_demo_readme_shows_the_true_factors_used():
    readme = (DEMO_DIR / "README.md").read_text(encoding="utf-8")
    assert sm.demo_truth_markdown() in readme
    for name in sm.DEMO_SPECIES:
        assert name in readme and ALLOWED_TAXA[name] in readme
    assert sm.DEMO_REFERENCE in readme and all(g in readme for g in sm.DEMO_GEARS)
    assert len(sm.DEMO_SPECIES) >= 10


def test_demo_taxa_are_from_the_allowed_list(demo):
    assert set(demo["catches"]["species"]) == set(sm.DEMO_SPECIES)
    sp = demo["truth/species"]
    for name, sci in zip(sp["species"], sp["scientific_name"]):
        assert ALLOWED_TAXA[name] == sci


def _groups(hauls: pd.DataFrame) -> pd.DataFrame:
    cal = hauls[hauls["pair_id"].notna()]
    return cal.groupby("pair_id").agg(
        gears=("gear", lambda g: "+".join(sorted(set(g)))),
        n_hauls=("haul_id", "size"),
        n_seine=("gear", lambda g: int((g == "beach_seine").sum())),
        n_dates=("date", "nunique"),
        n_sites=("site", "nunique"),
        lat_range=("latitude", lambda x: x.max() - x.min()),
    )


def test_demo_calibration_design_meets_minimum_sizes(demo):
    g = _groups(demo["hauls"])
    trawl_pairs = g[g["gears"] == "otter_trawl_new+otter_trawl_old"]
    assert len(trawl_pairs) >= 120 and (trawl_pairs["n_hauls"] == 2).all()
    seine = g[g["gears"].str.contains("beach_seine") & g["gears"].str.contains("otter_trawl_new")]
    assert len(seine) >= 60
    assert (seine["n_seine"] == 2).sum() >= 5  # several seine hauls summed by the program
    assert (seine["gears"] == "beach_seine+otter_trawl_new+otter_trawl_old").sum() >= 3
    # Side by side: same day, same site, well within 2 km (0.01 degree latitude is about 1.1 km).
    assert (g["n_dates"] == 1).all() and (g["n_sites"] == 1).all() and (g["lat_range"] < 0.01).all()
    assert len(g) * len(sm.DEMO_SPECIES) <= 220 * 12  # keeps a full fit near 2 minutes (measured.md)


def test_demo_efforts_are_area_swept_in_the_stated_ranges(demo):
    h = demo["hauls"]
    assert set(h["effort_unit"]) == {"m2"}
    trawl = h.loc[h["gear"].str.startswith("otter_trawl"), "effort"]
    seine = h.loc[h["gear"] == "beach_seine", "effort"]
    assert trawl.between(900, 3000).all() and seine.between(200, 600).all()


def test_demo_catches_have_many_zeros_abundant_and_rare_species(demo):
    h, c = demo["hauls"], demo["catches"]
    zero_share = 1 - len(c) / (len(h) * len(sm.DEMO_SPECIES))
    assert zero_share > 0.3
    totals = c.groupby("species")["count"].sum()
    for abundant in ("pinfish", "Atlantic silverside", "daggerblade grass shrimp"):
        assert totals[abundant] > 10 * totals["southern flounder"]
    for rare in ("southern flounder", "spotted seatrout"):
        assert totals[rare] < totals.median() / 5


def test_demo_true_factors_differ_by_species_plausibly(demo):
    f = demo["truth/factors"].set_index(["gear", "species"])["factor"]
    seine = f["beach_seine"]
    # Seine much more efficient for small schooling fish (factor < 1), less for flounder (> 1).
    assert seine["Atlantic silverside"] < 0.2 and seine["southern flounder"] > 1.5
    # The legacy trawl catches somewhat less than its replacement, by an amount varying by species.
    old = f["otter_trawl_old"]
    assert (old > 1).all() and (old < 2).all() and old.std() > 0.1


def test_demo_lengths_are_a_measured_subsample(demo):
    lengths, catches, hauls = demo["lengths"], demo["catches"], demo["hauls"]
    measured = lengths.groupby(["haul_id", "species"])["n"].sum()
    caught = catches.set_index(["haul_id", "species"])["count"]
    assert measured.index.isin(caught.index).all()
    assert (measured <= caught.reindex(measured.index)).all()
    survey = hauls.loc[hauls["pair_id"].isna(), "haul_id"]
    on_survey = measured.index.get_level_values("haul_id").isin(survey)
    assert measured[~on_survey].max() == 30 and measured[on_survey].max() == 10
    assert (lengths["n"] > 0).all() and (lengths["length_mm"] > 0).all()


def test_demo_surveys_span_twenty_years_with_gear_changes(demo):
    h = demo["hauls"]
    survey = h[h["pair_id"].isna()].assign(year=lambda d: d["date"].str[:4].astype(int))
    assert set(survey["source"]) == {"channel_trawl_survey", "shore_seine_survey", "tidal_creek_survey"}
    per = survey.groupby("source")
    assert (per["year"].nunique() >= 20).all()
    assert per.apply(lambda d: d.groupby("year").size().between(20, 40).all(), include_groups=False).all()
    gear_by_year = survey.groupby(["source", "year"])["gear"].agg(lambda g: "+".join(sorted(set(g))))
    ct = gear_by_year["channel_trawl_survey"]
    assert set(ct[ct.index <= 2014]) == {"otter_trawl_old"} and set(ct[ct.index >= 2015]) == {"otter_trawl_new"}
    assert set(gear_by_year["shore_seine_survey"]) == {"beach_seine"}
    tc = gear_by_year["tidal_creek_survey"]
    assert set(tc[tc.index <= 2013]) == {"beach_seine"} and set(tc[tc.index >= 2014]) == {"otter_trawl_new"}
    for col in ("site", "stratum", "stratum_area", "source"):
        assert survey[col].notna().all()
    # Covariates present; coordinates inside the made-up open-ocean box.
    assert set(h["day_night"]) == {"day", "night"}
    assert h[["depth_m", "temperature_c", "habitat"]].notna().all().all()
    assert h["latitude"].between(34.0, 34.2).all() and h["longitude"].between(-45.3, -45.0).all()


def test_demo_true_trend_is_in_the_survey_catches(demo):
    # Southern flounder truly declines (-0.05 log units a year), pinfish is flat. In the channel
    # trawl program, a Poisson GLM of counts on year, with log effort + the true theta of the gear
    # used as offset, recovers the true slopes; standard errors are cluster-robust by year because
    # the year effects are shared by all hauls of a year (statsmodels GLM, cov_type="cluster").
    import statsmodels.api as smapi

    h, c = demo["hauls"], demo["catches"]
    theta = demo["truth/factors"].set_index(["gear", "species"])["theta"]
    ct = h[h["source"] == "channel_trawl_survey"].assign(year=lambda d: d["date"].str[:4].astype(int))
    for species, slope in (("southern flounder", -0.05), ("pinfish", 0.0)):
        y = ct["haul_id"].map(c[c["species"] == species].set_index("haul_id")["count"]).fillna(0)
        th = np.array([0.0 if g == sm.DEMO_REFERENCE else theta[(g, species)] for g in ct["gear"]])
        X = smapi.add_constant((ct["year"] - 2004).to_numpy(dtype=float))
        offset = np.log(ct["effort"].to_numpy(float)) + th
        fit = smapi.GLM(y.to_numpy(), X, family=smapi.families.Poisson(), offset=offset).fit(
            cov_type="cluster", cov_kwds={"groups": ct["year"].to_numpy()}
        )
        assert fit.bse[1] < 0.03  # enough fish for the check to mean something
        assert abs(fit.params[1] - slope) < 3.5 * fit.bse[1], (species, fit.params[1], fit.bse[1])
    dens = demo["truth/density"]
    fl = dens[(dens["species"] == "southern flounder") & (dens["stratum"] == "north_shore")]
    assert np.polyfit(fl["year"], np.log(fl["density_per_1000m2"]), 1)[0] == pytest.approx(-0.05, abs=0.03)


def test_demo_calibration_cells_build(demo):
    from calib.cells import build_cells

    cells = build_cells(demo["hauls"], demo["catches"], reference=sm.DEMO_REFERENCE)
    assert cells.gears[0] == sm.DEMO_REFERENCE and set(cells.gears) == set(sm.DEMO_GEARS)
    assert cells.report["n_groups"] == 212
    assert cells.report["groups_with_summed_hauls"] == 14
    assert 1000 < cells.n_cells < 2400  # fit size that measured.md puts near 1-2 minutes


@pytest.mark.filterwarnings("ignore:df_model:UserWarning", "ignore:df_resid:UserWarning",
                            "ignore:more exog_names:statsmodels.tools.sm_exceptions.ValueWarning")
def test_demo_trawl_pairs_recover_the_true_factors_by_beta_binomial_ml(demo):
    # Maximum likelihood beta-binomial per species on the trawl pairs (statsmodels
    # GenericLikelihoodModel for the fit and its Hessian-based standard errors), against the truth.
    from statsmodels.base.model import GenericLikelihoodModel

    h, c = demo["hauls"], demo["catches"]
    pairs = h[h["pair_id"].fillna("").str.startswith("P14-")]
    eff = pairs.pivot(index="pair_id", columns="gear", values="effort")
    w_new = eff["otter_trawl_new"] / eff.mean(axis=1)
    w_old = eff["otter_trawl_old"] / eff.mean(axis=1)
    truth = demo["truth/factors"].set_index(["gear", "species"])["theta"]["otter_trawl_old"]

    class BetaBinomialSplit(GenericLikelihoodModel):
        def loglike(self, params):
            theta, log_kappa = params
            kappa = np.exp(log_kappa)
            k, n, wn, wo = self.endog, self.exog[:, 0], self.exog[:, 1], self.exog[:, 2]
            return stats.betabinom.logpmf(k, n, kappa * wo * np.exp(theta), kappa * wn).sum()

    z = []
    for species in sm.DEMO_SPECIES:
        cc = c[(c["species"] == species) & c["haul_id"].isin(pairs["haul_id"])]
        cc = cc.merge(pairs[["haul_id", "pair_id", "gear"]], on="haul_id")
        tab = cc.pivot_table(index="pair_id", columns="gear", values="count", aggfunc="sum", fill_value=0)
        tab = tab.reindex(columns=["otter_trawl_new", "otter_trawl_old"], fill_value=0)
        n = tab.sum(axis=1)
        if (n > 0).sum() < 100:
            continue
        exog = np.column_stack([n, w_new[tab.index], w_old[tab.index]])
        model = BetaBinomialSplit(tab["otter_trawl_old"].to_numpy(), exog)
        fit = model.fit(start_params=[0.0, 1.0], disp=0, method="bfgs", maxiter=500)
        z.append((fit.params[0] - truth[species]) / fit.bse[0])
    z = np.array(z)
    print("z of (ML theta - true theta):", np.round(z, 2))
    assert len(z) >= 8
    assert (np.abs(z) < 3.5).all(), z
    assert (z**2).sum() < stats.chi2.ppf(0.999, len(z)), z
