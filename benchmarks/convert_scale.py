"""Scale benchmark of ``calib convert`` + ``calib series`` (issue 3, item 4).

Builds synthetic survey tables in memory -- by default 1,000,000 hauls x 10 species =
10,000,000 haul x species records (zeros completed), 4 gears, 30 years, 10 strata with areas --
and a synthetic factor set with 1,000 posterior draws, then times

    convert(factor_set, tables)      every record in reference-gear units, draw by draw
    series(conversion)               stratified means with paired bootstrap x posterior draws

against a plain pandas groupby-sum over the same records in the same run
(records[species, year, stratum, gear, cpue].groupby([species, year, stratum, gear]).sum()).

Targets (issue 3): peak memory under 2 GiB, (convert + series) / groupby-sum under 3.

What is and is not timed: the tables are built as validated in-memory ``Tables`` (what
``load_tables`` returns), so reading and validating CSV files is not in the time; nor is
writing the outputs (``--save`` times that separately). Peak memory is the whole process's
maximum resident set size (``resource.getrusage(...).ru_maxrss``), building the tables
included; the resident size just before convert is printed too.

Run:  python benchmarks/convert_scale.py                 (10 million records)
      python benchmarks/convert_scale.py --records 200000 (a quick look)

Not a test: timings depend on the machine and are never asserted anywhere.
The data are invented (a fictional estuary survey); nothing here describes a real program.
"""

from __future__ import annotations

import argparse
import os
import resource
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
import pandas as pd

sys.path.insert(0, str(Path(__file__).resolve().parent.parent))

SPECIES = ["pinfish", "silver perch", "mummichog", "striped mullet", "Atlantic silverside", "Atlantic menhaden",
           "spotted seatrout", "southern flounder", "hogchoker", "blue crab", "daggerblade grass shrimp",
           "pink shrimp", "star drum", "striped killifish"]
GEARS = ["otter_trawl_new", "otter_trawl_old", "beach_seine", "throw_trap"]  # reference first
GEAR_SHARE = [0.45, 0.35, 0.19, 0.01]  # throw_trap has no factors: its records are rejected
REFERENCE = GEARS[0]


def rss_now() -> int:
    """Current resident set size in bytes (Linux /proc)."""
    with open("/proc/self/statm") as fh:
        return int(fh.read().split()[1]) * os.sysconf("SC_PAGE_SIZE")


def peak_rss() -> int:
    """Peak resident set size of this process so far, in bytes (ru_maxrss is KiB on Linux)."""
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024


def gib(n: float) -> str:
    return f"{n / 2**30:.2f} GiB"


def build_tables(n_hauls: int, n_species: int, n_years: int, n_strata: int, seed: int):
    """Validated-looking in-memory survey tables; text built with Arrow, no Python object per row."""
    import pyarrow as pa
    import pyarrow.compute as pc

    from calib.tables import Tables

    rng = np.random.default_rng(seed)
    species = SPECIES[:n_species]
    strata = [f"stratum_{i + 1:02d}" for i in range(n_strata)]
    st = rng.integers(0, n_strata, n_hauls).astype(np.int16)
    g = rng.choice(len(GEARS), size=n_hauls, p=GEAR_SHARE).astype(np.int8)
    year = (1995 + rng.integers(0, n_years, n_hauls)).astype(np.int64)
    day = rng.integers(0, 214, n_hauls)  # April to October
    date = (pd.to_datetime(pd.Series(year.astype(str)) + "-04-01").to_numpy() + day.astype("timedelta64[D]"))

    def text(labels, codes):
        return pd.Series(pd.arrays.ArrowStringArray(pa.array(np.asarray(labels, dtype=object)).take(
            pa.array(codes)).cast(pa.large_string())), dtype="str")

    ids = pc.binary_join_element_wise("H", pc.utf8_lpad(pa.array(np.arange(n_hauls)).cast(pa.string()), 8, "0"), "")
    hauls = pd.DataFrame({
        "haul_id": pd.Series(pd.arrays.ArrowStringArray(ids.cast(pa.large_string())), dtype="str"),
        "gear": text(GEARS, g),
        "date": pd.Series(date).astype("datetime64[ns]"),
        "effort": rng.uniform(500.0, 3000.0, n_hauls),
        "effort_unit": text(["m2"], np.zeros(n_hauls, dtype=np.int8)),
        "pair_id": pd.Series(np.full(n_hauls, np.nan), dtype="str"),
        "site": text([f"site_{i:03d}" for i in range(200)], rng.integers(0, 200, n_hauls)),
        "stratum": text(strata, st),
        "stratum_area": (np.arange(n_strata, dtype=float) * 0.7 + 1.3)[st],
        "source": text(["channel_program", "shore_program", "creek_program"], rng.integers(0, 3, n_hauls)),
        "depth_m": rng.uniform(0.5, 6.0, n_hauls).round(1),
    })
    hauls["year"] = year
    hauls["_row"] = np.arange(1, n_hauls + 1)
    # counts: negative binomial (gamma-Poisson, shape 0.6) around a density per species x stratum
    # x year, times the gear's catchability and the effort
    theta = np.zeros((len(GEARS), n_species))
    theta[1] = rng.normal(-0.3, 0.2, n_species)
    theta[2] = rng.normal(0.8, 0.4, n_species)
    theta[3] = rng.normal(0.0, 0.2, n_species)
    log_density = rng.normal(np.log(2.0), 0.8, (n_species, n_strata))  # per 1000 m2
    trend = rng.normal(0.0, 0.02, n_species)
    catches_h, catches_s, catches_n = [], [], []
    for s in range(n_species):  # one species at a time keeps the peak small
        mean = np.exp(log_density[s, st] + trend[s] * (year - 1995) + theta[g, s]) * hauls["effort"].to_numpy() / 1000
        count = rng.poisson(mean * rng.gamma(0.6, 1 / 0.6, n_hauls))
        hit = np.flatnonzero(count)
        catches_h.append(hit)
        catches_s.append(np.full(len(hit), s, dtype=np.int8))
        catches_n.append(count[hit].astype(float))
    hit = np.concatenate(catches_h)
    order = np.argsort(hit, kind="stable")
    hit = hit[order]
    catches = pd.DataFrame({
        "haul_id": pd.Series(pd.arrays.ArrowStringArray(ids.take(pa.array(hit)).cast(pa.large_string())), dtype="str"),
        "species": text(species, np.concatenate(catches_s)[order]),
        "count": np.concatenate(catches_n)[order],
    })
    del catches_h, catches_s, catches_n, hit, order
    catches["_row"] = np.arange(1, len(catches) + 1)
    tables = Tables(hauls=hauls, catches=catches, lengths=None,
                    files={"hauls": "(in memory) hauls", "catches": "(in memory) catches"})
    return tables, theta, species


def build_factor_set(theta: np.ndarray, species: list[str], n_draws: int, seed: int):
    """A factor set with known synthetic posterior draws (no fit): theta ~ Normal(truth, 0.1)."""
    import arviz as az
    import xarray as xr

    from calib.factors import FACTOR_COLUMNS, FactorSet

    rng = np.random.default_rng(seed + 1)
    fitted = GEARS[:3]  # no factors for throw_trap
    th = theta[None, None, :3, :] + 0.1 * rng.standard_normal((1, n_draws, 3, len(species)))
    th[:, :, 0, :] = 0.0
    post = xr.DataArray(th, dims=("chain", "draw", "gear", "species"),
                        coords={"chain": [0], "draw": np.arange(n_draws), "gear": fitted, "species": species},
                        name="theta")
    rows = []
    for s in species:
        for gear in fitted[1:]:
            r = {c: np.nan for c in FACTOR_COLUMNS}
            r.update(species=s, gear=gear, reference=REFERENCE, effort_unit="m2", status="ok", reason="")
            rows.append(r)
    manifest = {"factor_set_id": "fs-benchmark00000", "reference": REFERENCE, "reference_effort_unit": "m2",
                "method": "synthetic", "settings": {"interval": 0.9}, "inputs": {},
                "domain": {"numeric": ["depth_m"], "categorical": [], "skipped": {},
                           "by_gear": {gear: {"n_hauls": 100, "months": list(range(4, 11)),
                                              "numeric": {"depth_m": [0.5, 5.0]}, "categorical": {}}
                                       for gear in fitted}}}
    return FactorSet(table=pd.DataFrame(rows)[FACTOR_COLUMNS], checks=pd.DataFrame(),
                     idata=az.InferenceData(posterior=post.to_dataset(name="theta")), manifest=manifest)


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0],
                                 formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--records", type=int, default=10_000_000, help="haul x species records (hauls x species)")
    ap.add_argument("--species", type=int, default=10, help="species (at most 14)")
    ap.add_argument("--draws", type=int, default=1000, help="posterior draws per factor")
    ap.add_argument("--years", type=int, default=30)
    ap.add_argument("--strata", type=int, default=10)
    ap.add_argument("--seed", type=int, default=1)
    ap.add_argument("--repeat", type=int, default=3, help="groupby-sum repetitions (the median is used)")
    ap.add_argument("--save", action="store_true", help="also time writing both outputs (not in the ratio)")
    args = ap.parse_args(argv)
    if not 1 <= args.species <= len(SPECIES):
        ap.error(f"--species must be 1 to {len(SPECIES)}")

    from calib.convert import convert
    from calib.series import series

    n_hauls = max(args.records // args.species, 1)
    t0 = time.perf_counter()
    tables, theta, species = build_tables(n_hauls, args.species, args.years, args.strata, args.seed)
    fs = build_factor_set(theta, species, args.draws, args.seed)
    build_s = time.perf_counter() - t0
    rss_before = rss_now()
    print(f"built {n_hauls:,} hauls x {args.species} species ({len(tables.catches):,} catches rows), "
          f"{args.draws} draws, in {build_s:.1f} s; resident before convert: {gib(rss_before)}")

    t0 = time.perf_counter()
    conversion = convert(fs, tables)
    convert_s = time.perf_counter() - t0
    t0 = time.perf_counter()
    result = series(conversion)
    series_s = time.perf_counter() - t0
    peak_work = peak_rss()
    print(f"convert: {conversion.n_in:,} records in = {conversion.n_converted:,} converted + "
          f"{conversion.n_rejected:,} rejected, {convert_s:.2f} s")
    st = result.manifest["settings"]
    print(f"series:  {len(result.table):,} rows ({result.manifest['counts']['combined_rows']:,} combined), "
          f"{st['cells']:,} cells, {st['units_exact']:,} units resampled exactly and "
          f"{st['units_moment_matched']:,} moment-matched, {st['draws_used']} paired draws, {series_s:.2f} s")

    frame = conversion.record_columns(["species", "year", "stratum", "gear", "cpue"])
    times = []
    for _ in range(max(args.repeat, 1)):
        t0 = time.perf_counter()
        frame.groupby(["species", "year", "stratum", "gear"], observed=True)["cpue"].sum()
        times.append(time.perf_counter() - t0)
    groupby_s = float(np.median(times))
    del frame
    peak = peak_rss()
    ratio = (convert_s + series_s) / groupby_s
    print(f"groupby-sum over the same {conversion.n_converted:,} records: median {groupby_s:.2f} s "
          f"(runs: {', '.join(f'{t:.2f}' for t in times)})")
    print()
    print(f"peak memory (whole process, ru_maxrss): {gib(peak)}  "
          f"[through convert + series: {gib(peak_work)}]  target < 2 GiB: {'met' if peak < 2**31 else 'NOT met'}")
    print(f"(convert + series) / groupby-sum: ({convert_s:.2f} + {series_s:.2f}) / {groupby_s:.2f} = {ratio:.2f}  "
          f"target < 3: {'met' if ratio < 3 else 'NOT met'}")
    if args.save:
        with tempfile.TemporaryDirectory() as tmp:
            t0 = time.perf_counter()
            conversion.save(Path(tmp) / "converted")
            save_c = time.perf_counter() - t0
            t0 = time.perf_counter()
            result.save(Path(tmp) / "series")
            save_s = time.perf_counter() - t0
            size = sum(p.stat().st_size for p in Path(tmp).rglob("*") if p.is_file())
        print(f"saving (not in the ratio): convert outputs {save_c:.1f} s, series outputs {save_s:.1f} s, "
              f"{size / 2**20:.0f} MiB on disk; peak memory now {gib(peak_rss())}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
