"""The whole jobs, as library functions the CLI calls: ``fixations`` and ``convert``."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd

from .config import Study, load_study
from .detect import detect_fixations
from .output import AtomicOutputs, table_suffix
from .samples import nominal_interval_ms, read_samples

__all__ = ["fixations_table", "fixations_from_file", "FIXATION_OUTPUT_COLUMNS"]

FIXATION_OUTPUT_COLUMNS = ["trial", "fixation", "onset_ms", "offset_ms", "duration_ms",
                           "x_px", "y_px", "aoi"]


def fixations_table(fixations: pd.DataFrame, *, trial=None, aoi=None) -> pd.DataFrame:
    """The public fixation table layout (``fixations.csv``).

    ``trial`` and ``aoi`` are empty (missing) unless given.
    """
    n = len(fixations)
    out = pd.DataFrame({
        "trial": pd.Series([pd.NA] * n if trial is None else trial, dtype="string"),
        "fixation": fixations["fixation"].to_numpy(dtype=np.int64),
        "onset_ms": fixations["onset_ms"].to_numpy(float),
        "offset_ms": fixations["offset_ms"].to_numpy(float),
        "duration_ms": fixations["duration_ms"].to_numpy(float),
        "x_px": fixations["x_px"].to_numpy(float),
        "y_px": fixations["y_px"].to_numpy(float),
        "aoi": pd.Series([pd.NA] * n if aoi is None else aoi, dtype="string"),
    })
    return out


def fixations_from_file(samples_path: str | Path, study: Study | str | Path, *,
                        overrides=(), out: str | Path | None = None,
                        fmt: str = "csv") -> pd.DataFrame:
    """Read one recording, detect fixations, optionally write them.

    Parameters
    ----------
    samples_path : path
        Raw sample file (delimited text, ``.gz`` or Parquet).
    study : Study or path
        The study, or a TOML study file to load (``overrides`` applied).
    out : path, optional
        Where to write the fixation table (atomically).
    fmt : {"csv", "parquet"}

    Returns
    -------
    DataFrame
        The fixation table in the ``fixations.csv`` layout.
    """
    if not isinstance(study, Study):
        study = load_study(study, overrides)
    samples = read_samples(samples_path, study.samples, study.display)
    interval = nominal_interval_ms(samples["t_ms"].to_numpy(float), study.samples.rate_hz)
    fix = detect_fixations(samples, display=study.display, detection=study.detection,
                           interval_ms=interval)
    table = fixations_table(fix)
    table.attrs.update(fix.attrs)
    if out is not None:
        with AtomicOutputs() as w:
            w.table(table, out, fmt)
    return table
