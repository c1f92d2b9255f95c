"""The split model's likelihood, its PyMC build, seeding, diagnostics and status rules."""

from __future__ import annotations

import math

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from calib import diagnostics as dg
from calib import model as cm
from calib.cells import cells_from_arrays

from conftest import SMALL_FIT_SETTINGS, small_study_cells


# ---------------------------------------------------------------------------------------------
# Helpers
# ---------------------------------------------------------------------------------------------


def random_point(model, seed: int) -> dict:
    """The model's initial point (unconstrained values) moved at random."""
    rng = np.random.default_rng(seed)
    return {k: v + rng.normal(0.0, 0.5, size=np.shape(v)) for k, v in model.initial_point().items()}


def compile_at(model, outputs):
    """Compile model quantities (random variables replaced by their values) as f(point)."""
    outs = model.replace_rvs_by_values(outputs)
    return model.compile_fn(outs, inputs=model.value_vars, on_unused_input="ignore")


def model_cell_logp(model, point) -> np.ndarray:
    logp = model.logp(vars=model.observed_RVs, sum=False)[0]
    return np.asarray(model.compile_fn(logp, inputs=model.value_vars, on_unused_input="ignore")(point))


def reference_cell_logp(model, cells, point) -> np.ndarray:
    """calib.model.cell_log_density at the model's theta / log_kappa values of ``point``."""
    names = ["theta"] + (["log_kappa"] if "log_kappa" in model.named_vars else [])
    values = compile_at(model, [model[n] for n in names])(point)
    theta_cells = values[0][:, cells.cell_species].T
    combo = np.array([list(model.coords["combo"]).index(c) for c in cells.combos])[cells.cell_combo]
    kappa = None if len(values) == 1 else np.exp(values[1][combo, cells.cell_species])
    return cm.cell_log_density(cells.counts, cells.present, cells.weight, theta_cells, kappa)


def random_cases(seed: int, n_cases: int, n_gears: int, max_n: int = 40):
    rng = np.random.default_rng(seed)
    for _ in range(n_cases):
        n = int(rng.integers(0, max_n))
        weight = rng.uniform(0.5, 1.5, size=n_gears)
        theta = np.r_[0.0, rng.normal(0.0, 1.0, size=n_gears - 1)]
        kappa = float(np.exp(rng.normal(0.5, 1.0)))
        counts = rng.multinomial(n, rng.dirichlet(np.ones(n_gears)))
        yield counts, weight, theta, kappa


# ---------------------------------------------------------------------------------------------
# The numpy reference density against scipy
# ---------------------------------------------------------------------------------------------


def test_two_gear_split_is_beta_binomial():
    # A two-category Dirichlet-multinomial is the beta-binomial (Johnson, Kemp & Kotz 2005,
    # Univariate Discrete Distributions, 3rd ed., section 6.7.2, recalled from memory);
    # reference values from scipy.stats.betabinom.
    for counts, weight, theta, kappa in random_cases(1, 50, 2):
        alpha = kappa * weight * np.exp(theta)
        ours = cm.cell_log_density(counts[None], np.ones((1, 2), bool), weight[None], theta[None], np.r_[kappa])
        ref = stats.betabinom.logpmf(counts[1], counts.sum(), alpha[1], alpha[0])
        assert ours[0] == pytest.approx(ref, rel=1e-10, abs=1e-10)


def test_three_gear_split_matches_scipy_dirichlet_multinomial_with_a_masked_gear():
    # Reference: scipy.stats.dirichlet_multinomial (scipy >= 1.11). Our arrays carry a fourth,
    # absent gear with junk counts 0 / weight 0 that must be masked out.
    for counts, weight, theta, kappa in random_cases(2, 50, 3):
        alpha = kappa * weight * np.exp(theta)
        present = np.array([[True, True, False, True]])
        c4 = np.insert(counts, 2, 0)[None]
        w4 = np.insert(weight, 2, 0.0)[None]
        t4 = np.insert(theta, 2, 7.0)[None]
        ours = cm.cell_log_density(c4, present, w4, t4, np.r_[kappa])
        ref = stats.dirichlet_multinomial.logpmf(counts, alpha, counts.sum())
        assert ours[0] == pytest.approx(ref, rel=1e-10, abs=1e-10)


def test_split_density_sums_to_one_over_all_splits():
    # Brute force: every split of n fish among 3 gears, probabilities must sum to 1.
    weight, theta, kappa, n = np.array([0.8, 1.1, 1.1]), np.array([0.0, -0.7, 0.4]), 1.7, 9
    splits = np.array([(a, b, n - a - b) for a in range(n + 1) for b in range(n + 1 - a)])
    k = len(splits)
    for kappa_cells in (np.full(k, kappa), None):
        logp = cm.cell_log_density(
            splits, np.ones((k, 3), bool), np.tile(weight, (k, 1)), np.tile(theta, (k, 1)), kappa_cells
        )
        assert np.exp(logp).sum() == pytest.approx(1.0, abs=1e-12)


def test_multinomial_split_matches_scipy_multinomial():
    # overdispersion="none": p_g = w_g exp(theta_g) / sum over present gears (scipy.stats.multinomial).
    for counts, weight, theta, _ in random_cases(3, 40, 3):
        p = weight * np.exp(theta)
        p = p / p.sum()
        ours = cm.cell_log_density(counts[None], np.ones((1, 3), bool), weight[None], theta[None], None)
        assert ours[0] == pytest.approx(stats.multinomial.logpmf(counts, counts.sum(), p), rel=1e-10, abs=1e-10)


def test_masking_a_gear_equals_conditioning_on_the_other_gears_total():
    # Design section 5: the concentrations are unnormalised, so gears A and B's split given
    # n_A + n_B is the same whether C fished (and is summed out) or C is masked. Checked by
    # summing the 3-gear pmf over C's count: the conditional split of m = n_A + n_B fish between A
    # and B equals the masked two-gear model (the Dirichlet's aggregation / subcomposition
    # property: Mosimann 1962, Biometrika 49, "On the compound multinomial distribution, the
    # multivariate beta-distribution, and correlations among proportions", recalled from memory).
    weight, theta, kappa, n = np.array([1.2, 0.7, 1.1]), np.array([0.0, 0.6, -0.9]), 0.8, 25
    for m in (0, 1, 7, 25):
        y_a = np.arange(m + 1)
        three = np.column_stack([y_a, m - y_a, np.full(m + 1, n - m)])
        k = m + 1
        joint = cm.cell_log_density(three, np.ones((k, 3), bool), np.tile(weight, (k, 1)),
                                    np.tile(theta, (k, 1)), np.full(k, kappa))
        conditional = joint - np.logaddexp.reduce(joint)
        two = np.column_stack([y_a, m - y_a, np.zeros(k, int)])
        masked = cm.cell_log_density(two, np.tile([True, True, False], (k, 1)), np.tile(weight * [1, 1, 0], (k, 1)),
                                     np.tile(theta, (k, 1)), np.full(k, kappa))
        np.testing.assert_allclose(masked, conditional, rtol=0, atol=1e-10)

    # ... and summing A and B into one category gives the 2-category split with alpha_A + alpha_B.
    alpha = kappa * weight * np.exp(theta)
    for m in (0, 3, 25):
        y_a = np.arange(m + 1)
        k = m + 1
        three = np.column_stack([y_a, m - y_a, np.full(k, n - m)])
        joint = cm.cell_log_density(three, np.ones((k, 3), bool), np.tile(weight, (k, 1)),
                                    np.tile(theta, (k, 1)), np.full(k, kappa))
        ref = stats.betabinom.logpmf(n - m, n, alpha[2], alpha[0] + alpha[1])
        assert np.logaddexp.reduce(joint) == pytest.approx(ref, abs=1e-10)


# ---------------------------------------------------------------------------------------------
# The PyMC model
# ---------------------------------------------------------------------------------------------


@pytest.mark.parametrize("overdispersion", cm.OVERDISPERSION)
@pytest.mark.parametrize("pooling", cm.POOLING)
def test_model_log_likelihood_equals_reference(overdispersion, pooling):
    _, cells = small_study_cells()
    assert set(cells.combos) == {"A+B", "A+C", "A+B+C"}  # masking is exercised
    model = cm.build_model(cells, cm.ModelSpec(overdispersion=overdispersion, pooling=pooling))
    for seed in (0, 1):
        point = random_point(model, seed)
        np.testing.assert_allclose(model_cell_logp(model, point), reference_cell_logp(model, cells, point),
                                   rtol=1e-10, atol=1e-9)
        grad = model.compile_dlogp()(point)
        assert np.all(np.isfinite(grad))


def test_theta_has_labelled_reference_row_of_zeros():
    _, cells = small_study_cells()
    model = cm.build_model(cells)
    theta = compile_at(model, [model["theta"]])(random_point(model, 3))[0]
    assert list(model.coords["gear"]) == ["A", "B", "C"]
    assert model.named_vars_to_dims["theta"] == ("gear", "species")
    assert np.all(theta[0] == 0) and np.all(theta[1:] != 0)


def test_centred_and_non_centred_forms_are_the_same_model():
    # Change of variables theta = mu + tau * z: the centred density of theta equals the
    # non-centred density of z divided by the Jacobian tau, entry by entry.
    _, cells = small_study_cells()
    m_c = cm.build_model(cells, cm.ModelSpec(parametrization="centred"))
    m_n = cm.build_model(cells, cm.ModelSpec(parametrization="non-centred"))
    point_n = random_point(m_n, 4)
    mu, tau = point_n["mu"], np.exp(point_n["tau_log__"])
    z = point_n["theta_raw"]
    theta = mu[:, cells.species_pool] + tau[:, None] * z
    point_c = {**point_n, "theta_raw": theta}
    diff = m_c.compile_logp()(point_c) - m_n.compile_logp()(point_n)
    assert diff == pytest.approx(-np.log(tau).sum() * cells.n_species, abs=1e-8)
    np.testing.assert_allclose(compile_at(m_c, [m_c["theta"]])(point_c)[0][1:], theta, atol=1e-12)


def test_auto_parametrization_centres_only_well_measured_factors():
    # A gear that caught a species in large numbers is written centred; one that never caught
    # the other species is not (nothing pins its theta down).
    rng = np.random.default_rng(5)
    n_groups = 60
    counts_rich = np.column_stack([rng.poisson(200, n_groups), rng.poisson(100, n_groups)])
    counts_none = np.column_stack([rng.poisson(5, n_groups) + 1, np.zeros(n_groups, int)])
    counts = np.vstack([counts_rich, counts_none, np.column_stack([rng.poisson(100, n_groups), rng.poisson(300, n_groups)])])
    species = np.repeat([0, 1, 2], n_groups)
    cells = cells_from_arrays(counts, np.ones_like(counts, bool), np.ones(counts.shape), np.tile(np.arange(n_groups), 3),
                              species, ["A", "B"], ["s0", "s1", "s2"])
    centred = cm.centred_entries(cells)
    assert centred.tolist() == [[True, False, True]]
    assert not cm.centred_entries(cells, cm.ModelSpec(parametrization="non-centred")).any()


def test_set_cells_swaps_data_of_another_size():
    study, cells = small_study_cells()
    model = cm.build_model(cells)
    # Fewer cells, and only two of the three gear combinations (combos are matched by label).
    keep = ~cells.present[:, 2] | cells.present[:, 1]
    fewer = cells_from_arrays(cells.counts[keep], cells.present[keep], cells.effort[keep], cells.cell_group[keep],
                              cells.cell_species[keep], cells.gears, cells.species)
    assert fewer.combos == ["A+B", "A+B+C"] and fewer.n_cells < cells.n_cells
    fewer.combos = ["A+B+C", "A+B"]  # same cells, labels listed in another order
    fewer.cell_combo = 1 - fewer.cell_combo
    cm.set_cells(model, fewer)
    point = random_point(model, 6)
    logp = model_cell_logp(model, point)
    assert logp.shape == (fewer.n_cells,)
    np.testing.assert_allclose(logp, reference_cell_logp(model, fewer, point), rtol=1e-10, atol=1e-9)

    other_species = cells_from_arrays(cells.counts, cells.present, cells.effort, cells.cell_group, cells.cell_species,
                                      cells.gears, ["x", "y", "z"])
    with pytest.raises(ValueError, match="species"):
        cm.set_cells(model, other_species)


def test_bad_spec_is_refused_with_the_choices():
    with pytest.raises(ValueError, match="dirichlet-multinomial"):
        cm.ModelSpec(overdispersion="beta")
    with pytest.raises(ValueError, match="partial"):
        cm.ModelSpec(pooling="full")
    d = cm.ModelSpec().to_dict()
    assert d["overdispersion"] == "dirichlet-multinomial" and d["priors"]["theta_mu_sd"] == 1.5


# ---------------------------------------------------------------------------------------------
# Sampling (the session fit from conftest)
# ---------------------------------------------------------------------------------------------


def test_fit_has_the_groups_later_stages_read(small_fit):
    _, cells, _, idata = small_fit
    for group in ("posterior", "sample_stats", "log_likelihood", "prior", "observed_data"):
        assert group in idata.groups()
    assert idata.posterior["theta"].dims == ("chain", "draw", "gear", "species")
    assert idata.posterior["log_kappa"].dims == ("chain", "draw", "combo", "species")
    assert idata.log_likelihood["split"].dims == ("chain", "draw", "cell")
    assert idata.log_likelihood["split"].shape[-1] == cells.n_cells
    assert "diverging" in idata.sample_stats


def test_stored_log_likelihood_is_the_reference_density_at_the_draws(small_fit):
    _, cells, _, idata = small_fit
    post = idata.posterior
    for chain, draw in ((0, 0), (1, 123), (0, 299)):
        theta = post["theta"].sel(chain=chain, draw=draw).sel(gear=cells.gears, species=cells.species).values
        log_kappa = post["log_kappa"].sel(chain=chain, draw=draw).sel(combo=cells.combos, species=cells.species).values
        ref = cm.cell_log_density(cells.counts, cells.present, cells.weight, theta[:, cells.cell_species].T,
                                  np.exp(log_kappa[cells.cell_combo, cells.cell_species]))
        np.testing.assert_allclose(idata.log_likelihood["split"].sel(chain=chain, draw=draw).values, ref,
                                   rtol=1e-10, atol=1e-9)


def test_same_seed_gives_identical_draws(small_fit):
    _, cells, model, idata = small_fit
    again = cm.sample(model, **SMALL_FIT_SETTINGS)
    np.testing.assert_array_equal(again.posterior["theta"].values, idata.posterior["theta"].values)
    np.testing.assert_array_equal(again.prior["theta"].values, idata.prior["theta"].values)
    other = cm.sample(model, **{**SMALL_FIT_SETTINGS, "seed": SMALL_FIT_SETTINGS["seed"] + 1, "draws": 50, "tune": 50})
    assert not np.array_equal(other.posterior["theta"].values[:, :50], idata.posterior["theta"].values[:, :50])


def test_prior_group_has_the_stated_prior_sd_of_theta(small_fit):
    # theta = mu + tau z with mu ~ N(0, 1.5), tau ~ HalfNormal(1): Var = 1.5^2 + E[tau^2] = 2.25 + 1.
    # 2000 prior draws: sd's relative Monte Carlo se is about 1/sqrt(2 * 2000) = 1.6% (normal
    # approximation, rough here since theta is heavier-tailed); tolerance 6%.
    _, _, _, idata = small_fit
    sd = idata.prior["theta"].sel(gear=["B", "C"]).std(dim=("chain", "draw")).values
    np.testing.assert_allclose(sd, math.sqrt(1.5**2 + 1.0), rtol=0.06)
    assert np.all(idata.prior["theta"].sel(gear="A").values == 0)


def test_factor_diagnostics_table(small_fit):
    study, cells, _, idata = small_fit
    diag = dg.factor_diagnostics(idata, cells, ppc_draws=100, seed=0)
    assert list(diag.columns) == dg.DIAGNOSTIC_COLUMNS
    assert len(diag) == 2 * 3 and set(diag["gear"]) == {"B", "C"}
    # n_groups / n_caught recomputed from the simulated group x gear x species counts.
    gi = list(study.gears)
    for row in diag.itertuples():
        g, s = gi.index(row.gear), study.species.index(row.species)
        with_gear = study.present[:, g] & (study.present.sum(axis=1) >= 2)
        total = study.counts[:, :, s].sum(axis=1)
        assert row.n_groups == int((with_gear & (total > 0)).sum())
        assert row.n_caught == int(study.counts[with_gear, g, s].sum())
    assert diag["rhat"].between(0.99, 1.05).all()
    assert (diag["ess_bulk"] > 100).all() and (diag["ess_tail"] > 100).all()
    # The data (30 groups, dozens of fish) must narrow theta well below its prior sd of 1.8.
    assert diag["prior_ratio"].between(0.01, 0.5).all()
    assert diag["ppp"].between(0.0, 1.0).all()
    assert dg.divergences(idata) == int(idata.sample_stats["diverging"].sum())


# ---------------------------------------------------------------------------------------------
# Status rules (design section 4 defaults)
# ---------------------------------------------------------------------------------------------


def status_table() -> pd.DataFrame:
    good = dict(gear="B", n_groups=30, n_caught=120, rhat=1.001, ess_bulk=1500.0, ess_tail=1200.0,
                prior_ratio=0.2, ppp=0.5)
    rows = {
        "ok": {},
        "boundary_ok": dict(rhat=1.01, ess_bulk=400.0, ess_tail=400.0, prior_ratio=0.9, ppp=0.05),
        "rhat_warn": dict(rhat=1.02),
        "rhat_fail": dict(rhat=1.06),
        "ess_bulk_warn": dict(ess_bulk=399.0),
        "ess_bulk_fail": dict(ess_bulk=99.0),
        "ess_tail_warn": dict(ess_tail=350.0),
        "never_caught": dict(n_caught=0),
        "prior_ratio_fail": dict(prior_ratio=0.95),
        "ppp_low": dict(ppp=0.01),
        "ppp_high": dict(ppp=0.99),
        "baseline_nan": dict(rhat=np.nan, ess_bulk=np.nan, ess_tail=np.nan, prior_ratio=np.nan, ppp=np.nan),
        "fail_and_warn": dict(rhat=1.2, ess_tail=10.0, ppp=0.0),
    }
    return pd.DataFrame([{**good, "species": name, **change} for name, change in rows.items()])


def test_status_rules_every_rule():
    out = dg.assign_status(status_table(), divergences=0).set_index("species")
    expected = {
        "ok": ("ok", []),
        "boundary_ok": ("ok", []),
        "rhat_warn": ("warn", ["R-hat"]),
        "rhat_fail": ("fail", ["R-hat"]),
        "ess_bulk_warn": ("warn", ["bulk ESS"]),
        "ess_bulk_fail": ("fail", ["bulk ESS"]),
        "ess_tail_warn": ("warn", ["tail ESS"]),
        "never_caught": ("fail", ["never caught"]),
        "prior_ratio_fail": ("fail", ["prior_ratio"]),
        "ppp_low": ("warn", ["split check"]),
        "ppp_high": ("warn", ["split check"]),
        "baseline_nan": ("ok", []),
        "fail_and_warn": ("fail", ["R-hat", "tail ESS", "split check"]),
    }
    for name, (status, words) in expected.items():
        assert out.loc[name, "status"] == status, name
        reasons = [r for r in out.loc[name, "reason"].split("; ") if r]
        assert len(reasons) == len(words), (name, reasons)
        for word, reason in zip(words, reasons):
            assert word in reason, (name, reason)


def test_divergences_warn_every_factor_and_rules_are_overridable():
    table = status_table()
    out = dg.assign_status(table, divergences=3).set_index("species")
    assert out.loc["ok", "status"] == "warn" and "3 divergent transitions" in out.loc["ok", "reason"]
    assert out.loc["rhat_fail", "status"] == "fail" and "divergent" in out.loc["rhat_fail", "reason"]
    lenient = dg.StatusRules(fail_rhat=1.5, warn_rhat=1.3, warn_on_divergences=False)
    out = dg.assign_status(table, divergences=3, rules=lenient).set_index("species")
    assert out.loc["ok", "status"] == "ok" and out.loc["rhat_fail", "status"] == "ok"
    assert out.loc["fail_and_warn", "status"] == "warn"  # R-hat 1.2 now passes; tail ESS and ppp still warn


def fake_idata(theta: np.ndarray, gears, species, log_kappa: np.ndarray | None = None, combos=None, n_draws=200):
    """A posterior whose every draw sits at the given values (no sampling)."""
    import arviz as az

    post = {"theta": np.broadcast_to(theta, (1, n_draws) + theta.shape).copy()}
    dims = {"theta": ["gear", "species"]}
    coords = {"gear": list(gears), "species": list(species)}
    if log_kappa is not None:
        post["log_kappa"] = np.broadcast_to(log_kappa, (1, n_draws) + log_kappa.shape).copy()
        dims["log_kappa"] = ["combo", "species"]
        coords["combo"] = list(combos)
    return az.from_dict(posterior=post, dims=dims, coords=coords)


def test_split_check_flags_patchiness_the_fitted_split_does_not_allow():
    # Posterior predictive check (Gelman, Meng & Stern 1996): at the true parameters the right
    # split distribution gives p-values uniform on (0, 1); a multinomial split fitted to strongly
    # patchy (gamma, kappa 0.5) counts gives p = 0 for every species.
    from calib.simulate import simulate_calibration

    theta = np.array([[0.0, 0.0, 0.0, 0.0], [-0.5, 0.3, 0.0, 0.8]])
    species = ["pinfish", "blue crab", "hogchoker", "pink shrimp"]
    right, wrong, fine = [], [], []
    for seed in range(5):
        patchy = simulate_calibration(60, ["A", "B"], {"B": theta[1]}, np.full(4, 2.5), kappa=0.5, seed=seed,
                                      species=species).to_cells()
        log_kappa = np.full((1, 4), np.log(0.5))
        right += dg.split_check(fake_idata(theta, ["A", "B"], species, log_kappa, patchy.combos), patchy,
                                seed=seed)["ppp"].tolist()
        wrong += dg.split_check(fake_idata(theta, ["A", "B"], species), patchy, seed=seed)["ppp"].tolist()
        poisson = simulate_calibration(60, ["A", "B"], {"B": theta[1]}, np.full(4, 2.5), patchiness="none",
                                       seed=100 + seed, species=species).to_cells()
        fine += dg.split_check(fake_idata(theta, ["A", "B"], species), poisson, seed=seed)["ppp"].tolist()
    # 20 p-values each; the mean of 20 uniforms has sd 0.065, so 0.3-0.7 is a 3-sd band
    # (false alarm 0.002, normal approximation).
    assert 0.3 < np.mean(right) < 0.7, right
    assert 0.3 < np.mean(fine) < 0.7, fine
    assert np.all(np.array(wrong) == 0), wrong
