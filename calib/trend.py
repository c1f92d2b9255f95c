"""Stage 7: trend attribution (``calib trend``): how much of an apparent change is method artifact.

Reads converted records (``calib convert``) and, per species, compares the trend of the raw
merged series with the trend of the harmonized series (reference-gear units). The series
and its paired draws come from :func:`calib.series.series_draws` -- the same estimator and
the same pairing of bootstrap resample d with posterior factor draw d as ``calib series``.

Log-linear slope
----------------
For the annual combined index y_t ("all" stratum) of the years t with a value in the window,
the slope b per year is the quasi-Poisson GLM fit of y_t on year with a log link,
log E[y_t] = a + b t, Var y_t = phi E[y_t] (McCullagh & Nelder 1989, Generalized Linear
Models, 2nd ed., ch. 9 -- recalled from memory). A log link on the annual means, not a log
of them, so a year with a zero mean does not break the fit. phi is Pearson's X^2 / (n - 2);
se(b) = sqrt(phi [I^-1]_bb) with I the Poisson information. Fitted by Newton's method,
vectorised over draws; tests/test_trend.py compares with statsmodels' GLM (Poisson family,
scale="X2").

Draws
-----
* raw slope (point): the fit to the raw index of the observed hauls.
* harmonized slope (point): the fit to the harmonized index of the observed hauls
  (``SeriesDraws.estimate``).
* harmonized draw d: b_d + se_d * t_d, b_d the fit to the harmonized draw-d series, se_d its
  residual standard error, t_d a Student-t variate with n - 2 degrees of freedom: the
  interval so carries the conversion error, the sampling error (bootstrap) and the
  year-to-year scatter of the animals around the trend, so a few odd years cannot make a
  "real decline".
* artifact draw d: braw_d - b_d, with braw_d the fit to the raw series of the SAME resample
  d. The animals' year-to-year scatter is common to both series of a pair and cancels in
  the difference, so no residual term is added to the artifact.

Percent change over the span (first to last year with a value in the window):
100 (exp(b span) - 1). raw change = harmonized change x artifact, multiplicatively, for the
point values (the artifact slope is raw minus harmonized).

artifact_share = artifact slope / raw slope, only when |raw change| >= ``change_threshold``
(default 10% over the period; common practice, no source): below that the raw series has
no change worth apportioning and the share is left blank with a reason.

Verdict rule (intervals are the central ``interval`` quantiles of the draws):
1. "not estimable" when fewer than 3 years have a value, the series is all zero, or some
   draws give no finite slope (the reason says which);
2. "mostly method artifact" when the harmonized interval covers 0, the artifact interval
   excludes 0 and artifact_share > 0.5;
3. "real decline" / "real increase" when the harmonized interval excludes 0 (below / above);
4. "no clear change" when the harmonized interval covers 0 and lies within
   +-``change_threshold``;
5. "too uncertain to say" otherwise.

Outputs of :meth:`TrendResult.save`: trend.csv (``TREND_COLUMNS``), summary.md (one
sentence per species), trend_draws.parquet (species, draw, raw_slope, harmonized_slope,
harmonized_slope_with_residual, artifact_slope) and manifest.json.
"""

from __future__ import annotations

import argparse
import hashlib
import json
import textwrap
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd

from calib.errors import InputError, Problem
from calib.series import (
    add_resampling_options,
    EXACT_MAX_HAULS,
    _positive_int,
    _read_converted,
    row_quantiles,
    series_draws,
)

CHANGE_THRESHOLD = 0.10  # |raw change| below this (10% over the period) gets no share (common practice, no source)
SHARE_MAJORITY = 0.5  # artifact share above this is "mostly" artifact
MIN_YEARS = 3  # a slope and its residual standard error need at least 3 years
TREND_COLUMNS = ["species", "year_from", "year_to", "n_years", "raw_change_pct", "raw_change_lower",
                 "raw_change_upper", "harmonized_change_pct", "harmonized_change_lower", "harmonized_change_upper",
                 "artifact_pct", "artifact_lower", "artifact_upper", "artifact_share", "share_reason", "verdict",
                 "verdict_reason", "raw_slope", "harmonized_slope", "harmonized_slope_se", "artifact_slope",
                 "interval", "draws_used", "draws_without_slope"]
DRAW_COLUMNS = ["species", "draw", "raw_slope", "harmonized_slope", "harmonized_slope_with_residual",
                "artifact_slope"]
VERDICTS = ("not estimable", "mostly method artifact", "real decline", "real increase", "no clear change",
            "too uncertain to say")

CAUTION = (
    "Trends hold only as far as the conversion factors do: for the gears, sizes, habitats and seasons "
    "of the calibration study. Defer to the survey program's own standards and to qualified review "
    "before any management use."
)


# ----------------------------------------------------------------------------- the slope


def loglinear_slope(y: np.ndarray, years: np.ndarray, max_iter: int = 100,
                    tol: float = 1e-10) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Quasi-Poisson log-link slope per year of each row of ``y`` on ``years``.

    Parameters
    ----------
    y : (rows, n) non-negative annual index values (any unit: the slope does not depend on it).
    years : (n,) the years (numbers).

    Returns
    -------
    slope (per year, log scale), se (quasi-Poisson: Pearson X^2 / (n - 2) dispersion), and
    converged (bool): rows that are all zero, or whose maximum-likelihood slope is infinite
    (only the first or last year non-zero), give NaN and converged False.
    """
    y = np.atleast_2d(np.asarray(y, dtype=float))
    x = np.asarray(years, dtype=float)
    x = x - x.mean()  # centred: a well-conditioned 2 x 2 information
    n = len(x)
    total = y.sum(axis=1)
    ok = total > 0
    b0 = np.log(np.where(ok, total / n, 1.0))
    b1 = np.zeros(len(y))
    max_step = 2.0 / max(np.abs(x).max(), 1.0)  # keeps Newton steps from overshooting far
    converged = np.zeros(len(y), dtype=bool)
    for _ in range(max_iter):
        mu = np.exp(b0[:, None] + b1[:, None] * x)
        r = y - mu
        u0, u1 = r.sum(axis=1), (r * x).sum(axis=1)
        i00, i01, i11 = mu.sum(axis=1), (mu * x).sum(axis=1), (mu * x * x).sum(axis=1)
        det = i00 * i11 - i01 * i01
        with np.errstate(all="ignore"):
            d0 = (i11 * u0 - i01 * u1) / det
            d1 = (i00 * u1 - i01 * u0) / det
        d1 = np.clip(np.nan_to_num(d1), -max_step, max_step)
        d0 = np.clip(np.nan_to_num(d0), -20.0, 20.0)
        b0, b1 = b0 + d0, b1 + d1
        converged = np.abs(d1) < tol * (1 + np.abs(b1))
        if converged[ok].all():
            break
    mu = np.exp(b0[:, None] + b1[:, None] * x)
    with np.errstate(all="ignore"):
        phi = ((y - mu) ** 2 / mu).sum(axis=1) / max(n - 2, 1)
        i00, i01, i11 = mu.sum(axis=1), (mu * x).sum(axis=1), (mu * x * x).sum(axis=1)
        se = np.sqrt(phi * i00 / (i00 * i11 - i01 * i01))
    good = ok & converged & np.isfinite(b1) & np.isfinite(se) & (np.abs(b1) * np.ptp(x) < 50)
    return np.where(good, b1, np.nan), np.where(good, se, np.nan), good


def _pct(slope, span):
    return 100.0 * np.expm1(np.asarray(slope, dtype=float) * span)


# ----------------------------------------------------------------------------- result


@dataclass
class TrendResult:
    """Trend attribution per species.

    Attributes
    ----------
    table : trend.csv columns (``TREND_COLUMNS``); changes in percent over year_from..year_to.
    draws : long table of the per-draw slopes (``DRAW_COLUMNS``), per year on the log scale.
    manifest : inputs, settings, the verdict rule, versions, timestamp, trend_id.
    notes : things the user should know.
    """

    table: pd.DataFrame
    draws: pd.DataFrame
    manifest: dict
    notes: list[str] = field(default_factory=list)

    def sentences(self) -> list[str]:
        """One plain sentence per species with the numbers."""
        level = int(round(100 * self.manifest["settings"]["interval"]))
        out = []
        for r in self.table.itertuples():
            name = str(r.species)
            name = name[:1].upper() + name[1:]
            if r.verdict == "not estimable":
                out.append(f"{name}: no trend can be estimated ({r.verdict_reason}).")
                continue
            move = "fall" if r.raw_change_pct < 0 else "rise"
            text = (f"{name}: merged records {move} {abs(r.raw_change_pct):.0f}% from {r.year_from} to {r.year_to}; "
                    f"after harmonization the change is {_signed(r.harmonized_change_pct)} ({level}% interval "
                    f"{_signed(r.harmonized_change_lower)} to {_signed(r.harmonized_change_upper)}); the gear "
                    f"change alone accounts for {_signed(r.artifact_pct)} ({_signed(r.artifact_lower)} to "
                    f"{_signed(r.artifact_upper)})")
            if pd.notna(r.artifact_share):
                text += f", a share of {r.artifact_share:.2f} of the raw trend"
            out.append(text + f". Verdict: {r.verdict}.")
        return out

    def summary(self) -> str:
        """Plain-language summary: one sentence per species, notes and the caution."""
        m = self.manifest
        lines = [f"Trend attribution from conversion {m.get('conversion_id') or '(in memory)'} "
                 f"(factor set {m.get('factor_set_id')}), {m['settings']['draws_used']} paired draws", ""]
        lines += self.sentences()
        if self.notes:
            lines.append("")
            lines += [f"Note: {n}" for n in self.notes]
        lines += ["", f"Verdict rule: {VERDICT_RULE}", "", CAUTION]
        return "\n".join(lines)

    def save(self, directory) -> Path:
        """Write trend.csv, summary.md, trend_draws.parquet and manifest.json atomically."""
        from calib.outputs import atomic_directory

        directory = Path(directory)
        protect = [(self.manifest.get("converted_dir"), "the converted records")]
        with atomic_directory(directory, protect=protect) as tmp:
            self.table.to_csv(tmp / "trend.csv", index=False, float_format="%.6g")
            (tmp / "summary.md").write_text("# Trend attribution\n\n" + self.summary() + "\n")
            self.draws.to_parquet(tmp / "trend_draws.parquet", index=False)
            (tmp / "manifest.json").write_text(json.dumps(self.manifest, indent=2, default=str) + "\n")
        return directory


def _signed(v) -> str:
    if v is None or not np.isfinite(v):
        return "n/a"
    return f"{'+' if v > 0 else '−' if v < 0 else ''}{abs(v):.0f}%"


VERDICT_RULE = (
    "'not estimable' when fewer than 3 years have a value, the series is all zero or some draws give no "
    "finite slope; 'mostly method artifact' when the harmonized interval covers 0, the artifact interval "
    "excludes 0 and the artifact share is above 0.5; 'real decline' / 'real increase' when the harmonized "
    "interval excludes 0; 'no clear change' when the harmonized interval covers 0 and lies within plus or "
    "minus the change threshold; 'too uncertain to say' otherwise."
)


# ----------------------------------------------------------------------------- the estimator


def trend(converted, *, year_from: int | None = None, year_to: int | None = None, draws: int | None = None,
          seed: int = 0, interval: float | None = None, by_stratum: bool = True,
          exact_max_hauls: int = EXACT_MAX_HAULS, incomplete: str = "flag",
          change_threshold: float = CHANGE_THRESHOLD) -> TrendResult:
    """Per species, the raw and harmonized log-linear trends and the method artifact between them.

    Parameters
    ----------
    converted : a :class:`calib.convert.Conversion` or the directory ``calib convert`` wrote.
    year_from, year_to : window of years (inclusive); default all years.
    draws, seed, by_stratum, exact_max_hauls, incomplete : passed to
        :func:`calib.series.series_draws` (the series behind the trend); ``seed`` also seeds
        the residual t variates (a separate stream).
    interval : central interval level (default the conversion's, else 0.9).
    change_threshold : |raw change| over the period (fraction, default 0.10) below which the
        artifact share is not reported.

    Returns
    -------
    TrendResult. Changes are percent over the species' first to last year with a value in
    the window; slopes are per year on the log scale.
    """
    from calib.factors import software_versions, utc_timestamp

    if year_from is not None and year_to is not None and year_from > year_to:
        raise ValueError(f"year_from ({year_from}) is after year_to ({year_to})")
    if not change_threshold > 0:
        raise ValueError(f"change_threshold must be above 0 (e.g. 0.1), not {change_threshold}")
    records, factor_draws, conv_manifest, where, draws_where, inputs = _read_converted(converted)
    if interval is None:
        interval = float(conv_manifest.get("interval", 0.9))
    if not 0 < interval < 1:
        raise ValueError(f"interval must be between 0 and 1 (e.g. 0.9), not {interval}")
    sd = series_draws(records, factor_draws, draws=draws, seed=seed, by_stratum=by_stratum,
                      uncertainty="both", exact_max_hauls=exact_max_hauls, incomplete=incomplete,
                      where=where, draws_where=draws_where)
    del records
    years = np.asarray(sd.years)
    in_window = np.ones(len(years), dtype=bool)
    if year_from is not None:
        in_window &= years >= year_from
    if year_to is not None:
        in_window &= years <= year_to
    if not in_window.any():
        raise InputError([Problem(where, None, "year", f"no records in the years {year_from}-{year_to} "
                                  f"(the records cover {years.min()}-{years.max()})",
                                  "choose --from / --to within the years of the records", False)])
    value, raw = sd.cube("value"), sd.cube("raw")
    est, raw_est = sd.cube("estimate"), sd.cube("raw_estimate")
    D = len(sd.draw)
    lo_q, hi_q = (1 - interval) / 2, 1 - (1 - interval) / 2
    rng = np.random.default_rng([int(seed), 7])  # residual t variates: a stream apart from the bootstrap's
    rows, draw_frames = [], []
    for i, sp in enumerate(sd.species):
        has = in_window & np.isfinite(est[i]) & np.isfinite(raw_est[i])
        yrs = years[has]
        row = {c: np.nan for c in TREND_COLUMNS}
        row.update(species=sp, n_years=int(has.sum()), interval=interval, draws_used=D, share_reason="",
                   verdict_reason="", draws_without_slope=0)
        row["year_from"] = int(yrs.min()) if len(yrs) else (year_from if year_from is not None else np.nan)
        row["year_to"] = int(yrs.max()) if len(yrs) else (year_to if year_to is not None else np.nan)
        if len(yrs) < MIN_YEARS:
            row.update(verdict="not estimable", share_reason="no trend",
                       verdict_reason=f"{len(yrs)} year(s) with a value in the window; a trend needs {MIN_YEARS}")
            rows.append(row)
            continue
        span = float(yrs.max() - yrs.min())
        b_raw, _, _ = loglinear_slope(raw_est[i, has][None, :], yrs)
        b_harm, se_harm, _ = loglinear_slope(est[i, has][None, :], yrs)
        bd, sed, okd = loglinear_slope(value[i][has].T, yrs)
        brd, sed_raw, okr = loglinear_slope(raw[i][has].T, yrs)
        t = rng.standard_t(len(yrs) - 2, size=D)
        bd_res = bd + sed * t
        art = brd - bd
        bad = int((~(okd & okr)).sum())
        row.update(raw_slope=b_raw[0], harmonized_slope=b_harm[0], harmonized_slope_se=se_harm[0],
                   artifact_slope=b_raw[0] - b_harm[0], draws_without_slope=bad)
        row["raw_change_pct"] = _pct(b_raw[0], span)
        row["harmonized_change_pct"] = _pct(b_harm[0], span)
        row["artifact_pct"] = _pct(b_raw[0] - b_harm[0], span)
        draw_frames.append(pd.DataFrame({"species": sp, "draw": sd.draw, "raw_slope": brd, "harmonized_slope": bd,
                                         "harmonized_slope_with_residual": bd_res, "artifact_slope": art}))
        if not np.isfinite(b_raw[0]) or not np.isfinite(b_harm[0]) or bad:
            why = (f"{bad} of {D} paired draws give a series with no finite log-linear slope (all zero, or "
                   "a catch only in the first or last year)" if bad else
                   "the observed series is all zero or has a catch only in its first or last year")
            row.update(verdict="not estimable", verdict_reason=why, share_reason="no trend")
            rows.append(row)
            continue
        q_raw = row_quantiles((brd + sed_raw * t)[None, :], [lo_q, hi_q])[:, 0]
        q_h = row_quantiles(bd_res[None, :], [lo_q, hi_q])[:, 0]
        q_a = row_quantiles(art[None, :], [lo_q, hi_q])[:, 0]
        row["raw_change_lower"], row["raw_change_upper"] = _pct(q_raw, span)
        row["harmonized_change_lower"], row["harmonized_change_upper"] = _pct(q_h, span)
        row["artifact_lower"], row["artifact_upper"] = _pct(q_a, span)
        if abs(row["raw_change_pct"]) >= 100 * change_threshold and b_raw[0] != 0:
            row["artifact_share"] = row["artifact_slope"] / b_raw[0]
        else:
            row["share_reason"] = (f"raw change {row['raw_change_pct']:+.1f}% is within ±{100 * change_threshold:g}%: "
                                   "no change to apportion")
        row["verdict"], row["verdict_reason"] = _verdict(q_h, q_a, row["artifact_share"], span, change_threshold)
        rows.append(row)
    table = pd.DataFrame(rows, columns=TREND_COLUMNS)
    for c in ("year_from", "year_to"):
        table[c] = table[c].astype("Int64")
    draws_frame = (pd.concat(draw_frames, ignore_index=True) if draw_frames
                   else pd.DataFrame(columns=DRAW_COLUMNS))

    notes = []
    counts = conv_manifest.get("counts", {})
    if counts.get("rejected"):
        notes.append(f"{counts['rejected']} records were rejected by convert and are in no series or trend "
                     "(see rejected.csv)")
    if len(sd.settings.get("effort_units", [])) > 1:
        notes.append("effort units differ between gears: the raw series mixes them, the harmonized series is in "
                     "reference-gear units")
    manifest = {
        "tool": "calib",
        "step": "trend",
        "conversion_id": conv_manifest.get("conversion_id"),
        "factor_set_id": conv_manifest.get("factor_set_id"),
        "reference": conv_manifest.get("reference"),
        "converted_dir": None if not inputs else str(Path(converted)),
        "inputs": inputs,
        "settings": {**sd.settings, "interval": float(interval), "year_from": year_from, "year_to": year_to,
                     "change_threshold": float(change_threshold), "model": "quasi-Poisson GLM, log link, "
                     "annual combined index on year; residual t(n-2) term on harmonized draws"},
        "verdict_rule": VERDICT_RULE,
        "counts": {"species": int(len(table)),
                   "verdicts": {v: int((table["verdict"] == v).sum()) for v in VERDICTS}},
        "notes": notes,
        "caution": CAUTION,
        "versions": software_versions(),
    }
    manifest["trend_id"] = "tr-" + hashlib.sha256(json.dumps(manifest, sort_keys=True, default=str).encode()
                                                  ).hexdigest()[:16]
    manifest["timestamp"] = utc_timestamp()
    return TrendResult(table=table, draws=draws_frame, manifest=manifest, notes=notes)


def _verdict(q_h, q_a, share, span, threshold) -> tuple[str, str]:
    """The documented verdict rule (module docstring) on slope quantiles."""
    h_covers = q_h[0] <= 0 <= q_h[1]
    a_excludes = not (q_a[0] <= 0 <= q_a[1])
    if h_covers and a_excludes and np.isfinite(share) and share > SHARE_MAJORITY:
        return "mostly method artifact", (f"harmonized interval covers 0, artifact interval excludes 0, "
                                          f"share {share:.2f} > {SHARE_MAJORITY}")
    if not h_covers:
        word = "real decline" if q_h[1] < 0 else "real increase"
        extra = "; the gear change also shifts the raw trend (artifact interval excludes 0)" if a_excludes else ""
        return word, "harmonized interval excludes 0" + extra
    low, high = np.log1p(-threshold) / span, np.log1p(threshold) / span  # +-threshold over the span
    if low <= q_h[0] and q_h[1] <= high:
        return "no clear change", f"harmonized interval covers 0 and lies within ±{100 * threshold:g}%"
    return "too uncertain to say", "harmonized interval covers 0 but is wider than the change threshold"


# ----------------------------------------------------------------------------- command line


TREND_DESCRIPTION = """\
How much of an apparent trend is method artifact. Per species, the slope per
year of a log-link (quasi-Poisson) fit of the annual combined index on year,
for the raw merged series and for the harmonized series (reference-gear
units, from the same paired draws as `calib series`). The harmonized interval
carries conversion error, sampling error and the year-to-year scatter around
the trend; the artifact (raw minus harmonized slope) is computed draw by draw
on the paired series. Changes are percent over the period:
raw change = harmonized change x artifact.

""" + textwrap.fill("Verdict rule: " + VERDICT_RULE, 78) + """

Writes OUT/trend.csv, OUT/summary.md, OUT/trend_draws.parquet and
OUT/manifest.json."""


def add_trend_parser(sub, formatter_class=argparse.RawDescriptionHelpFormatter) -> argparse.ArgumentParser:
    """Add the ``trend`` subcommand to an argparse subparsers object; returns its parser."""
    p = sub.add_parser("trend", formatter_class=formatter_class,
                       help="how much of the apparent trend is method artifact",
                       description=textwrap.dedent(TREND_DESCRIPTION))
    p.add_argument("--converted", required=True, metavar="DIR", help="directory written by `calib convert`")
    p.add_argument("--out", required=True, metavar="DIR", help="directory to write the trend to")
    p.add_argument("--from", dest="year_from", type=int, default=None, metavar="YEAR",
                   help="first year of the period (default: the first year of the records)")
    p.add_argument("--to", dest="year_to", type=int, default=None, metavar="YEAR",
                   help="last year of the period (default: the last year of the records)")
    p.add_argument("--draws", type=_positive_int, default=None, metavar="N",
                   help="paired draws to use (default: every factor draw of the conversion)")
    p.add_argument("--seed", type=int, default=0, help="seed of the resampling, of --draws and of the residual term")
    p.add_argument("--interval", type=float, default=None,
                   help="central interval level (default: the conversion's)")
    p.add_argument("--change-threshold", type=float, default=CHANGE_THRESHOLD, metavar="FRACTION",
                   help="raw change over the period below which no artifact share is given (default 0.1 = 10%%)")
    add_resampling_options(p, incomplete_help="years missing a stratum: 'flag' uses the mean over the strata "
                                              "sampled; 'blank' leaves the year out of the trend")
    return p


def run_trend_command(args) -> int:
    """Run ``calib trend`` from parsed arguments; prints the summary; returns the exit code.

    Raises InputError on bad input (the caller prints it and exits 1).
    """
    if args.year_from is not None and args.year_to is not None and args.year_from > args.year_to:
        raise InputError([Problem("--from/--to", None, None, f"--from {args.year_from} is after --to {args.year_to}",
                                  "give --from a year before --to", False)])
    if args.interval is not None and not 0 < args.interval < 1:
        raise InputError([Problem("--interval", None, None, f"{args.interval} is not between 0 and 1",
                                  "give e.g. --interval 0.9", False)])
    if not args.change_threshold > 0:
        raise InputError([Problem("--change-threshold", None, None, f"{args.change_threshold} is not above 0",
                                  "give e.g. --change-threshold 0.1", False)])
    result = trend(args.converted, year_from=args.year_from, year_to=args.year_to, draws=args.draws,
                   seed=args.seed, interval=args.interval, by_stratum=not args.ignore_strata,
                   exact_max_hauls=args.exact_max_hauls, incomplete=args.incomplete,
                   change_threshold=args.change_threshold)
    out = result.save(args.out)
    print(result.summary())
    print(f"\nWrote {out}/: trend.csv, summary.md, trend_draws.parquet, manifest.json")
    return 0
