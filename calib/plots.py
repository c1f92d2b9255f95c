"""Figures: read results (tables, saved draws), draw them, return a matplotlib Figure.

Plot functions compute nothing a result table does not already hold: no fitting, no
resampling. They never call ``plt.show``; callers save the Figure (``save_figure``) or
embed it in the report.

Palette: calib's own, chosen so that every pair of colours used together stays apart
under the three common colour-vision deficiencies (checked by simulating protanopia,
deuteranopia and tritanopia with the Machado, Oliveira & Fernandes 2009 matrices,
IEEE TVCG 15, "A physiologically-based model for simulation of color vision
deficiency"; see tests/test_plots.py) and in greyscale print (lightness differs).
"""

from __future__ import annotations

import io
from pathlib import Path

import numpy as np

# Named colours (hex). Roles first: raw vs harmonized must differ in hue AND lightness.
INK = "#222222"
HARMONIZED = "#1d4f91"  # deep estuary blue: harmonized (reference-gear) series and intervals
RAW = "#e08a1e"  # marsh amber: raw merged records
ARTIFACT = "#c27bb0"  # orchid: the part of a change due to the change of methods
NEUTRAL = "#8a8a8a"  # reference lines, grid, "not estimable"

# Status of a factor (ok / warn / fail): blue, sand, brick, told apart by lightness too.
STATUS_COLOURS = {"ok": "#1d4f91", "warn": "#d9b44a", "fail": "#a8322d"}

# Categories (gears, sources, species): alternating dark / light so neighbours differ in lightness.
CATEGORICAL = ("#1d4f91", "#e08a1e", "#5fa8d3", "#5c1f4f", "#3b8c6e", "#d9b44a", "#a8322d", "#6b6b6b")


def categorical_colours(labels) -> dict:
    """Stable colour per label (in the order given), cycling through ``CATEGORICAL``."""
    return {label: CATEGORICAL[i % len(CATEGORICAL)] for i, label in enumerate(labels)}


def _pyplot():
    import matplotlib

    if matplotlib.get_backend().lower() not in ("agg", "pdf", "svg", "module://matplotlib_inline.backend_inline"):
        matplotlib.use("Agg")  # headless: no screen on the machines calib runs on
    import matplotlib.pyplot as plt

    return plt


def new_figure(n_panels: int = 1, *, ncols: int = 3, panel_size=(3.4, 2.5), sharex: bool = False,
               sharey: bool = False):
    """A Figure with ``n_panels`` axes on a grid; unused grid cells are hidden.

    Returns (fig, axes) with axes a flat list of length ``n_panels``.
    """
    plt = _pyplot()
    ncols = max(1, min(ncols, n_panels))
    nrows = int(np.ceil(n_panels / ncols)) if n_panels else 1
    fig, grid = plt.subplots(nrows, ncols, figsize=(panel_size[0] * ncols, panel_size[1] * nrows),
                             squeeze=False, sharex=sharex, sharey=sharey, layout="constrained")
    axes = list(grid.ravel())
    for ax in axes[n_panels:]:
        ax.set_visible(False)
    for ax in axes[:n_panels]:
        style_axes(ax)
    return fig, axes[:n_panels]


def style_axes(ax) -> None:
    """calib's quiet axes: no top/right spines, light horizontal grid, small ticks."""
    for side in ("top", "right"):
        ax.spines[side].set_visible(False)
    ax.grid(axis="y", color="#dddddd", linewidth=0.6)
    ax.set_axisbelow(True)
    ax.tick_params(labelsize=8)


def save_figure(fig, path, dpi: int = 120) -> Path:
    """Write ``fig`` to ``path`` (format from the suffix) and close it."""
    plt = _pyplot()
    path = Path(path)
    fig.savefig(path, dpi=dpi)
    plt.close(fig)
    return path


def figure_png(fig, dpi: int = 110) -> bytes:
    """PNG bytes of ``fig`` (for embedding in the HTML report); closes the figure."""
    plt = _pyplot()
    buffer = io.BytesIO()
    fig.savefig(buffer, format="png", dpi=dpi)
    plt.close(fig)
    return buffer.getvalue()


# --- series and trend attribution (calib trend)


def _pct_axis(ax, values) -> None:
    """A log-ratio axis (x) labelled in percent change: equal steps for equal multiplicative changes."""
    from matplotlib.ticker import FixedLocator, NullLocator

    finite = np.asarray([v for v in values if v is not None and np.isfinite(v)], dtype=float)
    ratios = 1 + finite / 100 if finite.size else np.array([0.5, 2.0])
    lo = max(float(np.nanmin(ratios)), 1e-3) if ratios.size else 0.5
    hi = float(np.nanmax(ratios)) if ratios.size else 2.0
    lo, hi = min(lo, 0.9), max(hi, 1.1)
    ax.set_xscale("log")
    ax.set_xlim(lo / 1.15, hi * 1.15)
    # ticks about evenly spaced on the log-ratio axis: coarser steps when the range is wide
    wide = np.log(hi / lo) > 2.0
    candidates = (np.array([-99, -95, -90, -75, -50, 0, 100, 300, 900, 1900, 4900]) if wide
                  else np.array([-90, -80, -60, -40, -20, 0, 25, 50, 100, 200, 400]))
    ticks = [c for c in candidates if lo / 1.15 <= 1 + c / 100 <= hi * 1.15]
    ax.xaxis.set_major_locator(FixedLocator([1 + t / 100 for t in ticks]))
    ax.xaxis.set_minor_locator(NullLocator())
    ax.set_xticklabels([f"{t:+d}%" if t else "0" for t in ticks])


def plot_series_bands(series_table, species=None, ncols: int = 3):
    """Raw merged vs harmonized annual index per species, with their interval bands.

    series_table : trend_series.csv of ``calib trend`` (columns species, year, estimate, lower,
        upper, raw_estimate, raw_lower, raw_upper; optional harmonized_fit / raw_fit, drawn as
        dashed lines over the years the slope used). Values are cpue: the harmonized series in
        reference-gear units, the raw one in whatever units the merged gears had.
    species : list of species to draw (default all, in table order).
    Returns a matplotlib Figure, one panel per species.
    """
    t = series_table
    names = list(dict.fromkeys(t["species"].astype(str))) if species is None else list(species)
    fig, axes = new_figure(max(len(names), 1), ncols=ncols)
    level = (f"{100 * float(t['interval'].iloc[0]):.0f}% interval" if "interval" in t and len(t)
             else "interval")
    for ax, sp in zip(axes, names):
        d = t[t["species"].astype(str) == sp].sort_values("year")
        yr = d["year"].to_numpy(dtype=float)
        ax.fill_between(yr, d["raw_lower"], d["raw_upper"], color=RAW, alpha=0.22, linewidth=0)
        ax.plot(yr, d["raw_estimate"], color=RAW, marker="o", markersize=2.5, linewidth=1.2, label="raw merged")
        ax.fill_between(yr, d["lower"], d["upper"], color=HARMONIZED, alpha=0.22, linewidth=0)
        ax.plot(yr, d["estimate"], color=HARMONIZED, marker="s", markersize=2.5, linewidth=1.4,
                label="harmonized")
        for col, colour in (("raw_fit", RAW), ("harmonized_fit", HARMONIZED)):
            if col in d and d[col].notna().any():
                ax.plot(yr, d[col], color=colour, linestyle="--", linewidth=1.0)
        ax.set_title(sp, fontsize=9)
        ax.set_ylim(bottom=0)
        ax.set_ylabel("catch per unit effort", fontsize=8)
    if names:
        axes[0].legend(fontsize=7, frameon=False, loc="upper left",
                       title=f"bands: {level}; dashed: log-linear trend", title_fontsize=6)
    fig.suptitle("Raw merged records and the harmonized series (reference-gear units)", fontsize=10)
    return fig


def plot_artifact_bars(trend_table):
    """Per species: change over the period after harmonization and the part due to the change of
    methods, each with its interval; the raw merged change as a marker.

    trend_table : trend.csv of ``calib trend``. The axis is logarithmic in the ratio
    (1 + change), labelled in percent, so raw = harmonized x artifact reads as a sum of bars.
    Species without an estimable trend are listed with "not estimable".
    Returns a matplotlib Figure.
    """
    t = trend_table.reset_index(drop=True)
    n = len(t)
    plt_fig, axes = new_figure(1, ncols=1, panel_size=(7.0, 0.45 * max(n, 2) + 1.2))
    ax = axes[0]
    ax.grid(axis="y", visible=False)
    ax.grid(axis="x", color="#dddddd", linewidth=0.6)
    y = np.arange(n)[::-1]
    values = []
    for yi, r in zip(y, t.itertuples()):
        if not np.isfinite(getattr(r, "harmonized_change_pct", np.nan)):
            ax.text(1.0, yi, "  not estimable", va="center", fontsize=7, color=NEUTRAL)
            continue
        for offset, (mid, lo, hi, colour) in zip((0.17, -0.17), (
                (r.harmonized_change_pct, r.harmonized_change_lower, r.harmonized_change_upper, HARMONIZED),
                (r.artifact_pct, r.artifact_lower, r.artifact_upper, ARTIFACT))):
            ratio = 1 + mid / 100
            ax.barh(yi + offset, ratio - 1, left=1, height=0.3, color=colour, alpha=0.85)
            ax.errorbar(ratio, yi + offset, xerr=[[ratio - (1 + lo / 100)], [(1 + hi / 100) - ratio]],
                        color=INK, linewidth=0.9, capsize=2)
            values += [mid, lo, hi]
        ax.plot(1 + r.raw_change_pct / 100, yi, marker="D", color=RAW, markeredgecolor=INK, markersize=5,
                linestyle="none")
        values.append(r.raw_change_pct)
    _pct_axis(ax, values)
    ax.axvline(1.0, color=INK, linewidth=0.8)
    ax.set_yticks(y)
    ax.set_yticklabels([str(s) for s in t["species"]], fontsize=8)
    ax.set_xlabel("change over the period", fontsize=8)
    from matplotlib.lines import Line2D
    from matplotlib.patches import Patch

    level = f"{100 * float(t['interval'].iloc[0]):.0f}%" if n and "interval" in t else ""
    handles = [Patch(color=HARMONIZED, label="harmonized change (the animals)"),
               Patch(color=ARTIFACT, label="method artifact (change of gears)"),
               Line2D([], [], marker="D", color=RAW, markeredgecolor=INK, linestyle="none",
                      label="raw merged change")]
    ax.legend(handles=handles, fontsize=7, frameon=False, loc="lower center", bbox_to_anchor=(0.5, 1.0),
              ncols=3, title=f"whiskers: {level} intervals", title_fontsize=6)
    plt_fig.suptitle("How much of each change is the change of methods?", fontsize=10)
    return plt_fig


def plot_gear_mix(mix_table):
    """Share of hauls by gear and year (stacked bars), and of effort within each effort unit.

    mix_table : gear_mix.csv of ``calib trend`` (year, gear, effort_unit, hauls, haul_share,
    effort, effort_share). One panel for hauls, one per effort unit for effort.
    Returns a matplotlib Figure.
    """
    t = mix_table
    units = [u for u in dict.fromkeys(t["effort_unit"].astype(str)) if t.loc[t["effort_unit"] == u,
                                                                                  "effort"].notna().any()]
    fig, axes = new_figure(1 + len(units), ncols=1, panel_size=(7.0, 2.3))
    gears = sorted(t["gear"].astype(str).unique())
    colours = categorical_colours(gears)
    years = np.sort(t["year"].unique())
    panels = [("haul_share", None, "share of hauls")] + [("effort_share", u, f"share of effort ({u})")
                                                          for u in units]
    for ax, (column, unit, label) in zip(axes, panels):
        d = t if unit is None else t[t["effort_unit"].astype(str) == unit]
        wide = d.pivot_table(index="year", columns="gear", values=column, aggfunc="sum").reindex(years).fillna(0.0)
        bottom = np.zeros(len(years))
        for g in gears:
            if g in wide:
                ax.bar(years, wide[g].to_numpy(), bottom=bottom, color=colours[g], width=0.85,
                       label=g, edgecolor="white", linewidth=0.3)
                bottom += wide[g].to_numpy()
        ax.set_ylim(0, 1)
        ax.set_ylabel(label, fontsize=8)
    axes[0].legend(fontsize=7, frameon=False, ncols=min(len(gears), 4), loc="upper center",
                   bbox_to_anchor=(0.5, 1.28))
    fig.suptitle("Which gears the records come from, year by year", fontsize=10)
    return fig


def plot_source_series(source_table, species=None, ncols: int = 3):
    """Harmonized series of each source (partner dataset) side by side, per species, with bands.

    source_table : source_series.csv of ``calib trend`` (species, source, year, estimate, lower,
    upper). Sources sampling different strata may differ in level for real; compare the shape.
    Returns a matplotlib Figure, one panel per species.
    """
    t = source_table
    names = list(dict.fromkeys(t["species"].astype(str))) if species is None else list(species)
    sources = sorted(t["source"].astype(str).unique())
    colours = categorical_colours(sources)
    fig, axes = new_figure(max(len(names), 1), ncols=ncols)
    for ax, sp in zip(axes, names):
        for src in sources:
            d = t[(t["species"].astype(str) == sp) & (t["source"].astype(str) == src)].sort_values("year")
            if d.empty:
                continue
            yr = d["year"].to_numpy(dtype=float)
            ax.fill_between(yr, d["lower"], d["upper"], color=colours[src], alpha=0.18, linewidth=0)
            ax.plot(yr, d["estimate"], color=colours[src], linewidth=1.2, marker="o", markersize=2, label=src)
        ax.set_title(sp, fontsize=9)
        ax.set_ylim(bottom=0)
        ax.set_ylabel("cpue, reference units", fontsize=8)
    if names:
        axes[0].legend(fontsize=6, frameon=False, loc="upper left")
    fig.suptitle("Harmonized series of each partner dataset", fontsize=10)
    return fig


# --- study planning


def plan_curves_figure(curve, table, *, target: dict | None = None, ncols: int = 3):
    """Interval width against the number of calibration groups, one panel per species x gear.

    curve : ``calib.plan`` curve table (species, gear, n_groups, width_median, width_low,
        width_high): the half-width factor exp(z se) of the factor's interval (upper / median),
        median and 10%-90% range over the simulated studies.
    table : ``calib.plan`` plan table (species, gear, groups_needed, mc_lower, mc_upper, verdict).
    target : the PlanTarget as a dict (kind, width_factor, ...); a width target is drawn as a
        horizontal line.

    Draws only what the tables hold; returns a matplotlib Figure.
    """
    import math

    from matplotlib.ticker import FuncFormatter

    keys = list(dict.fromkeys(zip(curve["species"], curve["gear"])))
    fig, axes = new_figure(max(1, len(keys)), ncols=ncols, panel_size=(3.4, 2.6))
    if not keys:
        axes[0].text(0.5, 0.5, "no species could be simulated", ha="center", va="center", color=NEUTRAL,
                     transform=axes[0].transAxes)
        return fig
    plan_rows = {(r.species, r.gear): r for r in table.itertuples()}
    for ax, (species, gear) in zip(axes, keys):
        c = curve[(curve["species"] == species) & (curve["gear"] == gear)].sort_values("n_groups")
        n = c["n_groups"].to_numpy(float)
        high = np.minimum(c["width_high"].to_numpy(float), 1e3)  # inf (not estimable) drawn at the top
        ax.fill_between(n, c["width_low"].to_numpy(float), high, color=HARMONIZED, alpha=0.18, linewidth=0,
                        label="10-90% of studies")
        ax.plot(n, np.minimum(c["width_median"].to_numpy(float), 1e3), color=HARMONIZED, linewidth=1.6,
                label="median study")
        if target and target.get("kind") == "width":
            ax.axhline(target["width_factor"], color=INK, linewidth=0.8, linestyle="--", label="target")
        row = plan_rows.get((species, gear))
        if row is not None and math.isfinite(float(row.groups_needed)):
            lo, hi = float(row.mc_lower), float(row.mc_upper)
            if math.isfinite(lo) and math.isfinite(hi):
                ax.axvspan(lo, hi, color=ARTIFACT, alpha=0.15, linewidth=0)
            ax.axvline(float(row.groups_needed), color=ARTIFACT, linewidth=1.2,
                       label=f"needed: {int(row.groups_needed)}")
        elif row is not None:
            ax.text(0.97, 0.92, str(row.verdict), ha="right", va="top", fontsize=8, color=STATUS_COLOURS["fail"],
                    transform=ax.transAxes)
        ax.set_xscale("log")
        ax.set_yscale("log")
        plain = FuncFormatter(lambda v, _pos: f"{v:g}")
        for axis in (ax.xaxis, ax.yaxis):
            axis.set_major_formatter(plain)
            axis.set_minor_formatter(FuncFormatter(lambda v, _pos: f"{v:g}" if str(v)[0] in "25" else ""))
        top = float(np.nanmax(np.minimum(c["width_high"].to_numpy(float), 1e3)))
        ax.set_ylim(1.0, max(2.0, min(top * 1.1, 10.0)))
        ax.set_title(f"{species} ({gear})", fontsize=9)
        ax.set_xlabel("calibration groups (pairs)", fontsize=8)
        ax.set_ylabel("interval end / median", fontsize=8)
        ax.legend(fontsize=6, frameon=False, loc="upper right")
    return fig


# --- factor set and checks
#
# These read a saved factor set's tables (factors.csv, checks.csv, the manifest's design) and
# draw them. Every function returns a matplotlib Figure.

# Status rules used when a caller gives none (the defaults of calib.diagnostics.StatusRules).
_DEFAULT_RULES = {"fail_rhat": 1.05, "warn_rhat": 1.01, "fail_ess_bulk": 100.0, "warn_ess": 400.0,
                  "ppp_low": 0.05, "ppp_high": 0.95}


def _rules(rules: dict | None) -> dict:
    merged = dict(_DEFAULT_RULES)
    merged.update({k: v for k, v in (rules or {}).items() if k in _DEFAULT_RULES})
    return merged


def _species_level(table):
    """Rows of a factors table that hold one factor per species x gear (no length class)."""
    if "length_mm" in table:
        return table[table["length_mm"].isna()]
    return table


def _check_rows(table):
    """The rows whose sampler checks are drawn: species-level rows, else (a length factor set) all."""
    rows = _species_level(table)
    return rows if len(rows) else table


def _factor_label(row) -> str:
    """Species, plus the covariate level when the factor is per level."""
    label = str(row["species"])
    length = row.get("length_mm")
    if length is not None and pd_notna(length):
        label += f" {float(length):g} mm"
    covariate, level = row.get("covariate"), row.get("level")
    if isinstance(covariate, str) and covariate:
        label += f" [{covariate} = {level}]"
    return label


def pd_notna(value) -> bool:
    """True for a present value (not None, NaN or pandas NA)."""
    import pandas as pd

    return not bool(pd.isna(value))


def _plain_log_axis(axis) -> None:
    """Log-scale axis labelled 0.1, 0.2, 0.5, 1, 2, 5 ... in plain numbers."""
    from matplotlib.ticker import FuncFormatter, LogLocator, NullFormatter

    axis.set_major_locator(LogLocator(base=10, subs=(1.0, 2.0, 5.0)))
    axis.set_major_formatter(FuncFormatter(lambda v, _: f"{v:g}"))
    axis.set_minor_formatter(NullFormatter())


def _empty_figure(message: str):
    fig, (ax,) = new_figure(1, panel_size=(6.0, 1.6))
    ax.axis("off")
    ax.text(0.5, 0.5, message, ha="center", va="center", fontsize=9, color=INK, wrap=True)
    return fig


def plot_forest(table, *, reference: str | None = None):
    """Forest plot of the conversion factors: one panel per gear, one row per species.

    ``table``: a factors.csv frame (``FactorSet.table``). Points are the posterior medians,
    lines the ``interval`` (e.g. 90%) intervals, on a log scale (a factor of 2 and of 1/2
    lie equally far from 1); colour is the factor's status (``STATUS_COLOURS``). Factors
    that could not be estimated are listed as "not estimable". Length-class rows are left
    out (see ``plot_factor_by_length``).
    """
    from matplotlib.lines import Line2D

    rows = _species_level(table).copy()
    if rows.empty:
        return _empty_figure("No species-level factors in this factor set.")
    rows["label"] = [_factor_label(r) for _, r in rows.iterrows()]
    gears = sorted(rows["gear"].astype(str).unique())
    labels = sorted(rows["label"].unique(), key=str.lower, reverse=True)  # A at the top
    ypos = {lab: i for i, lab in enumerate(labels)}
    fig, axes = new_figure(len(gears), ncols=min(len(gears), 3),
                           panel_size=(3.6, 0.8 + 0.24 * len(labels)), sharey=True)
    interval = rows["interval"].dropna()
    level = f"{100 * float(interval.iloc[0]):.0f}% interval" if len(interval) else "interval"
    for ax, gear in zip(axes, gears):
        sub = rows[rows["gear"].astype(str) == gear]
        finite = sub[np.isfinite(sub["factor_median"].astype(float))]
        for _, r in finite.iterrows():
            colour = STATUS_COLOURS.get(str(r["status"]), NEUTRAL)
            y = ypos[r["label"]]
            ax.plot([r["factor_lower"], r["factor_upper"]], [y, y], color=colour, linewidth=1.6,
                    solid_capstyle="butt")
            ax.plot([r["factor_median"]], [y], "o", color=colour, markersize=4.5,
                    markeredgecolor="white", markeredgewidth=0.5)
        ax.set_xscale("log")
        _plain_log_axis(ax.xaxis)
        ax.axvline(1.0, color=NEUTRAL, linestyle="--", linewidth=0.8)
        for _, r in sub[~sub.index.isin(finite.index)].iterrows():
            ax.text(1.0, ypos[r["label"]], " not estimable", fontsize=7, color=NEUTRAL, va="center")
        ax.set_yticks(range(len(labels)))
        ax.set_yticklabels(labels)
        ax.set_ylim(-0.7, len(labels) - 0.3)
        ax.grid(axis="x", color="#dddddd", linewidth=0.6)
        ax.grid(axis="y", visible=False)
        ax.set_title(f"{gear} → {reference}" if reference else gear, fontsize=9, color=INK)
        ax.set_xlabel(f"factor (median, {level}; log scale)", fontsize=8)
    handles = [Line2D([0], [0], color=c, marker="o", linewidth=1.6, label=s) for s, c in STATUS_COLOURS.items()]
    fig.legend(handles=handles, loc="outside lower center", ncols=len(handles), fontsize=8, frameon=False,
               title="status", title_fontsize=8)
    return fig


def plot_convergence(table, *, rules: dict | None = None):
    """Sampler checks per factor: R-hat (left) and bulk / tail effective sample size (right).

    ``table``: a factors.csv frame with rhat, ess_bulk and ess_tail. Dashed lines mark the
    ``warn`` and ``fail`` thresholds of the status rules (``rules``: the manifest's
    ``status_rules``; the defaults otherwise). ESS is on a log scale.
    """
    from matplotlib.lines import Line2D

    rules = _rules(rules)
    rows = _check_rows(table)
    rows = rows[np.isfinite(rows["rhat"].astype(float))] if "rhat" in rows else rows.iloc[0:0]
    if rows.empty:
        return _empty_figure("No sampler diagnostics: this factor set was not fitted by a sampler.")
    rows = rows.assign(label=[f"{_factor_label(r)} · {r['gear']}" for _, r in rows.iterrows()])
    rows = rows.sort_values("label", key=lambda c: c.str.lower(), ascending=False)  # A at the top
    labels = list(rows["label"])
    y = np.arange(len(labels))
    fig, (ax_r, ax_e) = new_figure(2, ncols=2, panel_size=(3.8, 0.8 + 0.2 * len(labels)), sharey=True)
    colours = [STATUS_COLOURS.get(str(s), NEUTRAL) for s in rows["status"]]
    ax_r.scatter(rows["rhat"].astype(float), y, c=colours, s=16, zorder=3)
    for value, name in ((rules["warn_rhat"], "warn"), (rules["fail_rhat"], "fail")):
        ax_r.axvline(value, color=STATUS_COLOURS[name], linestyle="--", linewidth=0.9)
    ax_r.set_xlabel("R-hat (rank-normalised)", fontsize=8)
    ax_r.set_xlim(min(0.998, float(rows["rhat"].min()) - 0.002), max(rules["fail_rhat"] + 0.01,
                                                                          float(rows["rhat"].max()) + 0.005))
    ax_e.scatter(rows["ess_bulk"].astype(float), y, color=HARMONIZED, marker="o", s=16, zorder=3, label="bulk")
    ax_e.scatter(rows["ess_tail"].astype(float), y, color=RAW, marker="^", s=16, zorder=3, label="tail")
    ax_e.set_xscale("log")
    ax_e.axvline(rules["warn_ess"], color=STATUS_COLOURS["warn"], linestyle="--", linewidth=0.9)
    ax_e.axvline(rules["fail_ess_bulk"], color=STATUS_COLOURS["fail"], linestyle="--", linewidth=0.9)
    ax_e.set_xlabel("effective sample size (log scale)", fontsize=8)
    for ax in (ax_r, ax_e):
        ax.set_yticks(np.arange(len(labels)))
        ax.set_yticklabels(labels)
        ax.set_ylim(-0.7, len(labels) - 0.3)
        ax.grid(axis="y", visible=False)
        ax.grid(axis="x", color="#dddddd", linewidth=0.6)
    handles = [Line2D([0], [0], color=HARMONIZED, marker="o", linestyle="", label="bulk ESS"),
               Line2D([0], [0], color=RAW, marker="^", linestyle="", label="tail ESS"),
               Line2D([0], [0], color=STATUS_COLOURS["warn"], linestyle="--", label="warn threshold"),
               Line2D([0], [0], color=STATUS_COLOURS["fail"], linestyle="--", label="fail threshold")]
    fig.legend(handles=handles, loc="outside lower center", ncols=4, fontsize=8, frameon=False)
    return fig


def plot_ppc(checks, *, rules: dict | None = None):
    """Posterior predictive check of each factor's split: the p-value ``ppp`` per gear x species.

    ``checks``: a checks.csv frame (gear, species, ppp). ``ppp`` is the share of replicated
    datasets whose split of the group totals among the gears is at least as far from the
    fitted one as the observed split (Pearson discrepancy; see calib.diagnostics.split_check).
    Values inside the shaded edges (below ``ppp_low`` or above ``ppp_high`` of the status
    rules) mean the observed splits vary more (near 0) or less (near 1) than the model allows.
    """
    rules = _rules(rules)
    if checks is None or "ppp" not in checks or not np.isfinite(checks["ppp"].astype(float)).any():
        return _empty_figure("No posterior predictive check in this factor set.")
    rows = checks[np.isfinite(checks["ppp"].astype(float))]
    species = sorted(rows["species"].astype(str).unique(), key=str.lower, reverse=True)
    ypos = {s: i for i, s in enumerate(species)}
    gears = sorted(rows["gear"].astype(str).unique())
    colours = categorical_colours(gears)
    markers = dict(zip(gears, "o^sDv<>"))
    fig, (ax,) = new_figure(1, panel_size=(6.0, 1.0 + 0.24 * len(species)))
    ax.axvspan(0, rules["ppp_low"], color=STATUS_COLOURS["warn"], alpha=0.25, linewidth=0)
    ax.axvspan(rules["ppp_high"], 1, color=STATUS_COLOURS["warn"], alpha=0.25, linewidth=0)
    offsets = np.linspace(-0.15, 0.15, len(gears)) if len(gears) > 1 else [0.0]
    for off, gear in zip(offsets, gears):
        sub = rows[rows["gear"].astype(str) == gear]
        ax.scatter(sub["ppp"].astype(float), [ypos[s] + off for s in sub["species"].astype(str)],
                   color=colours[gear], marker=markers.get(gear, "o"), s=20, label=gear, zorder=3)
    ax.set_xlim(0, 1)
    ax.set_yticks(range(len(species)))
    ax.set_yticklabels(species)
    ax.set_ylim(-0.7, len(species) - 0.3)
    ax.grid(axis="y", visible=False)
    ax.grid(axis="x", color="#dddddd", linewidth=0.6)
    ax.set_xlabel("posterior predictive p-value of the split (shaded: outside "
                  f"{rules['ppp_low']:g}–{rules['ppp_high']:g}, status warn)", fontsize=8)
    ax.legend(fontsize=8, frameon=False, loc="upper left", bbox_to_anchor=(1.0, 1.0), title="gear",
              title_fontsize=8)
    return fig


def plot_gear_network(combos, *, reference: str | None = None):
    """Which gears fished together: gears as points, a line for each pair of gears that shared
    calibration groups, labelled with the number of such groups.

    ``combos``: list of dicts with ``gears`` (list of gear names) and ``n_groups`` (as in
    ``calib.inspect.CheckSummary.combos``); groups with one gear are ignored. A group where
    three gears fished counts for each of its three pairs. The reference gear is drawn filled.
    """
    from itertools import combinations

    edges: dict[tuple[str, str], int] = {}
    gears: set[str] = set()
    for combo in combos:
        names = sorted(str(g) for g in combo["gears"])
        gears.update(names)
        if len(names) < 2:
            continue
        for a, b in combinations(names, 2):
            edges[(a, b)] = edges.get((a, b), 0) + int(combo["n_groups"])
    if reference is not None:
        gears.add(str(reference))
    if not gears:
        return _empty_figure("No calibration groups.")
    names = sorted(gears, key=lambda g: (g != reference, g))
    angle = np.pi / 2 + 2 * np.pi * np.arange(len(names)) / len(names)
    pos = {g: (np.cos(a), np.sin(a)) for g, a in zip(names, angle)}
    fig, (ax,) = new_figure(1, panel_size=(4.6, 3.2))
    ax.axis("off")
    widest = max(edges.values()) if edges else 1
    for (a, b), n in edges.items():
        (xa, ya), (xb, yb) = pos[a], pos[b]
        ax.plot([xa, xb], [ya, yb], color=NEUTRAL, linewidth=1 + 5 * n / widest, zorder=1,
                solid_capstyle="round")
        ax.text((xa + xb) / 2, (ya + yb) / 2, f"{n}", fontsize=8, ha="center", va="center", color=INK,
                bbox=dict(boxstyle="round,pad=0.2", facecolor="white", edgecolor="none"), zorder=3)
    for g, (x, y) in pos.items():
        is_ref = g == reference
        ax.scatter([x], [y], s=260, color=HARMONIZED if is_ref else "white", edgecolors=HARMONIZED,
                   linewidths=1.8, zorder=4)
        ax.text(x, y - 0.2 if y <= 0 else y + 0.2, g + (" (reference)" if is_ref else ""), fontsize=8,
                ha="center", va="top" if y <= 0 else "bottom", color=INK, zorder=5)
    ax.set_xlim(-1.6, 1.6)
    ax.set_ylim(-1.3, 1.45)
    ax.set_aspect("equal")
    ax.set_title("calibration groups shared by each pair of gears", fontsize=9, color=INK)
    return fig


def plot_factor_by_length(factors, *, truth=None, species=None, ncols: int = 3):
    """Factor versus length, one panel per species, one line and band per gear.

    factors : factors.csv of a length factor set (``FactorSet.table``): rows with length_mm (class
        lower bound, mm), factor_median, factor_lower, factor_upper, interval, status. The line is
        drawn at class mid-points (lower bound + half the class width, taken from the spacing of
        the classes); fail rows are marked with an open circle.
    truth : optional table species, gear, length_mm, factor (e.g. a simulator's ``theta_length``)
        drawn as a dashed line, for checking recovery.
    species : optional list of species to draw (default all, in table order).
    Returns a matplotlib Figure (log factor axis; the line factor = 1 is "same as the reference").
    """
    import pandas as pd

    t = factors[factors["length_mm"].notna()].copy()
    names = list(dict.fromkeys(t["species"])) if species is None else list(species)
    gears = list(dict.fromkeys(t["gear"]))
    colours = categorical_colours(gears)
    fig, axes = new_figure(max(len(names), 1), ncols=ncols)
    level = t["interval"].dropna().iloc[0] if t["interval"].notna().any() else None
    for ax, sp in zip(axes, names):
        part = t[t["species"] == sp]
        for gear in gears:
            g = part[part["gear"] == gear].sort_values("length_mm")
            if g.empty:
                continue
            steps = np.diff(g["length_mm"].to_numpy(dtype=float))
            half = float(np.min(steps)) / 2 if len(steps) else 0.0
            x = g["length_mm"].to_numpy(dtype=float) + half
            ax.fill_between(x, g["factor_lower"], g["factor_upper"], color=colours[gear], alpha=0.25, linewidth=0)
            ax.plot(x, g["factor_median"], color=colours[gear], linewidth=1.6, label=gear)
            fail = (g["status"] == "fail").to_numpy()
            if fail.any():
                ax.plot(x[fail], g["factor_median"].to_numpy()[fail], linestyle="none", marker="o",
                        markerfacecolor="white", markeredgecolor=STATUS_COLOURS["fail"], markersize=4)
            if truth is not None:
                tr = pd.DataFrame(truth)
                tr = tr[(tr["species"] == sp) & (tr["gear"] == gear)].sort_values("length_mm")
                tr = tr[(tr["length_mm"] >= g["length_mm"].min()) & (tr["length_mm"] <= g["length_mm"].max())]
                if not tr.empty:
                    ax.plot(tr["length_mm"].to_numpy(dtype=float) + half, tr["factor"], color=INK, linewidth=1.0,
                            linestyle="--", label=f"{gear} (truth)")
        ax.axhline(1.0, color=NEUTRAL, linewidth=0.8)
        ax.set_yscale("log")
        from matplotlib.ticker import FuncFormatter

        def _minor(v, _):  # label 0.2, 0.3, 0.5, 2, 3, 5, ... only: the others crowd the axis
            mantissa = round(v / 10 ** np.floor(np.log10(v)), 6) if v > 0 else 0
            return f"{v:g}" if mantissa in (2, 3, 5) else ""

        ax.yaxis.set_major_formatter(FuncFormatter(lambda v, _: f"{v:g}"))  # 1 rather than 10^0
        ax.yaxis.set_minor_formatter(FuncFormatter(_minor))
        ax.tick_params(which="minor", labelsize=8)
        ax.set_title(sp, fontsize=9, color=INK)
        ax.set_xlabel("length (mm)", fontsize=8)
        ax.set_ylabel("factor (reference / gear)", fontsize=8)
    if axes:
        axes[0].legend(fontsize=7, frameon=False)
    band = f"{level:.0%} interval" if level is not None else "interval"
    fig.suptitle(f"Conversion factor by length (median and {band}); open circles: status fail", fontsize=9)
    return fig


def plot_split_by_length(split, *, species=None, ncols: int = 3):
    """Observed versus fitted share of each gear's catch by length class, one panel per species.

    split : ``length_split.csv`` of a length factor set (``FactorSet.extra_tables["length_split"]``):
        species, length_mm, gear, n_fish, observed_share, fitted_median, fitted_lower, fitted_upper.
        Points are the observed shares (size grows with the fish in the class), lines and bands the
        fitted shares. Reference gear shares are left out (with two gears they are 1 minus the other).
    Returns a matplotlib Figure.
    """
    s = split.copy()
    names = list(dict.fromkeys(s["species"])) if species is None else list(species)
    gears = list(dict.fromkeys(s["gear"]))
    shown = gears[1:] if len(gears) > 1 else gears
    colours = categorical_colours(gears)
    fig, axes = new_figure(max(len(names), 1), ncols=ncols)
    for ax, sp in zip(axes, names):
        part = s[s["species"] == sp]
        for gear in shown:
            g = part[part["gear"] == gear].sort_values("length_mm")
            if g.empty:
                continue
            x = g["length_mm"].to_numpy(dtype=float)
            ax.fill_between(x, g["fitted_lower"], g["fitted_upper"], color=colours[gear], alpha=0.25, linewidth=0)
            ax.plot(x, g["fitted_median"], color=colours[gear], linewidth=1.4, label=f"{gear} fitted")
            size = 6 + 30 * np.sqrt(g["n_fish"].to_numpy(dtype=float) / max(float(part["n_fish"].max()), 1.0))
            ax.scatter(x, g["observed_share"], s=size, facecolor="white", edgecolor=colours[gear], linewidth=1.0,
                       label=f"{gear} observed", zorder=3)
        ax.set_ylim(0, 1)
        ax.set_title(sp, fontsize=9, color=INK)
        ax.set_xlabel("length class lower bound (mm)", fontsize=8)
        ax.set_ylabel("share of the class's fish", fontsize=8)
    if axes:
        axes[0].legend(fontsize=7, frameon=False)
    fig.suptitle("Split of each length class's catch between gears: observed (points) and fitted (bands)",
                 fontsize=9)
    return fig


# --- patchiness check


def patchiness_spread_figure(spread, *, title: str | None = None):
    """Spread of the split against the group total: observed and each patchiness form's band.

    ``spread`` is the spread check table (``spread_check.csv`` written by ``calib fit --compare``,
    or its path): one row per bin of group totals with ``observed``, ``binomial_only`` and, per
    variant, ``{name}_median``, ``{name}_lower``, ``{name}_upper``. Nothing is recomputed.
    x: group total (fish, log scale; the bin's range as a horizontal bar); y: spread of the
    followed gear's share, (share - expected)^2 / (p (1 - p)), averaged over the bin.
    Returns a matplotlib Figure.
    """
    import pandas as pd

    if not isinstance(spread, pd.DataFrame):
        spread = pd.read_csv(spread)
    names = [c[: -len("_median")] for c in spread.columns if c.endswith("_median")]
    colours = categorical_colours(names)
    fig, (ax,) = new_figure(1, panel_size=(5.2, 3.4))
    lo = spread["total_from"].to_numpy(dtype=float)
    hi = spread["total_to"].to_numpy(dtype=float)
    x = np.sqrt(np.maximum(lo, 1.0) * np.maximum(hi, 1.0))
    for k, name in enumerate(names):
        shift = x * (1.0 + 0.06 * (k - (len(names) - 1) / 2))  # side by side, same bins
        ax.fill_between(shift, spread[f"{name}_lower"], spread[f"{name}_upper"], color=colours[name], alpha=0.22,
                        linewidth=0)
        ax.plot(shift, spread[f"{name}_median"], color=colours[name], linewidth=1.6, label=f"{name} (90% band)")
    ax.plot(x, spread["binomial_only"], color=NEUTRAL, linestyle="--", linewidth=1.0, label="sampling alone (1/n)")
    ax.errorbar(x, spread["observed"], xerr=[x - lo, hi - x], fmt="o", color=INK, markersize=4, elinewidth=0.6,
                capsize=0, label="observed")
    ax.set_xscale("log")
    ax.set_xlabel("group total of the species (fish)", fontsize=9)
    ax.set_ylabel("spread of the split", fontsize=9)
    ax.set_title(title or "Does the split's spread grow with the catch as each form predicts?", fontsize=9)
    ax.legend(fontsize=7, frameon=False)
    return fig
