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
ARTIFACT = "#8e3b76"  # plum: the part of a change due to the change of methods
NEUTRAL = "#8a8a8a"  # reference lines, grid, "not estimable"

# Status of a factor (ok / warn / fail): blue, sand, brick, told apart by lightness too.
STATUS_COLOURS = {"ok": "#1d4f91", "warn": "#d9b44a", "fail": "#a8322d"}

# Categories (gears, sources, species): alternating dark / light so neighbours differ in lightness.
CATEGORICAL = ("#1d4f91", "#e08a1e", "#5fa8d3", "#8e3b76", "#3b8c6e", "#d9b44a", "#a8322d", "#6b6b6b")


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
