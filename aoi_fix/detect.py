"""Fixation detection: I-VT, I-DT, and merging/discarding of fixations.

Every detector takes the gap-filled sample frame (see :func:`aoi_fix.clean.fill_gaps`)
and returns a fixation table, one row per fixation, in time order::

    fixation     int      1-based number
    onset_ms     float    time of the first sample
    offset_ms    float    time of the last sample + one nominal interval
                          (never past the next sample's time)
    duration_ms  float    offset_ms - onset_ms
    x_px, y_px   float    mean of the fixation's valid (not interpolated) samples
    start_row    int      first sample row of the fixation
    end_row      int      one past its last sample row

An empty input gives an empty table with these columns and dtypes.
"""

from __future__ import annotations

import bisect
import logging
import math
import threading
from typing import TYPE_CHECKING

import numpy as np
import pandas as pd

from . import geometry
from .clean import fill_gaps, smooth_savgol
from .samples import nominal_interval_ms

if TYPE_CHECKING:  # pragma: no cover
    from .config import Detection, Display

__all__ = ["ivt", "idt", "merge_and_discard", "detect_fixations", "detect_filled",
           "velocity_deg_s", "velocity_and_noise",
           "FIXATION_COLUMNS"]

log = logging.getLogger(__name__)

_NOISE_SAMPLE_CAP = 200_000

FIXATION_COLUMNS = ["fixation", "onset_ms", "offset_ms", "duration_ms", "x_px", "y_px",
                    "start_row", "end_row"]


# --------------------------------------------------------------------------- helpers

def _ensure_filled(samples: pd.DataFrame, interval_ms: float) -> pd.DataFrame:
    if "segment" in samples.columns and "filled" in samples.columns:
        return samples
    return fill_gaps(samples, max_gap_ms=0.0, interval_ms=interval_ms)


def _table(starts: np.ndarray, ends: np.ndarray, t: np.ndarray, x: np.ndarray,
           y: np.ndarray, raw_valid: np.ndarray, interval_ms: float,
           known=None) -> pd.DataFrame:
    """Fixation table from sample runs [starts, ends).

    ``known``: ``(rows, x_px, y_px)``, the mean positions of some runs as this
    function computed them before for the same samples (a run's mean does not
    depend on the other runs, :func:`_run_means`); only the others are summed.
    """
    starts = np.asarray(starts, dtype=np.int64)
    ends = np.asarray(ends, dtype=np.int64)
    n = len(t)
    if len(starts) == 0:
        return pd.DataFrame({
            "fixation": pd.Series([], dtype="int64"),
            "onset_ms": pd.Series([], dtype=float), "offset_ms": pd.Series([], dtype=float),
            "duration_ms": pd.Series([], dtype=float), "x_px": pd.Series([], dtype=float),
            "y_px": pd.Series([], dtype=float), "start_row": pd.Series([], dtype="int64"),
            "end_row": pd.Series([], dtype="int64")})
    if known is None:
        mx, my = _positions(starts, ends, x, y, raw_valid)
    else:
        rows, kx, ky = known
        mx, my = np.empty(len(starts)), np.empty(len(starts))
        mx[rows], my[rows] = kx, ky
        todo = np.ones(len(starts), dtype=bool)
        todo[rows] = False
        todo = np.flatnonzero(todo)
        mx[todo], my[todo] = _positions(starts[todo], ends[todo], x, y, raw_valid)
    onset = t[starts]
    offset = t[ends - 1] + interval_ms
    nxt = np.where(ends < n, t[np.minimum(ends, n - 1)], np.inf)
    offset = np.minimum(offset, nxt)
    return pd.DataFrame({
        "fixation": np.arange(1, len(starts) + 1, dtype=np.int64),
        "onset_ms": onset, "offset_ms": offset, "duration_ms": offset - onset,
        "x_px": mx, "y_px": my, "start_row": starts, "end_row": ends})


def _positions(starts, ends, x, y, raw_valid) -> tuple[np.ndarray, np.ndarray]:
    """Mean x and y of each run over its raw valid samples (else its finite ones)."""
    mx, cnt = _run_means(starts, ends, x, y, raw_valid)
    lacking = cnt == 0  # no raw valid sample: mean of the finite (interpolated) ones
    if lacking.any():
        k = np.flatnonzero(lacking)
        mx[k], _ = _run_means(starts[k], ends[k], x, y)
    return mx[:, 0].copy(), mx[:, 1].copy()


def _run_means(starts: np.ndarray, ends: np.ndarray, x: np.ndarray, y: np.ndarray,
               valid: np.ndarray | None = None) -> tuple[np.ndarray, np.ndarray]:
    """Mean (x, y) of each run [start, end) over its samples with a finite position
    (and ``valid``, when given), and their count; NaN means where there is none.

    Runs in time order that do not overlap (every detector's) are summed with
    ``np.add.reduceat`` over groups of runs spanning about one block of
    samples (on a few threads), so no full-length temporary is made and each
    run's sum is taken over its own samples only: a run's mean does not depend
    on which other runs are summed with it.  Runs covering under a quarter of
    their span are gathered first and summed the same way.  Overlapping runs
    fall back to prefix sums.

    >>> x = np.array([1., 2, np.nan, 4, 5, 6])
    >>> m, c = _run_means(np.array([0, 3, 5]), np.array([3, 5, 5]), x, x)
    >>> m[:, 0].tolist()[:2], c.tolist()
    ([1.5, 4.5], [2, 2, 0])
    """
    from ._chunks import BLOCK, map_items

    starts = np.asarray(starts, dtype=np.int64)
    ends = np.asarray(ends, dtype=np.int64)
    m = len(starts)
    out = np.full((m, 2), np.nan)
    cnt = np.zeros(m, dtype=np.int64)
    nonempty = np.flatnonzero(ends > starts)
    if len(nonempty) == 0:
        return out, cnt
    st, en = starts[nonempty], ends[nonempty]
    if len(st) > 1 and not bool(np.all(st[1:] >= en[:-1])):
        return _run_means_prefix(starts, ends, x, y, valid)
    lengths = en - st
    if int(lengths.sum()) * 4 < int(en[-1] - st[0]):
        # sparse runs (e.g. the few a merge changed): gather their samples,
        # the same sums over the same values in the same order
        at = np.cumsum(lengths) - lengths
        idx = np.repeat(st - at, lengths)
        idx += np.arange(idx.size)
        xs, ys = x.take(idx), y.take(idx)
        use = np.isfinite(xs)
        use &= np.isfinite(ys)
        if valid is not None:
            use &= valid.take(idx)
        c = np.add.reduceat(use, at, dtype=np.int64)
        cnt[nonempty] = c
        with np.errstate(invalid="ignore", divide="ignore"):
            for j, v in enumerate((xs, ys)):  # two coordinates
                out[nonempty, j] = np.add.reduceat(np.where(use, v, 0.0), at) / c
        return out, cnt
    # groups of consecutive runs, each starting about BLOCK samples after the last
    marks = np.arange(int(st[0]), int(en[-1]), BLOCK)
    cut = np.unique(np.searchsorted(st, marks, side="left"))
    bounds = np.append(cut, len(st)).tolist()

    def group(g: tuple[int, int]) -> None:  # one group of runs (about one block)
        g0, g1 = g
        if g1 <= g0:
            return
        a, b = int(st[g0]), int(en[g1 - 1])
        use = np.isfinite(x[a:b])
        use &= np.isfinite(y[a:b])
        if valid is not None:
            use &= valid[a:b]
        idx = np.empty(2 * (g1 - g0), dtype=np.int64)
        idx[0::2] = st[g0:g1] - a
        idx[1::2] = en[g0:g1] - a
        if idx[-1] == b - a:  # the last run reaches the end of the stretch
            idx = idx[:-1]
        rows = nonempty[g0:g1]
        c = np.add.reduceat(use, idx, dtype=np.int64)[0::2]
        cnt[rows] = c
        with np.errstate(invalid="ignore", divide="ignore"):
            for j, v in enumerate((x, y)):  # two coordinates
                vals = np.where(use, v[a:b], 0.0)
                out[rows, j] = np.add.reduceat(vals, idx)[0::2] / c

    map_items(group, list(zip(bounds[:-1], bounds[1:])))
    return out, cnt


def _run_means_prefix(starts, ends, x, y, valid):
    """:func:`_run_means` by prefix sums (any runs, also overlapping ones)."""
    use = np.isfinite(x) & np.isfinite(y)
    if valid is not None:
        use &= valid
    n = len(x)
    cn = np.zeros(n + 1, dtype=np.int64)
    np.cumsum(use, out=cn[1:])
    cnt = cn[ends] - cn[starts]
    del cn
    out = np.empty((len(starts), 2))
    c = np.empty(n + 1)
    c[0] = 0.0
    for j, v in enumerate((x, y)):  # two coordinates
        np.cumsum(np.where(use, v, 0.0), out=c[1:])
        with np.errstate(invalid="ignore", divide="ignore"):
            out[:, j] = (c[ends] - c[starts]) / cnt
    return out, cnt


def _runs(mask: np.ndarray, segment: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Start and end (exclusive) rows of runs of True that stay within one segment."""
    n = len(mask)
    if n == 0:
        return np.array([], np.int64), np.array([], np.int64)
    # the run goes on from sample i - 1 to i: both in the mask and in one segment
    cont = mask[1:] & mask[:-1]
    cont &= segment[1:] == segment[:-1]
    start = mask.copy()
    start[1:] &= ~cont
    end = mask.copy()
    end[:-1] &= ~cont
    return np.flatnonzero(start), np.flatnonzero(end) + 1


def _arrays(samples: pd.DataFrame):
    t = samples["t_ms"].to_numpy(dtype=float)
    x = samples["x_px"].to_numpy(dtype=float)
    y = samples["y_px"].to_numpy(dtype=float)
    seg = samples["segment"].to_numpy()  # int32 from fill_gaps: no 64-bit copy per stage
    if seg.dtype.kind != "i":
        seg = seg.astype(np.int64)
    raw_valid = samples["valid"].to_numpy(dtype=bool) & ~samples["filled"].to_numpy(dtype=bool)
    return t, x, y, seg, raw_valid


# --------------------------------------------------------------------------- velocity

def _window_bounds(seg: np.ndarray, h: int, rows: np.ndarray):
    """lo, hi sample rows of the +-h window of ``rows``, clamped to their segment."""
    s0, s1 = _segment_runs(seg)
    ok = seg[rows] >= 0
    k = np.maximum(np.searchsorted(s0, rows, side="right") - 1, 0)
    if len(s0):
        lo = np.where(ok, np.maximum(rows - h, s0[k]), rows)
        hi = np.where(ok, np.minimum(rows + h, s1[k] - 1), rows)
    else:
        lo, hi = rows.copy(), rows.copy()
    return lo, hi, ok


def _prepared(samples, display, window_ms, interval_ms, smoothing, smoothing_window_ms):
    if interval_ms is None:
        interval_ms = nominal_interval_ms(samples["t_ms"].to_numpy(dtype=float))
    s = _ensure_filled(samples, interval_ms)
    t, x, y, seg, _ = _arrays(s)
    if smoothing == "savgol":
        x = smooth_savgol(t, x, seg, window_ms=smoothing_window_ms, interval_ms=interval_ms)
        y = smooth_savgol(t, y, seg, window_ms=smoothing_window_ms, interval_ms=interval_ms)
    h = max(1, int(round(window_ms / (2.0 * interval_ms))))
    return t, x, y, seg, h


def _segment_runs(seg: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """First row and one-past-last row of every segment (runs of one id >= 0)."""
    n = len(seg)
    if n == 0:
        return np.zeros(0, np.int64), np.zeros(0, np.int64)
    cut = np.flatnonzero(seg[1:] != seg[:-1]) + 1
    starts = np.concatenate([[0], cut]).astype(np.int64)
    ends = np.concatenate([cut, [n]]).astype(np.int64)
    keep = seg[starts] >= 0
    return starts[keep], ends[keep]


def _edge_windows(seg: np.ndarray, h: int):
    """Rows whose +-h window leaves their segment, with the clamped window ends.

    Returns ``rows, lo, hi`` (``lo <= rows <= hi``, all inside the segment).
    Only the first and last h rows of each segment qualify, so this costs
    O(segments x h), not O(samples).
    """
    s0, s1 = _segment_runs(seg)
    if len(s0) == 0:
        e = np.zeros(0, np.int64)
        return e, e, e
    k = np.minimum(h, s1 - s0)
    within = np.arange(k.sum()) - np.repeat(np.cumsum(k) - k, k)  # 0..k-1 per segment
    head = np.repeat(s0, k) + within
    tail = np.repeat(s1 - k, k) + within
    which = np.concatenate([np.repeat(np.arange(len(s0)), k)] * 2)
    rows, first = np.unique(np.concatenate([head, tail]), return_index=True)
    which = which[first]
    lo = np.maximum(rows - h, s0[which])
    hi = np.minimum(rows + h, s1[which] - 1)
    return rows, lo, hi


def _chord_sq(u, v):
    """Squared chord between the unit vectors ``u = (ux, uy, uz)`` and ``v``."""
    c2 = v[0] - u[0]
    c2 *= c2
    for k in (1, 2):  # the other two components
        d = v[k] - u[k]
        d *= d
        c2 += d
    return c2


def _chord_rate(c2, dt_ms):
    """deg/s from squared chords between unit lines of sight: 2 asin(chord / 2) / dt."""
    np.sqrt(c2, out=c2)
    c2 *= 0.5
    np.minimum(c2, 1.0, out=c2)
    np.arcsin(c2, out=c2)
    c2 *= 2000.0 * 180.0 / np.pi
    c2 /= dt_ms
    return c2


def _unit_vectors(x, y, display):
    """Unit lines of sight (eye at ``distance_mm`` before the display centre)."""
    x_mm, y_mm = geometry.px_to_mm(x, y, display)
    d = float(display.distance_mm)
    inv = x_mm * x_mm
    inv += y_mm * y_mm
    inv += d * d
    np.sqrt(inv, out=inv)
    np.divide(1.0, inv, out=inv)
    x_mm *= inv
    y_mm *= inv
    inv *= d
    return x_mm, y_mm, inv


def _speed(t, x, y, seg, h, display) -> np.ndarray:
    """Windowed angular speed (deg/s) of every sample; NaN for lost samples.

    Lines of sight are unit vectors; the angle between two of them is
    ``2 asin(chord / 2)``, exact and stable for small angles.  Interior
    samples are computed in blocks (with an h-sample halo) on a few threads;
    only samples whose window reaches a segment's edge are clamped, with
    gathers.
    """
    from ._chunks import map_blocks

    n = len(t)
    speed = np.full(n, np.nan)
    if n < 2:
        return speed

    def block(a, b):
        i0, i1 = max(a, h), min(b, n - h)  # rows whose full window exists
        if i1 <= i0:
            return
        lo, hi = i0 - h, i1 + h
        u = _unit_vectors(x[lo:hi], y[lo:hi], display)
        m = i1 - i0
        c2 = _chord_sq([a[:m] for a in u], [a[2 * h:2 * h + m] for a in u])
        speed[i0:i1] = _chord_rate(c2, t[i0 + h:i1 + h] - t[i0 - h:i1 - h])

    with np.errstate(invalid="ignore", divide="ignore"):
        map_blocks(block, n)
        # samples whose window leaves their segment (or the recording): clamp
        rows, lo, hi = _edge_windows(seg, h)
        if len(rows):
            c2 = _chord_sq(_unit_vectors(x[lo], y[lo], display),
                           _unit_vectors(x[hi], y[hi], display))
            speed[rows] = _chord_rate(c2, t[hi] - t[lo])
            speed[rows[hi == lo]] = np.nan
    speed[seg < 0] = np.nan
    return speed


def _components(t, x, y, seg, h, display, rows):
    """Horizontal and vertical angular velocity (deg/s) at ``rows``."""
    lo, hi, ok = _window_bounds(seg, h, rows)
    keep = ok & (hi > lo)
    lo, hi = lo[keep], hi[keep]
    axl, ayl = geometry.px_to_deg(x[lo], y[lo], display)
    axh, ayh = geometry.px_to_deg(x[hi], y[hi], display)
    dt_s = (t[hi] - t[lo]) / 1000.0
    return (axh - axl) / dt_s, (ayh - ayl) / dt_s


def velocity_deg_s(samples: pd.DataFrame, *, display: "Display", window_ms: float = 20.0,
                   interval_ms: float | None = None, smoothing: str = "none",
                   smoothing_window_ms: float = 20.0):
    """Angular gaze velocity from a central difference over a time window.

    For each sample ``n`` the velocity is the angle between the gaze at
    ``n - h`` and ``n + h`` divided by the time between them, with
    ``h = max(1, round(window_ms / (2 * interval_ms)))``, clamped at the ends
    of each segment.  With ``h = 1`` this is the two-point central difference;
    wider windows average out tracker noise, which otherwise fragments
    fixations on noisy or fast data (REFERENCES.md; Engbert & Kliegl 2003 use
    the same idea with a five-sample window).

    Returns
    -------
    speed, vx, vy : ndarray
        Speed in deg/s (NaN for lost samples and single-sample segments) and
        its horizontal and vertical components in deg/s.
    """
    t, x, y, seg, h = _prepared(samples, display, window_ms, interval_ms, smoothing,
                                smoothing_window_ms)
    n = len(t)
    speed = _speed(t, x, y, seg, h, display)
    vx = np.full(n, np.nan)
    vy = np.full(n, np.nan)
    rows = np.arange(n)
    lo, hi, ok = _window_bounds(seg, h, rows)
    keep = ok & (hi > lo)
    vx[keep], vy[keep] = _components(t, x, y, seg, h, display, rows[keep])
    return speed, vx, vy


def noise_velocity_deg_s(vx: np.ndarray, vy: np.ndarray) -> float:
    """Robust SD of the velocity noise along one axis (deg/s).

    Per axis ``sigma^2 = median(v^2) - median(v)^2`` (Engbert & Kliegl 2003);
    the two axes are combined as their root mean square.
    """
    fin = np.isfinite(vx) & np.isfinite(vy)
    if fin.sum() < 3:
        return 0.0
    a, b = vx[fin], vy[fin]
    if len(a) > _NOISE_SAMPLE_CAP:
        # a regular stride through the whole recording: medians of 200,000
        # values estimate the same SD and cost a tenth of the time
        step = int(np.ceil(len(a) / _NOISE_SAMPLE_CAP))
        a, b = a[::step], b[::step]
    sx2 = max(np.median(a * a) - np.median(a) ** 2, 0.0)
    sy2 = max(np.median(b * b) - np.median(b) ** 2, 0.0)
    return float(np.sqrt((sx2 + sy2) / 2.0))


def velocity_and_noise(samples: pd.DataFrame, *, display: "Display", window_ms: float,
                       interval_ms: float, smoothing: str = "none",
                       smoothing_window_ms: float = 20.0) -> tuple[np.ndarray, float]:
    """Windowed speed (deg/s) of every sample and the robust noise SD (deg/s).

    What :func:`ivt` needs before its threshold; independent of the threshold.
    The noise SD comes from the velocity components of a regular stride of at
    most 200,000 samples (see :func:`noise_velocity_deg_s`).
    """
    t, x, y, seg, h = _prepared(samples, display, window_ms, interval_ms, smoothing,
                                smoothing_window_ms)
    speed = _speed(t, x, y, seg, h, display)
    rows = np.flatnonzero(np.isfinite(speed))
    if len(rows) > _NOISE_SAMPLE_CAP:
        rows = rows[::int(np.ceil(len(rows) / _NOISE_SAMPLE_CAP))]
    vx, vy = _components(t, x, y, seg, h, display, rows)
    return speed, noise_velocity_deg_s(vx, vy)


# --------------------------------------------------------------------------- I-VT

def ivt(samples: pd.DataFrame, *, display: "Display", velocity_threshold_deg_s: float = 30.0,
        noise_factor: float = 5.0, velocity_window_ms: float = 20.0,
        smoothing: str = "none", smoothing_window_ms: float = 20.0,
        interval_ms: float | None = None, velocity=None) -> pd.DataFrame:
    """Velocity-threshold identification (I-VT) of fixations.

    A sample belongs to a fixation when its windowed angular velocity is below
    the threshold; consecutive such samples within one segment form one
    fixation (Salvucci & Goldberg 2000).  The threshold used is
    ``max(velocity_threshold_deg_s, noise_factor * sigma)`` where ``sigma`` is
    the robust per-axis SD of the velocity (Engbert & Kliegl 2003), so the
    same defaults work on quiet 1000 Hz data and on noisy 60 Hz infant data.
    The threshold used is stored in ``result.attrs["velocity_threshold_used_deg_s"]``.

    Parameters
    ----------
    samples : DataFrame
        Gap-filled tidy samples (``fill_gaps`` output); plain tidy samples are
        accepted and treated with no gap filling.
    display : Display
        Screen geometry for visual angles.
    velocity_threshold_deg_s : float
        Lowest threshold (30 deg/s is common practice).
    noise_factor : float
        Multiple of the noise SD the threshold must exceed (0 disables).
    velocity_window_ms : float
        Span of the central difference.
    smoothing, smoothing_window_ms
        ``"savgol"`` smooths positions (Nyström & Holmqvist 2010) before velocity.
    velocity : tuple, optional
        ``(speed, noise_sd)`` from :func:`velocity_and_noise` for these samples
        and velocity options, to skip recomputing it (threshold sweeps).

    Returns
    -------
    DataFrame
        The fixation table (see module docstring), before merging/discarding.

    References
    ----------
    Salvucci, D. D., & Goldberg, J. H. (2000). Identifying fixations and saccades
    in eye-tracking protocols. Proc. ETRA 2000, 71-78.
    Engbert, R., & Kliegl, R. (2003). Microsaccades uncover the orientation of
    covert attention. Vision Research, 43, 1035-1045.
    """
    t_all = samples["t_ms"].to_numpy(dtype=float)
    if interval_ms is None:
        interval_ms = nominal_interval_ms(t_all)
    s = _ensure_filled(samples, interval_ms)
    t, x, y, seg, raw_valid = _arrays(s)
    if velocity is None:
        velocity = velocity_and_noise(s, display=display, window_ms=velocity_window_ms,
                                      interval_ms=interval_ms, smoothing=smoothing,
                                      smoothing_window_ms=smoothing_window_ms)
    speed, sigma = velocity
    thr = max(velocity_threshold_deg_s, noise_factor * sigma)
    log.info("I-VT threshold %.1f deg/s (noise SD %.1f deg/s)", thr, sigma)
    with np.errstate(invalid="ignore"):
        slow = (seg >= 0) & (speed < thr)
    starts, ends = _runs(slow, seg)
    starts, ends = _refine_edges(starts, ends, x, y, seg)
    out = _table(starts, ends, t, x, y, raw_valid, interval_ms)
    out.attrs["velocity_threshold_used_deg_s"] = float(thr)
    out.attrs["noise_velocity_deg_s"] = float(sigma)
    return out


def _refine_edges(starts: np.ndarray, ends: np.ndarray, x: np.ndarray, y: np.ndarray,
                  seg: np.ndarray, *, rel_step: float = 0.1):
    """Give back to fixations the edge samples a velocity window took from them.

    A central difference over +-h samples sees a saccade up to h samples
    before it starts and after it ends.  Between two fixation runs of one
    segment, the in-flight part is taken as the stretch from the first to the
    last sample-to-sample step that reaches ``rel_step`` x the largest step
    between them; samples before it go back to the earlier fixation, samples
    after it to the later one.  On noisy data every step between two runs is
    that large and nothing changes; on clean data (a jump between two
    clusters) each fixation keeps its samples up to the jump.  Vectorised over
    all saccades with ``reduceat``.
    """
    k = len(starts)
    if k < 2:
        return starts, ends
    gap_ok = (seg[starts[1:]] == seg[ends[:-1] - 1]) & (starts[1:] > ends[:-1])
    g = np.flatnonzero(gap_ok)
    if len(g) == 0:
        return starts, ends
    first = ends[g] - 1  # interval leaving the last fixation sample
    last = starts[g + 1] - 1  # interval entering the next fixation
    # the samples first .. last + 1 of every saccade, one after another; the
    # step from a saccade's last sample to the next saccade's first is junk
    lengths = last - first + 2
    offsets = np.concatenate([[0], np.cumsum(lengths)[:-1]])
    idx = np.repeat(first - offsets, lengths)
    idx += np.arange(idx.size)
    sx, sy = x.take(idx), y.take(idx)
    sp = np.hypot(sx[1:] - sx[:-1], sy[1:] - sy[:-1])  # step of interval i -> i + 1
    idx = idx[:-1]
    sp[offsets[1:] - 1] = -np.inf  # the junk steps: never the peak, never fast
    peak = np.maximum.reduceat(sp, offsets)
    fast = sp >= rel_step * np.repeat(peak, lengths)[:-1]
    big = np.iinfo(np.int64).max
    first_fast = np.minimum.reduceat(np.where(fast, idx, big), offsets)
    last_fast = np.maximum.reduceat(np.where(fast, idx, -1), offsets)
    some = last_fast >= 0  # else a NaN step (not in gap-filled segments): no change
    g, first_fast, last_fast = g[some], first_fast[some], last_fast[some]
    ends = ends.copy()
    starts = starts.copy()
    ends[g] = np.maximum(ends[g], first_fast + 1)
    starts[g + 1] = np.minimum(starts[g + 1], last_fast + 1)
    return starts, ends


# --------------------------------------------------------------------------- I-DT

#: Samples per block of the conversion to degrees and the initial-window pass
#: (the block's arrays stay in cache; with per-thread scratch buffers, no fresh
#: pages per block).
_IDT_BLOCK = 1 << 15
#: Candidate starts grown together, column by column (bounds the temporaries).
_IDT_BATCH = 1 << 15
#: Another round of batch growth runs while at least this many new candidate
#: starts turn up; the few left are followed one fixation at a time.
_IDT_MIN_ROUND = 16
#: Below this many rows still growing, column-by-column growth hands the rest
#: to per-row growth over exponentially larger chunks.
_IDT_MIN_ACTIVE = 64


def _deg_rows(x: np.ndarray, y: np.ndarray, display: "Display") -> np.ndarray:
    """Per-axis visual angles (deg) as one ``(2, n)`` array, in blocks.

    Lost samples keep whatever they convert to (NaN): no window includes one.
    """
    from ._chunks import map_blocks

    axy = np.empty((2, len(x)))

    def block(a, b):
        axy[0, a:b], axy[1, a:b] = geometry.px_to_deg(x[a:b], y[a:b], display)

    map_blocks(block, len(x), size=_IDT_BLOCK)
    return axy


def _first_at_or_after(t: np.ndarray, target: np.ndarray, guess: np.ndarray) -> np.ndarray:
    """``np.searchsorted(t, target, side="left")`` for sorted ``t``, checked at a guess.

    The guess is right (``t[g-1] < target <= t[g]``) for almost every row of a
    regular clock; only the others are searched.
    """
    n = len(t)
    g = np.clip(guess, 0, n)
    good = (g >= n) | (np.take(t, g, mode="clip") >= target)
    good &= (g <= 0) | (np.take(t, g - 1, mode="clip") < target)
    if not good.all():
        bad = np.flatnonzero(~good)
        g[bad] = np.searchsorted(t, target[bad], side="left")
    return g


def _window_end(t: np.ndarray, rows: np.ndarray, min_fixation_ms: float, interval_ms: float,
                eps: float, k0: int) -> np.ndarray:
    """One past the last row of the shortest window starting at each of ``rows``.

    The first ``j`` with ``t[j-1] >= t[i] + min - interval`` (never before ``i + 1``).
    """
    target = t[rows] + min_fixation_ms
    target -= interval_ms
    target -= eps
    last = _first_at_or_after(t, target, rows + k0)
    np.maximum(last, rows, out=last)
    last += 1
    return last


def _segment_end(s0: np.ndarray, s1: np.ndarray, rows: np.ndarray) -> np.ndarray:
    """One past the last row of the segment of each of ``rows`` (rows in a segment)."""
    return s1[np.searchsorted(s0, rows, side="right") - 1]


class _Scratch(threading.local):
    """Per-thread scratch arrays, reused from block to block.

    Fresh block-sized temporaries may come from the operating system each
    time (page faults); reusing a few buffers keeps the work in cache.
    """

    def get(self, name: str, shape: tuple, dtype=float) -> np.ndarray:
        size = math.prod(shape)
        buf = self.__dict__.get(name)
        if buf is None or buf.size < size or buf.dtype != dtype:
            buf = self.__dict__[name] = np.empty(max(size, 1), dtype=dtype)
        return buf[:size].reshape(shape)


def _extrema_spans(axy, a, hi, sizes, scratch):
    """For each window size ``s`` of ``sizes`` (ascending): ``s``, and the per-axis
    max and min over ``[i, i + w)`` for ``i`` from ``a`` with ``w`` the largest power
    of two ``<= s``, and ``w`` (doubling: a span of 2w is two spans of w)."""
    mx = mn = axy[:, a:hi]
    length, w, k = hi - a, 1, 0
    for s in sizes:
        while 2 * w <= s:
            length -= w
            nx = scratch.get(f"mx{k % 2}", (2, length))
            nn = scratch.get(f"mn{k % 2}", (2, length))
            np.maximum(mx[:, :length], mx[:, w:w + length], out=nx)
            np.minimum(mn[:, :length], mn[:, w:w + length], out=nn)
            mx, mn, w, k = nx, nn, 2 * w, k + 1
        yield s, mx, mn, w


def _ok_starts(axy, t, seg, s0, s1, a, b, thr, min_fixation_ms, interval_ms, eps, k0,
               scratch):
    """Starts in ``[a, b)`` whose initial window lies in one segment and has D <= thr.

    A window of ``s`` samples is covered by two overlapping spans of the
    largest power of two ``w <= s``, whose extrema come from doubling
    (exact: only max and min).  Returns the passing starts, and the first
    start of each run of them with its window's per-axis maxima and minima
    (``(2, k)`` each), from where its growth carries on.
    """
    n = len(t)
    nb = b - a
    target = scratch.get("target", (nb,))
    np.add(t[a:b], min_fixation_ms, out=target)
    target -= interval_ms
    target -= eps
    uniform = b + k0 <= n
    if uniform:  # is the usual window end (row i + k0) right for every start of the block?
        good = scratch.get("good", (nb,), bool)
        np.greater_equal(t[a + k0:b + k0], target, out=good)
        if k0 > 0:
            before = scratch.get("before", (nb,), bool)
            np.less(t[a + k0 - 1:b + k0 - 1], target, out=before)
            good &= before
        uniform = bool(good.all())
    pre = scratch.get("pre", (nb,), bool)  # the window lies in the start's segment
    np.greater_equal(seg[a:b], 0, out=pre)
    if uniform:
        s = k0 + 1
        # a start less than s rows before its segment's end has no full window
        ends = s1[np.searchsorted(s1, a, side="right"):np.searchsorted(s1, b + s - 1)]
        lo = np.maximum(ends - (s - 1), a)
        cnt = np.maximum(np.minimum(ends, b) - lo, 0)
        if cnt.sum():
            pre[np.repeat(lo - a - np.cumsum(cnt) + cnt, cnt) + np.arange(cnt.sum())] = False
        if not pre.any():
            e = np.zeros(0, dtype=np.int64)
            return e, e, np.zeros((2, 0)), np.zeros((2, 0))
        _, mx, mn, w = next(_extrema_spans(axy, a, min(n, b + s - 1), [s], scratch))
        off = s - w
        m = min(nb, mx.shape[1] - off)  # starts past m have no full window
        wmx = scratch.get("wmx", (2, m))
        wmn = scratch.get("wmn", (2, m))
        np.maximum(mx[:, :m], mx[:, off:off + m], out=wmx)
        np.minimum(mn[:, :m], mn[:, off:off + m], out=wmn)
        r = scratch.get("r", (2, m))
        np.subtract(wmx, wmn, out=r)
        d = scratch.get("d", (m,))
        np.add(r[0], r[1], out=d)
        ok = scratch.get("ok", (m,), bool)
        np.less_equal(d, thr, out=ok)
        ok &= pre[:m]
        rel = np.flatnonzero(ok)
        first = rel[np.diff(rel, prepend=-2) != 1]  # heads of runs
        return rel + a, first + a, wmx[:, first], wmn[:, first]
    # window ends found one by one where the clock is irregular; sizes vary
    w_end = _first_at_or_after(t, target, np.arange(a + k0, b + k0))
    w_end = np.maximum(w_end, np.arange(a, b), out=w_end)
    w_end += 1
    k_lo = int(np.searchsorted(s1, a, side="right"))
    k_hi = int(np.searchsorted(s0, b, side="left"))
    s_end = np.full(nb, -1, dtype=np.int64)
    s_end[pre] = np.repeat(s1[k_lo:k_hi], np.minimum(s1[k_lo:k_hi], b)
                           - np.maximum(s0[k_lo:k_hi], a))
    rel = np.flatnonzero(s_end >= w_end)
    if len(rel) == 0:
        return rel, rel, np.zeros((2, 0)), np.zeros((2, 0))
    size = w_end[rel] - a
    size -= rel
    hi = min(n, b + int(size.max()) - 1)
    wmx = np.empty((2, len(rel)))
    wmn = np.empty((2, len(rel)))
    for s, mx, mn, w in _extrema_spans(axy, a, hi, np.unique(size).tolist(), scratch):
        sel = np.flatnonzero(size == s)
        r = rel[sel]
        wmx[:, sel] = np.maximum(mx[:, r], mx[:, r + s - w])
        wmn[:, sel] = np.minimum(mn[:, r], mn[:, r + s - w])
    r = wmx - wmn
    keep = np.flatnonzero(r[0] + r[1] <= thr)
    rel = rel[keep]
    head = np.diff(rel, prepend=-2) != 1
    first = keep[head]
    return rel + a, rel[head] + a, wmx[:, first], wmn[:, first]


def _grow_one(axy, p, stop, thr, mx=None, mn=None, m=64):
    """Growth end for one start, over exponentially larger chunks.

    With ``mx, mn`` (``(2, 1)``: per-axis extrema of the samples up to ``p``)
    the search goes on from ``p + 1``; without, it starts at ``p``.  Returns
    the first ``j`` at which D exceeds thr, else ``stop``.
    """
    lo = p if mx is None else p + 1
    while lo < stop:
        hi = min(lo + m, stop)
        b = axy[:, lo:hi]
        amx = np.maximum.accumulate(b, axis=1)
        amn = np.minimum.accumulate(b, axis=1)
        if mx is not None:
            np.maximum(amx, mx, out=amx)
            np.minimum(amn, mn, out=amn)
        mx, mn = amx[:, -1:].copy(), amn[:, -1:].copy()
        amx -= amn
        over = (amx[0] + amx[1]) > thr
        k = int(over.argmax())
        if over[k]:
            return lo + k
        lo = hi
        m *= 2
    return stop


def _walk_on(axy, i, known, okpos, s0, s1, thr):
    """The walk of fixations from start ``i`` on, one fixation at a time.

    ``known`` maps grown starts to ``(end, next start)``; others are grown
    here (:func:`_grow_one`).  Returns the starts and ends.
    """
    n = len(axy[0])
    first, end = s0.tolist(), s1.tolist()
    starts, ends = [], []
    m = 64
    while i < n:  # one iteration per fixation
        if i in known:
            e, f = known[i]
        else:
            stop = end[bisect.bisect_right(first, i) - 1]
            e = _grow_one(axy, i, stop, thr, m=m)
            m = max(64, 2 * (e - i))
            k = int(np.searchsorted(okpos, e))
            f = int(okpos[k]) if k < len(okpos) else n
        starts.append(i)
        ends.append(e)
        i = f
    return starts, ends


def _grow(axy, c, j0, stop, thr, wmx=None, wmn=None):
    """Growth ends of the fixations starting at ``c`` (whose windows ``[c, j0)`` pass).

    All starts advance together one sample column at a time, each keeping
    its running per-axis extrema (given for the windows as ``wmx, wmn``, or
    gathered here); a start is done at the first sample that makes D exceed
    the threshold, or at its segment end.  Done starts are dropped from the
    batch once they are half of it; the last few long growers finish one by
    one (:func:`_grow_one`).
    """
    ax, ay = axy
    e_all = np.empty(len(c), dtype=np.int64)
    for a in range(0, len(c), _IDT_BATCH):  # a loop over batches of starts
        sl = slice(a, a + _IDT_BATCH)
        sp = stop[sl]
        m = len(sp)
        v, w, d = np.empty(m), np.empty(m), np.empty(m)
        if wmx is not None:
            pos = j0[sl] - 1
            mxx, mxy, mnx, mny = wmx[0, sl], wmx[1, sl], wmn[0, sl], wmn[1, sl]
        else:
            pos = c[sl].copy()
            mxx, mxy = ax[pos], ay[pos]
            mnx, mny = mxx.copy(), mxy.copy()
            for _ in range(int((j0[sl] - pos).min()) - 1):  # inside every window: no test
                pos += 1
                ax.take(pos, out=v)
                ay.take(pos, out=w)
                np.maximum(mxx, v, out=mxx)
                np.minimum(mnx, v, out=mnx)
                np.maximum(mxy, w, out=mxy)
                np.minimum(mny, w, out=mny)
        mxx, mxy, mnx, mny = (np.array(u) for u in (mxx, mxy, mnx, mny))  # own copies
        idx = np.arange(a, a + m)
        live = np.ones(m, dtype=bool)
        n_live = m
        while n_live >= _IDT_MIN_ACTIVE:  # a loop over sample columns
            pos += 1
            ax.take(pos, out=v, mode="clip")  # past the segment end: done anyway
            ay.take(pos, out=w, mode="clip")
            np.maximum(mxx, v, out=mxx)
            np.minimum(mnx, v, out=mnx)
            np.maximum(mxy, w, out=mxy)
            np.minimum(mny, w, out=mny)
            np.subtract(mxx, mnx, out=v)
            np.subtract(mxy, mny, out=w)
            np.add(v, w, out=d)
            done = d > thr
            done |= pos >= sp
            done &= live
            k = np.flatnonzero(done)
            if len(k):
                e_all[idx[k]] = pos[k]
                live[k] = False
                n_live -= len(k)
                if n_live < len(pos) // 2:  # drop the done starts
                    pos, sp, idx = pos[live], sp[live], idx[live]
                    mxx, mxy, mnx, mny = mxx[live], mxy[live], mnx[live], mny[live]
                    m = len(pos)
                    v, w, d = np.empty(m), np.empty(m), np.empty(m)
                    live = np.ones(m, dtype=bool)
        for k in np.flatnonzero(live).tolist():  # the few long growers
            e_all[idx[k]] = _grow_one(axy, int(pos[k]), int(sp[k]), thr,
                                      np.array([[mxx[k]], [mxy[k]]]),
                                      np.array([[mnx[k]], [mny[k]]]))
    return e_all


def _chain(succ: np.ndarray) -> np.ndarray:
    """Indices visited from node 0 following ``succ`` (negative: the end), in order.

    Pointer doubling: after round r the walk holds the first 2**r nodes and
    ``jump`` leads 2**r steps on; O(N log N) integer gathers, no Python loop.
    """
    nn = len(succ)
    jump = np.append(np.where(succ >= 0, succ, nn), nn)  # nn: past the end, stays there
    walk = np.zeros(1, dtype=np.int64)
    while True:  # a loop over doublings (log2 of the chain length)
        step = jump[walk]
        step = step[step < nn]
        if len(step) == 0:
            return walk
        walk = np.concatenate([walk, step])
        jump = jump[jump]


def idt(samples: pd.DataFrame, *, display: "Display", dispersion_threshold_deg: float = 1.0,
        min_fixation_ms: float = 60.0, interval_ms: float | None = None) -> pd.DataFrame:
    """Dispersion-threshold identification (I-DT) of fixations.

    Exactly the sequential definition of Salvucci & Goldberg (2000): a window
    starting at the current sample covers ``min_fixation_ms``; its dispersion
    is ``D = (max x - min x) + (max y - min y)`` with x, y the per-axis visual
    angles (deg).  If ``D <= dispersion_threshold_deg`` the window grows sample
    by sample until ``D`` would exceed the threshold and becomes a fixation; the
    next window starts after it.  Otherwise the window start moves on by one
    sample.  Windows never cross a data loss or a pause (segment boundary).

    Implemented without a Python loop over samples.  In blocks, the initial
    window of every start is tested with running extrema over doubling spans
    (a window of ``w`` samples is two overlapping spans of a power of two;
    exact, as only max and min are taken).  The fixation from a passing start
    ``i`` ends at ``E(i)``, and the next one starts at the first passing start
    at or after ``E(i)``.  ``E`` is computed in a few rounds for batches of
    candidate starts: first the heads of runs of passing starts, then the next
    starts reached from the last round that are still unknown.  A batch grows
    together one sample column at a time, each start keeping its running
    per-axis extrema, until ``D`` exceeds the threshold or its segment ends
    (the few long growers finish on their own over exponentially larger
    chunks; the few candidates left after the rounds are followed one
    fixation at a time).  The walk from the first passing start is then read
    off by pointer doubling.  Every D is computed exactly as defined above,
    so the fixations are those of the sequential definition, bit for bit.

    A window covers ``min_fixation_ms`` when its duration, last sample time
    minus first plus one interval, reaches it.

    References
    ----------
    Salvucci, D. D., & Goldberg, J. H. (2000). Identifying fixations and saccades
    in eye-tracking protocols. Proc. ETRA 2000, 71-78.
    """
    from ._chunks import map_blocks

    t_all = samples["t_ms"].to_numpy(dtype=float)
    if interval_ms is None:
        interval_ms = nominal_interval_ms(t_all)
    s = _ensure_filled(samples, interval_ms)
    t, x, y, seg, raw_valid = _arrays(s)
    n = len(t)
    if n == 0:
        return _table(np.array([]), np.array([]), t, x, y, raw_valid, interval_ms)
    thr = float(dispersion_threshold_deg)
    axy = _deg_rows(x, y, display)
    s0, s1 = _segment_runs(seg)
    # window end (exclusive) for each start: first j with t[j-1] >= t[i] + min - interval
    eps = 1e-9 * max(1.0, abs(float(t[0])), abs(float(t[-1])))  # max |t|: t is sorted
    probe = np.arange(0, n, max(1, n // 1024))
    k0 = max(0, int(np.median(np.searchsorted(t, t[probe] + min_fixation_ms - interval_ms
                                              - eps) - probe)))  # the usual last row - i
    scratch = _Scratch()
    parts = map_blocks(
        lambda a, b: _ok_starts(axy, t, seg, s0, s1, a, b, thr, min_fixation_ms,
                                interval_ms, eps, k0, scratch), n, size=_IDT_BLOCK)
    del scratch
    okpos = np.concatenate([p[0] for p in parts])
    if len(okpos) == 0:
        return _table(np.array([]), np.array([]), t, x, y, raw_valid, interval_ms)
    new = np.concatenate([p[1] for p in parts])  # starts of runs of passing starts
    wmx = np.concatenate([p[2] for p in parts], axis=1)
    wmn = np.concatenate([p[3] for p in parts], axis=1)
    del parts
    at = np.flatnonzero(new % _IDT_BLOCK == 0)  # a block's first row heads a run there
    if len(at):
        k = np.minimum(np.searchsorted(okpos, new[at] - 1), len(okpos) - 1)
        keep = np.ones(len(new), dtype=bool)
        keep[at[okpos[k] == new[at] - 1]] = False  # the run began in the block before
        new, wmx, wmn = new[keep], wmx[:, keep], wmn[:, keep]

    def next_ok(e):  # first passing start at or after e (n when none)
        k = np.searchsorted(okpos, e)
        return np.where(k < len(okpos), okpos[np.minimum(k, len(okpos) - 1)], n)

    # rounds of batch growth over the candidate starts the walk may visit
    seen = np.zeros(n + 1, dtype=bool)
    seen[n] = True
    cs, es, fs = [], [], []
    while len(new) >= _IDT_MIN_ROUND:  # a loop over rounds (a few)
        seen[new] = True
        j0 = _window_end(t, new, min_fixation_ms, interval_ms, eps, k0)
        e = _grow(axy, new, j0, _segment_end(s0, s1, new), thr, wmx, wmn)
        wmx = wmn = None
        f = next_ok(e)
        cs.append(new)
        es.append(e)
        fs.append(f)
        new = np.unique(f[~seen[f]])
    del seen
    c = np.concatenate(cs) if cs else np.zeros(0, dtype=np.int64)
    order = np.argsort(c)
    c = c[order]
    e = np.concatenate(es)[order] if cs else c
    f = np.concatenate(fs)[order] if cs else c
    i = int(okpos[0])  # the first start
    starts = ends = np.zeros(0, dtype=np.int64)
    if len(c) and c[0] == i:  # the first start began the first run: grown
        k = np.minimum(np.searchsorted(c, f), len(c) - 1)
        succ = np.where(c[k] == f, k, -1)  # -1: the end, or a start not grown
        walk = _chain(succ)
        starts, ends = c[walk], e[walk]
        i = int(f[walk[-1]])
    if i < n:  # rare: the walk reaches a start no round grew
        known = dict(zip(c.tolist(), zip(e.tolist(), f.tolist())))
        more = _walk_on(axy, i, known, okpos, s0, s1, thr)
        starts = np.concatenate([starts, np.array(more[0], dtype=np.int64)])
        ends = np.concatenate([ends, np.array(more[1], dtype=np.int64)])
    return _table(starts, ends, t, x, y, raw_valid, interval_ms)


# --------------------------------------------------------------------------- post-processing

def merge_and_discard(fixations: pd.DataFrame, samples: pd.DataFrame, *, display: "Display",
                      merge_max_gap_ms: float = 75.0, merge_max_angle_deg: float = 1.0,
                      min_fixation_ms: float = 60.0,
                      interval_ms: float | None = None) -> pd.DataFrame:
    """Merge fixations split by a short gap and a small angle, then drop short ones.

    Two consecutive fixations in the same segment are merged when the time
    from the first's offset to the second's onset is at most
    ``merge_max_gap_ms`` and the angle between their positions is at most
    ``merge_max_angle_deg``; chains merge into one.  The merged fixation spans
    both and the samples between them.  Fixations shorter than
    ``min_fixation_ms`` are then discarded (common practice; REFERENCES.md,
    post-processing conventions).
    """
    return _merge_and_discard(fixations, samples, display=display,
                              merge_max_gap_ms=merge_max_gap_ms,
                              merge_max_angle_deg=merge_max_angle_deg,
                              min_fixation_ms=min_fixation_ms, interval_ms=interval_ms)


def _merge_and_discard(fixations: pd.DataFrame, samples: pd.DataFrame, *, display: "Display",
                       merge_max_gap_ms: float, merge_max_angle_deg: float,
                       min_fixation_ms: float, interval_ms: float | None,
                       means_are_ours: bool = False) -> pd.DataFrame:
    """:func:`merge_and_discard`; ``means_are_ours``: the table's ``x_px, y_px``
    come from :func:`_table` over these samples (a detector's output), so runs
    that no merge changes keep them instead of being summed again."""
    t_all = samples["t_ms"].to_numpy(dtype=float)
    if interval_ms is None:
        interval_ms = nominal_interval_ms(t_all)
    s = _ensure_filled(samples, interval_ms)
    t, x, y, seg, raw_valid = _arrays(s)
    starts = fixations["start_row"].to_numpy(dtype=np.int64)
    ends = fixations["end_row"].to_numpy(dtype=np.int64)
    known = None
    if means_are_ours and len(starts):
        known = (np.arange(len(starts)), fixations["x_px"].to_numpy(float),
                 fixations["y_px"].to_numpy(float))
    if len(starts) > 1 and merge_max_angle_deg > 0:
        fx = fixations["x_px"].to_numpy(float)
        fy = fixations["y_px"].to_numpy(float)
        gap = fixations["onset_ms"].to_numpy(float)[1:] - fixations["offset_ms"].to_numpy(float)[:-1]
        same_seg = seg[starts[1:]] == seg[ends[:-1] - 1]
        ang = geometry.angle_between_deg(fx[:-1], fy[:-1], fx[1:], fy[1:], display)
        join = same_seg & (gap <= merge_max_gap_ms) & (ang <= merge_max_angle_deg)
        first = np.concatenate([[True], ~join])
        lastm = np.concatenate([~join, [True]])
        starts = starts[first]
        ends = ends[lastm]
        if known is not None:  # runs no merge joined keep their means
            alone = np.flatnonzero(lastm[first])  # the new run is one old run
            old = np.flatnonzero(first)[alone]
            known = (alone, known[1][old], known[2][old])
    out = _table(starts, ends, t, x, y, raw_valid, interval_ms, known=known)
    keep = out["duration_ms"].to_numpy() >= min_fixation_ms - 1e-9
    out = out[keep].reset_index(drop=True)
    out["fixation"] = np.arange(1, len(out) + 1, dtype=np.int64)
    out.attrs.update(fixations.attrs)
    return out


def detect_filled(filled: pd.DataFrame, *, display: "Display", detection: "Detection",
                  interval_ms: float, cache: dict | None = None) -> pd.DataFrame:
    """Run the chosen method on gap-filled samples, then merge and discard.

    ``cache`` (a dict the caller keeps for one gap-filled frame) holds the
    velocity per velocity option set, so threshold sweeps compute it once.
    """
    if detection.method == "ivt_pursuit":
        from .pursuit import _merge_and_discard_events, ivt_pursuit

        _, events = ivt_pursuit(
            filled, display=display, interval_ms=interval_ms,
            saccade_threshold_deg_s=detection.saccade_threshold_deg_s,
            saccade_onset_deg_s=detection.velocity_threshold_deg_s,
            noise_factor=detection.noise_factor,
            velocity_window_ms=detection.velocity_window_ms,
            pursuit_window_ms=detection.pursuit_window_ms,
            pursuit_min_speed_deg_s=detection.pursuit_min_speed_deg_s,
            pursuit_z=detection.pursuit_z, min_fixation_ms=detection.min_fixation_ms,
            min_pursuit_ms=detection.min_pursuit_ms)
        _, events = _merge_and_discard_events(
            events, filled, display=display, merge_max_gap_ms=detection.merge_max_gap_ms,
            merge_max_angle_deg=detection.merge_max_angle_deg,
            min_fixation_ms=detection.min_fixation_ms, interval_ms=interval_ms)
        return events
    if detection.method == "idt":
        raw = idt(filled, display=display,
                  dispersion_threshold_deg=detection.dispersion_threshold_deg,
                  min_fixation_ms=detection.min_fixation_ms, interval_ms=interval_ms)
    else:
        velocity = None
        if cache is not None:
            key = ("velocity", detection.velocity_window_ms, detection.smoothing,
                   detection.smoothing_window_ms)
            if key not in cache:
                cache[key] = velocity_and_noise(
                    filled, display=display, window_ms=detection.velocity_window_ms,
                    interval_ms=interval_ms, smoothing=detection.smoothing,
                    smoothing_window_ms=detection.smoothing_window_ms)
            velocity = cache[key]
        raw = ivt(filled, display=display,
                  velocity_threshold_deg_s=detection.velocity_threshold_deg_s,
                  noise_factor=detection.noise_factor,
                  velocity_window_ms=detection.velocity_window_ms,
                  smoothing=detection.smoothing,
                  smoothing_window_ms=detection.smoothing_window_ms,
                  interval_ms=interval_ms, velocity=velocity)
    return _merge_and_discard(raw, filled, display=display,
                              merge_max_gap_ms=detection.merge_max_gap_ms,
                              merge_max_angle_deg=detection.merge_max_angle_deg,
                              min_fixation_ms=detection.min_fixation_ms,
                              interval_ms=interval_ms, means_are_ours=True)


def detect_fixations(samples: pd.DataFrame, *, display: "Display", detection: "Detection",
                     interval_ms: float | None = None) -> pd.DataFrame:
    """The whole detection stage: fill gaps, run the chosen method, merge and discard.

    Parameters
    ----------
    samples : DataFrame
        Tidy samples from :func:`aoi_fix.read_samples`.
    display, detection
        The ``[display]`` and ``[detection]`` sections of the study.
    interval_ms : float, optional
        Nominal sample interval; default the median time step.

    Returns
    -------
    DataFrame
        The fixation table (see module docstring).
    """
    t = samples["t_ms"].to_numpy(dtype=float)
    if interval_ms is None:
        interval_ms = nominal_interval_ms(t)
    filled = fill_gaps(samples, max_gap_ms=detection.max_gap_ms, interval_ms=interval_ms)
    return detect_filled(filled, display=display, detection=detection, interval_ms=interval_ms)
