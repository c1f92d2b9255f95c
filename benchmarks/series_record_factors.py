"""Scale benchmark of ``series_draws`` on records with their own factor (covariate-converted).

Builds N synthetic survey records in memory (default 1,000,000: 10 species, 3 gears, 30 years,
10 strata with areas, a depth per haul) and 1,000 posterior draws, then times the series
estimator twice on the same records:

    ordinary     every non-reference species x gear converted with one factor (species level)
    per record   the same gears converted with their own depth:
                 factor[d] = exp(-(theta_gs[d] + slope_g[d] * (depth - 3))), rebuilt draw by
                 draw from term draws (calib.covariate_convert.CovariateRecordFactors);
                 or, with --kind length, with their own mix of 3 length classes' factors
                 (calib.length_convert.LengthRecordFactors; every non-zero record has raised
                 counts in 1 to 3 classes, as record_lengths.csv holds them)

and prints wall time and the process's peak resident memory after each (ru_maxrss). The
per-record path adds O(non-zero records x draws) arithmetic, done about 2^20 values at a time.

Run:  python benchmarks/series_record_factors.py                  (1 million records)
      python benchmarks/series_record_factors.py --records 10000000

Not a test: timings depend on the machine and are never asserted anywhere. The data are
invented (a fictional estuary survey).
"""

from __future__ import annotations

import argparse
import resource
import sys
import time
from pathlib import Path

import numpy as np
import pandas as pd

sys.path.insert(0, str(Path(__file__).resolve().parent.parent))

SPECIES = ["pinfish", "silver perch", "mummichog", "striped mullet", "Atlantic silverside", "Atlantic menhaden",
           "spotted seatrout", "southern flounder", "hogchoker", "blue crab"]
GEARS = ["otter_trawl_new", "otter_trawl_old", "beach_seine"]  # reference first


def peak_gib() -> float:
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024 / 2**30


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--records", type=int, default=1_000_000)
    ap.add_argument("--draws", type=int, default=1000)
    ap.add_argument("--seed", type=int, default=1)
    ap.add_argument("--kind", choices=["covariate", "length"], default="covariate")
    args = ap.parse_args(argv)

    from calib.covariate_convert import CovariateRecordFactors
    from calib.series import RecordFactors, series_draws

    rng = np.random.default_rng(args.seed)
    n_sp = len(SPECIES)
    n_h = max(args.records // n_sp, 1)
    gear = rng.choice(3, size=n_h, p=[0.45, 0.35, 0.20])
    st = rng.integers(0, 10, n_h)
    depth = rng.uniform(0.5, 6.0, n_h).round(1)
    cat = pd.Categorical.from_codes
    rec = pd.DataFrame({
        **({"haul_id": pd.Categorical.from_codes(np.repeat(np.arange(n_h), n_sp), np.arange(n_h).astype(str))}
           if args.kind == "length" else {}),
        "species": cat(np.tile(np.arange(n_sp), n_h), SPECIES),
        "year": np.repeat(1995 + rng.integers(0, 30, n_h), n_sp),
        "gear": cat(np.repeat(gear, n_sp), GEARS),
        "stratum": cat(np.repeat(st, n_sp), [f"stratum_{i:02d}" for i in range(10)]),
        "stratum_area": np.repeat(st * 0.7 + 1.3, n_sp),
        "depth_m": np.repeat(depth, n_sp),
        "cpue": rng.poisson(rng.gamma(0.6, 2.0 / 0.6, n_h * n_sp)) / 1000.0,
    })
    D = args.draws
    theta = rng.normal(0.0, 0.5, (3, n_sp, 1)) + 0.1 * rng.standard_normal((3, n_sp, D))
    slope = rng.normal(0.1, 0.02, (3, D))
    fd_rows, term_rows = [], []
    for s, sp in enumerate(SPECIES):
        fd_rows.append(pd.DataFrame({"species": sp, "gear": GEARS[0], "draw": np.arange(D), "factor": 1.0}))
        for g in (1, 2):
            fd_rows.append(pd.DataFrame({"species": sp, "gear": GEARS[g], "draw": np.arange(D),
                                         "factor": np.exp(-theta[g, s])}))
            term_rows.append(pd.DataFrame({"species": sp, "gear": GEARS[g], "term": "theta", "covariate": "",
                                           "level": "", "draw": np.arange(D), "value": theta[g, s]}))
            term_rows.append(pd.DataFrame({"species": sp, "gear": GEARS[g], "term": "slope", "covariate": "depth_m",
                                           "level": "", "draw": np.arange(D), "value": slope[g]}))
    fd_all = pd.concat(fd_rows, ignore_index=True)
    fd_ref = fd_all[fd_all["gear"] == GEARS[0]]
    if args.kind == "covariate":
        rf = RecordFactors([CovariateRecordFactors(pd.concat(term_rows, ignore_index=True),
                                                   {"depth_m": {"kind": "numeric", "centre": 3.0}})])
    else:
        from calib.length_convert import LengthRecordFactors

        cls = [40.0, 60.0, 80.0]
        draws = pd.concat([pd.DataFrame({"species": sp, "gear": GEARS[g], "length_mm": L, "draw": np.arange(D),
                                         "factor": np.exp(-theta[g, s] + 0.3 * (k - 1))})
                           for s, sp in enumerate(SPECIES) for g in (1, 2) for k, L in enumerate(cls)],
                          ignore_index=True)
        conv = np.flatnonzero((rec["gear"] != GEARS[0]).to_numpy() & (rec["cpue"] > 0).to_numpy())
        k = rng.integers(1, 4, len(conv))  # classes per record
        r = np.repeat(conv, k)
        first = np.repeat(rng.integers(0, 3, len(conv)), k)
        within = np.arange(len(r)) - np.repeat(np.cumsum(k) - k, k)
        rl = pd.DataFrame({"haul_id": rec["haul_id"].to_numpy()[r].astype(str), "species":
                           rec["species"].to_numpy()[r].astype(str),
                           "factor_length_mm": np.asarray(cls)[(first + within) % 3],
                           "raised_count": rng.uniform(1.0, 20.0, len(r))})
        rf = RecordFactors([LengthRecordFactors(draws, rl)])
        print(f"record_lengths: {len(rl):,} rows")
    print(f"{len(rec):,} records ({(rec['cpue'] > 0).mean():.0%} non-zero), {D} draws; "
          f"peak so far {peak_gib():.2f} GiB")
    t0 = time.perf_counter()
    a = series_draws(rec, fd_all, seed=1)
    t1 = time.perf_counter()
    print(f"ordinary:   {t1 - t0:6.1f} s, peak {peak_gib():.2f} GiB, {a.settings['units_moment_matched']} "
          f"moment-matched units of {a.settings['units_moment_matched'] + a.settings['units_exact']}")
    t0 = time.perf_counter()
    series_draws(rec, fd_ref, seed=1, record_factors=rf)
    t1 = time.perf_counter()
    print(f"per record: {t1 - t0:6.1f} s, peak {peak_gib():.2f} GiB")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
