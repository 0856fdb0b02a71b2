"""Tests for aoi_fix.geometry: pixels, millimetres and degrees of visual angle.

Expected values are worked out here from plane geometry with the standard
library (``math``, ``fractions``), never from the code under test.
"""

from __future__ import annotations

import math
from fractions import Fraction

import numpy as np
import pytest

from aoi_fix import geometry
from aoi_fix.config import Display

# An invented 24-inch-like display: 1920 x 1080 px, 531.36 x 298.89 mm, eye at 600 mm.
DISPLAY = Display(width_px=1920, height_px=1080, width_mm=531.36, height_mm=298.89,
                  distance_mm=600.0)
CX, CY = DISPLAY.width_px / 2, DISPLAY.height_px / 2


def _mm(x_px, y_px, display=DISPLAY):
    """Offset of a pixel from the display centre in mm (plain arithmetic, square or not)."""
    return ((x_px - display.width_px / 2) * display.width_mm / display.width_px,
            (y_px - display.height_px / 2) * display.height_mm / display.height_px)


# --------------------------------------------------------------------------- visual angle

def test_57_cm_rule():
    # "57 cm rule" (common practice; REFERENCES.md): 1 cm at 57 cm subtends about 1 deg;
    # the exact value from 2*atan(s/2d) is 1.00511... deg.
    expected = math.degrees(2 * math.atan(10.0 / (2 * 570.0)))
    assert float(geometry.visual_angle_deg(10.0, 570.0)) == pytest.approx(expected, rel=1e-12)
    assert float(geometry.visual_angle_deg(10.0, 570.0)) == pytest.approx(1.005, abs=5e-4)


def test_visual_angle_is_vectorised():
    sizes = np.array([0.0, 10.0, 100.0])
    got = geometry.visual_angle_deg(sizes, 570.0)
    expected = [math.degrees(2 * math.atan(s / 1140.0)) for s in sizes]  # 2*atan(s/2d)
    np.testing.assert_allclose(got, expected, rtol=1e-12)
    assert got[0] == 0.0


def test_pixel_pitch_and_px_to_mm():
    # pixel pitch = width_mm / width_px (REFERENCES.md: do not assume square pixels)
    pw, ph = geometry.pixel_pitch_mm(DISPLAY)
    assert pw == pytest.approx(531.36 / 1920)
    assert ph == pytest.approx(298.89 / 1080)
    x_mm, y_mm = geometry.px_to_mm(np.array([CX, 0.0]), np.array([CY, 0.0]), DISPLAY)
    np.testing.assert_allclose(x_mm, [0.0, -531.36 / 2], atol=1e-12)
    np.testing.assert_allclose(y_mm, [0.0, -298.89 / 2], atol=1e-12)


def test_px_to_deg_on_axes_is_atan_of_offset():
    # On the axes through the centre the per-axis angle is atan(offset/d) (plane geometry).
    x_px = np.array([CX + 300.0, CX - 50.0])
    ax, ay = geometry.px_to_deg(x_px, np.array([CY, CY]), DISPLAY)
    x_mm = (x_px - CX) * 531.36 / 1920
    np.testing.assert_allclose(ax, np.degrees(np.arctan(x_mm / 600.0)), rtol=1e-12)
    np.testing.assert_allclose(ay, [0.0, 0.0], atol=1e-12)


# --------------------------------------------------------------------------- angle between

def test_angle_matches_small_angle_approximation_near_centre():
    # Small-angle approximation (common practice): theta ~ s / d radians for a short
    # displacement s centred on the line of sight. Must agree within 0.1 %.
    for dx_px in (1.0, 5.0, 20.0):
        got = float(geometry.angle_between_deg(CX - dx_px / 2, CY, CX + dx_px / 2, CY,
                                               DISPLAY))
        s_mm = dx_px * 531.36 / 1920
        approx = math.degrees(s_mm / 600.0)
        assert got == pytest.approx(approx, rel=1e-3)


def test_angle_per_pixel_smaller_off_centre():
    # REFERENCES.md (standard geometry): a fixed on-screen displacement subtends a smaller
    # angle far from the line of sight than at the centre.
    centre = float(geometry.angle_between_deg(CX, CY, CX + 10, CY, DISPLAY))
    edge = float(geometry.angle_between_deg(1900.0, CY, 1910.0, CY, DISPLAY))
    corner = float(geometry.angle_between_deg(1900.0, 1070.0, 1910.0, 1070.0, DISPLAY))
    assert edge < centre
    assert corner < centre
    # Along the horizontal axis the exact value is atan(x2/d) - atan(x1/d).
    x1, _ = _mm(1900.0, CY)
    x2, _ = _mm(1910.0, CY)
    assert edge == pytest.approx(math.degrees(math.atan(x2 / 600) - math.atan(x1 / 600)),
                                 rel=1e-9)


def test_angle_symmetric_and_zero_for_identical_points():
    rng = np.random.default_rng(1)
    x1, y1, x2, y2 = (rng.uniform(-200, 2100, 200) for _ in range(4))
    a = geometry.angle_between_deg(x1, y1, x2, y2, DISPLAY)
    b = geometry.angle_between_deg(x2, y2, x1, y1, DISPLAY)
    np.testing.assert_allclose(a, b, rtol=1e-13, atol=0)
    assert np.all(a >= 0)
    same = geometry.angle_between_deg(x1, y1, x1, y1, DISPLAY)
    assert np.all(same == 0.0)


def test_angle_between_nan_propagates():
    # shapely-style contract (STYLE.md): NaN propagates instead of raising.
    got = geometry.angle_between_deg(np.array([np.nan, 100.0, 100.0, 100.0]),
                                     np.array([10.0, np.nan, 10.0, 10.0]),
                                     np.array([20.0, 20.0, np.nan, 20.0]),
                                     np.array([20.0, 20.0, 20.0, 20.0]), DISPLAY)
    assert np.isnan(got[:3]).all()
    assert np.isfinite(got[3])


def _exact_reference_deg(x1_px, y1_px, x2_px, y2_px, display):
    """Angle between lines of sight, arccos-free and with exact intermediate arithmetic.

    The 3-D vectors from the eye, (x_mm, y_mm, d), are built with Fractions from the
    exact binary values of the inputs; |v1 x v2|^2 and v1 . v2 are then exact rationals,
    and theta = atan2(sqrt(|v1 x v2|^2), v1 . v2) (standard vector geometry, from memory)
    rounds only in the last three operations.
    """
    def mm(v, n_px, size_mm):
        return (Fraction(v) - Fraction(n_px, 2)) * Fraction(size_mm) / n_px

    a = (mm(x1_px, display.width_px, display.width_mm),
         mm(y1_px, display.height_px, display.height_mm), Fraction(display.distance_mm))
    b = (mm(x2_px, display.width_px, display.width_mm),
         mm(y2_px, display.height_px, display.height_mm), Fraction(display.distance_mm))
    cross = (a[1] * b[2] - a[2] * b[1], a[2] * b[0] - a[0] * b[2], a[0] * b[1] - a[1] * b[0])
    cross2 = sum(c * c for c in cross)
    dot = sum(p * q for p, q in zip(a, b))
    return math.degrees(math.atan2(math.sqrt(float(cross2)), float(dot)))


@pytest.mark.parametrize("delta_px", [1e-1, 1e-3, 1e-5])
@pytest.mark.parametrize("where", [(CX, CY), (300.0, 900.0), (1850.0, 60.0)])
def test_tiny_angles_accurate(delta_px, where):
    x1, y1 = where
    x2, y2 = x1 + delta_px, y1 - 0.5 * delta_px
    got = float(geometry.angle_between_deg(x1, y1, x2, y2, DISPLAY))
    ref = _exact_reference_deg(x1, y1, x2, y2, DISPLAY)
    assert ref > 0
    # arccos of the normalised dot product cannot resolve angles below ~1e-6 deg; the
    # atan2 form must stay within a tiny relative error of the exact reference.
    assert got == pytest.approx(ref, rel=1e-7)


def test_large_angle_matches_exact_reference():
    got = float(geometry.angle_between_deg(0.0, 0.0, 1920.0, 1080.0, DISPLAY))
    assert got == pytest.approx(_exact_reference_deg(0.0, 0.0, 1920.0, 1080.0, DISPLAY),
                                rel=1e-12)


# --------------------------------------------------------------------------- non-square pixels

NONSQUARE = Display(width_px=1000, height_px=1000, width_mm=500.0, height_mm=250.0,
                    distance_mm=500.0)


def test_non_square_pixels():
    # 100 px to the right is 50 mm; 100 px down is 25 mm (pitch 0.5 vs 0.25 mm).
    assert geometry.pixel_pitch_mm(NONSQUARE) == (0.5, 0.25)
    h = float(geometry.angle_between_deg(500, 500, 600, 500, NONSQUARE))
    v = float(geometry.angle_between_deg(500, 500, 500, 600, NONSQUARE))
    assert h == pytest.approx(math.degrees(math.atan(50 / 500)), rel=1e-12)
    assert v == pytest.approx(math.degrees(math.atan(25 / 500)), rel=1e-12)
    ax, ay = geometry.px_to_deg(600.0, 600.0, NONSQUARE)
    assert float(ax) == pytest.approx(math.degrees(math.atan(50 / 500)), rel=1e-12)
    assert float(ay) == pytest.approx(math.degrees(math.atan(25 / 500)), rel=1e-12)
    w, hh = geometry.deg_to_px(math.degrees(2 * math.atan(25 / 500)), NONSQUARE)
    assert float(w) == pytest.approx(100.0)   # 50 mm at 0.5 mm/px
    assert float(hh) == pytest.approx(200.0)  # 50 mm at 0.25 mm/px


# --------------------------------------------------------------------------- deg_to_px

@pytest.mark.parametrize("angle", [0.1, 1.0, 2.5, 10.0, 30.0])
def test_deg_to_px_inverts_visual_angle(angle):
    w_px, h_px = geometry.deg_to_px(angle, DISPLAY)
    pw, ph = 531.36 / 1920, 298.89 / 1080
    assert float(geometry.visual_angle_deg(float(w_px) * pw, DISPLAY.distance_mm)) == \
        pytest.approx(angle, rel=1e-12)
    assert float(geometry.visual_angle_deg(float(h_px) * ph, DISPLAY.distance_mm)) == \
        pytest.approx(angle, rel=1e-12)
    # and directly from the formula: size = 2 d tan(angle/2)
    assert float(w_px) == pytest.approx(2 * 600 * math.tan(math.radians(angle) / 2) / pw,
                                        rel=1e-12)


def test_deg_to_px_of_57cm_rule():
    d = Display(width_px=1000, height_px=1000, width_mm=1000.0, height_mm=1000.0,
                distance_mm=570.0)
    w, h = geometry.deg_to_px(math.degrees(2 * math.atan(10 / 1140)), d)
    assert float(w) == pytest.approx(10.0) and float(h) == pytest.approx(10.0)  # 1 mm/px
