"""Shared fixtures. Keep small: one session-scoped fit of the split model."""

from __future__ import annotations

import pytest

SMALL_FIT_SETTINGS = dict(draws=300, tune=300, chains=2, seed=11, progressbar=False)


def small_study_cells():
    """3 gears (A the reference), 3 species, groups A+B, A+C and A+B+C, gamma patchiness."""
    from calib.simulate import simulate_calibration

    group_gears = [["A", "B"], ["A", "C"], ["A", "B", "C"]] * 10
    study = simulate_calibration(
        n_groups=len(group_gears),
        gears=["A", "B", "C"],
        theta={"B": [-0.4, 0.3, 0.0], "C": [0.5, -0.2, 0.2]},
        log_density_mean=[2.0, 1.5, 2.5],
        kappa=2.0,
        effort={"A": (0.8, 1.2), "B": (0.8, 1.2), "C": (0.8, 1.2)},
        seed=20261202,
        group_gears=group_gears,
        species=["pinfish", "blue crab", "hogchoker"],
    )
    return study, study.to_cells()


@pytest.fixture(scope="session")
def small_fit():
    """(study, cells, model, idata): default model (Dirichlet-multinomial, partial pooling),
    PyMC's NUTS, 2 chains x (300 tune + 300 draws)."""
    from calib import model as cm

    study, cells = small_study_cells()
    model = cm.build_model(cells, cm.ModelSpec())
    idata = cm.sample(model, **SMALL_FIT_SETTINGS)
    return study, cells, model, idata


@pytest.fixture(scope="session")
def demo_run(tmp_path_factory):
    """One run of ``calib demo`` shared by the demo, report and notebook tests: the dict
    ``calib.demo.run_demo`` returns plus ``printed`` (everything it printed)."""
    import contextlib
    import io

    from calib.demo import run_demo

    out = tmp_path_factory.mktemp("demo") / "out"
    printed = io.StringIO()
    with contextlib.redirect_stdout(printed):
        result = run_demo(out, progressbar=False)
    return {**result, "printed": printed.getvalue()}
