"""Trials: when each video played, where it was drawn, and which frame was up.

A trial table says, for every trial, which stimulus (video) was shown, from
when to when on the recording clock, and where on the display the video was
drawn.  From it this module finds the trial of every gaze sample, the video
frame on screen at that moment, and the sample's position in video pixels.

Conventions
-----------
* Times are float ms on the recording clock.  A trial covers the half-open
  interval ``start_ms <= t < end_ms``; two trials may touch (one ends where
  the next starts) but not overlap.
* Pixel coordinates are continuous: ``(0, 0)`` is the top-left corner of the
  top-left pixel, x grows to the right and y downwards, on the display and in
  the video alike.
* Frame ``k`` (0-based) is on screen from ``start_ms + k * 1000 / fps`` up to
  the next frame; the first frame is shown at trial start (common practice
  for video playback logs that mark the first frame).
* Error messages give the line number in the file, the header being row 1
  (so the first data row is row 2; blank lines count as lines).
"""

from __future__ import annotations

import csv
import io
import math
from pathlib import Path
from typing import Mapping

import numpy as np
import pandas as pd

from .config import Stimulus, Study
from .errors import ConfigError, InputFormatError, read_text, where

__all__ = [
    "TIME_UNIT_TO_MS",
    "TRIAL_COLUMNS",
    "read_trials",
    "placement_sorted",
    "fit_video",
    "assign_trials",
    "frame_index",
    "frame_count",
    "screen_to_video",
    "on_video",
]

#: Factor from each supported time unit to milliseconds.
TIME_UNIT_TO_MS: dict[str, float] = {"s": 1e3, "ms": 1.0, "us": 1e-3, "ns": 1e-6}

#: Columns of the table returned by :func:`read_trials`, in order.
TRIAL_COLUMNS = ("trial", "stimulus", "start_ms", "end_ms",
                 "media_x_px", "media_y_px", "media_width_px", "media_height_px")

_REQUIRED = ("trial", "stimulus", "start", "end")
_MEDIA = ("media_x_px", "media_y_px", "media_width_px", "media_height_px")

# Tolerance (in frames) that absorbs float rounding when a sample time falls
# on a frame boundary, e.g. (1000 / 30) * 30 / 1000.
_FRAME_EPS = 1e-9


# --------------------------------------------------------------------------- reading

def _read_rows(path: Path, what: str) -> tuple[list[str], int, list[tuple[int, list[str]]]]:
    """Header cells, header line and non-blank data rows with their line numbers.

    Shared by the trial and AOI readers.  Line numbers count every line of
    the file from 1 (blank lines included), so they match a text editor.
    """
    text = read_text(path, what=f"{what} file", expected=f"a {what} CSV file")
    reader = csv.reader(io.StringIO(text, newline=""))
    header: list[str] | None = None
    header_line = 1
    rows: list[tuple[int, list[str]]] = []
    try:
        for cells in reader:
            if not any(c.strip() for c in cells):
                continue
            if header is None:
                header = [c.strip() for c in cells]
                header_line = reader.line_num
            else:
                rows.append((reader.line_num, cells))
    except csv.Error as e:
        raise InputFormatError(f"{where(path, row=reader.line_num)}: {e}") from None
    if header is None:
        raise InputFormatError(f"{path}: empty file, expected a header row and {what} rows")
    seen: set[str] = set()
    for name in header:
        if name and name in seen:
            raise InputFormatError(f"{where(path, row=header_line, column=name)}: "
                                   "found the column twice, expected unique column names")
        seen.add(name)
    return header, header_line, rows


def _missing_columns(path: Path, header: list[str], required, line: int = 1) -> None:
    missing = [c for c in required if c not in header]
    if missing:
        hint = ""
        if len(header) == 1 and any(d in header[0] for d in ";\t|"):
            hint = " (the file must be comma-separated)"
        raise InputFormatError(
            f"{where(path, row=line)}: missing column(s) {', '.join(map(repr, missing))}; "
            f"found {', '.join(map(repr, header))}{hint}")


def _parse_time_ms(text: str, factor: float) -> float:
    """Exact for integer counts (e.g. ns since an epoch), float otherwise."""
    text = text.strip()
    try:
        return int(text) * factor if factor >= 1 else int(text) / round(1 / factor)
    except ValueError:
        return float(text) * factor


def fit_video(video_width_px, video_height_px, display_width_px, display_height_px):
    """Centre a video on the display, scaled to fit with its aspect ratio kept.

    Parameters
    ----------
    video_width_px, video_height_px : float or array_like
        Size of the video frame.
    display_width_px, display_height_px : float
        Size of the display.

    Returns
    -------
    x_px, y_px, width_px, height_px : float or ndarray
        Top-left corner and size of the drawn video on the display.

    Examples
    --------
    A 4:3 video on a 16:9 display gets bars left and right:

    >>> [float(v) for v in fit_video(640, 480, 1920, 1080)]
    [240.0, 0.0, 1440.0, 1080.0]
    """
    vw = np.asarray(video_width_px, dtype=float)
    vh = np.asarray(video_height_px, dtype=float)
    scale = np.minimum(display_width_px / vw, display_height_px / vh)
    w, h = vw * scale, vh * scale
    return (display_width_px - w) / 2.0, (display_height_px - h) / 2.0, w, h


def read_trials(path, *, study: Study, time_unit: str | None = None) -> pd.DataFrame:
    """Read a trial table: which video played when, and where on the display.

    Parameters
    ----------
    path : str or Path
        Comma-separated UTF-8 text (a byte-order mark, CRLF line ends and
        blank lines are accepted) with the columns ``trial``, ``stimulus``,
        ``start`` and ``end``, and optionally all four of ``media_x_px``,
        ``media_y_px``, ``media_width_px`` and ``media_height_px``: the
        top-left corner and size of the drawn video in display pixels.  A row
        whose four media cells are empty, like a file without those columns,
        gets the video centred and scaled to fit the display with its aspect
        ratio kept (:func:`fit_video`).  Other columns are ignored.
    study : Study
        Gives the display size and, per ``[stimuli.NAME]``, the video size.
    time_unit : {"s", "ms", "us", "ns"}, optional
        Unit of ``start`` and ``end`` on the recording clock; default: the
        study's ``samples.time_unit``, because trial times share the sample
        clock.

    Returns
    -------
    pandas.DataFrame
        Columns ``trial`` (str), ``stimulus`` (str), ``start_ms``,
        ``end_ms``, ``media_x_px``, ``media_y_px``, ``media_width_px``,
        ``media_height_px`` (float), sorted by ``start_ms``, with a fresh
        0-based index (the "trial row" used by :func:`assign_trials`).

    Raises
    ------
    InputFormatError
        One line naming the file, the row (line number in the file, header
        = row 1) and column: a missing file or column, no trial rows, a
        non-numeric or non-finite time, ``end <= start``, overlapping
        trials (both named), a repeated trial id, a stimulus without a
        ``[stimuli.NAME]`` entry, half-given or non-positive media size.
    ConfigError
        An unknown ``time_unit``.
    """
    path = Path(path)
    unit = study.samples.time_unit if time_unit is None else time_unit
    if unit not in TIME_UNIT_TO_MS:
        raise ConfigError(f"time unit {unit!r} is unknown; expected one of "
                          + ", ".join(TIME_UNIT_TO_MS))
    factor = TIME_UNIT_TO_MS[unit]
    header, header_line, rows = _read_rows(path, "trial")
    _missing_columns(path, header, _REQUIRED, header_line)
    has_media = [c for c in _MEDIA if c in header]
    if has_media and len(has_media) < 4:
        _missing_columns(path, header, _MEDIA, header_line)
    if not rows:
        raise InputFormatError(f"{path}: no trial rows after the header; expected one row "
                               "per trial")
    col = {name: header.index(name) for name in header if name}
    disp = study.display

    def cell(cells: list[str], name: str) -> str:
        i = col[name]
        return cells[i].strip() if i < len(cells) else ""

    out: dict[str, list] = {c: [] for c in TRIAL_COLUMNS}
    lines: list[int] = []
    first_line_of: dict[str, int] = {}
    for line, cells in rows:
        if len(cells) > len(header) and any(c.strip() for c in cells[len(header):]):
            raise InputFormatError(f"{where(path, row=line)}: found {len(cells)} fields, "
                                   f"expected {len(header)} as in the header")
        trial = cell(cells, "trial")
        if not trial:
            raise InputFormatError(f"{where(path, row=line, column='trial')}: found an empty "
                                   "cell, expected a trial id")
        if trial in first_line_of:
            raise InputFormatError(f"{where(path, row=line, column='trial')}: found trial "
                                   f"{trial!r} again (first at row {first_line_of[trial]}), "
                                   "expected unique trial ids")
        first_line_of[trial] = line
        stim = cell(cells, "stimulus")
        if stim not in study.stimuli:
            known = ", ".join(map(repr, study.stimuli)) or "none defined"
            raise InputFormatError(f"{where(path, row=line, column='stimulus')}: found "
                                   f"{stim!r}, expected a stimulus with a [stimuli.NAME] "
                                   f"entry in the study ({known})")
        times = []
        for name in ("start", "end"):
            text = cell(cells, name)
            try:
                value = _parse_time_ms(text, factor)
            except (ValueError, OverflowError):
                value = math.nan
                if text:
                    raise InputFormatError(f"{where(path, row=line, column=name)}: found "
                                           f"{text!r}, expected a number of {unit}") from None
            if not math.isfinite(value):
                raise InputFormatError(f"{where(path, row=line, column=name)}: found "
                                       f"{text!r}, expected a finite number of {unit}")
            times.append(value)
        start_ms, end_ms = times
        if end_ms <= start_ms:
            raise InputFormatError(f"{where(path, row=line, column='end')}: found "
                                   f"{cell(cells, 'end')!r}, expected a time after start "
                                   f"{cell(cells, 'start')!r}")
        media = [cell(cells, c) for c in _MEDIA] if has_media else ["", "", "", ""]
        if not any(media):
            s: Stimulus = study.stimuli[stim]
            media_vals = [float(v) for v in fit_video(s.width_px, s.height_px,
                                                       disp.width_px, disp.height_px)]
        else:
            media_vals = []
            for name, text in zip(_MEDIA, media):
                try:
                    value = float(text)
                except ValueError:
                    value = math.nan
                if not math.isfinite(value):
                    raise InputFormatError(
                        f"{where(path, row=line, column=name)}: found {text!r}, expected a "
                        "finite number of display pixels (or all four media cells empty)")
                if name in ("media_width_px", "media_height_px") and value <= 0:
                    raise InputFormatError(f"{where(path, row=line, column=name)}: found "
                                           f"{text!r}, expected a size > 0 pixels")
                media_vals.append(value)
        for name, value in zip(TRIAL_COLUMNS, [trial, stim, start_ms, end_ms, *media_vals]):
            out[name].append(value)
        lines.append(line)

    df = pd.DataFrame(out)
    for c in TRIAL_COLUMNS[2:]:
        df[c] = df[c].astype(float)
    order = np.argsort(df["start_ms"].to_numpy(), kind="stable")
    df = df.iloc[order].reset_index(drop=True)
    lines_sorted = np.asarray(lines)[order]
    start = df["start_ms"].to_numpy()
    end = df["end_ms"].to_numpy()
    bad = np.flatnonzero(end[:-1] > start[1:])
    if bad.size:
        i = int(bad[0])
        a, b = df["trial"].iat[i], df["trial"].iat[i + 1]
        raise InputFormatError(
            f"{where(path, row=int(lines_sorted[i + 1]), column='start')}: trial {b!r} starts "
            f"at {start[i + 1] / factor:.12g} {unit}, before trial {a!r} (row "
            f"{int(lines_sorted[i])}) ends at {end[i] / factor:.12g} {unit}; expected trials "
            "that do not overlap")
    df.attrs["source"] = str(path)
    return df


# --------------------------------------------------------------------------- per-sample maps

def assign_trials(t_ms, trials: pd.DataFrame) -> np.ndarray:
    """Row of the trial containing each sample time, -1 outside every trial.

    A trial holds ``start_ms <= t < end_ms``.  Trials must not overlap
    (:func:`read_trials` guarantees it); they need not be sorted.

    Parameters
    ----------
    t_ms : array_like of float
        Sample times in ms on the recording clock.  NaN gives -1.
    trials : pandas.DataFrame
        With ``start_ms`` and ``end_ms``.

    Returns
    -------
    numpy.ndarray of int64
        Positional row index into ``trials`` (``trials.iloc[i]``), or -1.

    Examples
    --------
    >>> tr = pd.DataFrame({"start_ms": [0.0, 100.0], "end_ms": [100.0, 150.0]})
    >>> assign_trials([-1, 0, 99.9, 100, 149.9, 150, float("nan")], tr).tolist()
    [-1, 0, 0, 1, 1, -1, -1]
    """
    t = np.asarray(t_ms, dtype=float)
    start = trials["start_ms"].to_numpy(dtype=float)
    end = trials["end_ms"].to_numpy(dtype=float)
    if start.size == 0:
        return np.full(t.shape, -1, dtype=np.int64)
    order = np.argsort(start, kind="stable")
    s_sorted, e_sorted = start[order], end[order]
    pos = np.searchsorted(s_sorted, t, side="right") - 1
    safe = np.clip(pos, 0, None)
    inside = (pos >= 0) & (t < e_sorted[safe])  # NaN compares False
    return np.where(inside, order[safe], -1).astype(np.int64)


def placement_sorted(t_ms: np.ndarray, trials: pd.DataFrame,
                     stimuli: Mapping[str, Stimulus]) -> tuple[np.ndarray, np.ndarray]:
    """:func:`assign_trials` and :func:`frame_index` at once, for increasing times.

    Sample times of a recording only increase, so each trial is one slice of
    the samples, found by binary search; the loop runs over trials and each
    slice is filled with one vectorised expression.  Same values as the two
    general functions (tested), as int32 (half their memory), with no
    per-sample temporaries.

    >>> from aoi_fix.config import Stimulus
    >>> tr = pd.DataFrame({"stimulus": ["a"], "start_ms": [1000.0], "end_ms": [1100.0]})
    >>> st = {"a": Stimulus(fps=25.0, width_px=4, height_px=3)}
    >>> idx, fr = placement_sorted(np.array([990.0, 1000.0, 1040.0, 1099.9, 2000.0]), tr, st)
    >>> idx.tolist(), fr.tolist()
    ([-1, 0, 0, 0, -1], [-1, 0, 1, 2, -1])
    """
    t = np.asarray(t_ms, dtype=float)
    n = len(t)
    # int32: half the memory of int64 per sample (row and frame numbers fit)
    trial_idx = np.full(n, -1, dtype=np.int32)
    frame = np.full(n, -1, dtype=np.int32)
    if len(trials) == 0 or n == 0:
        return trial_idx, frame
    fps = _per_trial(trials, stimuli, "fps")
    last = frame_count(trials, stimuli) - 1
    start = trials["start_ms"].to_numpy(float)
    end = trials["end_ms"].to_numpy(float)
    a = np.searchsorted(t, start, side="left")
    b = np.searchsorted(t, end, side="left")
    for k in range(len(trials)):  # a loop over trials
        lo, hi = int(a[k]), int(b[k])
        if hi <= lo:
            continue
        trial_idx[lo:hi] = k
        f = t[lo:hi] - start[k]
        f *= fps[k]
        f /= 1000.0
        f += _FRAME_EPS
        np.floor(f, out=f)
        np.clip(f, 0, last[k], out=f)
        frame[lo:hi] = f
    return trial_idx, frame


def _per_trial(trials: pd.DataFrame, stimuli: Mapping[str, Stimulus], attr: str) -> np.ndarray:
    names = trials["stimulus"].to_numpy()
    try:
        return np.array([float(getattr(stimuli[n], attr)) for n in names], dtype=float)
    except KeyError as e:
        raise ConfigError(f"stimulus {e.args[0]!r} has no [stimuli.NAME] entry in the "
                          "study") from None


def frame_count(trials: pd.DataFrame, stimuli: Mapping[str, Stimulus]) -> np.ndarray:
    """Number of video frames shown in each trial: ``ceil(duration * fps / 1000)``, >= 1.

    >>> from aoi_fix.config import Stimulus
    >>> tr = pd.DataFrame({"stimulus": ["a"], "start_ms": [0.0], "end_ms": [1000.0]})
    >>> frame_count(tr, {"a": Stimulus(fps=25.0, width_px=4, height_px=3)}).tolist()
    [25]
    """
    fps = _per_trial(trials, stimuli, "fps")
    dur = trials["end_ms"].to_numpy(float) - trials["start_ms"].to_numpy(float)
    n = np.ceil(dur * fps / 1000.0 - _FRAME_EPS)
    return np.maximum(n, 1).astype(np.int64)


def frame_index(t_ms, trial_idx, trials: pd.DataFrame,
                stimuli: Mapping[str, Stimulus]) -> np.ndarray:
    """0-based video frame on screen at each sample time, -1 outside trials.

    ``floor((t_ms - start_ms) * fps / 1000)`` clipped to the frames of the
    trial, ``0 .. frame_count - 1``.  A time within 1e-9 frame of a frame
    boundary counts as the later frame (absorbs float rounding).

    Parameters
    ----------
    t_ms : array_like of float
    trial_idx : array_like of int
        From :func:`assign_trials`.
    trials : pandas.DataFrame
        From :func:`read_trials`.
    stimuli : Mapping[str, Stimulus]
        ``study.stimuli``.

    Returns
    -------
    numpy.ndarray of int64

    Examples
    --------
    At 25 fps a frame lasts 40 ms:

    >>> from aoi_fix.config import Stimulus
    >>> tr = pd.DataFrame({"stimulus": ["a"], "start_ms": [1000.0], "end_ms": [1100.0]})
    >>> st = {"a": Stimulus(fps=25.0, width_px=4, height_px=3)}
    >>> t = [1000.0, 1039.9, 1040.0, 1099.9, 2000.0]
    >>> frame_index(t, assign_trials(t, tr), tr, st).tolist()
    [0, 0, 1, 2, -1]
    """
    t = np.asarray(t_ms, dtype=float)
    idx = np.asarray(trial_idx, dtype=np.int64)
    out = np.full(np.broadcast(t, idx).shape, -1, dtype=np.int64)
    if len(trials) == 0:
        return out
    fps = _per_trial(trials, stimuli, "fps")
    start = trials["start_ms"].to_numpy(float)
    last = frame_count(trials, stimuli) - 1
    t, idx = np.broadcast_arrays(t, idx)
    sel = (idx >= 0) & np.isfinite(t)
    i = idx[sel]
    f = np.floor((t[sel] - start[i]) * fps[i] / 1000.0 + _FRAME_EPS)
    out[sel] = np.clip(f, 0, last[i]).astype(np.int64)
    return out


def screen_to_video(x_px, y_px, trial_idx, trials: pd.DataFrame,
                    stimuli: Mapping[str, Stimulus]):
    """Display pixels to video pixels through each trial's placement.

    ``x_vid = (x_px - media_x_px) * video_width_px / media_width_px`` and the
    same for y.  Points off the drawn video map outside ``0 .. width``; use
    :func:`on_video` to tell them apart.

    Returns
    -------
    x_vid, y_vid : numpy.ndarray of float
        NaN outside trials (``trial_idx == -1``) and for NaN input.

    Examples
    --------
    >>> from aoi_fix.config import Stimulus
    >>> tr = pd.DataFrame({"stimulus": ["a"], "media_x_px": [240.0], "media_y_px": [0.0],
    ...                    "media_width_px": [1440.0], "media_height_px": [1080.0]})
    >>> xv, yv = screen_to_video([240, 960, 0], [0, 540, 0], [0, 0, -1], tr,
    ...                          {"a": Stimulus(fps=25.0, width_px=640, height_px=480)})
    >>> xv.tolist(), yv.tolist()
    ([0.0, 320.0, nan], [0.0, 240.0, nan])
    """
    x = np.asarray(x_px, dtype=float)
    y = np.asarray(y_px, dtype=float)
    idx = np.asarray(trial_idx, dtype=np.int64)
    x, y, idx = np.broadcast_arrays(x, y, idx)
    x_vid = np.full(x.shape, np.nan)
    y_vid = np.full(x.shape, np.nan)
    if len(trials) == 0:
        return x_vid, y_vid
    sel = idx >= 0
    x_vid[sel], y_vid[sel] = to_video_at(x[sel], y[sel], idx[sel], media_rect(trials),
                                         video_scale(trials, stimuli))
    return x_vid, y_vid


def on_video(x_px, y_px, trial_idx, trials: pd.DataFrame) -> np.ndarray:
    """True where a display point lies on the drawn video of its trial.

    The rectangle's edges count as on the video (the same rule as AOI edges
    in :func:`aoi_fix.aois.match_points`).  False outside trials and for NaN.

    >>> tr = pd.DataFrame({"media_x_px": [10.0], "media_y_px": [0.0],
    ...                    "media_width_px": [100.0], "media_height_px": [50.0]})
    >>> on_video([10, 110, 110.5, 50], [0, 50, 10, 20], [0, 0, 0, -1], tr).tolist()
    [True, True, False, False]
    """
    x = np.asarray(x_px, dtype=float)
    y = np.asarray(y_px, dtype=float)
    idx = np.asarray(trial_idx, dtype=np.int64)
    x, y, idx = np.broadcast_arrays(x, y, idx)
    out = np.zeros(x.shape, dtype=bool)
    if len(trials) == 0:
        return out
    sel = idx >= 0
    out[sel] = on_video_at(x[sel], y[sel], idx[sel], media_rect(trials))
    return out


# Per-trial arrays and the two placement expressions, shared by on_video /
# screen_to_video and by the block-wise matching in pipeline.match_session
# (which takes the arrays out once: no pandas inside its threads).

def media_rect(trials: pd.DataFrame) -> tuple[np.ndarray, ...]:
    """``(x, y, width, height)`` of each trial's drawn video, display px."""
    return tuple(trials[c].to_numpy(float) for c in
                 ("media_x_px", "media_y_px", "media_width_px", "media_height_px"))


def video_scale(trials: pd.DataFrame, stimuli: Mapping[str, Stimulus]
                ) -> tuple[np.ndarray, np.ndarray]:
    """Video px per display px of each trial, horizontally and vertically."""
    _, _, mw, mh = media_rect(trials)
    return (_per_trial(trials, stimuli, "width_px") / mw,
            _per_trial(trials, stimuli, "height_px") / mh)


def on_video_at(x, y, i, rect) -> np.ndarray:
    """Display points on the drawn video of trial rows ``i`` (edges included)."""
    mx, my, mw, mh = rect
    return (x >= mx[i]) & (x <= mx[i] + mw[i]) & (y >= my[i]) & (y <= my[i] + mh[i])


def to_video_at(x, y, i, rect, scale) -> tuple[np.ndarray, np.ndarray]:
    """Display points of trial rows ``i`` in video px."""
    mx, my, _, _ = rect
    return (x - mx[i]) * scale[0][i], (y - my[i]) * scale[1][i]
