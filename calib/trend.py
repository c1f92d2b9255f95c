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
* harmonized draw d: b_d + r_d * t_d, b_d the fit to the harmonized draw-d series, t_d a
  Student-t variate with n - 2 degrees of freedom and r_d^2 = max(0, se_d^2 - v), se_d the
  fit's residual standard error and v the variance over draws of b_d - bc_d, bc_d the fit to
  the OBSERVED hauls converted with draw d (no resampling). se_d^2 measures all the
  year-to-year scatter of the annual index around the line: sampling error plus the animals'
  own swings; v is the part of it the bootstrap already carries (sampling error), so only the
  excess is added. The interval so carries the conversion error, the sampling error and the
  animals' scatter around the trend, each once, so a few odd years cannot make a "real
  decline". (Adding se_d in full counted the sampling error twice: 0.97 coverage of nominal
  90% intervals in the slow study of tests/test_trend.py.) The raw interval is built the same
  way, with v the variance of the raw slope draws (bootstrap only).
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
    ALL,
    OPTIONAL,
    REQUIRED,
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
SERIES_COLUMNS = ["species", "year", "in_window", "estimate", "lower", "upper", "raw_estimate", "raw_lower",
                  "raw_upper", "harmonized_fit", "raw_fit", "interval"]
MIX_COLUMNS = ["year", "gear", "effort_unit", "hauls", "haul_share", "effort", "effort_share"]
SOURCE_SERIES_COLUMNS = ["species", "source", "year", "estimate", "lower", "upper", "raw_estimate", "raw_lower",
                         "raw_upper", "n_hauls", "strata", "complete", "interval"]
AGREEMENT_COLUMNS = ["species", "source", "other_source", "year_from", "year_to", "n_years", "source_change_pct",
                     "other_change_pct", "difference_pct", "difference_lower", "difference_upper", "agreement",
                     "reason", "shared_strata", "interval"]
AGREEMENTS = ("agree", "differ", "not comparable")
VERDICTS = ("not estimable", "mostly method artifact", "real decline", "real increase", "no clear change",
            "too uncertain to say")

CAUTION = (
    "Trends hold only as far as the conversion factors do: for the gears, sizes, habitats and seasons "
    "of the calibration study. Defer to the survey program's own standards and to qualified review "
    "before any management use."
)


# ----------------------------------------------------------------------------- the slope


def _in_years(years: np.ndarray, year_from: int | None, year_to: int | None) -> np.ndarray:
    """Mask of ``years`` inside [year_from, year_to] (an open end when None)."""
    keep = np.ones(len(years), dtype=bool)
    if year_from is not None:
        keep &= years >= year_from
    if year_to is not None:
        keep &= years <= year_to
    return keep


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


def loglinear_fitted(y: np.ndarray, years: np.ndarray, slope: np.ndarray) -> np.ndarray:
    """Fitted values exp(a + b t) of the log-link fit of :func:`loglinear_slope`.

    With an intercept, the Poisson (and quasi-Poisson) score equation for a gives
    sum_t exp(a + b t) = sum_t y_t (McCullagh & Nelder 1989, ch. 6 -- recalled from memory),
    so a follows from the slope in closed form. y (rows, n), slope (rows,); NaN rows stay NaN.
    """
    y = np.atleast_2d(np.asarray(y, dtype=float))
    x = np.asarray(years, dtype=float)
    x = x - x.mean()
    b = np.asarray(slope, dtype=float).reshape(-1, 1)
    shape = np.exp(b * x)
    with np.errstate(all="ignore"):
        return shape * (y.sum(axis=1, keepdims=True) / shape.sum(axis=1, keepdims=True))


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
    series : trend_series.csv (``SERIES_COLUMNS``): the combined annual index behind the trend,
        harmonized and raw with their intervals (the same paired draws), and the fitted
        log-linear curves over the window.
    gear_mix : gear_mix.csv (``MIX_COLUMNS``): share of hauls by gear and year, and of effort
        within each effort unit (see :func:`gear_mix`).
    source_series : source_series.csv (``SOURCE_SERIES_COLUMNS``): the harmonized series of each
        source (partner dataset) on its own.
    agreement : source_agreement.csv (``AGREEMENT_COLUMNS``): do two sources' harmonized
        series change alike over the years both have (see :func:`source_agreement`).
    """

    table: pd.DataFrame
    draws: pd.DataFrame
    manifest: dict
    notes: list[str] = field(default_factory=list)
    series: pd.DataFrame = field(default_factory=lambda: pd.DataFrame(columns=SERIES_COLUMNS))
    gear_mix: pd.DataFrame = field(default_factory=lambda: pd.DataFrame(columns=MIX_COLUMNS))
    source_series: pd.DataFrame = field(default_factory=lambda: pd.DataFrame(columns=SOURCE_SERIES_COLUMNS))
    agreement: pd.DataFrame = field(default_factory=lambda: pd.DataFrame(columns=AGREEMENT_COLUMNS))

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

    def mix_sentences(self) -> list[str]:
        """How the share of hauls by gear moved between the first and last year."""
        mix = self.gear_mix
        if mix.empty:
            return []
        first, last = int(mix["year"].min()), int(mix["year"].max())
        shares = mix.pivot_table(index="gear", columns="year", values="haul_share", aggfunc="sum").fillna(0.0)
        parts = [f"{g} {100 * shares.loc[g, first]:.0f}% → {100 * shares.loc[g, last]:.0f}%" for g in shares.index]
        moved = float((shares[last] - shares[first]).abs().sum() / 2)
        return [f"Gear mix of the hauls, {first} → {last}: " + "; ".join(parts)
                + f" ({100 * moved:.0f}% of the hauls changed gear between the two years)."]

    def agreement_sentences(self) -> list[str]:
        """One sentence per species: which pairs of sources change alike once converted, with the
        numbers of those that differ (every pair is in source_agreement.csv)."""
        level = int(round(100 * self.manifest["settings"]["interval"]))
        out = []
        for sp, rows in self.agreement.groupby("species", sort=True):
            name = str(sp)[:1].upper() + str(sp)[1:]
            comparable = rows[rows["agreement"] != "not comparable"]
            differ = comparable[comparable["agreement"] == "differ"]
            if comparable.empty:
                out.append(f"{name}: no two sources share {MIN_SHARED_YEARS} years with a catch; nothing to compare.")
                continue
            text = f"{name}: {len(comparable) - len(differ)} of {len(comparable)} pairs of sources agree once converted"
            if len(differ):
                text += "; " + "; ".join(
                    f"{r.source} and {r.other_source} differ by {_signed(r.difference_pct)} over {r.year_from}-"
                    f"{r.year_to} ({level}% interval {_signed(r.difference_lower)} to {_signed(r.difference_upper)})"
                    for r in differ.itertuples())
            out.append(text + ".")
        return out

    def summary(self) -> str:
        """Plain-language summary: one sentence per species, gear mix, partner agreement, notes, caution."""
        m = self.manifest
        lines = [f"Trend attribution from conversion {m.get('conversion_id') or '(in memory)'} "
                 f"(factor set {m.get('factor_set_id')}), {m['settings']['draws_used']} paired draws", ""]
        lines += self.sentences()
        mix = self.mix_sentences()
        if mix:
            lines += [""] + mix
        agree = self.agreement_sentences()
        if agree:
            lines += ["", "Do the partners agree once converted? (same trend over the years both sampled; "
                      f"rule: {AGREEMENT_RULE})"] + agree
        if self.notes:
            lines.append("")
            lines += [f"Note: {n}" for n in self.notes]
        lines += ["", f"Verdict rule: {VERDICT_RULE}", "", CAUTION]
        return "\n".join(lines)

    def save(self, directory, figures: bool = True) -> Path:
        """Write trend.csv, summary.md, trend_draws.parquet, trend_series.csv, gear_mix.csv,
        source_series.csv, source_agreement.csv, figures/*.png (unless ``figures`` is False) and
        manifest.json atomically."""
        from calib.outputs import atomic_directory

        directory = Path(directory)
        protect = [(self.manifest.get("converted_dir"), "the converted records")]
        with atomic_directory(directory, protect=protect) as tmp:
            self.table.to_csv(tmp / "trend.csv", index=False, float_format="%.6g")
            (tmp / "summary.md").write_text("# Trend attribution\n\n" + self.summary() + "\n")
            self.draws.to_parquet(tmp / "trend_draws.parquet", index=False)
            self.series.to_csv(tmp / "trend_series.csv", index=False, float_format="%.6g")
            self.gear_mix.to_csv(tmp / "gear_mix.csv", index=False, float_format="%.6g")
            self.source_series.to_csv(tmp / "source_series.csv", index=False, float_format="%.6g")
            self.agreement.to_csv(tmp / "source_agreement.csv", index=False, float_format="%.6g")
            if figures:
                self.save_figures(tmp / "figures")
            (tmp / "manifest.json").write_text(json.dumps(self.manifest, indent=2, default=str) + "\n")
        return directory

    def save_figures(self, directory) -> list[Path]:
        """Draw the trend figures (calib.plots) from this result's tables into ``directory`` as PNG."""
        from calib import plots

        directory = Path(directory)
        directory.mkdir(parents=True, exist_ok=True)
        made = [plots.save_figure(plots.plot_series_bands(self.series), directory / "raw_vs_harmonized.png"),
                plots.save_figure(plots.plot_artifact_bars(self.table), directory / "artifact.png")]
        if not self.gear_mix.empty:
            made.append(plots.save_figure(plots.plot_gear_mix(self.gear_mix), directory / "gear_mix.png"))
        if not self.source_series.empty:
            made.append(plots.save_figure(plots.plot_source_series(self.source_series),
                                          directory / "source_series.png"))
        return made


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
    records, factor_draws, conv_manifest, where, draws_where, inputs, rf = _read_converted(
        converted, extra=HAUL_COLUMNS)
    if interval is None:
        interval = float(conv_manifest.get("interval", 0.9))
    if not 0 < interval < 1:
        raise ValueError(f"interval must be between 0 and 1 (e.g. 0.9), not {interval}")
    sd = series_draws(records, factor_draws, draws=draws, seed=seed, by_stratum=by_stratum,
                      uncertainty="both", exact_max_hauls=exact_max_hauls, incomplete=incomplete,
                      where=where, draws_where=draws_where, record_factors=rf)
    # The same factor draws on the observed hauls (no resampling): b_d minus its slope isolates the
    # bootstrap's sampling error, which the residual term must not count a second time.
    sd_conv = series_draws(records, factor_draws, draws=draws, seed=seed, by_stratum=by_stratum,
                           uncertainty="conversion", exact_max_hauls=exact_max_hauls, incomplete=incomplete,
                           where=where, draws_where=draws_where, record_factors=rf)
    years = np.asarray(sd.years)
    in_window = _in_years(years, year_from, year_to)
    if not in_window.any():
        raise InputError([Problem(where, None, "year", f"no records in the years {year_from}-{year_to} "
                                  f"(the records cover {years.min()}-{years.max()})",
                                  "choose --from / --to within the years of the records", False)])
    value, raw = sd.cube("value"), sd.cube("raw")
    est, raw_est = sd.cube("estimate"), sd.cube("raw_estimate")
    value_conv = sd_conv.cube("value")
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
        bc, _, okc = loglinear_slope(value_conv[i][has].T, yrs)
        t = rng.standard_t(len(yrs) - 2, size=D)
        # residual se^2 holds the year-to-year scatter of the annual index: sampling error plus the
        # animals' own swings. The bootstrap already carries the sampling part (its variance over
        # draws, var(b_d - bc_d)); only the excess is added.
        sampling_var = float(np.var(bd - bc, ddof=1)) if (okd & okc).sum() > 2 else 0.0
        residual_sd = np.sqrt(np.maximum(sed ** 2 - sampling_var, 0.0))
        bd_res = bd + residual_sd * t
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
        raw_residual_sd = np.sqrt(np.maximum(sed_raw ** 2 - float(np.var(brd, ddof=1)), 0.0))  # raw: bootstrap only
        q_raw = row_quantiles((brd + raw_residual_sd * t)[None, :], [lo_q, hi_q])[:, 0]
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
    series_table = _trend_series(sd, (value, raw, est, raw_est), table, in_window, interval)

    notes = []
    hauls = survey_hauls(records)
    mix = gear_mix(hauls) if hauls is not None else pd.DataFrame(columns=MIX_COLUMNS)
    if hauls is None:
        notes.append("the converted records have no haul_id column: no gear mix table")
    src_series, src_draws, src_notes = source_series(
        records, factor_draws, draws=draws, seed=seed, by_stratum=by_stratum, exact_max_hauls=exact_max_hauls,
        incomplete=incomplete, interval=interval, where=where, draws_where=draws_where, record_factors=rf)
    notes += src_notes
    agreement = source_agreement(src_draws, year_from=year_from, year_to=year_to, interval=interval)
    del records
    counts = conv_manifest.get("counts", {})
    if counts.get("rejected"):
        notes.append(f"{counts['rejected']} records were rejected by convert and are in no series or trend "
                     "(see rejected.csv)")
    if sd.settings.get("records_with_own_factor"):
        notes.append(f"{sd.settings['records_with_own_factor']} records have their own factor (converted by length "
                     "class or with their own covariate values), rebuilt draw by draw from the conversion's files")
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
                     "annual combined index on year; residual t(n-2) term on harmonized draws, its variance the "
                     "residual se^2 minus the bootstrap's sampling variance of the slope"},
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
    manifest["counts"]["sources"] = sorted(src_draws)
    manifest["counts"]["agreement"] = {a: int((agreement["agreement"] == a).sum()) for a in AGREEMENTS}
    manifest["agreement_rule"] = AGREEMENT_RULE
    return TrendResult(table=table, draws=draws_frame, manifest=manifest, notes=notes, series=series_table,
                       gear_mix=mix, source_series=src_series, agreement=agreement)


def _trend_series(sd, cubes: tuple, table: pd.DataFrame, in_window: np.ndarray, interval: float) -> pd.DataFrame:
    """The combined annual index behind each species' trend, both series with intervals, and the
    fitted log-linear curves over the years the slope used (trend_series.csv). ``cubes``: the
    (value, raw, estimate, raw_estimate) cubes of ``sd`` the trend already built."""
    years = np.asarray(sd.years)
    value, raw, est, raw_est = cubes
    lo_q, hi_q = (1 - interval) / 2, 1 - (1 - interval) / 2
    frames = []
    slopes = table.set_index("species")
    for i, sp in enumerate(sd.species):
        has = np.isfinite(est[i]) & np.isfinite(raw_est[i])
        if not has.any():
            continue
        q = row_quantiles(value[i][has], [lo_q, hi_q])
        qr = row_quantiles(raw[i][has], [lo_q, hi_q])
        frame = pd.DataFrame({"species": sp, "year": years[has], "in_window": in_window[has],
                              "estimate": est[i, has], "lower": q[0], "upper": q[1],
                              "raw_estimate": raw_est[i, has], "raw_lower": qr[0], "raw_upper": qr[1],
                              "harmonized_fit": np.nan, "raw_fit": np.nan, "interval": interval})
        row = slopes.loc[sp]
        used = frame["in_window"].to_numpy()
        if used.sum() >= MIN_YEARS and np.isfinite(row["harmonized_slope"]) and np.isfinite(row["raw_slope"]):
            yrs = frame["year"].to_numpy()[used]
            frame.loc[used, "harmonized_fit"] = loglinear_fitted(frame["estimate"].to_numpy()[used], yrs,
                                                                 row["harmonized_slope"])[0]
            frame.loc[used, "raw_fit"] = loglinear_fitted(frame["raw_estimate"].to_numpy()[used], yrs,
                                                          row["raw_slope"])[0]
        frames.append(frame)
    return (pd.concat(frames, ignore_index=True)[SERIES_COLUMNS] if frames
            else pd.DataFrame(columns=SERIES_COLUMNS))


# ----------------------------------------------------------------------------- gear mix and partners

MIN_SHARED_YEARS = 5  # two sources' changes are compared over at least this many years (common practice, no source)
HAUL_COLUMNS = ("haul_id", "effort", "source")  # read from converted records beside the series columns
NO_SOURCE = "(no source)"  # label of records whose source is blank
AGREEMENT_RULE = (
    "per species and pair of sources, the log-linear slopes of their harmonized series over the years both "
    f"have a value (at least {MIN_SHARED_YEARS}), draw by draw; 'agree' when the interval of "
    f"the difference of changes covers 0, 'differ' when it excludes 0, 'not comparable' when fewer than "
    f"{MIN_SHARED_YEARS} shared years or no finite slope"
)


def survey_hauls(records) -> pd.DataFrame | None:
    """One row per haul that has a converted record: haul_id, year, gear, effort, effort_unit and
    source where present. ``records``: a Conversion or a records DataFrame. None without haul_id."""
    from calib.convert import Conversion

    wanted = ("haul_id", "year", "gear", "effort", "effort_unit", "source")
    if isinstance(records, Conversion):
        lean = records.lean_records()
        hauls = lean["hauls"]
        cols = [c for c in wanted if c in hauls.columns]
        return hauls.iloc[np.unique(lean["haul"])][cols].reset_index(drop=True)
    if "haul_id" not in records.columns:
        return None
    cols = [c for c in wanted if c in records.columns]
    return records[cols].drop_duplicates("haul_id").reset_index(drop=True)


def gear_mix(hauls: pd.DataFrame) -> pd.DataFrame:
    """Share of hauls by gear and year, and of effort within each effort unit (gear_mix.csv).

    hauls : one row per haul with year, gear, effort (in its effort_unit) and effort_unit.
    haul_share = the gear's hauls / all hauls that year. effort_share = the gear's effort /
    the effort of every gear with the same effort unit that year (efforts in different units
    are never added). Artifacts come from changes of this mix: a series whose mix is constant
    cannot be bent by a conversion factor, only rescaled.
    """
    h = pd.DataFrame({"year": hauls["year"].astype(int).to_numpy(), "gear": hauls["gear"].astype(str).to_numpy(),
                      "effort_unit": (hauls["effort_unit"].astype(str).to_numpy() if "effort_unit" in hauls
                                      else ""),
                      "effort": pd.to_numeric(hauls["effort"]).to_numpy() if "effort" in hauls else np.nan})
    g = (h.groupby(["year", "gear", "effort_unit"], observed=True)
         .agg(hauls=("gear", "size"), effort=("effort", "sum")).reset_index())
    g["haul_share"] = g["hauls"] / g.groupby("year")["hauls"].transform("sum")
    g["effort_share"] = g["effort"] / g.groupby(["year", "effort_unit"])["effort"].transform("sum")
    return g[MIX_COLUMNS].sort_values(["year", "gear", "effort_unit"]).reset_index(drop=True)


def _records_frame(records, columns) -> pd.DataFrame:
    from calib.convert import Conversion

    if isinstance(records, Conversion):
        have = records.store.columns if records.store is not None else list(records.records.columns)
        return records.record_columns([c for c in columns if c in have])
    return records[[c for c in columns if c in records.columns]]


def source_series(records, factor_draws: pd.DataFrame, *, draws=None, seed: int = 0, by_stratum: bool = True,
                  exact_max_hauls: int = EXACT_MAX_HAULS, incomplete: str = "flag", interval: float = 0.9,
                  where: str = "records", draws_where: str = "factor_draws", record_factors=None):
    """The harmonized series of each source (partner dataset) on its own.

    Each source's records go through :func:`calib.series.series_draws` (the same estimator as
    ``calib series``) with the same factor draws as the merged series but its own bootstrap
    stream, so two sources' draws share the conversion error and have independent sampling
    error. Records with a blank source form the source "(no source)".

    Returns (table with ``SOURCE_SERIES_COLUMNS`` for the combined 'all' stratum, dict source ->
    SeriesDraws, notes). Empty with a note when the records have no source column or one source.
    """
    frame = _records_frame(records, list(REQUIRED) + list(OPTIONAL) + ["source"]
                           + (record_factors.columns if record_factors is not None else []))
    empty = pd.DataFrame(columns=SOURCE_SERIES_COLUMNS)
    if "source" not in frame.columns:
        return empty, {}, ["the converted records have no source column: no per-source series"]
    src = frame["source"].astype("string").fillna("").str.strip().replace("", NO_SOURCE)
    labels = sorted(src.unique())
    if len(labels) < 2:
        return empty, {}, [f"all converted records come from one source ({labels[0]}): no partner comparison"]
    lo_q, hi_q = (1 - interval) / 2, 1 - (1 - interval) / 2
    tables, out, notes = [], {}, []
    for k, label in enumerate(labels):
        sub = frame[(src == label).to_numpy()]
        try:
            sd = series_draws(sub, factor_draws, draws=draws, seed=seed, by_stratum=by_stratum, uncertainty="both",
                              exact_max_hauls=exact_max_hauls, incomplete=incomplete,
                              where=f"{where} (source {label})", draws_where=draws_where, stream=k + 1,
                              record_factors=record_factors)
        except InputError as err:
            notes.append(f"source {label}: no series ({err.problems[0].message})")
            continue
        out[label] = sd
        sel = (sd.table["stratum"] == ALL).to_numpy()
        t = sd.table.loc[sel, ["species", "year", "n_hauls", "complete"]].copy()
        q, qr = row_quantiles(sd.value[sel], [lo_q, hi_q]), row_quantiles(sd.raw[sel], [lo_q, hi_q])
        t["estimate"], t["lower"], t["upper"] = sd.estimate[sel], q[0], q[1]
        t["raw_estimate"], t["raw_lower"], t["raw_upper"] = sd.raw_estimate[sel], qr[0], qr[1]
        t["source"], t["interval"] = label, interval
        if "stratum" in sub.columns:
            strata = (sub.assign(species=sub["species"].astype(str),
                                 stratum=sub["stratum"].astype("string").fillna(""))
                      .groupby("species")["stratum"].agg(lambda v: ";".join(sorted(set(v) - {""}))))
            t["strata"] = t["species"].astype(str).map(strata).fillna("")
        else:
            t["strata"] = ""
        tables.append(t)
    table = pd.concat(tables, ignore_index=True)[SOURCE_SERIES_COLUMNS] if tables else empty
    return table, out, notes


def source_agreement(source_draws: dict, *, year_from=None, year_to=None, interval: float = 0.9) -> pd.DataFrame:
    """Do two sources' harmonized series change alike? One row per species and pair of sources.

    Over the years (in the window) where both sources have a value for the species, the
    log-linear slope of each source's harmonized series is taken draw by draw (the same
    quasi-Poisson fit as the trend); draw d of both uses the same factor draw and independent
    bootstrap resamples, so the difference of slopes carries the sampling error of both and the
    conversion error. As for the trend's artifact, no residual term is added: year-to-year
    swings of the animals that both sources see cancel in the difference. Partners whose animals
    swing independently (different habitats) can then "differ" without any conversion problem;
    the ``shared_strata`` column says when they sampled no stratum in common.
    Only changes are compared, never levels: partners often sample different strata or
    habitats, whose densities differ for real. Rule: ``AGREEMENT_RULE``.
    """
    lo_q, hi_q = (1 - interval) / 2, 1 - (1 - interval) / 2
    labels = sorted(source_draws)
    # Per source, once: species -> {year: (estimate, draws)} in the window, and the strata sampled.
    yearly, strata = {}, {}
    for lab, sd in source_draws.items():
        years = np.asarray(sd.years)
        window = _in_years(years, year_from, year_to)
        est, val = sd.cube("estimate"), sd.cube("value")
        for i, sp in enumerate(sd.species):
            keep = window & np.isfinite(est[i])
            yearly[lab, str(sp)] = dict(zip(years[keep].tolist(), zip(est[i, keep], val[i, keep])))
        per_stratum = sd.table[sd.table["stratum"] != ALL]
        strata.update({(lab, str(sp)): set(g.astype(str)) for sp, g in
                       per_stratum.groupby(per_stratum["species"].astype(str))["stratum"]})
    rows = []
    species = sorted({str(s) for sd in source_draws.values() for s in sd.species})
    for sp in species:
        have = [lab for lab in labels if (lab, sp) in yearly]
        for a_i, a in enumerate(have):
            for b in have[a_i + 1:]:
                rows.append(_agreement_row(sp, a, b, yearly[a, sp], yearly[b, sp],
                                           strata.get((a, sp), set()) & strata.get((b, sp), set()),
                                           interval, lo_q, hi_q))
    return pd.DataFrame(rows, columns=AGREEMENT_COLUMNS)


def _agreement_row(sp, a, b, ya: dict, yb: dict, shared_strata: set, interval, lo_q, hi_q) -> dict:
    """One source_agreement row; ya, yb: year -> (estimate, draws) of the two sources' species."""
    row = {c: np.nan for c in AGREEMENT_COLUMNS}
    row.update(species=sp, source=a, other_source=b, interval=interval, reason="",
               shared_strata=";".join(sorted(shared_strata)))
    shared = np.array(sorted(set(ya) & set(yb)))
    row["n_years"] = len(shared)
    if len(shared) < MIN_SHARED_YEARS:
        row.update(agreement="not comparable",
                   reason=f"{len(shared)} year(s) with a value from both; a comparison needs {MIN_SHARED_YEARS}")
        return row
    row["year_from"], row["year_to"] = int(shared.min()), int(shared.max())
    span = float(shared.max() - shared.min())
    est_a, est_b = np.array([ya[y][0] for y in shared]), np.array([yb[y][0] for y in shared])
    val_a, val_b = np.array([ya[y][1] for y in shared]), np.array([yb[y][1] for y in shared])
    pa, _, _ = loglinear_slope(est_a[None, :], shared)
    pb, _, _ = loglinear_slope(est_b[None, :], shared)
    da, _, oka = loglinear_slope(val_a.T, shared)
    db, _, okb = loglinear_slope(val_b.T, shared)
    if not (np.isfinite(pa[0]) and np.isfinite(pb[0]) and oka.all() and okb.all()):
        row.update(agreement="not comparable",
                   reason="a series is all zero or has a catch only in its first or last shared year")
        return row
    diff = da - db  # draw d of both: the same factor draw, independent resamples
    q = row_quantiles(diff[None, :], [lo_q, hi_q])[:, 0]
    row["source_change_pct"], row["other_change_pct"] = _pct(pa[0], span), _pct(pb[0], span)
    row["difference_pct"] = _pct(pa[0] - pb[0], span)
    row["difference_lower"], row["difference_upper"] = _pct(q, span)
    covers = q[0] <= 0 <= q[1]
    row["agreement"] = "agree" if covers else "differ"
    row["reason"] = ("interval of the difference of changes covers 0" if covers
                     else "interval of the difference of changes excludes 0")
    if not row["shared_strata"]:
        row["reason"] += "; no stratum sampled by both, so only the change is compared, not the level"
    return row


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
raw change = harmonized change x artifact. Records converted by length class
or with their own covariate values are taken as `calib series` takes them.

""" + textwrap.fill("Verdict rule: " + VERDICT_RULE, 78) + """

Beside it, for the data manager: the share of hauls (and of effort, within
one effort unit) by gear and year, since artifacts come from changes of that
mix; and the harmonized series of each source (partner dataset) side by
side, with a check of whether partners' series change alike once converted.

Writes OUT/trend.csv, OUT/summary.md, OUT/trend_draws.parquet,
OUT/trend_series.csv, OUT/gear_mix.csv, OUT/source_series.csv,
OUT/source_agreement.csv, OUT/figures/*.png and OUT/manifest.json."""


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
    p.add_argument("--no-figures", action="store_true", help="write the tables only, no PNG figures")
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
    out = result.save(args.out, figures=not args.no_figures)
    print(result.summary())
    print(f"\nWrote {out}/: trend.csv, summary.md, trend_draws.parquet, trend_series.csv, gear_mix.csv, "
          f"source_series.csv, source_agreement.csv, manifest.json"
          + ("" if args.no_figures else ", figures/ (raw_vs_harmonized.png, artifact.png, gear_mix.png, "
                                         "source_series.png)"))
    return 0
