"""aoi_fix: raw gaze samples to fixations, moving-AOI hits and per-trial tables.

A research tool, not a diagnostic device. The public API is loaded lazily so that
``aoi-fix --version`` starts fast.  Whole jobs beyond ``convert`` live in their
modules: ``aoi_fix.sweep.sweep`` and ``aoi_fix.batch.batch``.
"""

from __future__ import annotations

import importlib
import os

# Arrow's allocator (mimalloc) keeps freed pages for a while; the CSV parse
# frees ~40 MB per million samples just before the numpy stages need fresh
# memory, so handing pages back at once lowers convert's peak by about a sixth
# and saves the page faults (benchmarks/run.py).  Only when aoi_fix is imported
# before pyarrow (the CLI is), and never over a value the user set.
os.environ.setdefault("MIMALLOC_PURGE_DELAY", "0")

__version__ = "0.1.0"

_EXPORTS = {
    "load_study": "config", "study_from_dict": "config", "Study": "config",
    "read_samples": "samples", "fill_gaps": "clean",
    "ivt": "detect", "idt": "detect", "merge_and_discard": "detect",
    "detect_fixations": "detect",
    "fixations_from_file": "pipeline", "convert": "pipeline", "load_session": "pipeline",
    "run_demo": "demo", "ivt_pursuit": "pursuit", "check_aois": "aoicheck",
    "read_bids_samples": "bids",
    "AoiFixError": "errors", "InputFormatError": "errors", "ConfigError": "errors",
    "UsageError": "errors", "NoValidSamplesError": "errors", "OutputError": "errors",
}

__all__ = ["__version__", *_EXPORTS]


def __getattr__(name: str):
    if name in _EXPORTS:
        module = importlib.import_module(f".{_EXPORTS[name]}", __name__)
        return getattr(module, name)
    raise AttributeError(f"module 'aoi_fix' has no attribute {name!r}")


def __dir__():
    return sorted(__all__)
