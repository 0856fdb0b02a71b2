"""aoi_fix: raw gaze samples to fixations, moving-AOI hits and per-trial tables.

A research tool, not a diagnostic device.
"""

__version__ = "0.1.0"

__all__ = ["__version__"]
