"""Screen pixels, millimetres and degrees of visual angle.

The eye sits ``distance_mm`` in front of the display centre, on the
perpendicular through it (common practice unless a study says otherwise).
Screen x grows to the right and y grows downwards, as in pixel coordinates.

References
----------
Size ``s`` at distance ``d`` subtends ``2 * atan(s / (2 d))`` (common
practice; 1 cm at 57 cm is about 1.005 deg, the "57 cm rule").
The angle between two gaze points is taken between their 3-D vectors from
the eye with ``atan2(|v1 x v2|, v1 . v2)``, which stays accurate for tiny
angles (standard vector geometry, from memory).
"""

from __future__ import annotations

from typing import TYPE_CHECKING

import numpy as np

if TYPE_CHECKING:  # pragma: no cover
    from .config import Display

__all__ = [
    "visual_angle_deg",
    "pixel_pitch_mm",
    "px_to_mm",
    "px_to_deg",
    "angle_between_deg",
    "deg_to_px",
    "deg_to_xy_px",
]


def visual_angle_deg(size_mm, distance_mm):
    """Visual angle subtended by a size centred on the line of sight.

    >>> round(float(visual_angle_deg(10.0, 570.0)), 3)
    1.005
    """
    size_mm = np.asarray(size_mm, dtype=float)
    return np.degrees(2.0 * np.arctan(size_mm / (2.0 * distance_mm)))


def pixel_pitch_mm(display: "Display") -> tuple[float, float]:
    """Horizontal and vertical size of one pixel in mm (pixels need not be square)."""
    return display.width_mm / display.width_px, display.height_mm / display.height_px


def px_to_mm(x_px, y_px, display: "Display"):
    """Offsets in mm from the display centre (x right, y down)."""
    px_w, px_h = pixel_pitch_mm(display)
    x_mm = (np.asarray(x_px, dtype=float) - display.width_px / 2.0) * px_w
    y_mm = (np.asarray(y_px, dtype=float) - display.height_px / 2.0) * px_h
    return x_mm, y_mm


def px_to_deg(x_px, y_px, display: "Display"):
    """Per-axis angular position (deg) of screen points seen from the eye.

    ``atan(offset_mm / distance_mm)`` along each axis: exact on the axes
    through the display centre, used for dispersion and velocity components.
    """
    x_mm, y_mm = px_to_mm(x_px, y_px, display)
    d = float(display.distance_mm)
    return np.degrees(np.arctan2(x_mm, d)), np.degrees(np.arctan2(y_mm, d))


def angle_between_deg(x1_px, y1_px, x2_px, y2_px, display: "Display"):
    """Angle (deg) between the lines of sight to two screen points.

    Vectorised; NaN in any coordinate gives NaN.
    """
    x1, y1 = px_to_mm(x1_px, y1_px, display)
    x2, y2 = px_to_mm(x2_px, y2_px, display)
    d = float(display.distance_mm)
    # cross product of (x1, y1, d) and (x2, y2, d)
    cx = y1 * d - d * y2
    cy = d * x2 - x1 * d
    cz = x1 * y2 - y1 * x2
    cross = np.sqrt(cx * cx + cy * cy + cz * cz)
    dot = x1 * x2 + y1 * y2 + d * d
    return np.degrees(np.arctan2(cross, dot))


def deg_to_px(angle_deg, display: "Display") -> tuple[float, float]:
    """Horizontal and vertical pixel extent of a visual angle at the display centre.

    Inverse of :func:`visual_angle_deg` for a size centred on the line of sight.
    """
    size_mm = 2.0 * display.distance_mm * np.tan(np.radians(np.asarray(angle_deg, float)) / 2.0)
    px_w, px_h = pixel_pitch_mm(display)
    return size_mm / px_w, size_mm / px_h


def deg_to_xy_px(ax_deg, ay_deg, display: "Display"):
    """Inverse of :func:`px_to_deg`: per-axis angles (deg) to screen px.

    >>> from aoi_fix.config import Display
    >>> d = Display(width_px=1000, height_px=800, width_mm=500.0, height_mm=400.0,
    ...             distance_mm=600.0)
    >>> ax, ay = px_to_deg(123.0, 456.0, d)
    >>> [round(float(v), 9) for v in deg_to_xy_px(ax, ay, d)]
    [123.0, 456.0]
    """
    px_w, px_h = pixel_pitch_mm(display)
    d = float(display.distance_mm)
    x_mm = d * np.tan(np.radians(np.asarray(ax_deg, dtype=float)))
    y_mm = d * np.tan(np.radians(np.asarray(ay_deg, dtype=float)))
    return x_mm / px_w + display.width_px / 2.0, y_mm / px_h + display.height_px / 2.0
