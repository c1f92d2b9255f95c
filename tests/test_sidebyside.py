"""Unpaired side-by-side designs (``calib fit --design side-by-side``).

Checked three ways (design section 2): against a reference library on the same data
(statsmodels' Poisson GLM with site-period fixed effects, and scipy's negative binomial for
the stored pointwise log-likelihood), by recovering the factors used to simulate the data, and
against the paired model fitted to the same simulated population (issue 5: "Paired and
side-by-side fits of the same simulated population agree within their intervals").
"""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
from scipy import stats

from calib import diagnostics as dg
from calib import model_sidebyside as ms
from calib.cli import main
from calib.errors import InputError
from calib.factors import FACTOR_COLUMNS, FactorSet
from calib.fitting import fit
from calib.simulate import simulate_side_by_side
from calib.site_periods import build_site_periods, period_labels
from calib.tables import complete_zeros, load_tables, side_by_side_problems

SPECIES = ["pinfish", "blue crab", "hogchoker", "silver perch"]
SMALL = dict(draws=300, tune=300, chains=2, progressbar=False)


def _write(tmp_path, hauls: pd.DataFrame, catches: pd.DataFrame):
    h, c = tmp_path / "hauls.csv", tmp_path / "catches.csv"
    hauls.to_csv(h, index=False)
    catches.to_csv(c, index=False)
    return h, c


# ---------------------------------------------------------------------------------------------
# Periods, site-periods and validation (no sampling)
# ---------------------------------------------------------------------------------------------


def test_period_rules():
    hauls = pd.DataFrame({"date": pd.to_datetime(["2023-12-20", "2024-01-05", "2024-02-28", "2024-03-01",
                                                  "2024-11-30"])})
    assert list(period_labels(hauls, "month")) == ["2023-12", "2024-01", "2024-02", "2024-03", "2024-11"]
    # December belongs to the next year's winter (meteorological seasons).
    assert list(period_labels(hauls, "season")) == ["2024-winter", "2024-winter", "2024-winter",
                                                    "2024-spring", "2024-autumn"]
    assert list(period_labels(hauls, "year")) == ["2023", "2024", "2024", "2024", "2024"]
    assert list(period_labels(hauls, "auto")) == list(period_labels(hauls, "month"))
    hauls["period"] = [3.0, 3.0, np.nan, "wet", "wet"]
    assert list(period_labels(hauls, "auto")) == ["3", "3", None, "wet", "wet"]


def test_site_periods_count_shared_and_single_gear_hauls(tmp_path):
    hauls = pd.DataFrame({
        "haul_id": ["h1", "h2", "h3", "h4", "h5", "h6", "h7"],
        "gear": ["A", "A", "B", "A", "B", "C", "C"],
        "date": ["2024-05-02", "2024-05-20", "2024-05-11", "2024-06-03", "2024-06-04", "2024-06-05", "2024-07-01"],
        "effort": [1.0, 1.2, 0.9, 1.0, 1.1, 2.0, 2.0],
        "effort_unit": ["m2", "m2", "m2", "m2", "m2", "min", "min"],
        "pair_id": ["", "", "", "", "", "", ""],
        "site": ["X", "X", "X", "X", "X", "X", "Y"],
    })
    catches = pd.DataFrame({"haul_id": ["h1", "h3", "h5", "h6", "h7"], "species": ["pinfish"] * 5,
                            "count": [3, 1, 4, 2, 6]})
    h, c = _write(tmp_path, hauls, catches)
    tables = load_tables(h, c)
    assert side_by_side_problems(tables, "A") == []
    data = build_site_periods(tables.hauls, complete_zeros(tables), "A")
    assert data.site_periods == ["X | 2024-05", "X | 2024-06", "Y | 2024-07"]
    shared = {(r.gear_a, r.gear_b): r.n_site_periods for r in data.shared.itertuples()}
    assert shared == {("A", "B"): 2, ("A", "C"): 1, ("B", "C"): 1}
    assert data.report["hauls_in_single_gear_site_periods"] == 1  # h7, alone at Y in July
    assert data.report["n_site_periods_two_or_more_gears"] == 2
    assert data.n_obs == 7  # every haul x species, zeros completed, single-gear hauls kept
    # the paired-model summary of the shared site-periods: gear sums per site-period
    cells = data.cells
    assert cells.groups == ["X | 2024-05", "X | 2024-06"]
    row = cells.counts[cells.cell_group == 0][0]
    assert list(row) == [3, 1, 0]  # A: h1 + h2 = 3 + 0, B: h3 = 1, C absent
    assert data.effort_unit == {"A": "m2", "B": "m2", "C": "min"}


def _layout(tmp_path, **changes):
    hauls = pd.DataFrame({
        "haul_id": ["h1", "h2", "h3", "h4", "h5", "h6"],
        "gear": ["A", "B", "A", "B", "C", "C"],
        "date": ["2024-05-02", "2024-05-03", "2024-06-02", "2024-06-09", "2024-07-01", "2024-07-02"],
        "effort": [1.0, 1.0, 1.0, 1.0, 1.0, 1.0],
        "effort_unit": ["m2"] * 6,
        "site": ["X", "X", "X", "X", "X", "Y"],
    })
    for k, v in changes.items():
        hauls[k] = v
    catches = pd.DataFrame({"haul_id": ["h1", "h2", "h5"], "species": ["pinfish"] * 3, "count": [3, 1, 2]})
    return _write(tmp_path, hauls, catches)


def test_gear_that_never_meets_the_reference_is_an_error_naming_the_row(tmp_path, capsys):
    h, c = _layout(tmp_path)  # gear C fished X in July and Y in July, where no A or B fished
    problems = side_by_side_problems(load_tables(h, c), "A")
    assert len(problems) == 1
    p = problems[0]
    assert (p.file, p.row, p.column) == (str(h), 5, "gear") and "'C'" in p.message and p.fix
    # a coarser period (the year) puts C beside A and B at site X: no problem any more
    assert side_by_side_problems(load_tables(h, c), "A", period_by="year") == []
    out = tmp_path / "out"
    code = main(["fit", "--hauls", str(h), "--catches", str(c), "--reference", "A", "--design", "side-by-side",
                 "--out", str(out), "--quiet"])
    err = capsys.readouterr().err
    assert code == 1 and "row 5" in err and "gear 'C'" in err and "Nothing was written" in err
    assert not out.exists()


def test_check_summarises_the_side_by_side_layout(tmp_path, capsys):
    h, c = _layout(tmp_path)
    assert main(["check", "--hauls", str(h), "--catches", str(c), "--reference", "A",
                 "--design", "side-by-side"]) == 0
    text = capsys.readouterr().out
    assert "6 hauls with a site and period in 4 site-periods; 2 fished by two or more gears" in text
    assert "A + B: 2" in text and "A + C: 0" in text
    assert "fit --design side-by-side stops on" in text and "gear 'C'" in text


def test_missing_site_period_and_fractional_counts_are_reported(tmp_path):
    h, c = _layout(tmp_path, site=["X", "", "X", "X", "X", "Y"], period=["a", "a", "b", "b", "", "c"])
    frame = pd.read_csv(c)
    frame["count"] = frame["count"].astype(float)
    frame.loc[1, "count"] = 1.5
    frame.to_csv(c, index=False)
    problems = side_by_side_problems(load_tables(h, c), "A")
    where = {(p.row, p.column) for p in problems}
    assert (2, "site") in where and (5, "period") in where and (2, "count") in where
    h2, c2 = _layout(tmp_path)  # no period column
    problems = side_by_side_problems(load_tables(h2, c2), "A", period_by="column")
    assert [(p.row, p.column) for p in problems] == [(None, "period")]
    h3, c3 = _write(tmp_path, pd.read_csv(h2).drop(columns="site"), pd.read_csv(c2))
    assert [(p.row, p.column) for p in side_by_side_problems(load_tables(h3, c3), "A")] == [(None, "site")]
    with pytest.raises(InputError):
        fit(h3, c3, reference="A", design="side-by-side", **SMALL)


# ---------------------------------------------------------------------------------------------
# Recovery of known factors (the model's own generating process)
# ---------------------------------------------------------------------------------------------

RECOVERY_THETA = {"B": [-0.5, 0.3, 0.0, 0.6], "C": [0.4, -0.3, 0.2, -0.6]}


def recovery_study(seed: int):
    """3 gears (A the reference), 4 species, 10 sites x 3 months; B fishes 80 % and C 70 % of the
    site-periods, 1-3 hauls per gear, negative-binomial hauls (shape 2), site-period sd 1."""
    return simulate_side_by_side(
        10, 3, ["A", "B", "C"], RECOVERY_THETA, [1.0, 1.2, 0.6, 1.4], species=SPECIES,
        site_period_sd=1.0, dispersion=2.0, hauls_per_gear=(1, 3), gear_presence={"B": 0.8, "C": 0.7},
        effort={"A": (0.8, 1.2), "B": (0.8, 1.2), "C": (0.5, 1.5)}, seed=seed)


@pytest.fixture(scope="module")
def recovery_fit():
    study = recovery_study(2026)
    data = study.to_data()
    model = ms.build_model(data, ms.SideBySideSpec())
    idata = ms.sample(model, seed=7, prior_draws=500, **SMALL)
    return study, data, model, idata


def test_recovers_known_factors(recovery_fit):
    study, data, _, idata = recovery_fit
    theta = idata.posterior["theta"]
    lo, hi = theta.quantile([0.05, 0.95], dim=("chain", "draw")).values
    truth = study.theta.loc[data.gears, data.species].to_numpy()
    covered = (lo[1:] <= truth[1:]) & (truth[1:] <= hi[1:])
    # 8 factors, 90 % intervals: with nominal coverage P(at least 6 covered) = 0.96 (binomial).
    print(f"recovery: {int(covered.sum())} of 8 true factors inside their 90% intervals")
    assert covered.sum() >= 6, (lo, hi, truth)
    assert float(np.abs(np.asarray(theta.sel(gear="A"))).max()) == 0.0  # reference row zero
    diag = dg.factor_diagnostics(idata, data.cells, ppp=ms.share_check(idata, data, ppc_draws=100, seed=1))
    assert (diag["rhat"] < 1.05).all()
    assert (diag["prior_ratio"] < 0.9).all()  # the data moved every factor
    # Under the true model the share check's p-values are not extreme (posterior predictive
    # p-values concentrate around 0.5: Meng 1994, Annals of Statistics 22, "Posterior predictive
    # p-values"; limit 0.01 is a rule of thumb, no source).
    assert diag["ppp"].between(0.01, 0.99).all(), diag
    assert (diag["n_groups"] > 0).all()


def test_pointwise_log_likelihood_matches_scipy(recovery_fit):
    # Reference library: scipy's negative binomial, nbinom(n = phi, p = phi / (phi + mean))
    # (scipy.stats.nbinom documentation), per haul x species at one posterior draw.
    _, data, _, idata = recovery_fit
    post = idata.posterior.isel(chain=0, draw=5)
    theta = post["theta"].sel(gear=data.gears, species=data.species).values
    b = post["beta"].values[None, :] + post["sigma"].values[None, :] * post["z_site"].values
    phi = np.exp(post["log_phi"].sel(gear=data.gears, species=data.species).values)
    g, c = data.haul_gear[data.obs_haul], data.haul_cell[data.obs_haul]
    s = data.obs_species
    mean = data.haul_effort[data.obs_haul] * np.exp(theta[g, s] + b[c, s])
    expected = stats.nbinom.logpmf(data.obs_count, phi[g, s], phi[g, s] / (phi[g, s] + mean))
    stored = idata.log_likelihood[ms.LIKELIHOOD].isel(chain=0, draw=5).values
    np.testing.assert_allclose(stored, expected, rtol=1e-6, atol=1e-8)
    assert stored.shape == (data.n_obs,)  # one value per haul x species, for LOO
    import arviz as az

    loo = az.loo(idata)  # PSIS-LOO (Vehtari, Gelman & Gabry 2017, Statistics and Computing 27)
    assert loo.n_data_points == data.n_obs and np.isfinite(loo.elpd_loo)


@pytest.mark.slow
def test_coverage_over_replicates(recovery_fit):
    """20 replicate studies x 8 factors = 160 intervals at 90 %: with nominal coverage the share
    lies in [0.84, 0.95] with probability 0.99 (binomial, ignoring the within-study correlation of
    the factors, which widens it). The model is built once; data are swapped in."""
    study, data, model, _ = recovery_fit
    hits = []
    for rep in range(20):
        st = recovery_study(10_000 + rep)
        d = st.to_data()
        if d.site_periods != data.site_periods:
            continue
        ms.set_data(model, d)
        idata = ms.sample(model, seed=rep, prior_draws=0, log_likelihood=False, **SMALL)
        lo, hi = idata.posterior["theta"].quantile([0.05, 0.95], dim=("chain", "draw")).values
        truth = st.theta.loc[d.gears, d.species].to_numpy()
        hits.append(((lo[1:] <= truth[1:]) & (truth[1:] <= hi[1:])).ravel())
    ms.set_data(model, data)
    share = float(np.concatenate(hits).mean())
    print(f"coverage: {share:.3f} of {len(np.concatenate(hits))} intervals; per factor "
          f"{np.mean(hits, axis=0).round(2).tolist()}")
    assert len(hits) == 20
    assert 0.84 <= share <= 0.97, share


# ---------------------------------------------------------------------------------------------
# Reference library: Poisson GLM with site-period x species fixed effects
# ---------------------------------------------------------------------------------------------


def test_fixed_site_effects_poisson_match_statsmodels_glm():
    # Source: with Poisson counts, a flat prior on each site-period x species effect integrates
    # to the multinomial likelihood of the counts given the site-period totals, whose maximum is
    # the Poisson GLM's with those fixed effects (Baker 1994, The Statistician 43, "The
    # multinomial-Poisson transformation"); with vague priors on theta the posterior median then
    # sits at the GLM estimate and the posterior sd at its standard error (Bernstein-von Mises).
    study = simulate_side_by_side(
        8, 2, ["A", "B", "C"], {"B": [-0.5, 0.4, 0.1], "C": [0.3, -0.6, 0.5]}, [2.0, 1.6, 1.8],
        species=SPECIES[:3], site_period_sd=0.6, patchiness="none", hauls_per_gear=2,
        gear_presence={"B": 0.85, "C": 0.85}, effort={g: (0.6, 1.4) for g in "ABC"}, seed=99)
    data = study.to_data()
    spec = ms.SideBySideSpec(overdispersion="none", site_effect="fixed", pooling="none")
    idata = ms.sample(ms.build_model(data, spec), draws=800, tune=500, chains=2, seed=3, progressbar=False,
                      prior_draws=0, log_likelihood=False)

    # The same data as a statsmodels Poisson GLM: gear x species effects, one fixed effect per
    # site-period x species with a non-zero total, log effort offset.
    g, c, s = data.haul_gear[data.obs_haul], data.haul_cell[data.obs_haul], data.obs_species
    key = c * data.n_species + s
    totals = np.bincount(key, weights=data.obs_count)
    keep = totals[key] > 0
    labels = [(gi, si) for gi in range(1, data.n_gears) for si in range(data.n_species)]
    effects = np.column_stack([((g == gi) & (s == si))[keep] for gi, si in labels]).astype(float)
    levels = np.unique(key[keep])
    fixed = (key[keep][:, None] == levels[None, :]).astype(float)
    glm = sm.GLM(data.obs_count[keep], np.hstack([effects, fixed]), family=sm.families.Poisson(),
                 offset=np.log(data.haul_effort[data.obs_haul][keep])).fit()

    import arviz as az

    assert dg.divergences(idata) == 0
    for k, (gi, si) in enumerate(labels):
        draws = idata.posterior["theta"].sel(gear=data.gears[gi], species=data.species[si])
        median, sd = float(draws.median()), float(draws.std())
        mcse = float(az.mcse(draws.to_dataset(name="t"), method="median")["t"])
        # 0.25 posterior sd + 3 Monte Carlo se, as in tests/test_model_recovery.py: posterior
        # median vs maximum likelihood differ by a skewness term of order sd / sqrt(counts)
        # (rule of thumb, no source), the vague N(0, 5) prior moves theta by about sd^2 / 25.
        print(f"glm {labels[k]}: posterior median {median:.4f} sd {sd:.4f} mcse {mcse:.4f}; "
              f"glm {glm.params[k]:.4f} se {glm.bse[k]:.4f}")
        assert abs(median - glm.params[k]) < 0.25 * sd + 3 * mcse, (labels[k], median, glm.params[k])
        assert sd == pytest.approx(glm.bse[k], rel=0.15), labels[k]


# ---------------------------------------------------------------------------------------------
# Paired and side-by-side fits of one simulated population agree (issue 5)
# ---------------------------------------------------------------------------------------------


def test_paired_and_side_by_side_fits_of_one_population_agree(tmp_path, capsys):
    """One population: 12 sites x 3 months, two gears towed as pairs (2 pairs per site-period,
    72 pairs), pairs sharing a small local density offset (sd 0.3), gamma tow patchiness (the
    paired model's own tow model, kappa 3). The paired model is fitted to the pairs, the
    side-by-side model (through the command line) to the same hauls with pair_id ignored.

    Criterion (stated before running): for every factor, each fit's 90 % interval covers the
    other fit's median. Both fits also cover the true factor for at least 3 of the 4 species
    (nominal P = 0.95 each).
    """
    theta_b = [-0.6, 0.4, 0.1, 0.5]
    study = simulate_side_by_side(
        12, 3, ["trawl_new", "trawl_old"], {"trawl_old": theta_b}, [1.2, 0.9, 0.5, 1.5], species=SPECIES,
        site_period_sd=0.8, patchiness="gamma", dispersion=3.0, hauls_per_gear=2, paired=True, pair_sd=0.3,
        effort={"trawl_new": (0.8, 1.2), "trawl_old": (0.8, 1.2)}, seed=505)
    h, c = _write(tmp_path, study.hauls, study.catches)

    paired = fit(h, c, reference="trawl_new", seed=1, **SMALL)
    out = tmp_path / "sbs"
    code = main(["fit", "--hauls", str(h), "--catches", str(c), "--reference", "trawl_new",
                 "--design", "side-by-side", "--out", str(out), "--draws", "300", "--tune", "300",
                 "--seed", "1", "--quiet"])
    printed = capsys.readouterr().out
    assert code == 0 and "36 site-periods, 36 fished by two or more gears" in printed
    side = FactorSet.load(out)
    assert list(side.table.columns) == FACTOR_COLUMNS
    manifest = json.loads((out / "manifest.json").read_text())
    assert manifest["design"] == "side-by-side" and manifest["cells"]["period_by"] == "month"
    assert manifest["cells"]["site_periods_per_gear_pair"] == [
        {"gear_a": "trawl_new", "gear_b": "trawl_old", "n_site_periods": 36}]
    assert "log_phi_mean[gear]" in manifest["model"]["priors"]["formulas"]["partial"]

    a = paired.table.set_index("species").loc[SPECIES]
    b = side.table.set_index("species").loc[SPECIES]
    assert ((a["factor_lower"] <= b["factor_median"]) & (b["factor_median"] <= a["factor_upper"])).all(), (a, b)
    assert ((b["factor_lower"] <= a["factor_median"]) & (a["factor_median"] <= b["factor_upper"])).all(), (a, b)
    truth = np.exp(-np.asarray(theta_b))
    print(pd.DataFrame({"truth": truth, "paired": a["factor_median"], "paired_lo": a["factor_lower"],
                        "paired_hi": a["factor_upper"], "sbs": b["factor_median"], "sbs_lo": b["factor_lower"],
                        "sbs_hi": b["factor_upper"]}).round(3).to_string())
    for t in (a, b):
        assert ((t["factor_lower"] <= truth) & (truth <= t["factor_upper"])).sum() >= 3

    # the factor set converts survey records unchanged (convert reads only theta draws and the table)
    conv = tmp_path / "converted"
    assert main(["convert", "--factors", str(out), "--hauls", str(h), "--catches", str(c),
                 "--out", str(conv)]) == 0
    assert (conv / "rejected.csv").exists()


@pytest.mark.slow
@pytest.mark.xfail(strict=True, reason=(
    "known limitation, measured: with gear B in its own habitat (independent site-period effect, "
    "sd 1) the share check gave ppp 0.02, 0.17, 0.205, 0.22 for B's four species (one of four "
    "below 0.05): B's fitted patchiness absorbs most of the mismatch. The same-animals assumption "
    "has to be met by the study design; see docs/methods.md section 8b"))
def test_share_check_flags_gears_that_sampled_different_animals(recovery_fit):
    """Design section 5: side-by-side groups only calibrate if both gears sample the same animals.
    Simulate gear B fishing a habitat whose density varies independently of the reference's (its
    own site-period effect, sd 1) and ask whether the share check says so: ppp < 0.05 for at
    least 3 of B's 4 species (one replicate; under the true model the same check gave no ppp
    below 0.01 in test_recovers_known_factors). It does not (strict xfail): if a better check
    makes this pass, remove the xfail and update the docs."""
    study, data, model, _ = recovery_fit
    st = recovery_study(2026)
    rng = np.random.default_rng(1)
    d = st.to_data()
    other = rng.normal(0.0, 1.0, size=(d.n_site_periods, d.n_species))  # B's own habitat effect
    is_b = st.hauls["gear"].to_numpy() == "B"
    log_b = st.log_density.to_numpy()[st.haul_cell[is_b]] + other[st.haul_cell[is_b]]
    mean = np.exp(log_b + st.theta.loc["B"].to_numpy()[None, :]) * st.hauls["effort"].to_numpy()[is_b, None]
    count = st.count.copy()
    count[is_b] = rng.poisson(mean * rng.gamma(2.0, 0.5, size=mean.shape))  # negative binomial, shape 2
    from calib.site_periods import from_arrays

    moved = from_arrays(count, d.haul_gear, d.haul_cell, d.haul_effort, d.gears, d.species,
                        site_periods=d.site_periods, haul_ids=d.haul_ids)
    ms.set_data(model, moved)
    try:
        idata = ms.sample(model, seed=3, prior_draws=0, log_likelihood=False, **SMALL)
    finally:
        ms.set_data(model, data)
    ppp = ms.share_check(idata, moved, ppc_draws=200, seed=2).set_index(["gear", "species"])["ppp"]
    print(ppp)
    assert (ppp.loc["B"] < 0.05).sum() >= 3, ppp


def test_species_a_source_did_not_record_are_not_observations(tmp_path):
    # Design section 3: zeros are completed only for species a haul's source recorded.
    h, c = _layout(tmp_path, source=["p1", "p2", "p1", "p2", "p1", "p1"])
    catches = pd.DataFrame({"haul_id": ["h1", "h2", "h3"], "species": ["pinfish", "pinfish", "blue crab"],
                            "count": [3, 1, 2]})
    catches.to_csv(c, index=False)
    rec = tmp_path / "recorded.csv"
    pd.DataFrame({"source": ["p1", "p1", "p2"], "species": ["pinfish", "blue crab", "pinfish"],
                  "year_from": ["", "", ""], "year_to": ["", "", ""]}).to_csv(rec, index=False)
    tables = load_tables(h, c, species_recorded=rec)
    data = build_site_periods(tables.hauls, complete_zeros(tables), "A", period_by="year")
    # 6 hauls x 2 species, less blue crab in p2's two hauls (h2, h4), which p2 did not record
    assert data.n_obs == 10
    crab = data.species.index("blue crab")
    assert not any(data.haul_ids[h] in ("h2", "h4") for h in data.obs_haul[data.obs_species == crab])


@pytest.mark.slow
def test_paired_and_side_by_side_agree_over_replicates():
    """10 replicate populations as in test_paired_and_side_by_side_fits_of_one_population_agree
    (other seeds), 4 factors each. Criterion (stated before running): in at least 90 % of the 40
    comparisons each fit's 90 % interval covers the other's median. Both models are built once and
    data are swapped in."""
    from calib import model as cm
    from calib.cells import build_cells

    def population(seed):
        return simulate_side_by_side(
            12, 3, ["trawl_new", "trawl_old"], {"trawl_old": [-0.6, 0.4, 0.1, 0.5]}, [1.2, 0.9, 0.5, 1.5],
            species=SPECIES, site_period_sd=0.8, patchiness="gamma", dispersion=3.0, hauls_per_gear=2,
            paired=True, pair_sd=0.3, effort={"trawl_new": (0.8, 1.2), "trawl_old": (0.8, 1.2)}, seed=seed)

    def paired_cells(st):
        hi, si = np.nonzero(np.ones_like(st.count, dtype=bool))
        counts = pd.DataFrame({"haul_id": st.hauls["haul_id"].to_numpy()[hi],
                               "species": np.asarray(st.species)[si], "count": st.count[hi, si]})
        return build_cells(st.hauls, counts, "trawl_new", species=list(st.species))

    first = population(600)
    paired_model = cm.build_model(paired_cells(first), cm.ModelSpec())
    side_model = ms.build_model(first.to_data(), ms.SideBySideSpec())
    agree = []
    for rep in range(10):
        st = population(600 + rep)
        cm.set_cells(paired_model, paired_cells(st))
        ms.set_data(side_model, st.to_data())
        q = []
        for model, sampler in ((paired_model, cm.sample), (side_model, ms.sample)):
            idata = sampler(model, seed=rep, prior_draws=0, log_likelihood=False, **SMALL)
            q.append(idata.posterior["theta"].sel(gear="trawl_old", species=SPECIES)
                     .quantile([0.05, 0.5, 0.95], dim=("chain", "draw")).values)
        (plo, pmed, phi), (slo, smed, shi) = q
        agree.append((plo <= smed) & (smed <= phi) & (slo <= pmed) & (pmed <= shi))
    share = float(np.concatenate(agree).mean())
    print(f"paired vs side-by-side: mutual coverage in {share:.3f} of {len(np.concatenate(agree))} comparisons")
    assert share >= 0.9
