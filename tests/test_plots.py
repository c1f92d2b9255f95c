"""calib's palette stays apart for readers with colour-vision deficiencies and in greyscale."""

from __future__ import annotations

import itertools

import numpy as np
import pytest

from calib import plots

# Machado, Oliveira & Fernandes 2009, "A physiologically-based model for simulation of color
# vision deficiency", IEEE TVCG 15: simulation matrices at severity 1.0, applied to linear RGB.
# The numbers are recalled from memory (the paper's table); the identity is "normal vision".
SIMULATIONS = {
    "normal": np.eye(3),
    "protanopia": np.array([[0.152286, 1.052583, -0.204868], [0.114503, 0.786281, 0.099216],
                            [-0.003882, -0.048116, 1.051998]]),
    "deuteranopia": np.array([[0.367322, 0.860646, -0.227968], [0.280085, 0.672501, 0.047413],
                              [-0.011820, 0.042940, 0.968881]]),
    "tritanopia": np.array([[1.255528, -0.076749, -0.178779], [-0.078411, 0.930809, 0.147602],
                            [0.004733, 0.691367, 0.303900]]),
}


def linear_rgb(hex_colour: str) -> np.ndarray:
    """sRGB hex -> linear RGB (IEC 61966-2-1 transfer function)."""
    c = np.array([int(hex_colour[i:i + 2], 16) / 255 for i in (1, 3, 5)])
    return np.where(c <= 0.04045, c / 12.92, ((c + 0.055) / 1.055) ** 2.4)


def cielab(lin: np.ndarray) -> np.ndarray:
    """Linear sRGB -> CIE 1976 L*a*b* (D65 white), CIE 15:2004."""
    xyz = np.array([[0.4124, 0.3576, 0.1805], [0.2126, 0.7152, 0.0722], [0.0193, 0.1192, 0.9505]]) @ np.clip(lin, 0, 1)
    t = xyz / np.array([0.95047, 1.0, 1.08883])
    f = np.where(t > (6 / 29) ** 3, np.cbrt(t), t / (3 * (6 / 29) ** 2) + 4 / 29)
    return np.array([116 * f[1] - 16, 500 * (f[0] - f[1]), 200 * (f[1] - f[2])])


def worst_difference(colours) -> float:
    """Smallest CIE76 colour difference between any two colours, under any simulated vision."""
    return min(float(np.linalg.norm(cielab(m @ linear_rgb(a)) - cielab(m @ linear_rgb(b))))
               for a, b in itertools.combinations(colours, 2) for m in SIMULATIONS.values())


def test_the_simulation_matrices_keep_white_and_grey():
    # A property of the published matrices: rows sum to 1, so neutral greys are unchanged.
    for m in SIMULATIONS.values():
        assert np.allclose(m.sum(axis=1), 1.0, atol=1e-3)


# Thresholds: CIE76 difference 20 between colours drawn next to each other, 15 among the first
# four categories, 8 among all eight; about 2.3 is a just-noticeable difference (Sharma 2003,
# Digital Color Imaging Handbook -- recalled from memory); the margins are common practice, no source.
@pytest.mark.parametrize("colours,minimum", [
    ((plots.HARMONIZED, plots.RAW, plots.ARTIFACT), 20.0),
    (tuple(plots.STATUS_COLOURS.values()), 20.0),
    (plots.CATEGORICAL[:4], 15.0),
    (plots.CATEGORICAL, 8.0),
])
def test_palette_stays_apart_under_colour_vision_deficiencies(colours, minimum):
    assert worst_difference(colours) >= minimum


def test_raw_and_harmonized_differ_in_lightness_for_greyscale_print():
    lightness = {c: cielab(linear_rgb(c))[0] for c in (plots.HARMONIZED, plots.RAW)}
    assert abs(lightness[plots.HARMONIZED] - lightness[plots.RAW]) >= 20
    status = [cielab(linear_rgb(c))[0] for c in plots.STATUS_COLOURS.values()]
    assert max(status) - min(status) >= 20  # warn stands out from ok and fail in print


def test_new_figure_hides_unused_panels():
    fig, axes = plots.new_figure(4, ncols=3)
    assert len(axes) == 4 and sum(ax.get_visible() for ax in fig.axes) == 4 and len(fig.axes) == 6
    assert plots.figure_png(fig)[:4] == b"\x89PNG"
