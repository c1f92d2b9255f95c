"""Stage 9: one self-contained HTML report of a factor set and what was made with it.

Reads saved results only (the folders written by ``calib fit``, ``convert``, ``series`` and
``trend``); it never refits and never resamples. Figures come from :mod:`calib.plots` and
are embedded as base64 PNG, styles are inline, and nothing is fetched from the network, so
the file can be mailed, archived and printed (print styles keep figures whole on a page).

The input tables named in the fit's manifest are read, when they are still where they were
and their SHA-256 still matches, to describe the calibration design (groups per gear
combination); otherwise the report says so and uses the counts the fit recorded.

Sections (``SECTIONS``): what went in, the factors, model checks, factor by length, series,
trend attribution, cautions, manifests.
"""

from __future__ import annotations

import argparse
import base64
import html
import json
import textwrap
from dataclasses import dataclass
from datetime import datetime, timezone
from pathlib import Path

import numpy as np
import pandas as pd

from calib.errors import InputError, Problem

# (anchor, heading) in the order they appear; the browser test checks every heading.
SECTIONS = [
    ("inputs", "What went in"),
    ("factors", "Conversion factors"),
    ("checks", "Model checks"),
    ("length", "Factor by length"),
    ("series", "Harmonized series"),
    ("trend", "Trend attribution"),
    ("cautions", "Cautions"),
    ("manifest", "Manifests"),
]

# A model comparison (PSIS-LOO) saved in the factor set folder under one of these names is shown.
COMPARISON_FILES = ("comparison.csv", "loo_comparison.csv", "loo.csv")

CAUTIONS = [
    "Conversion factors hold only for the gears, size range, habitats and seasons of the calibration "
    "study they were fitted on. Applying them to other sizes, places or months is an extrapolation the "
    "calibration data cannot check; records outside the calibrated months or covariate ranges are "
    "flagged in the converted records (domain_flag).",
    "Side-by-side groups calibrate two gears only if both sampled the same animals. A seine on the marsh "
    "edge and a trawl in the channel share no local density; a factor between them also absorbs the "
    "habitat difference.",
    "A factor whose status is warn or fail rests on a fit that did not pass every check (see Model "
    "checks); convert refuses fail factors unless told otherwise.",
    "Harmonized series and trends carry the uncertainty of the factors and of sampling, but not that of "
    "changes the calibration did not cover (new sites, seasons, crews, or gears changing again).",
    "Outputs may inform fishery management. Defer to the survey program's own standards and to qualified "
    "review before any management use.",
]


# ----------------------------------------------------------------------------- reading results


@dataclass
class ReportInputs:
    """The saved results a report is made from (frames and manifests; nothing is refitted)."""

    factors_dir: Path
    factors: pd.DataFrame
    checks: pd.DataFrame
    manifest: dict
    comparison: pd.DataFrame | None = None
    comparison_file: str | None = None
    length_split: pd.DataFrame | None = None  # length_split.csv of a length factor set
    converted_dir: Path | None = None
    converted_manifest: dict | None = None
    records: pd.DataFrame | None = None
    rejected: pd.DataFrame | None = None
    series_dir: Path | None = None
    series: pd.DataFrame | None = None
    series_manifest: dict | None = None
    trend_dir: Path | None = None
    trend: pd.DataFrame | None = None
    trend_summary: str | None = None
    trend_manifest: dict | None = None
    trend_series: pd.DataFrame | None = None  # the optional tables of a trend folder
    gear_mix: pd.DataFrame | None = None
    source_series: pd.DataFrame | None = None
    agreement: pd.DataFrame | None = None


def _missing(directory: Path, names, option: str, command: str) -> list[Problem]:
    if not directory.is_dir():
        return [Problem(str(directory), None, None, "folder not found",
                        f"point {option} at a folder written by `calib {command}`", False)]
    return [Problem(str(directory / n), None, None, "file not found in the folder",
                    f"point {option} at a folder written by `calib {command}`", False)
            for n in names if not (directory / n).is_file()]


def _read_json(path: Path, problems: list[Problem]) -> dict:
    try:
        return json.loads(path.read_text())
    except (OSError, ValueError) as err:
        problems.append(Problem(str(path), None, None, f"cannot be read as JSON ({err})",
                                "write the folder again with the calib command that made it", False))
        return {}


def _read_csv(path: Path, problems: list[Problem]) -> pd.DataFrame:
    try:
        return pd.read_csv(path)
    except pd.errors.EmptyDataError:
        return pd.DataFrame()
    except (OSError, ValueError) as err:
        problems.append(Problem(str(path), None, None, f"cannot be read as CSV ({err})",
                                "write the folder again with the calib command that made it", False))
        return pd.DataFrame()


def read_results(factors, converted=None, series=None, trend=None) -> ReportInputs:
    """Read the saved result folders a report is made from.

    ``factors``: folder written by ``calib fit`` (factors.csv, manifest.json; checks.csv and a
    model comparison file are used when present). ``converted``, ``series``, ``trend``:
    optional folders written by ``calib convert``, ``series`` and ``trend``.
    Raises InputError naming every missing or unreadable file.
    """
    problems: list[Problem] = []
    fdir = Path(factors)
    problems += _missing(fdir, ("factors.csv", "manifest.json"), "--factors", "fit")
    cdir = Path(converted) if converted is not None else None
    sdir = Path(series) if series is not None else None
    tdir = Path(trend) if trend is not None else None
    if cdir is not None:
        problems += _missing(cdir, ("manifest.json",), "--converted", "convert")
    if sdir is not None:
        problems += _missing(sdir, ("series.csv", "manifest.json"), "--series", "series")
    if tdir is not None:
        problems += _missing(tdir, ("trend.csv", "summary.md", "manifest.json"), "--trend", "trend")
    if problems:
        raise InputError(problems)

    inputs = ReportInputs(factors_dir=fdir, factors=_read_csv(fdir / "factors.csv", problems),
                          checks=pd.DataFrame(), manifest=_read_json(fdir / "manifest.json", problems))
    if (fdir / "checks.csv").is_file():
        inputs.checks = _read_csv(fdir / "checks.csv", problems)
    for name in COMPARISON_FILES:
        if (fdir / name).is_file():
            inputs.comparison, inputs.comparison_file = _read_csv(fdir / name, problems), name
            break
    if (fdir / "length_split.csv").is_file():
        inputs.length_split = _read_csv(fdir / "length_split.csv", problems)
    if cdir is not None:
        inputs.converted_dir = cdir
        inputs.converted_manifest = _read_json(cdir / "manifest.json", problems)
        if (cdir / "records.parquet").is_file():
            wanted = ["year", "gear", "source", "species", "cpue", "cpue_ref_median"]
            import pyarrow.parquet as pq

            names = pq.read_schema(cdir / "records.parquet").names
            inputs.records = pd.read_parquet(cdir / "records.parquet", columns=[c for c in wanted if c in names])
        if (cdir / "rejected.csv").is_file():
            inputs.rejected = _read_csv(cdir / "rejected.csv", problems)
    if sdir is not None:
        inputs.series_dir = sdir
        inputs.series = _read_csv(sdir / "series.csv", problems)
        inputs.series_manifest = _read_json(sdir / "manifest.json", problems)
    if tdir is not None:
        inputs.trend_dir = tdir
        inputs.trend = _read_csv(tdir / "trend.csv", problems)
        inputs.trend_summary = (tdir / "summary.md").read_text()
        inputs.trend_manifest = _read_json(tdir / "manifest.json", problems)
        for name, attr in (("trend_series.csv", "trend_series"), ("gear_mix.csv", "gear_mix"),
                           ("source_series.csv", "source_series"), ("source_agreement.csv", "agreement")):
            if (tdir / name).is_file():
                setattr(inputs, attr, _read_csv(tdir / name, problems))
    if problems:
        raise InputError(problems)
    required = {"species", "gear", "factor_median", "factor_lower", "factor_upper", "status"}
    absent = sorted(required - set(inputs.factors.columns))
    if absent:
        raise InputError([Problem(str(fdir / "factors.csv"), None, c, "column missing",
                                  "point --factors at a folder written by `calib fit`", True) for c in absent])
    return inputs


# ----------------------------------------------------------------------------- HTML pieces


def esc(value) -> str:
    """Text from files made safe for HTML (every value shown passes through here)."""
    if value is None or (isinstance(value, float) and not np.isfinite(value)):
        return ""
    return html.escape(str(value), quote=True)


def _fmt(value, spec: str | None = None) -> str:
    """A number by a format spec (e.g. '.3f'), else readably (thousands separators, 3 significant
    digits); text is escaped as it is, missing values become a dash."""
    try:
        v = float(value)
    except (TypeError, ValueError):
        return esc(value)
    if not np.isfinite(v):
        return "—"
    if spec:
        return format(v, spec)
    if v.is_integer() and abs(v) < 1e15:
        return f"{int(v):,}"
    return f"{v:,.1f}" if abs(v) >= 100 else f"{v:.3g}"


_num = _fmt


def _table(frame: pd.DataFrame, columns: dict, *, status_column: str | None = None, numeric=(), code=()) -> str:
    """An HTML table of ``frame`` with headings ``columns`` (column -> heading), values escaped.

    ``numeric``: columns right-aligned as numbers; a dict maps them to format specs. ``code``:
    columns shown in a small fixed-width font that may break anywhere (paths, hashes).
    """
    specs = numeric if isinstance(numeric, dict) else {c: None for c in numeric}
    head = "".join(f"<th>{esc(h)}</th>" for h in columns.values())
    body = []
    for _, row in frame.iterrows():
        cells = []
        for col in columns:
            value = row.get(col)
            text = _fmt(value, specs[col]) if col in specs else esc(value)
            cls = ""
            if col == status_column:
                cls = f' class="status status-{esc(value)}"'
            elif col in specs:
                cls = ' class="num"'
            elif col in code:
                cls = ' class="code"'
            cells.append(f"<td{cls}>{text}</td>")
        body.append("<tr>" + "".join(cells) + "</tr>")
    return f'<table><thead><tr>{head}</tr></thead><tbody>{"".join(body)}</tbody></table>'


def _figure(fig, caption: str, alt: str) -> str:
    from calib.plots import figure_png

    data = base64.b64encode(figure_png(fig)).decode("ascii")
    return (f'<figure><img src="data:image/png;base64,{data}" alt="{esc(alt)}">'
            f"<figcaption>{esc(caption)}</figcaption></figure>")


def _p(text: str) -> str:
    return f"<p>{esc(text)}</p>"


def _note(text: str) -> str:
    return f'<p class="note">{esc(text)}</p>'


# ----------------------------------------------------------------------------- sections


def _input_state(meta: dict) -> str:
    """'unchanged', 'changed since' or 'not found' for an input file named in a manifest."""
    from calib.factors import file_sha256

    path = Path(str(meta.get("path", "")))
    if not meta.get("path") or not path.is_file():
        return "not found now"
    return "unchanged" if file_sha256(path) == meta.get("sha256") else "changed since"


def calibration_design(manifest: dict):
    """The calibration design of a fit, from its manifest's input tables when they are unchanged.

    Returns (``calib.inspect.CheckSummary`` or None, note): None with a note saying why when
    an input table is missing or its SHA-256 differs from the one recorded at the fit.
    """
    files = manifest.get("inputs", {})
    roles = ("hauls", "catches", "lengths", "species_recorded", "species_names")
    if not all(r in files for r in ("hauls", "catches")):
        return None, "the fit's manifest names no input tables"
    states = {r: _input_state(files[r]) for r in roles if r in files}
    if any(s != "unchanged" for s in states.values()):
        which = ", ".join(f"{r} {s}" for r, s in states.items() if s != "unchanged")
        return None, (f"the input tables are not as they were at the fit ({which}); "
                      "the design below is what the fit recorded")
    from calib.inspect import summarize
    from calib.tables import load_tables

    # The lengths table does not change the design; only its row count is shown, so it is not
    # validated again here (the fit did that), which keeps the report quick.
    try:
        tables = load_tables(*(files[r]["path"] if r in files and r != "lengths" else None for r in roles))
        summary = summarize(tables, reference=manifest.get("reference"))
    except InputError as err:  # cannot happen for files a fit accepted, unless the rules changed
        return None, f"the input tables could not be read again ({err.problems[0]})"
    if "lengths" in files:
        summary.n_length_rows = _count_rows(files["lengths"]["path"])
        summary.notes = [n for n in summary.notes if not n.startswith("no lengths table")]
    return summary, ""


def _count_rows(path) -> int:
    """Data rows of a CSV (lines after the header, blank lines excluded) or Parquet file."""
    path = Path(path)
    if path.suffix.lower() in (".parquet", ".pq"):
        import pyarrow.parquet as pq

        return int(pq.ParquetFile(path).metadata.num_rows)
    with open(path, "rb") as fh:
        return max(sum(1 for line in fh if line.strip(b" ,\r\n")) - 1, 0)


def _section_inputs(r: ReportInputs) -> str:
    m = r.manifest
    out = []
    settings = m.get("settings", {})
    facts = [("factor set", m.get("factor_set_id")), ("method", m.get("method")),
             ("reference gear", f"{m.get('reference')} (effort in {m.get('reference_effort_unit') or '?'})"),
             ("fitted", m.get("timestamp")),
             ("settings", ", ".join(f"{k} {v}" for k, v in settings.items()))]
    model = m.get("model") or {}
    if model:
        facts.append(("model", ", ".join(f"{k}: {v}" for k, v in model.items() if not isinstance(v, dict))))
    out.append('<dl class="facts">' + "".join(f"<dt>{esc(k)}</dt><dd>{esc(v)}</dd>" for k, v in facts) + "</dl>")

    rows = [{"role": role, "path": meta.get("path"), "sha256": meta.get("sha256"), "now": _input_state(meta)}
            for role, meta in m.get("inputs", {}).items()]
    if rows:
        out.append("<h3>Input tables</h3>")
        out.append(_table(pd.DataFrame(rows), {"role": "table", "path": "file", "sha256": "SHA-256 at the fit",
                                               "now": "file now"}, code=("path", "sha256")))
    summary, note = calibration_design(m)
    cells = m.get("cells", {})
    out.append("<h3>Calibration design</h3>")
    if summary is not None:
        counts = [("hauls", summary.n_hauls), ("hauls in calibration groups", summary.n_calibration_hauls),
                  ("calibration groups (usable: two or more gears)", f"{summary.n_groups} ({summary.n_usable_groups})"),
                  ("groups where several hauls of one gear were summed", summary.groups_with_summed_hauls),
                  ("catch rows", summary.n_catch_rows), ("species", len(summary.species))]
        if summary.n_length_rows is not None:
            counts.append(("length rows", summary.n_length_rows))
        out.append(_table(pd.DataFrame(counts, columns=["what", "n"]), {"what": "", "n": "count"}, numeric=("n",)))
        combos = pd.DataFrame(summary.combos)
        out.append(_table(combos, {"label": "gears fishing together", "n_groups": "groups"}, numeric=("n_groups",)))
        combo_list = summary.combos
    else:
        out.append(_note(f"Design from the fit's record: {note}."))
        counts = [(k.replace("_", " "), v) for k, v in cells.items() if not isinstance(v, (list, dict))]
        out.append(_table(pd.DataFrame(counts, columns=["what", "n"]), {"what": "", "n": "count"}, numeric=("n",)))
        combo_list = [{"gears": c.split("+"), "n_groups": None} for c in _combos_from_posterior(r.factors_dir)]
        if combo_list:
            out.append(_p("Gear combinations in the fit: " + "; ".join(" + ".join(c["gears"]) for c in combo_list)
                          + " (group counts need the input tables)."))
    gears = m.get("gears") or sorted(set(r.factors["gear"].astype(str)) | {str(m.get("reference"))})
    if len(gears) > 2 and combo_list and all(c.get("n_groups") is not None for c in combo_list):
        from calib.plots import plot_gear_network

        out.append(_figure(plot_gear_network(combo_list, reference=m.get("reference")),
                           "Gears that fished together: a line joins two gears that shared calibration groups, "
                           "labelled with the number of groups (a three-gear group counts for each pair). Gears "
                           "linked to the reference only through another gear get their factor through that chain.",
                           "network of gears and calibration groups"))
    if r.converted_manifest:
        c = r.converted_manifest.get("counts", {})
        out.append("<h3>Converted records</h3>")
        rows = [("records in (haul × species, zeros completed)", c.get("records_in")),
                ("converted", c.get("converted")), ("rejected (see rejected.csv)", c.get("rejected")),
                ("reference-gear records passed through", c.get("reference_pass_through")),
                ("outside the calibration's domain (flagged, converted)", c.get("domain_flagged"))]
        for reason, n in (c.get("rejected_by_reason") or {}).items():
            rows.append((f"rejected: {reason}", n))
        out.append(_table(pd.DataFrame(rows, columns=["what", "n"]), {"what": "", "n": "count"}, numeric=("n",)))
    return "".join(out)


def _combos_from_posterior(fdir: Path) -> list[str]:
    """Gear combinations recorded in posterior.nc (coordinate ``combo``), without loading draws."""
    path = fdir / "posterior.nc"
    if not path.is_file():
        return []
    try:
        import xarray as xr

        with xr.open_dataset(path, group="posterior", engine="h5netcdf") as ds:
            return [str(c) for c in ds.coords["combo"].values] if "combo" in ds.coords else []
    except (OSError, ValueError, KeyError):
        return []


def _species_rows(table: pd.DataFrame) -> pd.DataFrame:
    """Species-level factors; for a factor set with length classes only, every row."""
    if "length_mm" in table and table["length_mm"].isna().any():
        return table[table["length_mm"].isna()]
    return table


def _section_factors(r: ReportInputs) -> str:
    from calib.plots import plot_forest

    m = r.manifest
    ref = m.get("reference")
    t = _species_rows(r.factors).copy()
    level = _level(t)
    out = [_p(f"factor × catch per unit effort of the gear = expected catch per unit effort of the reference gear "
              f"({ref}) at the same place and time. A factor above 1 means the gear catches less of that species "
              f"than the reference gear per unit effort.")]
    counts = t["status"].value_counts()
    out.append(_p(f"{len(t)} factors: " + ", ".join(f"{int(counts.get(s, 0))} {s}" for s in ("ok", "warn", "fail"))
                  + "."))
    by_length_only = "length_mm" in t and t["length_mm"].notna().all() and len(t)
    if by_length_only:
        out.append(_p("This factor set holds factors by length class only: see Factor by length for the figure."))
    else:
        out.append(_figure(plot_forest(t, reference=ref),
                           f"Conversion factors to {ref}: median and {level} interval, log scale, colour = status.",
                           "forest plot of conversion factors"))
    t["interval_text"] = [f"{_num(lo)}\u00a0–\u00a0{_num(hi)}"
                          for lo, hi in zip(t["factor_lower"], t["factor_upper"])]
    columns = {"species": "species", "gear": "gear", "length_mm": "length class (mm)", "factor_median": "factor",
               "interval_text": f"{level} interval",
               "n_groups": "groups", "n_caught": "caught by gear", "status": "status", "reason": "why"}
    if "covariate" in t and t["covariate"].notna().any():
        columns = {"species": "species", "gear": "gear", "covariate": "covariate", "level": "level",
                   **{k: v for k, v in columns.items() if k not in ("species", "gear")}}
    if not by_length_only:
        columns.pop("length_mm")
    out.append(_table(t, {k: v for k, v in columns.items() if k in t}, status_column="status",
                      numeric=("factor_median", "length_mm", "n_groups", "n_caught")))
    return "".join(out)


def _section_checks(r: ReportInputs) -> str:
    from calib.plots import plot_convergence, plot_ppc

    m = r.manifest
    rules = m.get("status_rules") or {}
    out = []
    if m.get("divergences") is not None:
        out.append(_p(f"Divergent transitions in the fit: {m['divergences']}."))
    if rules:
        out.append(_p(_rules_text(rules)))
    t = _species_rows(r.factors).copy()
    if not r.checks.empty and "ppp" in r.checks:
        t = t.merge(r.checks[["gear", "species", "ppp"]], on=["gear", "species"], how="left")
    sampled = "rhat" in t and pd.to_numeric(t["rhat"], errors="coerce").notna().any()
    predicted = "ppp" in t and pd.to_numeric(t["ppp"], errors="coerce").notna().any()
    if sampled or predicted:
        columns = {"species": "species", "gear": "gear", "rhat": "R-hat", "ess_bulk": "bulk ESS",
                   "ess_tail": "tail ESS", "prior_ratio": "prior ratio", "ppp": "predictive p", "status": "status"}
        out.append(_table(t, {k: v for k, v in columns.items() if k in t}, status_column="status",
                          numeric={"rhat": ".3f", "ess_bulk": ",.0f", "ess_tail": ",.0f", "prior_ratio": ".2f",
                                   "ppp": ".2f"}))
        out.append(_p("prior ratio = posterior sd / prior sd of the log factor: near 1 means the data said little."))
    if sampled:
        out.append(_figure(plot_convergence(t, rules=rules),
                           "Sampler checks per factor: R-hat and effective sample sizes against the status thresholds.",
                           "R-hat and effective sample size per factor"))
    else:
        out.append(_p(f"No sampler diagnostics: this factor set was made by the {m.get('method', '?')} method, "
                      "without a sampler (R-hat and ESS do not apply)."))
    if predicted:
        out.append(_figure(plot_ppc(r.checks, rules=rules),
                           "Posterior predictive check of the split of each group's catch among its gears: p-values "
                           "near 0 mean the observed splits vary more than the model allows, near 1 less.",
                           "posterior predictive p-values"))
    else:
        out.append(_p("No posterior predictive check in this factor set."))
    out.append("<h3>Model comparison (LOO)</h3>")
    if r.comparison is not None and not r.comparison.empty:
        comp = r.comparison
        numeric = tuple(c for c in comp.columns if pd.api.types.is_numeric_dtype(comp[c]))
        out.append(_p(f"From {r.comparison_file} in the factor set folder: PSIS-LOO on the same observations "
                      "(Vehtari, Gelman & Gabry 2017)."))
        out.append(_table(comp, {c: c for c in comp.columns}, numeric=numeric))
        entry = (r.manifest or {}).get("comparison") or {}
        if entry.get("verdict"):
            how = f" Scored {entry['how']}." if entry.get("how") else ""
            out.append(_p(f"{entry['verdict']} Kept: {entry.get('kept', entry.get('preferred', ''))}.{how}"))
    else:
        out.append(_p("No model comparison was run for this factor set (no "
                      + " / ".join(COMPARISON_FILES) + " in its folder)."))
    return "".join(out)


RULES_TEXT = ("Status rules: fail when R-hat > {fail_rhat:g}, bulk ESS < {fail_ess_bulk:g}, the gear never caught the "
              "species, or prior ratio > {fail_prior_ratio:g}; warn when R-hat > {warn_rhat:g}, bulk or tail ESS < "
              "{warn_ess:g}, any divergence, or the posterior predictive p-value is outside "
              "{ppp_low:g}–{ppp_high:g}.")


def _rules_text(rules: dict) -> str:
    """The status rules of a fit in words (as recorded in its manifest)."""
    try:
        text = RULES_TEXT.format(**{k: float(v) for k, v in rules.items() if k != "warn_on_divergences"})
        return text if rules.get("warn_on_divergences", True) else text.replace(", any divergence", "")
    except (KeyError, TypeError, ValueError):  # rules from another version: list them as they are
        return "Status rules: " + ", ".join(f"{k} = {v}" for k, v in rules.items()) + "."


def _section_length(r: ReportInputs) -> str:
    t = r.factors
    if "length_mm" not in t or not t["length_mm"].notna().any():
        return _p("Not fitted: this factor set has one factor per species and gear over all sizes.")
    from calib.plots import plot_factor_by_length, plot_split_by_length

    rows = t[t["length_mm"].notna()]
    out = [_p(f"{len(rows)} factors by length class for {rows['species'].nunique()} species, only inside the "
              f"calibrated length range ({_num(rows['length_mm'].min())} to {_num(rows['length_mm'].max())} mm).")]
    out.append(_figure(plot_factor_by_length(rows),
                       "Factor by length class: median and interval band per gear, log scale.",
                       "factor by length"))
    if r.length_split is not None and not r.length_split.empty:
        out.append(_figure(plot_split_by_length(r.length_split),
                           "Observed (points) and fitted (line, band) share of each gear's catch by length class.",
                           "split by length"))
    return "".join(out)


def _level(frame: pd.DataFrame | None) -> str:
    if frame is None or "interval" not in frame or not frame["interval"].notna().any():
        return ""
    return f"{100 * float(frame['interval'].dropna().iloc[0]):.0f}%"


def _section_series(r: ReportInputs) -> str:
    from calib import plots

    out = []
    if r.series is not None and not r.series.empty:
        s = r.series
        combined = s[s["stratum"].astype(str) == "all"] if "stratum" in s else s
        source = "calib series (series.csv, combined over strata)"
    elif r.trend_series is not None and not r.trend_series.empty:
        combined, source = r.trend_series, "calib trend (trend_series.csv)"
    else:
        return _p("No series given (calib report --series DIR, from calib series; or --trend DIR).")
    level = _level(combined)
    out.append(_p(f"{combined['species'].nunique()} species, years {int(combined['year'].min())} to "
                  f"{int(combined['year'].max())}, from {source}: the harmonized series (reference-gear units, "
                  f"{level} interval carrying sampling and conversion error) beside the raw merged records, on the "
                  "same resamples."))
    out.append(_figure(plots.plot_series_bands(combined),
                       f"Raw merged records (amber) and the harmonized series (blue) per species, with {level} bands.",
                       "raw and harmonized series per species"))
    for note in (r.series_manifest or {}).get("notes", []):
        out.append(_note(note))
    if r.gear_mix is not None and not r.gear_mix.empty:
        out.append("<h3>Where the records come from</h3>")
        out.append(_figure(plots.plot_gear_mix(r.gear_mix),
                           "Share of hauls (and of effort) by gear, year by year: a change of gears shows here "
                           "as a change of colours.", "gear mix by year"))
    if r.source_series is not None and not r.source_series.empty:
        out.append("<h3>Each partner dataset on its own</h3>")
        out.append(_figure(plots.plot_source_series(r.source_series),
                           "Harmonized series of each source with its band. Sources that sample different strata "
                           "may differ in level for real; compare the shapes.", "harmonized series per source"))
    return "".join(out)


def _section_trend(r: ReportInputs) -> str:
    from calib import plots

    if r.trend is None:
        return _p("No trend attribution given (calib report --trend DIR, from calib trend).")
    t = r.trend.copy()
    out = [_figure(plots.plot_artifact_bars(t),
                   "Change over the period per species: after harmonization (the animals) and the part due to the "
                   "change of gears (the artifact), with intervals; the diamond is the raw merged change.",
                   "trend attribution bars")]

    def span(v, lo, hi):
        return f"{_signed(v)} ({_signed(lo)}\u00a0to\u00a0{_signed(hi)})"

    t["raw"] = [_signed(v) for v in t["raw_change_pct"]]
    t["harm"] = [span(*x) for x in zip(t["harmonized_change_pct"], t["harmonized_change_lower"],
                                       t["harmonized_change_upper"])]
    t["art"] = [span(*x) for x in zip(t["artifact_pct"], t["artifact_lower"], t["artifact_upper"])]
    level = _level(t)
    out.append(_table(t, {"species": "species", "year_from": "from", "year_to": "to", "raw": "raw change",
                          "harm": f"harmonized change ({level} interval)",
                          "art": f"due to the change of gears ({level} interval)", "verdict": "verdict"}))
    out.append("<h3>In plain words</h3>")
    lines = [ln.strip() for ln in (r.trend_summary or "").splitlines()]
    lines = [ln for ln in lines if ln and not ln.startswith("#")]
    out.append('<div class="plain">' + "".join(_p(ln) for ln in lines) + "</div>")
    if r.agreement is not None and not r.agreement.empty:
        a = r.agreement.copy()
        a["diff"] = [span(*x) for x in zip(a["difference_pct"], a["difference_lower"], a["difference_upper"])]
        out.append("<h3>Do the partner datasets agree?</h3>")
        out.append(_p("Per species and pair of sources, the difference between their harmonized changes over the "
                      "years both have; 'differ' means the interval excludes 0."))
        out.append(_table(a, {"species": "species", "source": "source", "other_source": "other source",
                              "year_from": "from", "year_to": "to", "diff": f"difference ({level} interval)",
                              "agreement": "agreement", "reason": "why"}))
    return "".join(out)


def _signed(value) -> str:
    """A percent change with its sign (+12%, −5%); a dash when missing."""
    try:
        v = float(value)
    except (TypeError, ValueError):
        return "—"
    if not np.isfinite(v):
        return "—"
    return f"{'+' if v > 0 else '−' if v < 0 else ''}{abs(v):.0f}%"


def _section_cautions(r: ReportInputs) -> str:
    return "<ul>" + "".join(f"<li>{esc(c)}</li>" for c in CAUTIONS) + "</ul>"


def _section_manifest(r: ReportInputs) -> str:
    out = [_p("Everything needed to trace these results: input hashes, model, priors, settings, seeds and "
              "software versions, as written by each command.")]
    manifests = (("factor set (calib fit)", r.manifest), ("conversion (calib convert)", r.converted_manifest),
                 ("series (calib series)", r.series_manifest), ("trend (calib trend)", r.trend_manifest))
    for label, manifest in manifests:
        if manifest:
            out.append(f"<h3>{esc(label)}</h3><pre>{esc(json.dumps(manifest, indent=2, default=str))}</pre>")
    return "".join(out)


SECTION_BUILDERS = {"inputs": _section_inputs, "factors": _section_factors, "checks": _section_checks,
                    "length": _section_length, "series": _section_series, "trend": _section_trend,
                    "cautions": _section_cautions, "manifest": _section_manifest}


# ----------------------------------------------------------------------------- the page


def _css() -> str:
    from calib.plots import HARMONIZED, INK, NEUTRAL, RAW, STATUS_COLOURS

    return f"""
:root {{ --ink: {INK}; --accent: {HARMONIZED}; --amber: {RAW}; --rule: #d8dde3; --muted: {NEUTRAL}; }}
* {{ box-sizing: border-box; }}
body {{ margin: 0; color: var(--ink); background: #fbfaf7; font: 15px/1.5 "DejaVu Sans", "Liberation Sans",
       Arial, sans-serif; }}
header.top {{ background: var(--accent); color: #fff; padding: 1.2rem 2rem 1rem;
              border-bottom: 6px solid var(--amber); }}
header.top h1 {{ margin: 0 0 .2rem; font-size: 1.6rem; letter-spacing: .02em; }}
header.top p {{ margin: 0; opacity: .9; font-size: .9rem; }}
.page {{ display: flex; gap: 2rem; max-width: 1250px; margin: 0 auto; padding: 1.2rem 2rem 3rem; }}
nav.toc {{ flex: 0 0 12rem; position: sticky; top: 1rem; align-self: flex-start; font-size: .9rem; }}
nav.toc ol {{ padding-left: 1.2rem; margin: 0; }}
nav.toc a {{ color: var(--accent); text-decoration: none; }}
main {{ flex: 1; min-width: 0; }}
section {{ background: #fff; border: 1px solid var(--rule); border-left: 4px solid var(--accent);
          padding: .6rem 1.4rem 1.2rem; margin-bottom: 1.4rem; }}
h2 {{ font-size: 1.25rem; margin: .6rem 0 .6rem; color: var(--accent); }}
h3 {{ font-size: 1rem; margin: 1.2rem 0 .4rem; }}
table {{ border-collapse: collapse; margin: .5rem 0 1rem; font-size: .85rem; }}
th, td {{ border-bottom: 1px solid var(--rule); padding: .25rem .6rem; text-align: left; vertical-align: top; }}
td.code {{ font-family: "DejaVu Sans Mono", monospace; font-size: .75rem; word-break: break-all; }}
table {{ max-width: 100%; }}
th {{ background: #eef2f6; }}
td.num {{ text-align: right; font-variant-numeric: tabular-nums; }}
td.status {{ font-weight: bold; }}
td.status-ok {{ color: {STATUS_COLOURS['ok']}; }}
td.status-warn {{ color: #7a5d00; background: #f7eccb; }}
td.status-fail {{ color: #fff; background: {STATUS_COLOURS['fail']}; }}
figure {{ margin: .8rem 0 1.2rem; }}
figure img {{ max-width: 100%; height: auto; display: block; }}
figcaption {{ font-size: .85rem; color: #444; margin-top: .3rem; }}
dl.facts {{ display: grid; grid-template-columns: max-content 1fr; gap: .2rem 1rem; font-size: .9rem; }}
dl.facts dt {{ font-weight: bold; }} dl.facts dd {{ margin: 0; }}
p.note {{ border-left: 3px solid var(--amber); padding-left: .6rem; color: #444; }}
div.plain p {{ margin: .3rem 0; }}
pre {{ background: #f3f4f6; padding: .6rem; font-size: .75rem; overflow-x: auto; white-space: pre-wrap;
      word-break: break-all; }}
footer {{ font-size: .8rem; color: #555; text-align: center; padding-bottom: 2rem; }}
@media print {{
  body {{ background: #fff; font-size: 10pt; }}
  header.top {{ background: #fff; color: #000; border-bottom: 3px solid #000; padding: 0 0 .4rem; }}
  nav.toc {{ display: none; }}
  .page {{ display: block; padding: 0; max-width: none; }}
  section {{ border: none; border-top: 2px solid #000; padding: .2rem 0; break-inside: auto; }}
  h2, h3 {{ break-after: avoid; color: #000; }}
  figure, table, dl {{ break-inside: avoid; }}
  td.status-fail {{ color: #000; background: none; text-decoration: underline; }}
  td.status-warn {{ background: none; }}
  pre {{ font-size: 7pt; background: none; border: 1px solid #999; }}
  @page {{ margin: 15mm; }}
}}
"""


def render_report(results: ReportInputs) -> str:
    """The report as one HTML string (figures embedded, inline styles, no external links)."""
    m = results.manifest
    made = datetime.now(timezone.utc).isoformat(timespec="seconds")
    nav = "".join(f'<li><a href="#{a}">{esc(h)}</a></li>' for a, h in SECTIONS)
    body = "".join(f'<section id="{a}"><h2>{esc(h)}</h2>{SECTION_BUILDERS[a](results)}</section>'
                   for a, h in SECTIONS)
    from calib import __version__

    return f"""<!DOCTYPE html>
<html lang="en">
<head>
<meta charset="utf-8">
<meta name="viewport" content="width=device-width, initial-scale=1">
<title>calib report — {esc(m.get('factor_set_id'))}</title>
<style>{_css()}</style>
</head>
<body>
<header class="top">
<h1>Gear calibration report</h1>
<p>factor set {esc(m.get('factor_set_id'))} · reference gear {esc(m.get('reference'))} ·
made {esc(made)} by calib {esc(__version__)}</p>
</header>
<div class="page">
<nav class="toc"><ol>{nav}</ol></nav>
<main>{body}</main>
</div>
<footer>Made by calib from saved results; nothing was refitted. Factors hold only for the gears, sizes, habitats and
seasons of the calibration study.</footer>
</body>
</html>
"""


def write_report(out, factors, converted=None, series=None, trend=None) -> Path:
    """Write the HTML report of the saved results to the file ``out`` (atomically); returns its path.

    ``factors``: folder from ``calib fit``; ``converted``, ``series``, ``trend``: optional folders
    from ``calib convert``, ``series``, ``trend``. ``out`` must not lie inside one of them
    (result folders stay as their command wrote them). Raises InputError on missing files.
    """
    from calib.outputs import atomic_file

    out = Path(out)
    for folder, option in ((factors, "--factors"), (converted, "--converted"), (series, "--series"),
                           (trend, "--trend")):
        if folder is not None and Path(folder).resolve() in out.resolve().parents:
            raise InputError([Problem(str(out), None, None, f"the report would be written inside the {option} folder",
                                      "write the report outside the result folders, e.g. --out report.html", False)])
    results = read_results(factors, converted=converted, series=series, trend=trend)
    atomic_file(out, render_report(results))
    return out


# ----------------------------------------------------------------------------- command line

REPORT_DESCRIPTION = """\
Write one self-contained HTML report of a factor set and of what was made with
it: the inputs and calibration design, the factors (table and forest plot), the
model checks, factor by length when fitted, the harmonized series, the trend
attribution, the cautions and the manifests. Figures are embedded, so the file
opens without a network, can be mailed or archived, and prints cleanly.

Reads saved results only; nothing is refitted. Give the folders written by
calib fit (--factors) and, optionally, convert, series and trend."""


def add_report_parser(sub, formatter_class=argparse.RawDescriptionHelpFormatter) -> argparse.ArgumentParser:
    """Add the ``report`` subcommand to an argparse subparsers object; returns its parser."""
    p = sub.add_parser("report", formatter_class=formatter_class,
                       help="one self-contained HTML report with figures",
                       description=textwrap.dedent(REPORT_DESCRIPTION))
    p.add_argument("--factors", required=True, metavar="DIR", help="folder written by `calib fit`")
    p.add_argument("--converted", metavar="DIR", default=None, help="optional folder written by `calib convert`")
    p.add_argument("--series", metavar="DIR", default=None, help="optional folder written by `calib series`")
    p.add_argument("--trend", metavar="DIR", default=None, help="optional folder written by `calib trend`")
    p.add_argument("--out", required=True, metavar="FILE", help="the HTML file to write, e.g. report.html")
    return p


def run_report_command(args) -> int:
    """Run ``calib report`` from parsed arguments; prints where the report is; returns the exit code."""
    out = write_report(args.out, args.factors, converted=args.converted, series=args.series, trend=args.trend)
    print(f"Wrote {out} ({out.stat().st_size / 1e6:.1f} MB); open it in a web browser.")
    return 0
