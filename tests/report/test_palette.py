"""The report's colours stay apart for colour-blind readers and in greyscale print.

Method: each colour is converted to linear sRGB (IEC 61966-2-1), passed through the
Machado, Oliveira & Fernandes (2009) simulation matrices for protanopia, deuteranopia and
tritanopia at severity 1.0 (matrix entries from memory), converted to CIE L*a*b* (D65) and
compared by the CIE76 distance. Greyscale print is judged by the WCAG 2.1 relative luminance and
contrast ratio (W3C): between colours that must be told apart, and against the white page
(3:1 for graphical objects, WCAG 2.1 SC 1.4.11).
"""

from __future__ import annotations

import itertools

import numpy as np
import pytest

from report_kit.report.figures import ACCENT, INK
from report_kit.report.figures_checks import FLAG_TONES

SIMULATIONS = {   # Machado et al. (2009), severity 1.0 (from memory)
    "protanopia": [[0.152286, 1.052583, -0.204868], [0.114503, 0.786281, 0.099216],
                   [-0.003882, -0.048116, 1.051998]],
    "deuteranopia": [[0.367322, 0.860646, -0.227968], [0.280085, 0.672501, 0.047413],
                     [-0.011820, 0.042940, 0.968881]],
    "tritanopia": [[1.255528, -0.076749, -0.178779], [-0.078411, 0.930809, 0.147602],
                   [0.004733, 0.691367, 0.303900]],
    "typical": np.eye(3).tolist(),
}
#: Sets of colours a reader must tell apart in one figure.
GROUPS = {"estimates": (INK, ACCENT), "balance flags": tuple(FLAG_TONES.values())}


def linear(hex_colour: str) -> np.ndarray:
    c = np.array([int(hex_colour[i:i + 2], 16) for i in (1, 3, 5)]) / 255
    return np.where(c <= 0.04045, c / 12.92, ((c + 0.055) / 1.055) ** 2.4)


def luminance(rgb: np.ndarray) -> float:
    return float(rgb @ [0.2126, 0.7152, 0.0722])   # WCAG 2.1 relative luminance


def contrast(a: float, b: float) -> float:
    low, high = sorted((a, b))
    return (high + 0.05) / (low + 0.05)


def lab(rgb: np.ndarray) -> np.ndarray:
    xyz = np.array([[0.4124, 0.3576, 0.1805], [0.2126, 0.7152, 0.0722], [0.0193, 0.1192, 0.9505]]) @ rgb
    xyz = xyz / np.array([0.95047, 1.0, 1.08883])
    f = np.where(xyz > 0.008856, np.cbrt(xyz), 7.787 * xyz + 16 / 116)
    return np.array([116 * f[1] - 16, 500 * (f[0] - f[1]), 200 * (f[1] - f[2])])


def test_the_conversions_on_known_points():
    # sRGB white is L* = 100 and luminance 1; black has contrast 21:1 against white (WCAG 2.1)
    assert lab(linear("#ffffff"))[0] == pytest.approx(100, abs=0.05)
    assert contrast(luminance(linear("#000000")), 1.0) == pytest.approx(21.0)
    # the simulation matrices keep white white (each row sums to 1)
    for matrix in SIMULATIONS.values():
        assert np.asarray(matrix).sum(axis=1) == pytest.approx(np.ones(3), abs=1e-5)


@pytest.mark.parametrize("group", sorted(GROUPS))
@pytest.mark.parametrize("vision", sorted(SIMULATIONS))
def test_colours_stay_apart_under_colour_blindness(group, vision):
    matrix = np.asarray(SIMULATIONS[vision])
    for a, b in itertools.combinations(GROUPS[group], 2):
        seen_a = np.clip(matrix @ linear(a), 0, 1)
        seen_b = np.clip(matrix @ linear(b), 0, 1)
        assert np.linalg.norm(lab(seen_a) - lab(seen_b)) >= 30, (a, b)


@pytest.mark.parametrize("group", sorted(GROUPS))
def test_colours_stay_apart_in_greyscale_and_show_on_white(group):
    colours = GROUPS[group]
    for a, b in itertools.combinations(colours, 2):
        assert contrast(luminance(linear(a)), luminance(linear(b))) >= 1.5, (a, b)
    for colour in colours:
        assert contrast(luminance(linear(colour)), 1.0) >= 3.0, colour
