"""Gap filling and smoothing: the contract for missing data before detection.

* A run of invalid samples whose missing time is at most ``max_gap_ms`` (a
  blink fragment, a dropped frame) is filled by linear interpolation between
  the valid samples on either side and marked ``filled``.
* A longer loss stays a loss (NaN, ``segment = -1``).
* A pause in the recording (a time step with no samples) counts as missing
  time too: up to ``max_gap_ms`` it is bridged, beyond it the recording is cut.
* ``segment`` numbers the stretches of usable data; no fixation crosses from
  one segment to the next.

Gap filling bridges short dropouts and discards nothing (common practice;
REFERENCES.md, post-processing conventions, ~75 ms).
"""

from __future__ import annotations

import numpy as np
import pandas as pd

__all__ = ["fill_gaps", "smooth_savgol", "fixation_average", "window_rows"]


def fill_gaps(samples: pd.DataFrame, *, max_gap_ms: float, interval_ms: float) -> pd.DataFrame:
    """Interpolate short dropouts and number the usable segments.

    Parameters
    ----------
    samples : DataFrame
        Tidy frame with ``t_ms, x_px, y_px, valid``.
    max_gap_ms : float
        Longest missing time that is interpolated.
    interval_ms : float
        Nominal sample interval; the missing time between valid samples at
        ``t1 < t2`` is ``t2 - t1 - interval_ms``.

    Returns
    -------
    DataFrame
        A copy with ``x_px, y_px`` filled where allowed and two new columns:
        ``filled`` (bool) and ``segment`` (int, -1 for lost samples).

    Examples
    --------
    >>> s = pd.DataFrame({"t_ms": [0., 10, 20, 30, 40, 100, 110],
    ...                   "x_px": [0., np.nan, 2, 3, np.nan, 5, 6],
    ...                   "y_px": [0., np.nan, 0, 0, np.nan, 0, 0],
    ...                   "valid": [True, False, True, True, False, True, True]})
    >>> out = fill_gaps(s, max_gap_ms=20, interval_ms=10)
    >>> out["x_px"].tolist()[:3], out["segment"].tolist()
    ([0.0, 1.0, 2.0], [0, 0, 0, 0, -1, 1, 1])
    """
    t = samples["t_ms"].to_numpy(dtype=float)
    x = np.array(samples["x_px"].to_numpy(dtype=float), dtype=float)  # own copies
    y = np.array(samples["y_px"].to_numpy(dtype=float), dtype=float)
    valid = samples["valid"].to_numpy(dtype=bool)
    n = len(t)
    filled = np.zeros(n, dtype=bool)
    segment = np.full(n, -1, dtype=np.int32)
    vi = np.flatnonzero(valid)
    if len(vi):
        missing_ms = np.diff(t[vi])
        missing_ms -= interval_ms
        # a small tolerance absorbs timestamp jitter (common practice: half an interval)
        bridge = missing_ms <= max_gap_ms + 0.5 * interval_ms
        del missing_ms
        # fill invalid samples lying inside bridged gaps
        has_holes = np.diff(vi) > 1
        fill_gap = bridge & has_holes
        if fill_gap.any():
            # owner gap of each invalid sample: index of the previous valid sample
            inv = np.flatnonzero(~valid)
            pos = np.searchsorted(vi, inv) - 1  # gap number (between vi[pos] and vi[pos+1])
            inside = (pos >= 0) & (pos < len(vi) - 1)
            inv, pos = inv[inside], pos[inside]
            take = fill_gap[pos]
            inv, pos = inv[take], pos[take]
            a, b = vi[pos], vi[pos + 1]  # the valid samples on either side
            frac = (t[inv] - t[a]) / (t[b] - t[a])
            x[inv] = x[a] + frac * (x[b] - x[a])
            y[inv] = y[a] + frac * (y[b] - y[a])
            filled[inv] = True
        # segments: consecutive valid samples joined by bridged gaps.  A new one
        # starts at each valid sample after a gap that is not bridged; filled
        # samples lie inside bridged gaps, so a running count of the starts
        # numbers them too, and lost samples get -1.
        starts = np.zeros(n, dtype=np.int32)
        starts[vi[1:][~bridge]] = 1
        np.cumsum(starts, out=segment)
        del starts
        segment[~(valid | filled)] = -1
    cols = {c: samples[c].to_numpy() for c in samples.columns}
    cols.update(x_px=x, y_px=y, filled=filled, segment=segment)
    return pd.DataFrame(cols, index=samples.index, copy=False)


def smooth_savgol(t_ms: np.ndarray, values: np.ndarray, segment: np.ndarray, *,
                  window_ms: float, interval_ms: float, polyorder: int = 2) -> np.ndarray:
    """Savitzky-Golay smoothing within each segment (lost samples untouched).

    The window is the odd number of samples closest to ``window_ms`` (at least
    ``polyorder + 2``); segments shorter than it are left as they are.

    References
    ----------
    Nyström, M., & Holmqvist, K. (2010). An adaptive algorithm for fixation,
    saccade, and glissade detection in eyetracking data. Behavior Research
    Methods, 42, 188-204 (Savitzky-Golay smoothing before velocity).
    """
    from scipy.signal import savgol_filter

    n_win = int(round(window_ms / interval_ms))
    n_win = max(n_win, polyorder + 2)
    if n_win % 2 == 0:
        n_win += 1
    out = np.asarray(values, dtype=float).copy()
    seg = np.asarray(segment)
    ok = seg >= 0
    if not ok.any():
        return out
    idx = np.flatnonzero(ok)
    breaks = np.flatnonzero(np.diff(seg[idx]) != 0) + 1
    for part in np.split(idx, breaks):  # loop over segments, not samples
        if len(part) >= n_win:
            out[part] = savgol_filter(out[part], n_win, polyorder, mode="interp")
    return out


def window_half_width(window_ms: float, interval_ms: float) -> int:
    """Samples on either side of a sample in :func:`fixation_average`'s window.

    >>> window_half_width(100.0, 1000 / 300)
    15
    """
    return max(0, int(round(window_ms / (2.0 * interval_ms))))


def window_rows(i: np.ndarray, f: np.ndarray, start_row: np.ndarray, end_row: np.ndarray,
                h: int) -> tuple[np.ndarray, np.ndarray]:
    """Rows ``[lo, hi)`` of the averaging window of fixation samples ``i``.

    ``f`` is each sample's fixation (index into ``start_row``/``end_row``);
    the window is ``h`` samples either side, cut at the fixation's ends
    (:func:`fixation_average`).

    >>> lo, hi = window_rows(np.array([0, 5, 9]), np.array([0, 0, 0]), np.array([0]),
    ...                      np.array([10]), 2)
    >>> lo.tolist(), hi.tolist()
    ([0, 3, 7], [3, 8, 10])
    """
    lo = i - h
    np.maximum(lo, start_row.take(f), out=lo)
    hi = i + (h + 1)
    np.minimum(hi, end_row.take(f), out=hi)
    return lo, hi


def _window_means(x_in: np.ndarray, y_in: np.ndarray, fid: np.ndarray, st: np.ndarray,
                  en: np.ndarray, h: int, a: int, i: np.ndarray):
    """Window means of the fixation rows ``i`` (increasing) of the block starting at ``a``.

    Prefix sums start at the block's own first window row, ``max(0, a - h)``,
    so a sample's mean does not depend on which other rows are asked for (it
    does on ``a``: callers use the blocks of :func:`aoi_fix._chunks.blocks`).
    Returns ``(good, mx, my)``: the means of rows ``i[good]`` (``good`` None
    when every window has a finite sample, as after gap filling).
    """
    lo, hi = window_rows(i, fid[i], st, en, h)
    # every window lies in base..top-1: prefix sums over that stretch only
    base, top = max(0, a - h), int(hi.max())
    lo -= base
    hi -= base
    xs, ys = x_in[base:top], y_in[base:top]
    ok = np.isfinite(xs)
    ok &= np.isfinite(ys)
    cn = np.zeros(top - base + 1, dtype=np.int64)
    np.cumsum(ok, out=cn[1:])
    cnt = cn[hi] - cn[lo]
    good = cnt > 0
    if good.all():
        good = None
    else:  # a window without a finite sample (not after gap filling)
        lo, hi, cnt = lo[good], hi[good], cnt[good]
    c = np.zeros(top - base + 1)
    out = []
    for v in (xs, ys):  # two coordinates
        np.cumsum(np.where(ok, v, 0.0), out=c[1:])
        m = c[hi]
        m -= c[lo]
        m /= cnt
        out.append(m)
    return good, out[0], out[1]


def fixation_average_blocks(filled: pd.DataFrame, fixations: pd.DataFrame, *,
                            window_ms: float, interval_ms: float, fid: np.ndarray):
    """:func:`fixation_average` a block at a time, for matching without whole columns.

    Returns a function ``(a, b) -> (x, y)``: rows ``a..b-1`` of
    ``fixation_average(filled, fixations, ...)`` as new arrays, the same
    numbers bit for bit when the blocks are those of
    :func:`aoi_fix._chunks.map_blocks` (``a`` a multiple of ``BLOCK``).
    ``convert`` hands it to :func:`aoi_fix.pipeline.match_session`, so the
    averaged positions are made block by block where they are tested and
    never as two whole columns.

    >>> f = pd.DataFrame({"x_px": [0., 2, 4, 9], "y_px": [0., 0, 0, 0]})
    >>> fx = pd.DataFrame({"start_row": [0], "end_row": [3]})
    >>> get = fixation_average_blocks(f, fx, window_ms=20, interval_ms=10,
    ...                               fid=np.array([0, 0, 0, -1]))
    >>> get(0, 4)[0].tolist()
    [1.0, 2.0, 3.0, 9.0]
    """
    x_in = filled["x_px"].to_numpy(dtype=float)
    y_in = filled["y_px"].to_numpy(dtype=float)
    st = fixations["start_row"].to_numpy(np.int64)
    en = fixations["end_row"].to_numpy(np.int64)
    h = window_half_width(window_ms, interval_ms)
    averaging = len(fixations) > 0 and window_ms > 0

    def positions(a: int, b: int) -> tuple[np.ndarray, np.ndarray]:
        x, y = x_in[a:b].copy(), y_in[a:b].copy()
        i = np.flatnonzero(fid[a:b] >= 0) if averaging else ()
        if len(i):
            i += a
            good, mx, my = _window_means(x_in, y_in, fid, st, en, h, a, i)
            at = i - a if good is None else (i - a)[good]
            x[at] = mx
            y[at] = my
        return x, y

    return positions


def fixation_average(filled: pd.DataFrame, fixations: pd.DataFrame, *, window_ms: float,
                     interval_ms: float, fid: np.ndarray | None = None,
                     rows: np.ndarray | None = None) -> tuple[np.ndarray, np.ndarray]:
    """Positions for AOI matching: each fixation sample averaged over a window.

    For a sample inside a fixation, the mean position of the fixation's
    samples within ``window_ms / 2`` on either side (the window is cut at the
    fixation's ends); other samples keep their (gap-filled) position.  Tracker
    noise moves single samples across AOI edges; within a fixation the eye is
    (nearly) still, so a short average removes most of that noise while still
    following an AOI that moves during the fixation.  Measured on our
    simulator: with 0.15 deg noise at 300 Hz, 100 ms brought the share of
    (trial, AOI) percentages within 3 points of the truth from 0.61 to 1.0.

    ``fid`` (:func:`aoi_fix.summary.fixation_of_sample` of these fixations)
    may be passed when the caller has it already.  With ``rows`` (increasing
    sample rows; needs ``fid``) only those samples are computed and returned,
    the same numbers as at those rows of the whole result (threshold sweeps
    re-average the few samples whose window changed).

    >>> f = pd.DataFrame({"x_px": [0., 2, 4, 9], "y_px": [0., 0, 0, 0]})
    >>> fx = pd.DataFrame({"start_row": [0], "end_row": [3]})
    >>> fixation_average(f, fx, window_ms=20, interval_ms=10)[0].tolist()
    [1.0, 2.0, 3.0, 9.0]
    >>> fid = np.array([0, 0, 0, -1])
    >>> fixation_average(f, fx, window_ms=20, interval_ms=10, fid=fid,
    ...                  rows=np.array([1, 3]))[0].tolist()
    [2.0, 9.0]
    """
    from . import _chunks
    from .summary import fixation_of_sample

    x_in = filled["x_px"].to_numpy(dtype=float)
    y_in = filled["y_px"].to_numpy(dtype=float)
    n = len(x_in)
    if rows is not None:
        if fid is None:
            raise ValueError("fixation_average: rows needs fid")
        rows = np.asarray(rows, dtype=np.int64)
        x, y = x_in[rows], y_in[rows]
    else:
        x, y = x_in.copy(), y_in.copy()
    if n == 0 or len(fixations) == 0 or window_ms <= 0 or (rows is not None and not rows.size):
        return x, y
    if fid is None:
        fid = fixation_of_sample(n, fixations)
    st = fixations["start_row"].to_numpy(np.int64)
    en = fixations["end_row"].to_numpy(np.int64)
    h = window_half_width(window_ms, interval_ms)

    def means(a: int, b: int, i: np.ndarray, out_at) -> None:
        """Window means of fixation rows ``i`` of block ``a..b-1``, written to ``out_at``."""
        good, mx, my = _window_means(x_in, y_in, fid, st, en, h, a, i)
        at = out_at if good is None else out_at[good]
        x[at] = mx
        y[at] = my

    if rows is None:
        def block(a: int, b: int) -> None:  # rows a..b-1; reads the input, writes x, y there
            i = np.flatnonzero(fid[a:b] >= 0)  # fixation samples, in order
            if len(i):
                i += a
                means(a, b, i, i)

        _chunks.map_blocks(block, n)
        return x, y
    # only the given rows: the blocks they fall in, with the same arithmetic
    size = _chunks.BLOCK
    inside = np.flatnonzero(fid[rows] >= 0)
    cut = np.searchsorted(rows[inside], np.arange(0, n + size, size))
    for k in np.flatnonzero(np.diff(cut)).tolist():  # a loop over blocks
        a = k * size
        at = inside[cut[k]:cut[k + 1]]
        means(a, min(a + size, n), rows[at], at)
    return x, y
