"""The report's look checked against published colour and contrast criteria.

* Contrast of every line colour against the white background: WCAG 2.1, success
  criterion 1.4.11 "Non-text contrast" (>= 3:1), with "relative luminance" and
  "contrast ratio" as defined in the WCAG 2.1 glossary (sRGB, IEC 61966-2-1).
* Line colours stay apart for dichromat viewers: simulated with the severity-1.0
  matrices of G. M. Machado, M. M. Oliveira, L. A. F. Fernandes, "A physiologically-based
  model for simulation of color vision deficiency", IEEE TVCG 15(6):1291-1298, 2009
  (matrix values from memory), distances as CIE 1976 L*a*b* colour difference
  (CIE 15:2004). The 10-unit minimum is common practice for "clearly different".
"""

from __future__ import annotations

import itertools

import numpy as np
import pytest

from benchctl.report import plots, style

# Machado et al. 2009, severity 1.0, applied to linear RGB (from memory).
DICHROMAT = {
    "protanopia": np.array([[0.152286, 1.052583, -0.204868],
                            [0.114503, 0.786281, 0.099216],
                            [-0.003882, -0.048116, 1.051998]]),
    "deuteranopia": np.array([[0.367322, 0.860646, -0.227968],
                              [0.280085, 0.672501, 0.047413],
                              [-0.011820, 0.042940, 0.968881]]),
    "tritanopia": np.array([[1.255528, -0.076749, -0.178779],
                            [-0.078411, 0.930809, 0.147602],
                            [0.004733, 0.691367, 0.303900]]),
}
# Linear sRGB -> CIE XYZ (D65), IEC 61966-2-1.
SRGB_TO_XYZ = np.array([[0.4124, 0.3576, 0.1805],
                        [0.2126, 0.7152, 0.0722],
                        [0.0193, 0.1192, 0.9505]])


def srgb_to_linear(hex_colour: str, threshold: float = 0.04045) -> np.ndarray:
    c = np.array([int(hex_colour[k:k + 2], 16) / 255.0 for k in (1, 3, 5)])
    return np.where(c <= threshold, c / 12.92, ((c + 0.055) / 1.055) ** 2.4)


def wcag_contrast(hex_a: str, hex_b: str) -> float:
    # WCAG 2.1 glossary: L = 0.2126 R + 0.7152 G + 0.0722 B (the glossary uses 0.03928
    # as the sRGB threshold); ratio (L1 + 0.05) / (L2 + 0.05), L1 the lighter.
    la, lb = (float(srgb_to_linear(h, 0.03928) @ [0.2126, 0.7152, 0.0722]) for h in (hex_a, hex_b))
    hi, lo = max(la, lb), min(la, lb)
    return (hi + 0.05) / (lo + 0.05)


def lab(linear_rgb: np.ndarray) -> np.ndarray:
    # CIE 15:2004 L*a*b* with the D65 white of sRGB.
    white = SRGB_TO_XYZ @ np.ones(3)
    t = (SRGB_TO_XYZ @ np.clip(linear_rgb, 0.0, 1.0)) / white
    d = 6.0 / 29.0
    f = np.where(t > d**3, np.cbrt(t), t / (3 * d * d) + 4.0 / 29.0)
    return np.array([116 * f[1] - 16, 500 * (f[0] - f[1]), 200 * (f[1] - f[2])])


def test_contrast_formula_matches_the_wcag_extremes():
    # WCAG 2.1 glossary: contrast ratios range from 1:1 to 21:1 (black on white).
    assert wcag_contrast("#000000", "#ffffff") == pytest.approx(21.0)
    assert wcag_contrast("#777777", "#777777") == pytest.approx(1.0)


@pytest.mark.parametrize("colour", [*style.LINE_COLOURS, *plots.LOAD_RAMP, style.LIMIT_INK, style.REFERENCE_INK])
def test_every_line_colour_reaches_3_to_1_on_white(colour):
    assert style.BACKGROUND.lower() == "#ffffff"
    assert wcag_contrast(colour, style.BACKGROUND) >= 3.0  # WCAG 2.1 SC 1.4.11


def test_text_ink_reaches_4_5_to_1():
    # WCAG 2.1 SC 1.4.3 "Contrast (Minimum)": 4.5:1 for normal text.
    assert wcag_contrast(style.INK, style.BACKGROUND) >= 4.5
    assert wcag_contrast(style.MUTED_INK, style.BACKGROUND) >= 4.5


@pytest.mark.parametrize("vision", ["normal", *DICHROMAT])
def test_line_colours_stay_distinct_for_dichromats(vision):
    matrix = np.eye(3) if vision == "normal" else DICHROMAT[vision]
    seen = [lab(matrix @ srgb_to_linear(c)) for c in style.LINE_COLOURS]
    for (i, a), (j, b) in itertools.combinations(enumerate(seen), 2):
        delta_e = float(np.linalg.norm(a - b))  # CIE 1976 colour difference
        assert delta_e >= 10.0, f"{style.LINE_COLOURS[i]} vs {style.LINE_COLOURS[j]} under {vision}: {delta_e:.1f}"


def test_load_ramp_gets_darker_with_load():
    # a sequential scale must be monotonic in lightness (common practice)
    lightness = [lab(srgb_to_linear(c))[0] for c in plots.LOAD_RAMP]
    assert all(a > b for a, b in zip(lightness, lightness[1:]))


def test_new_figure_is_8_by_5_inches_at_110_dpi():
    fig, axes = style.new_figure()
    assert tuple(fig.get_size_inches()) == (8.0, 5.0) and fig.dpi == 110
    (ax,) = axes
    assert not ax.spines["top"].get_visible() and not ax.spines["right"].get_visible()
    assert all(line.get_visible() for line in ax.yaxis.get_gridlines())
    assert style.line_colour(len(style.LINE_COLOURS)) == style.line_colour(0)
