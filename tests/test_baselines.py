"""Frequentist baselines (calib.baselines): ratio of mean cpue and the conditional logit MLE.

Checked against statsmodels and scipy on the same simulated data, by recovering known values
(interval coverage) and against published properties; sources beside each check.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from scipy import optimize, stats

from calib.baselines import BaselineResult, fit_glm, fit_ratio, group_design
from calib.cells import cells_from_arrays

GEARS = ["otter_trawl", "beam_trawl", "seine"]  # gear 0 is the reference


def simulate_cells(seed, n_groups, combos, theta, species=None, log_density=2.0, density_sd=1.0,
                   effort_range=(0.5, 2.0), gears=GEARS):
    """Seeded Poisson catches in calibration groups (no overdispersion between tows).

    Group i uses gear combination combos[i % len(combos)] (tuples of gear indices); each gear's
    effort is uniform on effort_range; species density lambda_is is lognormal; the count is
    Poisson(lambda_is * effort_ig * exp(theta_gs)). theta is (n_gears, n_species), row 0 zero.
    Returns (cells, full) where full holds every group x species row, zeros included.
    """
    rng = np.random.default_rng(seed)
    theta = np.asarray(theta, dtype=float)
    n_gears, n_species = theta.shape
    species = species or [f"sp{s}" for s in range(n_species)]
    present = np.zeros((n_groups, n_gears), dtype=bool)
    for i in range(n_groups):
        present[i, list(combos[i % len(combos)])] = True
    effort = np.where(present, rng.uniform(*effort_range, size=(n_groups, n_gears)), 0.0)
    density = np.exp(rng.normal(log_density, density_sd, size=(n_groups, n_species)))
    mean = density[:, :, None] * effort[:, None, :] * np.exp(theta.T)[None, :, :]
    counts = np.where(present[:, None, :], rng.poisson(mean), 0)
    full = {
        "counts": counts.reshape(-1, n_gears),
        "present": np.repeat(present, n_species, axis=0),
        "effort": np.repeat(effort, n_species, axis=0),
        "cell_group": np.repeat(np.arange(n_groups), n_species),
        "cell_species": np.tile(np.arange(n_species), n_groups),
    }
    cells = cells_from_arrays(gears=list(gears[:n_gears]), species=species, **full)
    return cells, full


def row(result: BaselineResult, gear: str, species: str) -> pd.Series:
    p = result.point
    return p[(p["gear"] == gear) & (p["species"] == species)].iloc[0]


# ----------------------------------------------------------------------------- glm


def statsmodels_poisson_fe(cells):
    """Poisson GLM: group x species fixed effects + gear x species effects + log(effort) offset."""
    import statsmodels.api as sm

    long = cells.to_frame()
    long["species_i"] = cells.cell_species[long["cell"]]
    long["gear_i"] = long["gear"].map({g: i for i, g in enumerate(cells.gears)})
    cell_dummies = (long["cell"].to_numpy()[:, None] == np.arange(cells.n_cells)[None, :]).astype(float)
    names, cols = [], []
    for g in range(1, cells.n_gears):
        for s in range(cells.n_species):
            names.append((cells.gears[g], cells.species[s]))
            cols.append(((long["gear_i"] == g) & (long["species_i"] == s)).to_numpy(float))
    X = np.column_stack([cell_dummies] + cols)
    res = sm.GLM(long["count"].to_numpy(float), X, family=sm.families.Poisson(),
                 offset=np.log(long["effort"].to_numpy())).fit(tol=1e-13, maxiter=300)
    k = cells.n_cells
    return {name: (res.params[k + j], res.bse[k + j]) for j, name in enumerate(names)}


@pytest.mark.parametrize(
    "design, combos",
    [
        ("three-gear groups", [(0, 1), (0, 2), (0, 1, 2)]),
        ("network A-B, B-C, A-C never", [(0, 1), (1, 2)]),
    ],
)
def test_glm_matches_statsmodels_poisson_with_group_fixed_effects(design, combos):
    # Source: Baker 1994, "The multinomial-Poisson transformation", The Statistician 43
    # (also Palmgren 1981): the Poisson log-linear model with one fixed effect per
    # group x species gives the same MLE and the same standard errors for the gear effects
    # as the multinomial conditioned on the group totals. Reference library: statsmodels GLM.
    theta = [[0, 0, 0], [-0.6, 0.4, 0.1], [0.5, -0.3, 0.9]]
    cells, _ = simulate_cells(11, 45, combos, theta)
    ours = fit_glm(cells, n_draws=50)
    theirs = statsmodels_poisson_fe(cells)
    assert len(theirs) == 6
    for (gear, sp), (coef, se) in theirs.items():
        r = row(ours, gear, sp)
        assert r["note"] == ""
        np.testing.assert_allclose(r["theta"], coef, rtol=1e-5, atol=1e-7, err_msg=f"{design} {gear} {sp}")
        np.testing.assert_allclose(r["theta_se"], se, rtol=1e-5, err_msg=f"{design} {gear} {sp}")


def binomial_mle(cells, gear_index, species_index):
    """Independent MLE for one gear against the reference, from two-gear cells only:
    y_gear ~ Binomial(n, w_g e^theta / (w_ref + w_g e^theta)) via scipy.stats.binom."""
    rows = ((cells.cell_species == species_index) & cells.present[:, 0] & cells.present[:, gear_index]
            & (cells.present.sum(axis=1) == 2))
    y = cells.counts[rows, gear_index]
    n = cells.counts[rows].sum(axis=1)
    w_ref, w_g = cells.weight[rows, 0], cells.weight[rows, gear_index]

    def negloglik(t):
        p = w_g * np.exp(t) / (w_ref + w_g * np.exp(t))
        return -stats.binom.logpmf(y, n, p).sum()

    res = optimize.minimize_scalar(negloglik, bounds=(-8, 8), method="bounded",
                                   options={"xatol": 1e-11})
    return res.x


def test_glm_matches_binomial_likelihood_maximised_separately():
    # Source: for two gears the conditional split is binomial (the multinomial with two
    # categories); maximised here independently with scipy.stats.binom + minimize_scalar.
    theta = [[0, 0, 0], [-1.2, 0.3, 0.8]]
    cells, _ = simulate_cells(5, 60, [(0, 1)], theta, gears=GEARS[:2])
    ours = fit_glm(cells, n_draws=20)
    for s, sp in enumerate(cells.species):
        np.testing.assert_allclose(row(ours, GEARS[1], sp)["theta"], binomial_mle(cells, 1, s),
                                   rtol=1e-5, atol=1e-7)


def test_glm_wald_interval_coverage_near_nominal():
    # Property of maximum likelihood (Wald interval, e.g. Casella & Berger 2002, "Statistical
    # Inference", sec. 10.4): coverage near nominal without overdispersion.
    # Binomial bound: 250 replicates x 4 independent species = 1000 intervals per gear; at
    # nominal 0.9 the observed coverage has sd sqrt(0.9 * 0.1 / 1000) = 0.0095, we accept
    # 0.9 +- 0.03 (about 3.2 sd, false alarm about 0.15% per gear). Gear C is linked to the
    # reference only through B in half the groups (network), and directly in three-gear groups.
    theta = np.array([[0, 0, 0, 0], [-0.8, 0.2, 0.6, -0.3], [0.4, -0.5, 1.0, 0.0]])
    hits = {GEARS[1]: [], GEARS[2]: []}
    for rep in range(250):
        cells, _ = simulate_cells(1000 + rep, 30, [(0, 1), (1, 2), (0, 1, 2)], theta, log_density=1.0)
        result = fit_glm(cells, interval=0.9, n_draws=2, seed=rep)
        for g in (1, 2):
            for s, sp in enumerate(cells.species):
                r = row(result, GEARS[g], sp)
                assert r["note"] == ""
                hits[GEARS[g]].append(r["theta_lower"] <= theta[g, s] <= r["theta_upper"])
    for gear, h in hits.items():
        assert len(h) == 1000
        assert abs(np.mean(h) - 0.9) < 0.03, f"{gear}: coverage {np.mean(h):.3f}"


def test_glm_draws_follow_the_wald_normal():
    # The draws are the normal approximation at the MLE: mean theta_hat, sd = Wald se.
    # 4000 draws: Monte Carlo sd of the mean is se/63, of the sd about se/89; 5 sd bounds.
    cells, _ = simulate_cells(3, 40, [(0, 1, 2)], [[0, 0], [-0.5, 0.5], [0.3, 0.0]])
    result = fit_glm(cells, n_draws=4000, seed=9)
    d = result.theta_draws
    assert d.dims == ("chain", "draw", "gear", "species")
    assert d.sizes == {"chain": 1, "draw": 4000, "gear": 3, "species": 2}
    assert list(d.gear.values) == cells.gears and list(d.species.values) == cells.species
    assert (d.sel(gear=cells.reference) == 0).all()
    for r in result.point.itertuples():
        x = d.sel(gear=r.gear, species=r.species).values.ravel()
        assert abs(x.mean() - r.theta) < 5 * r.theta_se / np.sqrt(4000)
        assert abs(x.std() / r.theta_se - 1) < 5 / np.sqrt(2 * 4000)
    again = fit_glm(cells, n_draws=4000, seed=9)
    np.testing.assert_array_equal(again.theta_draws.values, d.values)


def test_factor_direction_and_interval_ends():
    # Design section 4: cpue_ref ~ factor x cpue_gear, factor = exp(-theta), so a gear that
    # catches less than the reference (theta < 0) has factor > 1; factor_lower = exp(-theta_upper).
    cells, _ = simulate_cells(8, 200, [(0, 1)], [[0], [-1.0]], gears=GEARS[:2])
    for result in (fit_glm(cells, n_draws=10), fit_ratio(cells, n_boot=200)):
        f = result.factor_table().iloc[0]
        p = result.point.iloc[0]
        assert f["factor"] > 2
        assert f["factor_lower"] == pytest.approx(np.exp(-p["theta_upper"]))
        assert f["factor_upper"] == pytest.approx(np.exp(-p["theta_lower"]))
        assert f["factor_lower"] < f["factor"] < f["factor_upper"]


# ----------------------------------------------------------------------------- ratio


def hand_example():
    """Three groups, two gears (reference A, gear B), two species x and y.

    group:      0          1          2
    effort A:   1          2          1
    effort B:   2          2          1
    x  A, B:    2, 1       0, 3       4, 0
    y  A, B:    0, 0       1, 1       0, 2      (group 0: zero total, dropped from the cells)
    """
    counts = np.array([[2, 1], [0, 0], [0, 3], [1, 1], [4, 0], [0, 2]])
    effort = np.array([[1, 2], [1, 2], [2, 2], [2, 2], [1, 1], [1, 1]], dtype=float)
    present = np.ones_like(counts, dtype=bool)
    cells = cells_from_arrays(counts, present, effort, cell_group=[0, 0, 1, 1, 2, 2],
                              cell_species=[0, 1, 0, 1, 0, 1], gears=["A", "B"], species=["x", "y"])
    return cells


def test_ratio_is_ratio_of_mean_cpue_by_hand():
    # Hand computation (definition of the ratio-of-means estimator, Cochran 1977, "Sampling
    # Techniques", ch. 6): x: cpue A = 2, 0, 4 (mean 2); cpue B = 0.5, 1.5, 0 (mean 2/3): factor 3.
    # y: cpue A = 0, 0.5, 0 (mean 1/6); cpue B = 0, 0.5, 2 (mean 5/6): factor 0.2, group 0 in as zeros.
    cells = hand_example()
    assert cells.n_cells == 5  # the zero-total cell of y in group 0 is not in the cells
    seen, present, cpue = group_design(cells)
    assert seen.all() and present.all()
    np.testing.assert_allclose(cpue[:, 1, :], [[0, 0], [0.5, 0.5], [0, 2]])
    result = fit_ratio(cells, n_boot=500, seed=1)
    f = result.factor_table().set_index("species")
    assert f.loc["x", "factor"] == pytest.approx(np.mean([2, 0, 4]) / np.mean([0.5, 1.5, 0]))
    assert f.loc["x", "factor"] == pytest.approx(3.0)
    assert f.loc["y", "factor"] == pytest.approx(np.mean([0, 0.5, 0]) / np.mean([0, 0.5, 2]))
    assert f.loc["y", "factor"] == pytest.approx(0.2)
    assert result.theta_draws.sizes == {"chain": 1, "draw": 500, "gear": 2, "species": 2}


def test_ratio_bootstrap_matches_scipy_percentile_bootstrap():
    # Reference library: scipy.stats.bootstrap(method="percentile", paired over groups), same
    # groups, zero-total groups included as zeros. Source for the method: Efron & Tibshirani
    # 1993, "An Introduction to the Bootstrap", ch. 13. Monte Carlo tolerance: with 4000
    # resamples each, a 5% / 95% percentile has MC sd about 0.034 bootstrap sd (normal case),
    # the difference of two about 0.047 sd; we allow 0.2 sd (about 4 MC sd). The bootstrap sd
    # itself has MC relative sd about 1.1% each; we allow 6%.
    theta = [[0, 0, 0], [-0.7, 0.3, 0.2]]
    cells, full = simulate_cells(21, 50, [(0, 1)], theta, log_density=0.8, density_sd=1.2,
                                 gears=GEARS[:2])
    assert cells.report["zero_total_cells_dropped"] > 0  # zero groups are really in play
    ours = fit_ratio(cells, n_boot=4000, interval=0.9, seed=3)
    for s, sp in enumerate(cells.species):
        rows = full["cell_species"] == s
        cpue_ref = full["counts"][rows, 0] / full["effort"][rows, 0]
        cpue_gear = full["counts"][rows, 1] / full["effort"][rows, 1]

        def log_ratio(a, b, axis=-1):
            return np.log(b.mean(axis=axis)) - np.log(a.mean(axis=axis))

        ref = stats.bootstrap((cpue_ref, cpue_gear), log_ratio, paired=True, vectorized=True,
                              n_resamples=4000, confidence_level=0.9, method="percentile",
                              rng=np.random.default_rng(100 + s))
        r = row(ours, GEARS[1], sp)
        assert r["theta"] == pytest.approx(log_ratio(cpue_ref, cpue_gear), rel=1e-12)
        sd = ref.standard_error
        assert abs(r["theta_lower"] - ref.confidence_interval.low) < 0.2 * sd
        assert abs(r["theta_upper"] - ref.confidence_interval.high) < 0.2 * sd
        assert abs(r["theta_se"] / sd - 1) < 0.06
        draws = ours.theta_draws.sel(gear=GEARS[1], species=sp).values.ravel()
        assert np.quantile(draws, 0.05) == pytest.approx(r["theta_lower"])


def test_ratio_consistent_for_large_poisson_data():
    # Property: under y ~ Poisson(lambda_i e_g q_g) the ratio of mean cpue estimates
    # q_ref / q_gear consistently (Cochran 1977, "Sampling Techniques", ch. 6, the ratio
    # estimator is consistent). 3000 groups; bound 4 bootstrap se and at most 0.08 on theta.
    theta = np.array([[0, 0], [-0.7, 0.5]])
    cells, _ = simulate_cells(4, 3000, [(0, 1)], theta, log_density=0.5, gears=GEARS[:2])
    result = fit_ratio(cells, n_boot=300, seed=2)
    for s, sp in enumerate(cells.species):
        r = row(result, GEARS[1], sp)
        assert abs(r["theta"] - theta[1, s]) < min(4 * r["theta_se"], 0.08)


def test_ratio_uses_only_directly_paired_groups():
    # In three-gear groups each gear is paired with the reference; the ratio for B uses the
    # A-B and A-B-C groups, not the B-C groups (hand check against the full table).
    theta = [[0], [-0.4], [0.3]]
    cells, full = simulate_cells(6, 60, [(0, 1), (1, 2), (0, 1, 2)], theta)
    result = fit_ratio(cells, n_boot=100)
    both = full["present"][:, 0] & full["present"][:, 1]
    ref = (full["counts"][both, 0] / full["effort"][both, 0]).mean()
    gear = (full["counts"][both, 1] / full["effort"][both, 1]).mean()
    assert row(result, GEARS[1], "sp0")["theta"] == pytest.approx(np.log(gear / ref))
    # Groups where nothing at all was caught have no cell (and do not change the ratio).
    caught = full["counts"].sum(axis=1) > 0
    expected = {GEARS[g]: int((full["present"][:, 0] & full["present"][:, g] & caught).sum()) for g in (1, 2)}
    assert result.settings["groups_shared_with_reference"] == expected
    assert 35 <= expected[GEARS[1]] <= 40 and 15 <= expected[GEARS[2]] <= 20
    assert result.settings["groups_without_any_catch"] == int((~caught).sum())


# ----------------------------------------------------------------------------- not estimable


def test_non_estimable_factors_are_nan_with_a_note():
    # Network A-B, B-C (A and C never together) plus A-C groups for some checks.
    # Species: sp0 ordinary; sp1 never caught by B; sp2 never caught by the reference A.
    theta = np.array([[0, 0, 0], [0.2, -np.inf, 0.0], [0.1, 0.3, -0.2]])
    with np.errstate(over="ignore"):
        cells, full = simulate_cells(7, 60, [(0, 1), (1, 2)], theta, log_density=2.5)
    counts = full["counts"].copy()
    counts[full["cell_species"] == 2, 0] = 0           # reference never catches sp2
    cells = cells_from_arrays(counts, full["present"], full["effort"], full["cell_group"],
                              full["cell_species"], gears=GEARS, species=cells.species)
    b, c = GEARS[1], GEARS[2]

    ratio = fit_ratio(cells, n_boot=200)
    for sp in cells.species:  # C never fished with the reference: no ratio, whatever its catch
        r = row(ratio, c, sp)
        assert np.isnan(r["theta"]) and np.isnan(r["theta_lower"]) and "directly paired" in r["note"]
    assert np.isfinite(row(ratio, b, "sp0")["theta"]) and row(ratio, b, "sp0")["note"] == ""
    assert np.isnan(row(ratio, b, "sp1")["theta"]) and "never caught" in row(ratio, b, "sp1")["note"]
    assert np.isnan(row(ratio, b, "sp2")["theta"]) and "reference never caught" in row(ratio, b, "sp2")["note"]
    assert np.isnan(ratio.theta_draws.sel(gear=c).values).all()
    assert np.isnan(ratio.theta_draws.sel(gear=b, species=["sp1", "sp2"]).values).all()
    assert np.isfinite(ratio.theta_draws.sel(gear=b, species="sp0").values).all()

    glm = fit_glm(cells, n_draws=50)
    # sp0: the network is estimable for the GLM (C through B).
    assert np.isfinite(row(glm, c, "sp0")["theta"]) and row(glm, c, "sp0")["note"] == ""
    # sp1: B never caught it (MLE -inf), and C is then linked to A only through B's zeros.
    r = row(glm, b, "sp1")
    assert np.isnan(r["theta"]) and np.isnan(r["theta_se"]) and "never caught" in r["note"]
    r = row(glm, c, "sp1")
    assert np.isnan(r["theta"]) and "shares no group" in r["note"]
    # sp2: reference never caught it: B and C caught every fish (MLE of the factor is 0).
    assert np.isnan(row(glm, b, "sp2")["theta"]) and "reference" in row(glm, b, "sp2")["note"]
    assert np.isnan(row(glm, c, "sp2")["theta"])
    assert np.isnan(glm.theta_draws.sel(species=["sp1", "sp2"], gear=[b, c]).values).all()
    assert np.isfinite(glm.theta_draws.sel(species="sp0").values).all()
    # Every row is either estimable (finite, no note) or NaN with a note: no garbage.
    for result in (ratio, glm):
        p = result.point
        finite = np.isfinite(p["theta"])
        assert (p.loc[~finite, "note"].str.len() > 0).all()
        assert np.isfinite(p.loc[finite, ["theta_lower", "theta_upper"]].to_numpy()).all()


def test_glm_other_gears_unaffected_by_a_gear_that_never_caught():
    # B never catches sp1; C's estimate against A (A-C groups) must equal the independent
    # binomial MLE from the A-C groups alone (scipy.stats.binom), not be dragged by B.
    theta = np.array([[0, 0], [0.2, -np.inf], [0.4, -0.6]])
    with np.errstate(over="ignore"):
        cells, _ = simulate_cells(12, 60, [(0, 1), (0, 2)], theta)
    glm = fit_glm(cells, n_draws=20)
    assert np.isnan(row(glm, GEARS[1], "sp1")["theta"])
    np.testing.assert_allclose(row(glm, GEARS[2], "sp1")["theta"], binomial_mle(cells, 2, 1),
                               rtol=1e-5, atol=1e-7)


def test_species_without_any_catch_is_not_estimable():
    cells, full = simulate_cells(2, 20, [(0, 1)], [[0, 0], [0.1, 0.2]], gears=GEARS[:2])
    counts = full["counts"].copy()
    counts[full["cell_species"] == 1] = 0
    cells = cells_from_arrays(counts, full["present"], full["effort"], full["cell_group"],
                              full["cell_species"], gears=GEARS[:2], species=cells.species)
    for result in (fit_ratio(cells, n_boot=50), fit_glm(cells, n_draws=10)):
        r = row(result, GEARS[1], "sp1")
        assert np.isnan(r["theta"]) and r["note"] != ""
        assert np.isfinite(row(result, GEARS[1], "sp0")["theta"])


def test_bad_settings_are_refused():
    cells = hand_example()
    with pytest.raises(ValueError, match="interval"):
        fit_ratio(cells, interval=90)
    with pytest.raises(ValueError, match="n_draws"):
        fit_glm(cells, n_draws=0)
