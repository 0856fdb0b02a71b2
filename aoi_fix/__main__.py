"""``python -m aoi_fix``."""

from .cli import main

main()
