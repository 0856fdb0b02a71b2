"""``python -m aoi_fix``."""

from .cli import run

run()
