"""Data quality at calibration-check targets, the drift model, and trial flags.

Measures (Holmqvist, Nyström & Mulvey 2012):

accuracy
    angular offset between a check target and the gaze of the fixation that
    best matches it (below), with its horizontal and vertical components
    (per-axis visual angles, gaze minus target; positive = right / down);
precision
    RMS of the angles between successive valid samples of that fixation
    inside the check window (RMS-S2S), and the STD of their positions,
    ``sqrt(var_x + var_y)`` in per-axis degrees; for white noise
    RMS-S2S / STD = sqrt(2) (Niehorster et al. 2020);
data loss
    share of the window's samples without a valid raw position.

Choosing the check's fixation: among the fixations that overlap the check
window and lie within ``[quality] check_max_offset_deg`` of the target, the
one with the most time inside the window (ties: the closest to the target).
A check without such a fixation is reported with ``status = "no fixation"``
(or ``"no data"`` when no sample in the window is valid), never dropped.

Drift model: the per-axis angular offset (gaze minus target, deg) of each
usable check, placed at the check's mid-time, linearly interpolated in time
between checks and held constant before the first and after the last.  A
trial's ``offset_deg`` is the size of the modelled offset at the trial's
mid-time, as a visual angle from the display centre.

References
----------
Holmqvist, K., Nyström, M., & Mulvey, F. (2012). Eye tracker data quality:
what it is and how to measure it. Proc. ETRA 2012, 45-52.
Niehorster, D. C., Zemblys, R., Beelders, T., & Holmqvist, K. (2020).
Characterizing gaze position signals and synthesizing noise during fixations
in eye-tracking data. Behavior Research Methods, 52, 2515-2534.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd

from . import geometry
from .errors import InputFormatError, where

__all__ = ["read_checks", "check_quality", "drift_model", "correct_positions", "trial_drift",
           "precision_deg"]

CHECK_COLUMNS = ("onset", "offset", "x_px", "y_px")


def read_checks(path, *, study, samples: pd.DataFrame | None = None) -> pd.DataFrame:
    """Read a calibration-check table: ``onset, offset, x_px, y_px``.

    Times are in the samples' time unit on the recording clock; targets in
    display px.  Returns ``check`` (1-based, time order), ``onset_ms``,
    ``offset_ms``, ``x_px``, ``y_px``.

    Raises
    ------
    InputFormatError
        Text or non-finite numbers, offset <= onset, overlapping checks, a
        target outside the display, a check outside the recording.
    """
    from .samples import TIME_SCALE_MS
    from .trials import _missing_columns, _read_rows

    path = Path(path)
    header, header_line, rows = _read_rows(path, "check")
    _missing_columns(path, header, CHECK_COLUMNS, header_line)
    col = {c: header.index(c) for c in CHECK_COLUMNS}
    factor = TIME_SCALE_MS[study.samples.time_unit]
    disp = study.display
    recs = []
    for line, cells in rows:
        vals = {}
        for c in CHECK_COLUMNS:
            text = cells[col[c]].strip() if col[c] < len(cells) else ""
            try:
                v = float(text)
            except ValueError:
                v = float("nan")
            if not np.isfinite(v):
                raise InputFormatError(f"{where(path, row=line, column=c)}: found {text!r}, "
                                       "expected a finite number")
            vals[c] = v
        if vals["offset"] <= vals["onset"]:
            raise InputFormatError(f"{where(path, row=line, column='offset')}: found "
                                   f"{vals['offset']:.12g} <= onset {vals['onset']:.12g}; "
                                   "expected offset after onset")
        for c, size in (("x_px", disp.width_px), ("y_px", disp.height_px)):
            if not 0 <= vals[c] <= size:
                raise InputFormatError(
                    f"{where(path, row=line, column=c)}: found {vals[c]:g}, a target off the "
                    f"display; expected 0..{size} px")
        recs.append((line, vals["onset"] * factor, vals["offset"] * factor,
                     vals["x_px"], vals["y_px"]))
    if not recs:
        raise InputFormatError(f"{path}: no check rows after the header; expected one row "
                               "per check target (or leave out --checks)")
    df = pd.DataFrame(recs, columns=["line", "onset_ms", "offset_ms", "x_px", "y_px"])
    df = df.sort_values("onset_ms", kind="stable").reset_index(drop=True)
    over = df["onset_ms"].to_numpy()[1:] < df["offset_ms"].to_numpy()[:-1]
    if over.any():
        i = int(np.argmax(over))
        a, b = df["line"].iat[i], df["line"].iat[i + 1]
        raise InputFormatError(f"{path}: rows {a} and {b}: checks overlap in time; expected "
                               "one check at a time")
    if samples is not None and len(samples):
        t0, t1 = float(samples["t_ms"].iat[0]), float(samples["t_ms"].iat[-1])
        out = (df["offset_ms"] <= t0) | (df["onset_ms"] > t1)
        if out.any():
            i = int(np.argmax(out.to_numpy()))
            raise InputFormatError(
                f"{where(path, row=int(df['line'].iat[i]))}: check "
                f"{df['onset_ms'].iat[i] / factor:.12g}.."
                f"{df['offset_ms'].iat[i] / factor:.12g} lies "
                "outside the recording; expected times on the samples' clock and unit")
    df.insert(0, "check", np.arange(1, len(df) + 1, dtype=np.int64))
    return df.drop(columns="line")


def precision_deg(x_px: np.ndarray, y_px: np.ndarray, display) -> tuple[float, float]:
    """RMS of sample-to-sample angles and STD of positions (deg) of one stretch.

    >>> from aoi_fix.config import Display
    >>> d = Display(width_px=1000, height_px=1000, width_mm=1000.0, height_mm=1000.0,
    ...             distance_mm=1000.0)
    >>> rms, std = precision_deg(np.array([500.0, 500.0]), np.array([500.0, 500.0]), d)
    >>> rms, std
    (0.0, 0.0)
    """
    ok = np.isfinite(x_px) & np.isfinite(y_px)
    x, y = x_px[ok], y_px[ok]
    if len(x) < 2:
        return float("nan"), float("nan")
    theta = geometry.angle_between_deg(x[:-1], y[:-1], x[1:], y[1:], display)
    rms = float(np.sqrt(np.mean(theta ** 2)))
    ax, ay = geometry.px_to_deg(x, y, display)
    std = float(np.sqrt(np.var(ax) + np.var(ay)))
    return rms, std


def check_quality(checks: pd.DataFrame, samples: pd.DataFrame, fixations: pd.DataFrame, *,
                  display, max_offset_deg: float = 5.0) -> pd.DataFrame:
    """Accuracy, precision and data loss at each check target (one row per check).

    ``fixations`` is the detector's table (with ``start_row``/``end_row``).
    """
    t = samples["t_ms"].to_numpy(float)
    x = samples["x_px"].to_numpy(float)
    y = samples["y_px"].to_numpy(float)
    valid = samples["valid"].to_numpy(bool)
    f_on = fixations["onset_ms"].to_numpy(float)
    f_off = fixations["offset_ms"].to_numpy(float)
    fx = fixations["x_px"].to_numpy(float)
    fy = fixations["y_px"].to_numpy(float)
    f_start = fixations["start_row"].to_numpy(np.int64)
    f_end = fixations["end_row"].to_numpy(np.int64)
    f_number = fixations["fixation"].to_numpy(np.int64)
    # the fixations overlapping each check in time: a range of the table when it is in
    # time order (every detector's is), so each check looks at a few fixations only
    c_on = checks["onset_ms"].to_numpy(float)
    c_off = checks["offset_ms"].to_numpy(float)
    if len(f_on) < 2 or (bool(np.all(np.diff(f_on) >= 0)) and bool(np.all(np.diff(f_off) >= 0))):
        f_lo = np.searchsorted(f_off, c_on, side="right")
        f_hi = np.searchsorted(f_on, c_off, side="left")
    else:
        f_lo = np.zeros(len(checks), dtype=np.int64)
        f_hi = np.full(len(checks), len(f_on), dtype=np.int64)
    s_a = np.searchsorted(t, c_on, side="left")
    s_b = np.searchsorted(t, c_off, side="left")
    rows = []
    for k, r in enumerate(checks.itertuples(index=False)):  # a loop over checks
        a, b = int(s_a[k]), int(s_b[k])
        n = int(b - a)
        loss = float(1.0 - valid[a:b].mean()) if n else float("nan")
        rec = {"check": r.check, "onset_ms": r.onset_ms, "offset_ms": r.offset_ms,
               "target_x_px": r.x_px, "target_y_px": r.y_px, "n_samples": n,
               "data_loss": loss, "fixation": pd.NA, "gaze_x_px": np.nan, "gaze_y_px": np.nan,
               "accuracy_deg": np.nan, "offset_x_deg": np.nan, "offset_y_deg": np.nan,
               "precision_rms_deg": np.nan, "precision_std_deg": np.nan,
               "status": "no data" if n == 0 or loss == 1.0 else "no fixation"}
        lo, hi = int(f_lo[k]), max(int(f_hi[k]), int(f_lo[k]))
        overlap = np.minimum(f_off[lo:hi], r.offset_ms) - np.maximum(f_on[lo:hi], r.onset_ms)
        dist = geometry.angle_between_deg(fx[lo:hi], fy[lo:hi], r.x_px, r.y_px, display)
        cand = np.flatnonzero((overlap > 0) & (dist <= max_offset_deg))
        if len(cand) and rec["status"] != "no data":
            best = lo + cand[np.lexsort((dist[cand], -overlap[cand]))[0]]
            s0 = max(int(f_start[best]), a)
            s1 = min(int(f_end[best]), b)
            use = valid[s0:s1]
            gx, gy = x[s0:s1][use], y[s0:s1][use]
            if len(gx):
                mx, my = float(gx.mean()), float(gy.mean())
                axg, ayg = geometry.px_to_deg(mx, my, display)
                axt, ayt = geometry.px_to_deg(r.x_px, r.y_px, display)
                rms, std = precision_deg(gx, gy, display)
                rec.update(fixation=int(f_number[best]), gaze_x_px=mx,
                           gaze_y_px=my,
                           accuracy_deg=float(geometry.angle_between_deg(mx, my, r.x_px, r.y_px,
                                                                         display)),
                           offset_x_deg=float(axg - axt), offset_y_deg=float(ayg - ayt),
                           precision_rms_deg=rms, precision_std_deg=std, status="ok")
        rows.append(rec)
    out = pd.DataFrame(rows, columns=[
        "check", "onset_ms", "offset_ms", "target_x_px", "target_y_px", "n_samples",
        "data_loss", "fixation", "gaze_x_px", "gaze_y_px", "accuracy_deg", "offset_x_deg",
        "offset_y_deg", "precision_rms_deg", "precision_std_deg", "status"])
    out["fixation"] = out["fixation"].astype("Int64")
    out["n_samples"] = out["n_samples"].astype("int64")
    return out


def drift_model(check_table: pd.DataFrame):
    """The drift model as a function ``t_ms -> (dx_deg, dy_deg)`` (None without usable checks).

    Per-axis angular offsets (gaze minus target) at check mid-times,
    interpolated linearly between checks and held at the ends.  Offsets are
    modelled in degrees, not pixels: a fixed angular error covers more pixels
    away from the display centre.
    """
    ok = check_table["status"].to_numpy() == "ok"
    if not ok.any():
        return None
    tc = ((check_table["onset_ms"] + check_table["offset_ms"]) / 2.0).to_numpy(float)[ok]
    dx = check_table["offset_x_deg"].to_numpy(float)[ok]
    dy = check_table["offset_y_deg"].to_numpy(float)[ok]

    def offset_at(t_ms):
        t_ms = np.asarray(t_ms, dtype=float)
        return np.interp(t_ms, tc, dx), np.interp(t_ms, tc, dy)

    return offset_at


def correct_positions(x_px, y_px, t_ms, model, display):
    """Subtract the modelled per-axis angular offset from gaze positions (px in, px out)."""
    ax, ay = geometry.px_to_deg(x_px, y_px, display)
    dx, dy = model(t_ms)
    return geometry.deg_to_xy_px(ax - dx, ay - dy, display)


def trial_drift(trials: pd.DataFrame, check_table: pd.DataFrame | None, *, display,
                max_offset_deg: float) -> pd.DataFrame:
    """Per-trial calibration columns: offset_deg, accuracy_deg, precision_rms_deg, flag_drift.

    Empty (missing) when there are no usable checks.
    """
    n = len(trials)
    mid = ((trials["start_ms"] + trials["end_ms"]) / 2.0).to_numpy(float)
    out = pd.DataFrame({"offset_deg": np.full(n, np.nan), "accuracy_deg": np.full(n, np.nan),
                        "precision_rms_deg": np.full(n, np.nan),
                        "flag_drift": pd.array([pd.NA] * n, dtype="boolean")})
    if check_table is None:
        return out
    model = drift_model(check_table)
    if model is None:
        return out
    dx, dy = model(mid)
    cx, cy = display.width_px / 2.0, display.height_px / 2.0
    px, py = geometry.deg_to_xy_px(dx, dy, display)
    off = geometry.angle_between_deg(cx, cy, px, py, display)
    ok = check_table[check_table["status"] == "ok"]
    tc = ((ok["onset_ms"] + ok["offset_ms"]) / 2.0).to_numpy(float)
    nearest = np.abs(mid[:, None] - tc[None, :]).argmin(axis=1)
    out["offset_deg"] = off
    out["accuracy_deg"] = ok["accuracy_deg"].to_numpy(float)[nearest]
    out["precision_rms_deg"] = ok["precision_rms_deg"].to_numpy(float)[nearest]
    out["flag_drift"] = pd.array(off > max_offset_deg, dtype="boolean")
    return out
