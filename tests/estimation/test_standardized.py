"""Arm means and the effect in standard-deviation units (estimation/standardized.py)."""

from __future__ import annotations

import math

import numpy as np
import pytest

from report_kit.estimation.standardized import blocks_left_out, hedges_correction, standardized_effect

# A hand computation from the published formulas (Cohen 1988 pooled SD; Hedges 1981, eq. 6b for
# J(m) = Gamma(m/2) / (sqrt(m/2) Gamma((m-1)/2)); Glass 1976 control-arm SD):
#   treated 5, 7, 9  -> mean 7, s1^2 = 4;   control 2, 4, 6, 8 -> mean 5, s0^2 = 20/3
#   pooled variance = (2*4 + 3*20/3) / 5 = 5.6, s_p = sqrt(5.6) = 2.366432
#   d = 2 / 2.366432 = 0.845154
#   J(5) = Gamma(2.5) / (sqrt(2.5) Gamma(2)) = (0.75 sqrt(pi)) / 1.581139 = 1.329340 / 1.581139 = 0.840749
#   g = 0.845154 * 0.840749 = 0.710562;  Glass's delta = 2 / sqrt(20/3) = 0.774597
Y = np.array([5, 7, 9, 2, 4, 6, 8], dtype=float)
Z = np.array([1, 1, 1, 0, 0, 0, 0])


@pytest.mark.parametrize(("method", "expected"), [("cohen_d", 0.845154), ("hedges_g", 0.710562),
                                                  ("glass_delta", 0.774597)])
def test_hand_computation(method, expected):
    out = standardized_effect(2.0, Y, Z, method=method)
    assert out.mean_treated == pytest.approx(7.0)
    assert out.mean_control == pytest.approx(5.0)
    assert out.std_effect == pytest.approx(expected, abs=5e-6)
    assert out.std_effect_method == method


def test_hedges_correction_against_gamma_and_the_published_approximation():
    # J(5) by hand above; Hedges (1981) approximation J(m) ~ 1 - 3/(4m - 1): its error shrinks like 1/m^2
    assert hedges_correction(5) == pytest.approx(0.840749, abs=5e-7)
    for m in (10, 40, 400, 10_000):
        assert abs(hedges_correction(m) - (1 - 3 / (4 * m - 1))) < 0.04 / m ** 2
    assert hedges_correction(8) == pytest.approx(math.gamma(4) / (math.sqrt(4) * math.gamma(3.5)))


def test_independent_numpy_computation_with_missing_outcomes():
    rng = np.random.default_rng(7)
    y = rng.normal(10, 3, 61)
    z = (rng.random(61) < 0.4).astype(int)
    y[[3, 9, 20]] = np.nan
    keep = ~np.isnan(y)
    y1, y0 = y[keep & (z == 1)], y[keep & (z == 0)]
    diff = y1.mean() - y0.mean()
    n1, n0 = y1.size, y0.size
    sp = np.sqrt(((n1 - 1) * y1.var(ddof=1) + (n0 - 1) * y0.var(ddof=1)) / (n1 + n0 - 2))
    m = n1 + n0 - 2
    j = math.gamma(m / 2) / (math.sqrt(m / 2) * math.gamma((m - 1) / 2))
    assert standardized_effect(diff, y, z).std_effect == pytest.approx(j * diff / sp, rel=1e-12)
    assert standardized_effect(diff, y, z, method="cohen_d").std_effect == pytest.approx(diff / sp, rel=1e-12)
    assert standardized_effect(diff, y, z, method="glass_delta").std_effect == pytest.approx(
        diff / y0.std(ddof=1), rel=1e-12)


def test_undefined_cases_are_none():
    assert standardized_effect(None, Y, Z).std_effect is None
    flat = standardized_effect(1.0, np.ones(6), np.array([1, 1, 1, 0, 0, 0]))
    assert flat.std_effect is None and flat.mean_treated == 1.0
    one_each = standardized_effect(1.0, np.array([1.0, 2.0]), np.array([1, 0]))
    assert one_each.std_effect is None


def test_misuse_raises():
    with pytest.raises(ValueError, match="`method` must be one of"):
        standardized_effect(1.0, Y, Z, method="cohens")
    with pytest.raises(ValueError, match="same length"):
        standardized_effect(1.0, Y, Z[:3])
    with pytest.raises(ValueError, match="only 0"):
        standardized_effect(1.0, Y, Z * 2)
    with pytest.raises(ValueError, match="`df` must be"):
        hedges_correction(1)


def test_blocks_left_out_counts_one_armed_blocks():
    y = np.array([1.0, 2.0, np.nan, 4.0, 5.0, 6.0])
    z = np.array([1, 0, 1, 0, 1, 1])
    block = np.array(["a", "a", "b", "b", "c", "c"])
    # block a has both arms; b's treated unit is missing -> control only; c is all treated
    assert blocks_left_out(y, z, block) == 2
    assert blocks_left_out(np.ones(4), np.array([1, 0, 1, 0]), np.array([1, 1, 2, 2])) == 0
