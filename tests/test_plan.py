"""calib plan: planning the size of a calibration study.

Checks against closed forms (binomial logit delta method, normal power), reference libraries
(scipy's beta-binomial and trigamma), published properties (more overdispersion, less catch or a
tighter target need more groups), the full PyMC model (Bernstein-von Mises agreement at one
size), and the command line (bad input, end to end).
"""

from __future__ import annotations

import json
import math

import numpy as np
import pandas as pd
import pytest
from scipy.optimize import minimize
from scipy.special import polygamma
from scipy.stats import betabinom, norm

from calib.cli import main
from calib.plan import (
    PLAN_COLUMNS,
    PlanTarget,
    _trigamma,
    expected_catch_from_factors,
    expected_catch_from_records,
    expected_catch_from_table,
    fit_split_ml,
    groups_needed,
    kappa_from_factors,
    plan,
)
from calib.simulate import simulate_calibration


def _inputs(rows, gear="new", reference="old"):
    """Plan inputs from (species, catch_reference, catch_gear) tuples."""
    return pd.DataFrame([{"species": s, "gear": gear, "reference": reference, "catch_reference": r,
                          "catch_gear": g, "catch_source": "test"} for s, r, g in rows])


QUICK = dict(full_fit=False, progressbar=False, n_boot=300)


# ----------------------------------------------------------------------------- fast fit


def test_trigamma_matches_scipy():
    # Reference library: scipy.special.polygamma(1, x).
    x = np.geomspace(1e-4, 1e6, 3000)
    assert np.max(np.abs(_trigamma(x) / polygamma(1, x) - 1)) < 1e-8


@pytest.mark.parametrize("kappa, seed", [(0.5, 1), (5.0, 2)])
def test_fast_fit_matches_scipy_betabinomial_maximum_likelihood(kappa, seed):
    """theta_hat and its Laplace se equal a maximum-likelihood fit written with scipy.stats.betabinom
    (reference library) and a finite-difference Hessian of that log-likelihood."""
    study = simulate_calibration(60, ["old", "new"], {"new": [0.4]}, [math.log(6.0)], kappa=kappa, seed=seed,
                                 species=["pinfish"])
    y_ref, y_gear = study.counts[:, 0, 0], study.counts[:, 1, 0]
    n = y_ref + y_gear

    def loglik(p):
        theta, log_kappa = p
        return betabinom.logpmf(y_gear, n, math.exp(log_kappa + theta), math.exp(log_kappa)).sum()

    best = minimize(lambda p: -loglik(p), [0.0, 0.0], method="Nelder-Mead",
                    options={"xatol": 1e-10, "fatol": 1e-12, "maxiter": 5000}).x
    h, hess = 1e-4, np.zeros((2, 2))
    for i in range(2):
        for j in range(2):
            ei, ej = np.eye(2)[i] * h, np.eye(2)[j] * h
            hess[i, j] = (loglik(best + ei + ej) - loglik(best + ei - ej) - loglik(best - ei + ej)
                          + loglik(best - ei - ej)) / (4 * h * h)
    se_ref = math.sqrt(np.linalg.inv(-hess)[0, 0])
    theta, se = fit_split_ml(y_gear, y_ref)
    assert abs(theta - best[0]) < 1e-4
    assert abs(se / se_ref - 1) < 0.01


def test_fast_fit_is_vectorised_and_flags_studies_without_catch():
    y_gear = np.array([[0, 0, 0], [3, 1, 4]])
    y_ref = np.array([[2, 5, 1], [2, 2, 3]])
    theta, se = fit_split_ml(y_gear, y_ref)
    assert theta[0] == -np.inf and se[0] == np.inf
    one_theta, one_se = fit_split_ml(y_gear[1], y_ref[1])
    assert theta[1] == pytest.approx(one_theta) and se[1] == pytest.approx(one_se)


# ----------------------------------------------------------------------------- closed forms


def test_binomial_split_width_matches_the_delta_method():
    """Without overdispersion the split is binomial and theta_hat = logit of the gear's share; its sd
    is sqrt(1 / (N p (1 - p))) by the delta method (Agresti 2013, Categorical Data Analysis, 3rd ed.,
    sec. 1.4 and 3.1 -- recalled from memory). N = n (m_ref + m_gear) fish in n pairs, p = m_gear / (m_ref
    + m_gear). Checked twice: the median simulated interval half-width exp(z se) against exp(z se_delta),
    and the sd of theta_hat over 400 simulated studies against se_delta (Monte Carlo relative error of an
    sd from 400 studies is 1 / sqrt(2 x 399) = 3.5%; tolerance 3 of those)."""
    m_ref, m_gear, n_studies = 4.0, 6.0, 400
    result = plan(_inputs([("pinfish", m_ref, m_gear)]), PlanTarget(), kappa=math.inf, density_spread=0.0,
                  sizes=[10, 40], n_studies=n_studies, seed=3, **QUICK)
    p = m_gear / (m_ref + m_gear)
    z = PlanTarget().z
    rep = result.replicate_theta[("pinfish", "new")]
    for n in (10, 40):
        se_delta = 1 / math.sqrt(n * (m_ref + m_gear) * p * (1 - p))
        curve = result.curve.set_index("n_groups").loc[n]
        assert abs(math.log(curve["width_median"]) / (z * se_delta) - 1) < 0.03
        k = list(rep["sizes"]).index(n)
        sd = np.std(rep["theta_hat"][:, k], ddof=1)
        assert abs(sd / se_delta - 1) < 3 / math.sqrt(2 * (n_studies - 1))


def test_binomial_split_power_matches_the_normal_approximation():
    """Power of the Wald interval to exclude 1 when the true factor is 1.5: Phi(|theta| / se - z) with
    se from the delta method (normal approximation; Agresti 2013, Categorical Data Analysis -- recalled
    from memory). The simulated share of studies that detect it agrees within 3 binomial standard
    errors plus 0.02 for the approximation."""
    m_ref, n_studies = 4.0, 400
    target = PlanTarget(kind="power", effect=1.5)
    result = plan(_inputs([("blue crab", m_ref, 2.0)]), target, kappa=math.inf, density_spread=0.0,
                  sizes=[5, 15, 30], n_studies=n_studies, seed=5, **QUICK)
    m_gear = m_ref / 1.5  # the power target simulates the true factor 1.5
    for row in result.curve[result.curve["n_groups"].isin([5, 15, 30])].itertuples():
        se = math.sqrt(1 / (row.n_groups * m_gear) + 1 / (row.n_groups * m_ref))
        power = norm.cdf(math.log(1.5) / se - target.z)
        tol = 3 * math.sqrt(power * (1 - power) / n_studies) + 0.02
        assert abs(row.success - power) < tol, (row.n_groups, row.success, power)


def test_fast_fit_interval_covers_the_true_factor_near_nominal():
    """Recovery: over 600 simulated studies of 60 pairs (kappa 3, 3 and 2 fish per deployment) the
    90% Laplace interval of the fast fit covers the true theta in 0.9 of them, within 3 binomial
    standard errors (3 x 0.012) plus 0.01. Measured with 1,000 studies: 0.88-0.91 from 60 pairs up,
    0.86-0.88 at 20 pairs (docs/planning.md)."""
    n_studies = 600
    result = plan(_inputs([("pinfish", 3.0, 2.0)]), PlanTarget(), kappa=3.0, sizes=[20, 60], n_studies=n_studies,
                  seed=12, **QUICK)
    rep = result.replicate_theta[("pinfish", "new")]
    k = list(rep["sizes"]).index(60)
    covered = np.abs(rep["theta_hat"][:, k] - rep["theta_true"]) <= PlanTarget().z * rep["se"][:, k]
    assert abs(covered.mean() - 0.9) < 3 * math.sqrt(0.09 / n_studies) + 0.01, covered.mean()


def test_monte_carlo_error_of_groups_needed_matches_the_binomial_error_at_the_crossing():
    """Bootstrap sd of groups needed against the delta method at the crossing:
    se(n) = sqrt(a (1 - a) / R) / s'(n*), for a known success curve s(n) (logistic) and nested studies
    (study r succeeds at n when U_r < s(n)). Delta method: Casella & Berger 2002, Statistical Inference,
    2nd ed., sec. 5.5.4 (recalled from memory). Tolerance 30%: the bootstrap sd of 400 resamples has
    its own error of about 4%, and the step of whole numbers adds some."""
    rng = np.random.default_rng(11)
    n_studies, a, scale, centre = 400, 0.8, 30.0, 50.0
    sizes = np.arange(10, 201)
    share = 1 / (1 + np.exp(-(sizes - centre) / scale))
    u = rng.uniform(size=n_studies)
    success = u[:, None] < share[None, :]
    need = groups_needed(success, sizes, a, n_boot=400, seed=1)
    n_star = centre + scale * math.log(a / (1 - a))
    slope = a * (1 - a) / scale
    se_delta = math.sqrt(a * (1 - a) / n_studies) / slope
    assert abs(need["groups_needed"] - n_star) < 3 * se_delta
    assert abs(need["mc_sd"] / se_delta - 1) < 0.3
    assert need["mc_lower"] <= need["groups_needed"] <= need["mc_upper"]


# ----------------------------------------------------------------------------- published properties


def _needed(result, species):
    row = result.table.set_index("species").loc[species]
    return float(row["groups_needed"]), float(row["mc_sd"])


def _clearly_more(more, less):
    """more > less by more than twice the summed Monte Carlo sds."""
    return more[0] - less[0] > 2 * (more[1] + less[1]), (more, less)


def test_more_overdispersion_needs_more_groups():
    """Patchier catches (smaller kappa) carry less information per pair: the beta-binomial variance
    of a share is n p (1 - p) (n + A) / (1 + A), A = the concentration (e.g. Agresti 2013, Categorical
    Data Analysis, sec. 4.7 on overdispersion -- recalled from memory)."""
    inputs = _inputs([("k10", 3.0, 3.0), ("k3", 3.0, 3.0), ("k1", 3.0, 3.0)])
    kappa = pd.DataFrame({"species": ["k10", "k3", "k1"], "gear": "new", "kappa": [10.0, 3.0, 1.0],
                          "kappa_source": "test"})
    result = plan(inputs, PlanTarget(), kappa_table=kappa, n_studies=150, seed=7, **QUICK)
    k10, k3, k1 = (_needed(result, s) for s in ("k10", "k3", "k1"))
    assert _clearly_more(k3, k10)[0], _clearly_more(k3, k10)[1]
    assert _clearly_more(k1, k3)[0], _clearly_more(k1, k3)[1]


def test_doubling_the_expected_catch_needs_fewer_groups():
    """More fish per pair, more information per pair (binomial information N p (1 - p) grows with N)."""
    inputs = _inputs([("single", 2.0, 2.0), ("double", 4.0, 4.0)])
    result = plan(inputs, PlanTarget(), kappa=3.0, n_studies=150, seed=8, **QUICK)
    single, double = _needed(result, "single"), _needed(result, "double")
    assert _clearly_more(single, double)[0], (single, double)


def test_groups_needed_is_monotone_in_the_target():
    """A tighter interval, or a larger share of studies that must meet it, needs more groups
    (the same simulated studies, seed fixed)."""
    inputs = _inputs([("pinfish", 10.0, 8.0)])
    settings = dict(kappa=3.0, max_groups=100, n_studies=100, seed=9, **QUICK)
    by_width = [_needed(plan(inputs, PlanTarget(width_factor=w), **settings), "pinfish")[0] for w in (1.5, 1.3, 1.2)]
    assert by_width[0] < by_width[1] < by_width[2], by_width
    by_assurance = [_needed(plan(inputs, PlanTarget(assurance=a), **settings), "pinfish")[0] for a in (0.5, 0.8, 0.95)]
    assert by_assurance[0] < by_assurance[1] < by_assurance[2], by_assurance


def test_unreachable_and_uncatchable_species_are_said_plainly():
    inputs = _inputs([("rare", 0.2, 0.2), ("never", 1.0, 0.0)])
    result = plan(inputs, PlanTarget(), kappa=3.0, max_groups=40, n_studies=60, seed=1, **QUICK)
    table = result.table.set_index("species")
    assert table.loc["rare", "verdict"] == "not reachable"
    assert "cannot be calibrated" in table.loc["rare", "note"] and "40 pairs" in table.loc["rare", "note"]
    assert table.loc["never", "verdict"] == "no catch"
    assert "expected catch of new is 0" in table.loc["never", "note"]
    assert "cannot be calibrated" in result.markdown()


# ----------------------------------------------------------------------------- full fit


def test_fast_fit_agrees_with_the_full_pymc_fit_at_one_size():
    """With 40 pairs and a few hundred fish the posterior of theta under vague priors is close to
    normal around the maximum-likelihood estimate with the inverse observed information as variance
    (Bernstein-von Mises; van der Vaart 1998, Asymptotic Statistics, sec. 10.2 -- recalled from memory).
    So the full PyMC 90% interval (calib.model, pooling="none") should be within 15% as wide as the fast
    fit's on the log scale and centred within 0.35 of its standard errors. Small settings: 1 study,
    2 chains x 300 draws (the quantiles' own Monte Carlo error is a few per cent)."""
    inputs = _inputs([("pinfish", 8.0, 6.0), ("blue crab", 3.0, 4.0)])
    result = plan(inputs, PlanTarget(), kappa=3.0, sizes=[10, 40], n_studies=40, seed=2, full_fit=True,
                  full_fit_groups=40, full_fit_studies=1, full_fit_draws=300, progressbar=False)
    check = result.full_fit
    assert len(check) == 2 and set(check["n_groups"]) == {40}
    assert (check["width_ratio"].sub(1).abs() < 0.15).all(), check
    assert (check["shift_se"].abs() < 0.35).all(), check
    assert "Full-fit check" in result.summary() and "Full-fit check" in result.markdown()


# ----------------------------------------------------------------------------- inputs


def test_expected_catch_from_survey_records_is_the_mean_per_haul_with_zeros(tmp_path):
    study = simulate_calibration(25, ["old", "new"], {"new": [0.3, -0.5]}, [1.0, 0.0], kappa=2.0, seed=4,
                                 species=["pinfish", "hogchoker"])
    study.hauls.to_csv(tmp_path / "hauls.csv", index=False)
    study.catches.to_csv(tmp_path / "catches.csv", index=False)
    got = expected_catch_from_records(tmp_path / "hauls.csv", tmp_path / "catches.csv", "old").set_index("species")
    for s, k in (("pinfish", 0), ("hogchoker", 1)):
        # counts (groups, gear, species): one haul per gear per group, so the mean per haul is the mean over groups
        assert got.loc[s, "catch_reference"] == pytest.approx(study.counts[:, 0, k].mean())
        assert got.loc[s, "catch_gear"] == pytest.approx(study.counts[:, 1, k].mean())


def test_expected_catch_and_kappa_from_a_factor_set(tmp_path):
    import arviz as az
    import xarray as xr

    from calib.factors import FACTOR_COLUMNS, FactorSet

    table = pd.DataFrame([{c: np.nan for c in FACTOR_COLUMNS} | {"species": s, "gear": "new", "reference": "old",
                           "factor_median": 2.0, "n_groups": ng, "n_caught": nc, "status": "ok", "reason": ""}
                          for s, ng, nc in (("pinfish", 10, 50), ("hogchoker", 4, 6))], columns=FACTOR_COLUMNS)
    log_kappa = np.log(np.array([2.0, 5.0]))[None, None, None, :] + np.zeros((2, 10, 1, 2))
    log_kappa[0] += 0.1  # 11 of the 20 draws raised by 0.1: the median is the raised value
    log_kappa[1, 0] += 0.1
    post = xr.Dataset({"log_kappa": (("chain", "draw", "combo", "species"), log_kappa)},
                      coords={"combo": ["old+new"], "species": ["pinfish", "hogchoker"]})
    # Stored cells: reference counts in the cells shared with the gear.
    counts = np.array([[10, 5], [20, 45], [3, 6]])
    const = xr.Dataset({"counts": (("cell", "gear"), counts), "present": (("cell", "gear"), np.ones((3, 2), bool)),
                        "cell_species": (("cell",), np.array([0, 0, 1])),
                        "species_pool": (("species",), np.zeros(2, int))},
                       coords={"gear": ["old", "new"], "species": ["pinfish", "hogchoker"]})
    fs = FactorSet(table=table, checks=pd.DataFrame(), idata=az.InferenceData(posterior=post, constant_data=const),
                   manifest={"reference": "old", "factor_set_id": "test"})
    fs.save(tmp_path / "factors")
    catches = expected_catch_from_factors(tmp_path / "factors").set_index("species")
    # Groups of the gear: the largest n_groups (10); reference catch from the cells: 30 and 3 fish.
    assert catches.loc["pinfish", "catch_gear"] == pytest.approx(5.0)
    assert catches.loc["hogchoker", "catch_gear"] == pytest.approx(0.6)
    assert catches.loc["pinfish", "catch_reference"] == pytest.approx(3.0)
    assert catches.loc["hogchoker", "catch_reference"] == pytest.approx(0.3)
    kappa = kappa_from_factors(tmp_path / "factors").set_index("species")
    assert kappa.loc["pinfish", "kappa"] == pytest.approx(2.0 * math.exp(0.1))
    assert kappa.loc["hogchoker", "kappa"] == pytest.approx(5.0 * math.exp(0.1))


# ----------------------------------------------------------------------------- command line


def _write(path, text):
    path.write_text(text)
    return path


GOOD = "species,gear,expected_catch\npinfish,otter,12\npinfish,seine,30\nblue crab,otter,2\nblue crab,seine,1.5\n"


@pytest.mark.parametrize("text, expect", [
    ("species,gear,catch\npinfish,otter,1\n", ["column 'expected_catch'", "required column is missing"]),
    ("species,gear,expected_catch\npinfish,otter,1\npinfish,seine,lots\n",
     ["row 2 (line 3)", "column 'expected_catch'", "'lots' is not a number"]),
    ("species,gear,expected_catch\npinfish,otter,1\npinfish,seine,-2\n", ["row 2", "negative value -2"]),
    ("species,gear,expected_catch\npinfish,otter,1\npinfish,seine,2\npinfish,seine,3\n",
     ["row 3", "listed twice (also row 2)"]),
    ("species,gear,expected_catch\npinfish,seine,2\n", ["reference gear 'otter' has no expected catch"]),
    ("species,gear,expected_catch\npinfish,otter,1\nblue crab,seine,2\n",
     ["'blue crab' has an expected catch for gear 'seine' but none for the reference gear 'otter'"]),
])
def test_cli_bad_catch_table_exits_1_naming_file_row_column(tmp_path, capsys, text, expect):
    table = _write(tmp_path / "catch.csv", text)
    out = tmp_path / "plan"
    code = main(["plan", "--catch-table", str(table), "--reference", "otter", "--out", str(out), "--quiet"])
    err = capsys.readouterr().err
    assert code == 1
    assert "catch.csv" in err and "Nothing was written" in err
    for e in expect:
        assert e in err, err
    assert not out.exists()


def test_cli_missing_inputs_and_bad_settings(tmp_path, capsys):
    out = str(tmp_path / "plan")
    assert main(["plan", "--out", out]) == 1
    assert "no expected catches given" in capsys.readouterr().err
    table = _write(tmp_path / "catch.csv", GOOD)
    assert main(["plan", "--catch-table", str(table), "--out", out]) == 1
    assert "--reference" in capsys.readouterr().err
    for bad in (["--within", "0.9"], ["--assurance", "1.5"], ["--max-groups", "3"], ["--goal", "narrow"],
                ["--kappa", "-1"]):
        with pytest.raises(SystemExit) as exc:
            main(["plan", "--catch-table", str(table), "--reference", "otter", "--out", out, *bad])
        assert exc.value.code == 2
    assert not (tmp_path / "plan").exists()


def test_cli_end_to_end_on_a_tiny_case(tmp_path, capsys):
    table = _write(tmp_path / "catch.csv", GOOD)
    args = ["plan", "--catch-table", str(table), "--reference", "otter", "--studies", "40", "--max-groups", "60",
            "--skip-full-fit-check", "--quiet", "--seed", "5"]
    assert main([*args, "--out", str(tmp_path / "a")]) == 0
    printed = capsys.readouterr().out
    assert "pinfish (seine vs otter)" in printed and str(tmp_path / "a") in printed
    for name in ("plan.csv", "curve.csv", "plan_curves.png", "plan.md", "full_fit_check.csv", "manifest.json"):
        assert (tmp_path / "a" / name).exists(), name
    plan_a = pd.read_csv(tmp_path / "a" / "plan.csv")
    assert list(plan_a.columns) == PLAN_COLUMNS and len(plan_a) == 2
    manifest = json.loads((tmp_path / "a" / "manifest.json").read_text())
    assert manifest["settings"]["seed"] == 5 and manifest["target"]["width_factor"] == 1.25
    assert "pymc" in manifest["software"]
    text = (tmp_path / "a" / "plan.md").read_text()
    assert "Design advice" in text and "Hurlbert 1984" in text and "qualified review" in text
    # Same seed, same plan.
    assert main([*args, "--out", str(tmp_path / "b")]) == 0
    pd.testing.assert_frame_equal(plan_a, pd.read_csv(tmp_path / "b" / "plan.csv"))


def test_cli_survey_records_bad_input_and_factor_set_route(tmp_path, capsys):
    study = simulate_calibration(20, ["old", "new"], {"new": [0.3]}, [1.5], kappa=2.0, seed=6, species=["pinfish"])
    hauls = study.hauls.copy()
    hauls.loc[2, "effort"] = -1.0
    hauls.to_csv(tmp_path / "hauls.csv", index=False)
    study.catches.to_csv(tmp_path / "catches.csv", index=False)
    out = tmp_path / "plan"
    code = main(["plan", "--hauls", str(tmp_path / "hauls.csv"), "--catches", str(tmp_path / "catches.csv"),
                 "--reference", "old", "--out", str(out), "--quiet"])
    err = capsys.readouterr().err
    assert code == 1 and "hauls.csv" in err and "row 3" in err and "'effort'" in err
    assert not out.exists()
    # Factor-set route: expected catches and kappa from a saved factor set (test above builds one).
    test_expected_catch_and_kappa_from_a_factor_set(tmp_path)
    code = main(["plan", "--factors", str(tmp_path / "factors"), "--species", "pinfish", "--studies", "20",
                 "--max-groups", "20", "--skip-full-fit-check", "--quiet", "--out", str(out)])
    assert code == 0
    row = pd.read_csv(out / "plan.csv").iloc[0]
    assert row["species"] == "pinfish" and row["kappa"] == pytest.approx(2.0 * math.exp(0.1))
    assert "posterior median" in row["kappa_source"]
    assert main(["plan", "--factors", str(tmp_path / "factors"), "--species", "menhaden", "--out",
                 str(tmp_path / "other")]) == 1
    assert "menhaden not in the expected catches" in capsys.readouterr().err


def test_typed_table_reader_returns_one_row_per_species_and_gear(tmp_path):
    got = expected_catch_from_table(_write(tmp_path / "c.csv", GOOD), "otter").set_index("species")
    assert got.loc["pinfish", "catch_reference"] == 12 and got.loc["pinfish", "catch_gear"] == 30
    assert set(got["gear"]) == {"seine"}


def test_plan_curves_figure_one_panel_per_species():
    from calib.plots import plan_curves_figure

    result = plan(_inputs([("pinfish", 5.0, 4.0), ("rare", 0.1, 0.1)]), PlanTarget(), kappa=3.0, max_groups=30,
                  n_studies=30, seed=1, **QUICK)
    fig = plan_curves_figure(result.curve, result.table, target={"kind": "width", "width_factor": 1.25})
    visible = [ax for ax in fig.axes if ax.get_visible()]
    assert [ax.get_title() for ax in visible] == ["pinfish (new)", "rare (new)"]
