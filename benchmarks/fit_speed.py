"""How fast does calib fit its split model, against a plain PyMC implementation of the same model?

One run, the same simulated data for every contender (two gears, gamma patchiness, so the
beta-binomial split is the true model):

* size "species":  12 species x 150 pairs (``--pairs``), catches aggregated over length, fitted
  with calib.model (constant factors);
* size "length":   12 species x 150 pairs x about 20 length classes of 10 mm, fitted with
  calib.length_model (P-spline factor by length), the other gear letting small fish through.

Contenders, all 2 chains x (1,000 tune + 1,000 draws) unless --draws/--tune say otherwise:

* ``plain``: the same model written the obvious way -- ``pm.BetaBinomial`` on every cell,
  non-centred hierarchy (at the length size the P-spline in its textbook non-centred form),
  PyMC's default NUTS with its default cores (on 2 CPUs: one job, chains one after the other);
* ``calib``: ``calib.model.build_model`` (``calib.length_model.build_length_model`` at the length
  size) + ``calib.model.sample`` as ``calib fit`` runs them (masked Dirichlet-multinomial
  log-density, per-entry centring; at the length size the random walk in its eigen-coordinates;
  chains in parallel);
* ``calib+nutpie``: the same model sampled by nutpie (numba backend).

Each is run cold (a fresh model object: graph compilation included) and warm (the same model
sampled again: compiled functions reused). Printed per contender: wall time, minimum bulk ESS over
theta and the hyper-parameters, that ESS per second, max R-hat, and ratios to ``plain``; then
whether every parameter's posterior medians agree (within 3 sqrt(MCSE_1^2 + MCSE_2^2)), the cost of
one log-density-and-gradient evaluation (PyTensor) against a fused numpy evaluation of the same
density and gradient, and the gradient evaluations per effective draw.

    python benchmarks/fit_speed.py                # both sizes (tens of minutes on 2 cores)
    python benchmarks/fit_speed.py --size species --draws 500 --tune 500   # quicker look
    python benchmarks/fit_speed.py --size length --skip-nutpie
        # the length size as measured in docs/performance.md (about an hour on 2 cores, most of it
        # the plain fits; --pairs 20 --draws 500 --tune 500 for a quicker look)
"""

from __future__ import annotations

import argparse
import math
import sys
import time

import numpy as np

PARAMS = {"species": ("theta", "mu", "tau", "log_kappa_mean", "log_kappa_sd"),
          "length": ("theta_class", "mu", "tau", "sigma_rw", "log_kappa_mean", "log_kappa_sd")}


def simulated_cells(n_species: int, n_pairs: int, n_classes: int, seed: int):
    """Cells of a two-gear study; with n_classes > 1 each pair gives n_classes cells."""
    from calib.simulate import simulate_calibration

    rng = np.random.default_rng(seed)
    theta = rng.normal(0.0, 0.6, n_species)
    log_density = rng.uniform(0.5, 2.5, n_species) - math.log(n_classes)
    study = simulate_calibration(
        n_groups=n_pairs * n_classes, gears=["ref", "other"], theta={"other": list(theta)},
        log_density_mean=list(log_density), kappa=2.0,
        effort={"ref": (0.8, 1.2), "other": (0.8, 1.2)}, seed=seed,
        species=[f"sp{j:02d}" for j in range(n_species)])
    return study.to_cells()


def simulated_length_cells(n_species: int, n_pairs: int, seed: int, bin_mm: float = 10.0):
    """LengthCells of a two-gear study with length-dependent retention (about 20 classes per species).

    Lengths lognormal (median 100 to 130 mm, cv 0.25), every fish measured, 10-mm classes, a
    species' calibrated range from its first to its last class with at least 5 measured fish; the
    other gear lets small fish through (logistic retention, l50 60 mm, selection range 30 mm), so
    the factor changes with length. Each length class's split is exactly beta-binomial
    (patchiness drawn per haul x species x class).
    """
    import tempfile
    from pathlib import Path

    from calib.cells import build_length_cells
    from calib.simulate import LengthSpec, simulate_calibration
    from calib.tables import complete_zeros, load_tables

    rng = np.random.default_rng(seed)
    species = [f"sp{j:02d}" for j in range(n_species)]
    spec = LengthSpec(median_mm=list(rng.uniform(100, 130, n_species)), cv=0.25, n_measured=1_000_000,
                      bin_mm=int(bin_mm), patchiness_level="length_class", retention={"other": (60, 30)})
    study = simulate_calibration(
        n_groups=n_pairs, gears=["ref", "other"], theta={"other": list(rng.normal(0.0, 0.6, n_species))},
        log_density_mean=list(rng.uniform(2.5, 4.0, n_species)), kappa=2.0, seed=seed, species=species,
        lengths=spec, effort={"ref": (0.8, 1.2), "other": (0.8, 1.2)})
    with tempfile.TemporaryDirectory() as d:
        paths = []
        for name in ("hauls", "catches", "lengths"):
            path = Path(d) / f"{name}.csv"
            getattr(study, name).to_csv(path, index=False)
            paths.append(path)
        tables = load_tables(*paths)
        return build_length_cells(tables.hauls, complete_zeros(tables), tables.lengths, "ref", bin_mm,
                                  min_class_fish=5)


def plain_length_model(lc):
    """The length model for two gears written the obvious way: the P-spline of
    calib.length_model in its non-centred textbook form (level + sigma x centred random walk), the
    same priors and basis, pm.BetaBinomial on every cell."""
    import pymc as pm
    import pytensor.tensor as pt

    from calib.length_model import LengthModelSpec, _basis_blocks

    spec = LengthModelSpec()
    p = spec.priors
    cells = lc.cells
    if not np.asarray(cells.present).all():
        raise ValueError("the plain length model assumes both gears in every cell")
    basis, n_basis, k_max = _basis_blocks(lc, spec)
    mask = (np.arange(k_max)[None, :] < n_basis[:, None]).astype(float)
    y = np.asarray(cells.counts)[:, 1]
    n = np.asarray(cells.counts).sum(axis=1)
    w = np.asarray(cells.weight)
    stratum = np.asarray(cells.cell_species)
    sp_of_stratum = np.asarray(lc.stratum_species)
    n_sp = len(lc.species)
    with pm.Model(coords={"species": list(lc.species), "stratum": list(cells.species)}) as model:
        mu = pm.Normal("mu", 0.0, p.theta_mu_sd)
        tau = pm.HalfNormal("tau", p.theta_tau_sd)
        sigma = pm.HalfNormal("sigma_rw", spec.rw_sd)
        z_level = pm.Normal("z_level", 0.0, 1.0, dims="species")
        z_step = pm.Normal("z_step", 0.0, 1.0, shape=(n_sp, k_max - 1))
        walk = pt.concatenate([pt.zeros((n_sp, 1)), pt.cumsum(z_step, axis=1)], axis=1) * mask
        centre = walk.sum(axis=1, keepdims=True) / n_basis[:, None]
        beta = (mu + tau * z_level)[:, None] + sigma * (walk - centre) * mask
        theta = pm.Deterministic("theta_class", (beta[sp_of_stratum] * basis).sum(axis=1), dims="stratum")
        lk_mean = pm.Normal("log_kappa_mean", p.log_kappa_loc_mean, p.log_kappa_loc_sd)
        lk_sd = pm.HalfNormal("log_kappa_sd", p.log_kappa_spread_sd)
        zk = pm.Normal("z_log_kappa", 0.0, 1.0, dims="species")
        kappa = pm.math.exp(lk_mean + lk_sd * zk)[sp_of_stratum[stratum]]
        pm.BetaBinomial("y", n=n, alpha=kappa * w[:, 1] * pm.math.exp(theta[stratum]), beta=kappa * w[:, 0],
                        observed=y)
    return model


def plain_model(cells):
    """The default model for two gears, written the obvious way: pm.BetaBinomial on every cell."""
    import pymc as pm

    from calib.model import Priors

    p = Priors()
    y = np.asarray(cells.counts)[:, 1]
    n = np.asarray(cells.counts).sum(axis=1)
    w = np.asarray(cells.weight)
    s = np.asarray(cells.cell_species)
    with pm.Model(coords={"species": list(cells.species)}) as model:
        mu = pm.Normal("mu", 0.0, p.theta_mu_sd)
        tau = pm.HalfNormal("tau", p.theta_tau_sd)
        z = pm.Normal("z", 0.0, 1.0, dims="species")
        theta = pm.Deterministic("theta", mu + tau * z, dims="species")
        lk_mean = pm.Normal("log_kappa_mean", p.log_kappa_loc_mean, p.log_kappa_loc_sd)
        lk_sd = pm.HalfNormal("log_kappa_sd", p.log_kappa_spread_sd)
        zk = pm.Normal("z_log_kappa", 0.0, 1.0, dims="species")
        kappa = pm.math.exp(lk_mean + lk_sd * zk)
        pm.BetaBinomial("y", n=n, alpha=kappa[s] * w[:, 1] * pm.math.exp(theta[s]), beta=kappa[s] * w[:, 0],
                        observed=y)
    return model


def summary(idata, kind: str, params=PARAMS["species"]):
    """Per-parameter posterior medians, MCSE of the median, bulk ESS and R-hat, flattened."""
    import arviz as az

    post = idata.posterior
    out = {}
    for name in params:
        if name not in post:
            continue
        da = post[name]
        if kind == "calib":  # theta (gear, species): keep the non-reference gear; mu (gear, pool): squeeze
            if "gear" in da.dims:
                da = da.isel(gear=1)
            for dim in ("factor_gear", "pool", "combo"):
                if dim in da.dims:
                    da = da.isel({dim: 0})
        ds = da.to_dataset(name=name)
        med = ds[name].median(("chain", "draw")).values.ravel()
        mcse = az.mcse(ds, method="median")[name].values.ravel()
        ess = az.ess(ds, method="bulk")[name].values.ravel()
        rhat = az.rhat(ds)[name].values.ravel()
        for i in range(len(med)):
            out[f"{name}[{i}]"] = (med[i], mcse[i], ess[i], rhat[i])
    return out


def run(label, make_model, sample, kind, params=PARAMS["species"]):
    rows = []
    model = None
    for phase in ("cold", "warm"):
        start = time.perf_counter()
        if model is None:
            model = make_model()
        idata = sample(model)
        wall = time.perf_counter() - start
        stats = summary(idata, kind, params)
        ess = min(v[2] for v in stats.values())
        rhat = max(v[3] for v in stats.values())
        steps = float(idata.sample_stats["n_steps"].sum()) if "n_steps" in idata.sample_stats else float("nan")
        rows.append({"label": label, "phase": phase, "wall": wall, "ess": ess, "ess_per_s": ess / wall,
                     "rhat": rhat, "grads_per_ess": steps / ess, "stats": stats})
        print(f"  {label:<13} {phase:<5} wall {wall:7.1f} s   min bulk ESS {ess:7.0f}   ESS/s {ess / wall:7.2f}   "
              f"max R-hat {rhat:.4f}   gradient evaluations per effective draw {steps / ess:7.1f}", flush=True)
    return rows, model


def fused_logp_grad(cells):
    """Minimal cost of the model's likelihood: one vectorised numpy pass giving the log-density of
    every cell's beta-binomial split and its gradient with respect to theta and log kappa."""
    from scipy.special import digamma, gammaln

    y = np.asarray(cells.counts, dtype=float)
    w = np.asarray(cells.weight, dtype=float)
    s = np.asarray(cells.cell_species)
    n = y.sum(axis=1)
    const = gammaln(n + 1) - gammaln(y + 1).sum(axis=1)
    n_sp = cells.n_species

    def f(theta, log_kappa):
        k = np.exp(log_kappa)[s]
        a = np.stack([k * w[:, 0], k * w[:, 1] * np.exp(theta[s])], axis=1)
        a_sum = a.sum(axis=1)
        logp = const + gammaln(a_sum) - gammaln(n + a_sum) + (gammaln(y + a) - gammaln(a)).sum(axis=1)
        d_a = digamma(a_sum)[:, None] - digamma(n + a_sum)[:, None] + digamma(y + a) - digamma(a)
        g_theta = np.bincount(s, weights=d_a[:, 1] * a[:, 1], minlength=n_sp)
        g_kappa = np.bincount(s, weights=(d_a * a).sum(axis=1), minlength=n_sp)
        return logp.sum(), g_theta, g_kappa

    return f


def time_call(fn, repeats: int = 20, batches: int = 15) -> float:
    """CPU seconds per call (this process's CPU time, so other processes' load counts little): the
    fastest of ``batches`` batches."""
    fn()
    best = math.inf
    for _ in range(batches):
        start = time.process_time()
        for _ in range(repeats):
            fn()
        best = min(best, (time.process_time() - start) / repeats)
    return best


def gradient_costs(cells, calib_model, plain):
    """Seconds per log-density-and-gradient evaluation: calib's model, the plain one, fused numpy."""
    out = {}
    for label, model in (("calib", calib_model), ("plain", plain)):
        fn = model.logp_dlogp_function(ravel_inputs=True)
        fn.set_extra_values({})
        x = np.concatenate([np.ravel(v) for v in model.initial_point().values()])
        out[label] = time_call(lambda: fn(x))
    f = fused_logp_grad(cells)
    theta, lk = np.zeros(cells.n_species), np.full(cells.n_species, math.log(3.0))
    out["fused numpy"] = time_call(lambda: f(theta, lk))
    return out


def compare_medians(a: dict, b: dict) -> tuple[int, int, float]:
    """Parameters whose medians differ by more than 3 sqrt(MCSE_a^2 + MCSE_b^2); worst z."""
    bad, worst, n = 0, 0.0, 0
    for key in a:
        if key not in b:
            continue
        n += 1
        z = abs(a[key][0] - b[key][0]) / math.sqrt(a[key][1] ** 2 + b[key][1] ** 2)
        worst = max(worst, z)
        bad += z > 3
    return bad, n, worst


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--size", choices=["species", "length", "both"], default="both")
    ap.add_argument("--draws", type=int, default=1000)
    ap.add_argument("--tune", type=int, default=1000)
    ap.add_argument("--seed", type=int, default=7)
    ap.add_argument("--skip-nutpie", action="store_true")
    ap.add_argument("--pairs", type=int, default=150, help="calibration pairs per study (default 150)")
    args = ap.parse_args(argv)

    import os

    import pymc
    import pytensor

    from calib import model as cm

    print(f"calib fit speed; pymc {pymc.__version__}, pytensor {pytensor.__version__}, "
          f"{len(os.sched_getaffinity(0))} CPUs, {time.strftime('%Y-%m-%d %H:%M')}; "
          f"2 chains x ({args.tune} tune + {args.draws} draws)")
    from calib import length_model as lm

    sizes = ("species", "length") if args.size == "both" else (args.size,)
    for size in sizes:
        if size == "species":
            cells = simulated_cells(12, args.pairs, 1, args.seed)
            print(f"\n== size 'species': 12 species x {args.pairs} pairs, aggregated over length: {cells.n_cells} "
                  "cells with a non-zero total")
            make_plain, make_calib = (lambda: plain_model(cells)), (lambda: cm.build_model(cells, cm.ModelSpec()))
        else:
            lc = simulated_length_cells(12, args.pairs, args.seed)
            cells = lc.cells
            per_sp = np.bincount(lc.stratum_species)
            print(f"\n== size 'length': 12 species x {args.pairs} pairs x {per_sp.min()} to {per_sp.max()} length "
                  f"classes ({lc.bin_mm:g} mm; {len(lc.stratum_species)} species x classes): {cells.n_cells} cells "
                  "with a non-zero total")
            centred = lm.level_centring(lc, lm.LengthModelSpec())
            print(f"  calib writes {int(centred.sum())} of {centred.size} species levels centred "
                  "(length_model.level_centring)")
            make_plain = lambda: plain_length_model(lc)  # noqa: E731
            make_calib = lambda: lm.build_length_model(lc, lm.LengthModelSpec())  # noqa: E731
        params = PARAMS[size]
        settings = dict(draws=args.draws, tune=args.tune, chains=2, seed=args.seed, progressbar=False,
                        prior_draws=0, log_likelihood=False)

        def sample_plain(m):
            with m:
                return pymc.sample(draws=args.draws, tune=args.tune, chains=2, random_seed=args.seed,
                                   progressbar=False, target_accept=0.9, compute_convergence_checks=False)

        plain_rows, plain = run("plain", make_plain, sample_plain, "plain", params)
        calib_rows, calib_model = run("calib", make_calib, lambda m: cm.sample(m, **settings), "calib", params)
        rows = plain_rows + calib_rows
        if not args.skip_nutpie:
            nut_rows, _ = run("calib+nutpie", make_calib, lambda m: cm.sample(m, sampler="nutpie", **settings),
                              "calib", params)
            rows += nut_rows
        base = {r["phase"]: r for r in plain_rows}
        print("\n  ratios to plain (same phase):   wall time   ESS per second")
        for r in rows:
            b = base[r["phase"]]
            print(f"    {r['label']:<13} {r['phase']:<5}  {r['wall'] / b['wall']:9.2f}   {r['ess_per_s'] / b['ess_per_s']:9.2f}")
        print("\n  same posterior? (every parameter's medians within 3 sqrt(MCSE_1^2 + MCSE_2^2) of plain's)")
        for r in rows[2:]:
            bad, n, worst = compare_medians(r["stats"], base[r["phase"]]["stats"])
            print(f"    {r['label']:<13} {r['phase']:<5}  {n - bad} of {n} agree; largest |z| {worst:.2f}")
        costs = gradient_costs(cells, calib_model, plain)
        print("\n  one log-density + gradient evaluation:")
        for label, sec in costs.items():
            print(f"    {label:<12} {1e6 * sec:9.1f} µs   ({sec / costs['fused numpy']:.2f} x fused numpy)")
        warm = calib_rows[1]
        floor = costs["fused numpy"] * warm["grads_per_ess"]
        print(f"\n  limit: calib warm spends {1e3 * warm['wall'] / warm['ess']:.2f} ms per effective draw; "
              f"fused cost x gradients per effective draw = {1e3 * floor:.3f} ms "
              f"({warm['wall'] / warm['ess'] / floor:.1f} x the floor)")
    return 0


if __name__ == "__main__":
    sys.exit(main())
