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


# --- length-dependent factors


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
