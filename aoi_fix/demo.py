"""The demo: an invented storyteller video watched by a simulated toddler.

A storyteller sits at a table and reads a picture book to the camera; the
eyes, mouth, body and book are AOIs that move from frame to frame, the book
turns and leaves the frame for a while.  A toddler's gaze is simulated on a
noisy 60 Hz tracker (:mod:`aoi_fix.simulate`, ``infant_60hz_noisy`` style),
all input files are written to the demo folder, and ``convert`` runs on them
exactly as a user would run it.  No real person's data is involved.
"""

from __future__ import annotations

from pathlib import Path

import pandas as pd

__all__ = ["run_demo"]


def run_demo(directory: str | Path, *, n_trials: int = 4, seed: int = 2026,
             fmt: str = "csv", plots: bool | None = None) -> dict:
    """Write the demo inputs to ``directory/inputs`` and convert them to ``directory/out``.

    Returns the ``convert`` tables plus ``paths`` (the input files).  QC
    figures are drawn when matplotlib is installed (``plots=None``) or asked for.
    """
    from . import simulate
    from .pipeline import convert

    directory = Path(directory)
    if plots is None:
        try:
            import matplotlib  # noqa: F401
            plots = True
        except ImportError:
            plots = False
    ses = simulate.simulate_session("infant_60hz_noisy", n_trials=n_trials, seed=seed)
    paths = simulate.write_session(ses, directory / "inputs")
    tables = convert(paths["samples"], study=paths["study"], trials=paths["trials"],
                     aois=paths["aois"], checks=paths.get("checks"),
                     out_dir=directory / "out", fmt=fmt, plots=plots)
    tables["paths"] = paths
    return tables


def demo_table(tables: dict) -> pd.DataFrame:
    """Per-trial percent of fixation time, one column per AOI (for printing)."""
    s = tables["aoi_summary"]
    wide = s.pivot_table(index="trial", columns="aoi", values="pct_fixation", sort=False)
    q = tables["trial_quality"].set_index("trial")
    wide["valid_fraction"] = q["valid_fraction"]
    wide["low_validity"] = q["flag_low_validity"]
    if "flag_drift" in q:
        wide["offset_deg"] = q["offset_deg"]
    return wide.round(2)
