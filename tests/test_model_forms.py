"""`calib fit --compare` across the forms of the factor: constant, length-dependent, covariate.

PSIS-LOO (Vehtari, Gelman & Gabry 2017, Statistics and Computing 27, "Practical Bayesian model
evaluation using leave-one-out cross-validation and WAIC") on the same observations: with
--length-bin, the split of the measured fish of each group x species x length class, the constant
model being fitted to those same cells (calib.cells.species_view).

Fits: PyMC NUTS 2 chains x (250 tune + 250 draws); about 100 s in all on a quiet 2-core machine.
"""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest

from calib.simulate import LengthSpec, simulate_calibration

GEARS = ["seine", "trawl"]
SPECIES = ["pinfish", "mummichog"]
FIT = dict(draws=250, tune=250, chains=2, seed=5, progressbar=False)


def _length_study(retention, seed=3):
    """30 groups, 2 species (median 70 and 90 mm), lengths in 20-mm classes, every fish measured.

    retention : logistic retention curves (l50, sr) per gear (Millar & Fryer 1999, Reviews in Fish
    Biology and Fisheries 9) or None (both gears keep every length: the factor is the same at every
    length)."""
    spec = LengthSpec(median_mm=[70, 90], cv=0.25, n_measured=100_000, bin_mm=20,
                      patchiness_level="length_class", retention=retention)
    return simulate_calibration(n_groups=30, gears=GEARS, theta={"trawl": [0.0, 0.3]},
                                log_density_mean=[3.5, 3.2], kappa=5.0, seed=seed, species=SPECIES,
                                lengths=spec, effort={"seine": (0.8, 1.2), "trawl": (0.8, 1.2)})


def _compare(study, tmp_path, **kw):
    from calib.compare import compare_models

    for name in ("hauls", "catches", "lengths"):
        getattr(study, name).to_csv(tmp_path / f"{name}.csv", index=False)
    return compare_models(tmp_path / "hauls.csv", tmp_path / "catches.csv", lengths=tmp_path / "lengths.csv",
                          reference="seine", length_bin=20, length_min_fish=5, **FIT, **kw)


def test_loo_prefers_the_length_model_when_the_factor_changes_with_length(tmp_path):
    # The trawl lets fish under about 75 mm through (l50 75 mm, selection range 30 mm) while the
    # seine keeps everything over 25 mm: the true factor falls several-fold over the species'
    # length range. On this study LOO preferred the length model by 60.1 log-units (se 9.4).
    study = _length_study({"seine": (25, 10), "trawl": (75, 30)})
    fs, comparison = _compare(study, tmp_path)
    table = comparison.table.set_index("variant")
    assert comparison.preferred == "length", comparison.verdict
    gap, dse = table.loc["constant", "elpd_diff"], table.loc["constant", "dse"]
    assert gap > 4 and gap > 2 * dse
    # both scored on the same observations: every length-class cell
    assert table.loc["constant", "n_obs"] == table.loc["length", "n_obs"] == fs.cells.cells.n_cells
    assert fs.manifest["comparison"]["kept"] == "length"
    assert fs.table["length_mm"].notna().all()
    assert list(fs.extra_tables["comparison"]["variant"]) == list(comparison.table["variant"])


def test_loo_does_not_prefer_the_length_model_when_the_factor_is_constant(tmp_path):
    # Neither gear selects by length: the length model can only add noise. LOO must not call it
    # clearly better (on this study: difference 0.9, se 0.6). The constant form kept is refitted to
    # all counted fish: an ordinary factor set (one row per species x gear, no length classes).
    study = _length_study(None)
    fs, comparison = _compare(study, tmp_path)
    assert comparison.preferred == "constant", comparison.verdict
    assert fs.manifest["comparison"]["kept"] == "constant"
    assert fs.table["length_mm"].isna().all()
    assert sorted(fs.table["species"]) == sorted(SPECIES)
    assert fs.manifest["comparison"]["variants"] == ["constant", "length"]
    assert "comparison" in fs.extra_tables


def test_covariate_compare_from_the_command_line_and_model_choice(tmp_path, capsys):
    # A known night offset (0.7 on theta) and depth slope (0.15 per m): LOO on each group x species
    # split prefers the covariate form (on this study by 30.3 log-units, se 6.8); --model constant
    # keeps the constant form anyway and says so.
    from calib.cli import main
    from test_covariates import DEPTH_SLOPE, NIGHT_OFFSET, _study

    study = _study(NIGHT_OFFSET, DEPTH_SLOPE, seed=31)
    study.hauls.to_csv(tmp_path / "hauls.csv", index=False)
    study.catches.to_csv(tmp_path / "catches.csv", index=False)
    out = tmp_path / "factors"
    code = main(["fit", "--hauls", str(tmp_path / "hauls.csv"), "--catches", str(tmp_path / "catches.csv"),
                 "--reference", "otter", "--covariate", "day_night", "--covariate", "depth_m", "--compare",
                 "--model", "constant", "--draws", "300", "--tune", "300", "--seed", "7", "--quiet",
                 "--out", str(out)])
    printed = capsys.readouterr().out
    assert code == 0
    table = pd.read_csv(out / "comparison.csv")
    assert list(table["variant"]) == ["covariate", "constant"]
    gap = table.set_index("variant").loc["constant"]
    assert gap["elpd_diff"] > 4 and gap["elpd_diff"] > 2 * gap["dse"]
    manifest = json.loads((out / "manifest.json").read_text())
    assert manifest["comparison"]["preferred"] == "covariate"
    assert manifest["comparison"]["kept"] == "constant"
    assert "as asked" in manifest["comparison"]["verdict"]
    factors = pd.read_csv(out / "factors.csv")
    assert factors["covariate"].isna().all()
    assert "Kept: constant." in printed


def test_species_view_keeps_the_cells_and_points_classes_at_their_species(tmp_path):
    from calib import cells as cells_mod
    from calib.cells import species_view
    from calib.tables import complete_zeros, load_tables

    study = _length_study(None)
    for name in ("hauls", "catches", "lengths"):
        getattr(study, name).to_csv(tmp_path / f"{name}.csv", index=False)
    tables = load_tables(tmp_path / "hauls.csv", tmp_path / "catches.csv", tmp_path / "lengths.csv")
    lc = cells_mod.build_length_cells(tables.hauls, complete_zeros(tables), tables.lengths, "seine", 20.0,
                                      min_class_fish=5)
    view = species_view(lc)
    assert np.array_equal(view.counts, lc.cells.counts) and np.array_equal(view.weight, lc.cells.weight)
    assert view.species == list(lc.species)
    labels = np.asarray(lc.cells.species, dtype=object)[lc.cells.cell_species]
    # each class label "species | 40 mm" starts with the species the view points at
    assert all(lab.startswith(view.species[s] + " |") for lab, s in zip(labels, view.cell_species))


@pytest.mark.parametrize("extra, message", [
    (["--model", "length", "--length-bin", "20"], "--model picks one of the forms --compare fits"),
    (["--compare", "--model", "length"], "--model length needs --length-bin"),
    (["--compare", "--model", "covariate", "--length-bin", "20"], "--model covariate needs --covariate"),
    (["--compare", "--length-bin", "20", "--patchiness", "lognormal"], "compare patchiness forms in a separate run"),
    (["--compare", "--design", "side-by-side"], "work with --design paired only"),
    (["--length-bin", "20", "--covariate", "day_night"], "add --compare"),
])
def test_compare_usage_errors(tmp_path, capsys, extra, message):
    from calib.cli import main

    with pytest.raises(SystemExit) as exc:
        main(["fit", "--hauls", "h.csv", "--catches", "c.csv", "--lengths", "l.csv", "--reference", "seine",
              "--out", str(tmp_path / "out"), *extra])
    assert exc.value.code == 2
    assert message in capsys.readouterr().err
    assert not (tmp_path / "out").exists()


def test_verdict_names_every_variant_and_keeps_the_default_unless_clearly_beaten():
    # Synthetic pointwise log-likelihoods: 'length' better than 'constant' by 0.5 per observation
    # (25 over 50), 'covariate' by 0.1 (5): the verdict keeps 'length' and names all three.
    import xarray as xr

    from calib.compare import compare_variants

    rng = np.random.default_rng(0)
    base = rng.normal(-2.0, 0.1, size=(2, 200, 50))

    def ll(shift, noise=0.01):
        return xr.DataArray(base + shift + rng.normal(0, noise, size=base.shape), dims=("chain", "draw", "obs"))

    c = compare_variants({"constant": ll(0.0), "length": ll(0.5), "covariate": ll(0.1)}, default="constant")
    assert c.preferred == "length"
    assert "'covariate' predicts" in c.verdict and "'constant'" in c.verdict
    # a gain of 0.05 per observation (2.5 in all) is below the 4-log-unit rule: keep the default
    c = compare_variants({"constant": ll(0.0), "length": ll(0.05)}, default="constant")
    assert c.preferred == "constant" and "keep 'constant'" in c.verdict
