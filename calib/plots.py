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
