"""``calib demo``: the whole job on the bundled, invented demo data.

The demo tables live in ``demo_paired_tows/`` of a source checkout. An installed
package without that folder regenerates them with the documented simulator
(``calib.simulate.write_demo``, fixed seed), which writes the same bytes.
"""

from __future__ import annotations

import time
from pathlib import Path

DEMO_FILES = ("hauls.csv", "catches.csv", "lengths.csv")
# The planning example: a few species of the seine-trawl groups (a few seconds of simulation).
PLAN_GEAR = "beach_seine"
PLAN_SPECIES = ("pinfish", "blue crab", "southern flounder")


def demo_data_dir(out: Path) -> Path:
    """Folder holding the demo tables: the checkout's copy, else a fresh one under ``out``."""
    checkout = Path(__file__).resolve().parent.parent / "demo_paired_tows"
    if all((checkout / f).exists() for f in DEMO_FILES):
        return checkout
    from calib.simulate import write_demo

    target = out / "demo_inputs"
    write_demo(target)
    return target


def run_demo(out, *, draws: int = 1000, tune: int = 1000, seed: int = 20261202,
             progressbar: bool = True) -> dict:
    """Run check, fit, convert, series, trend, a small study plan and the report on the demo data; print
    findings and where the files are.

    Returns a dict of the output paths and the FactorSet (for tests and notebooks).
    """
    from calib.fitting import fit
    from calib.inspect import summarize
    from calib.simulate import DEMO_REFERENCE
    from calib.tables import load_tables

    out = Path(out)
    out.mkdir(parents=True, exist_ok=True)
    started = time.perf_counter()
    data = demo_data_dir(out)
    lengths = data / "lengths.csv"
    groups = data / "species_groups.csv"
    tables = load_tables(data / "hauls.csv", data / "catches.csv", lengths if lengths.exists() else None)

    print(f"== calib demo: invented data from {data}\n")
    summary = summarize(tables, reference=DEMO_REFERENCE)
    summary_text = summary.text()
    (out / "check.txt").write_text(summary_text + "\n")
    print(summary_text)

    print(f"\n== Fitting conversion factors to the reference gear '{DEMO_REFERENCE}'\n")
    factor_set = fit(tables, reference=DEMO_REFERENCE, species_groups=groups if groups.exists() else None,
                     draws=draws, tune=tune, chains=2, seed=seed, progressbar=progressbar)
    factors_dir = factor_set.save(out / "factors")
    print(factor_set.summary())

    from calib.convert import convert

    print("\n== Converting every haul to reference-gear units\n")
    conversion = convert(factor_set, tables)
    converted_dir = conversion.save(out / "converted")
    print(conversion.summary())

    from calib.series import series

    print("\n== Building the harmonized abundance series\n")
    series_result = series(conversion, seed=seed)
    series_dir = series_result.save(out / "series")
    print(series_result.summary())

    from calib.trend import trend

    print("\n== How much of each apparent trend is the change of gears?\n")
    trend_result = trend(conversion, seed=seed)
    trend_dir = trend_result.save(out / "trend")
    print(trend_result.summary())

    from calib.plan import PlanTarget, expected_catch_from_factors, kappa_from_factors, plan

    print("\n== Planning a further seine calibration: how many seine-trawl groups?\n")
    wanted = [s for s in PLAN_SPECIES if s in set(factor_set.table["species"])]
    inputs = expected_catch_from_factors(factor_set)
    inputs = inputs[(inputs["gear"] == PLAN_GEAR) & inputs["species"].isin(wanted)]
    plan_result = plan(inputs, PlanTarget(), kappa_table=kappa_from_factors(factor_set), n_studies=100,
                       full_fit=False, seed=seed, progressbar=progressbar, input_paths=[factors_dir])
    plan_dir = plan_result.save(out / "plan")
    print(plan_result.summary())
    print("  (The demo skips the check of the fast fit against a full Bayesian fit; `calib plan` runs it.)")

    from calib.report import write_report

    report_path = write_report(out / "report.html", factors_dir, converted=converted_dir, series=series_dir,
                               trend=trend_dir)

    elapsed = time.perf_counter() - started
    table = factor_set.table
    print("\n== What the demo found")
    print(f"  {len(table)} factors for {table['species'].nunique()} species and "
          f"{table['gear'].nunique()} gears; status: "
          + ", ".join(f"{n} {s}" for s, n in table['status'].value_counts().items()))
    print(f"  The true factors used to simulate the data are in {data / 'truth' / 'factors.csv'}.")
    print("\n== Files")
    print(f"  check summary:  {out / 'check.txt'}")
    print(f"  factor set:     {factors_dir}/ (factors.csv, checks.csv, posterior.nc, manifest.json)")
    print(f"  converted:      {converted_dir}/ (records, rejected.csv, factor_draws.parquet, manifest.json)")
    print(f"  series:         {series_dir}/ (series.csv, series_draws.parquet, manifest.json)")
    print(f"  trend:          {trend_dir}/ (trend.csv, summary.md, trend_series.csv, gear_mix.csv, "
          "source_series.csv, source_agreement.csv, trend_draws.parquet, manifest.json)")
    print(f"  figures:        {trend_dir / 'figures'}/ (raw_vs_harmonized.png, artifact.png, gear_mix.png, "
          "source_series.png)")
    print(f"  study plan:     {plan_dir}/ (plan.csv, curve.csv, plan_curves.png, plan.md, manifest.json)")
    print(f"  report:         {report_path}  (open it in a web browser)")
    print(f"\nDone in {elapsed:.0f} s. The report: {report_path}")
    return {"out": out, "factors_dir": factors_dir, "factor_set": factor_set, "data_dir": data,
            "converted_dir": converted_dir, "conversion": conversion,
            "series_dir": series_dir, "series": series_result,
            "trend_dir": trend_dir, "trend": trend_result, "plan_dir": plan_dir, "plan": plan_result,
            "report": report_path}
