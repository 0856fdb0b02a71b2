"""Fixations and smooth pursuit: telling a still eye from an eye following a target.

Children watching a storyteller follow moving faces and hands.  I-VT calls
a slow pursuit a fixation (it is below any saccade threshold), and I-DT cuts
it into fixations or drops it (its dispersion grows with time).
:func:`ivt_pursuit` separates the two in two stages, in the manner of the
two-threshold detectors of Komogortsev & Karpov (2013):

1. **Saccades** by velocity, as in :func:`aoi_fix.detect.ivt`: the
   windowed angular velocity against ``max(saccade_threshold_deg_s,
   noise_factor * sigma)`` (Engbert & Kliegl 2003 noise estimate).  Each
   saccade then takes in the flanks of its velocity peak while the speed
   keeps falling and stays above ``saccade_onset_deg_s`` (a detection and
   an onset threshold, as in Nystrom & Holmqvist 2010), and I-VT's edge
   refinement gives back to the neighbours what the velocity window took.
   What is left within a segment are *intersaccadic intervals*.
2. **Pursuit or fixation** inside each interval, per sample, from the gaze
   velocity fitted by least squares over a window centred on the sample (cut
   at the interval's ends, so a saccade never leaks in).  A fitted velocity
   is the net displacement per unit time over the whole window, so it is
   consistent in direction by construction; tracker noise averages out of
   it.  A sample is a pursuit candidate when the fitted speed is both

   * at least ``pursuit_min_speed_deg_s`` (a floor below which gaze movement
     is treated as fixational drift), and
   * at least ``pursuit_z`` standard errors above zero, the standard error
     coming from the measured position noise (robust, from second
     differences) and the window's sample times (the noise-adaptive part:
     on noisy or slow data the detectable speed rises instead of noise
     turning into pursuit).
3. **Clean-up**, per interval: each pursuit run's ends move to where the
   fitted speed crosses half the run's mean speed (exact for a noise-free
   change from still to moving); fixation runs shorter than
   ``min_fixation_ms`` that touch a pursuit become pursuit; pursuit runs
   shorter than ``min_pursuit_ms`` become fixation.
4. **Jumps**: a small saccade that the velocity threshold missed (common at
   60 Hz with infant-level noise) leaves a jump, and every window around it
   fits a velocity.  Each pursuit run is cut at jumps (a two-level or a
   line-plus-jump model beats one line, see ``_segment_runs``) and each
   piece is judged again on its own least-squares speed and duration.

Why not dispersion for stage 2?  The dispersion of a still eye over a
window grows with tracker noise: with white noise of 0.15 deg per axis, 60
samples (200 ms at 300 Hz) already span about 1.4 deg (x range + y range),
more than a typical 1 deg threshold.  The fitted velocity's noise instead
shrinks with the number of samples and is known from the noise level.

Label codes
-----------
Per-sample labels are a :class:`pandas.Categorical` with the categories of
:data:`LABELS`, in this order, so ``labels.codes`` are small integers::

    0  fixation   inside a fixation event
    1  saccade    fast, or in no event (between two intervals)
    2  loss       no measurement (invalid, including bridged short dropouts)
    3  pursuit    inside a pursuit event

These are the label categories (and codes) of :func:`aoi_fix.simulate.simulate_gaze`
with pursuit enabled, so a detection and the truth compare directly.

References
----------
.. [1] Komogortsev, O. V., & Karpov, A. (2013). Automated classification and
   scoring of smooth pursuit eye movements in the presence of fixations and
   saccades. *Behavior Research Methods*, 45, 203-215 (two-stage velocity /
   dispersion classifiers; citation details from memory).
.. [2] Larsson, L., Nystrom, M., Andersson, R., & Stridh, M. (2015). Detection
   of fixations and smooth pursuit movements in high-speed eye-tracking
   data. *Biomedical Signal Processing and Control*, 18, 145-152 (pursuit
   told from fixation inside intersaccadic intervals by the consistency of
   the movement's direction and its spatial range; from memory).
.. [3] Salvucci, D. D., & Goldberg, J. H. (2000). Identifying fixations and
   saccades in eye-tracking protocols. *Proc. ETRA 2000*, 71-78.
.. [4] Engbert, R., & Kliegl, R. (2003). Microsaccades uncover the orientation
   of covert attention. *Vision Research*, 43, 1035-1045.
.. [5] Nystrom, M., & Holmqvist, K. (2010). An adaptive algorithm for fixation,
   saccade, and glissade detection in eyetracking data. *Behavior Research
   Methods*, 42, 188-204 (peak and onset velocity thresholds).
"""

from __future__ import annotations

import logging
from typing import TYPE_CHECKING

import numpy as np
import pandas as pd

from . import geometry
from .detect import (FIXATION_COLUMNS, _arrays, _ensure_filled, _refine_edges, _runs, _table,
                     merge_and_discard, noise_velocity_deg_s, velocity_deg_s)
from .samples import nominal_interval_ms

if TYPE_CHECKING:  # pragma: no cover
    from .config import Display

__all__ = ["ivt_pursuit", "LABELS", "EVENT_COLUMNS"]

log = logging.getLogger(__name__)

#: Per-sample label categories; the position is the integer code.
LABELS = ("fixation", "saccade", "loss", "pursuit")
_FIX, _SAC, _LOSS, _PUR = 0, 1, 2, 3

_MIN_NOISE_DEG = 0.01

#: Columns of the event table: the fixation table's plus ``event_type``.
EVENT_COLUMNS = FIXATION_COLUMNS + ["event_type"]


def _labels(codes: np.ndarray) -> pd.Categorical:
    return pd.Categorical.from_codes(codes.astype(np.int8), categories=list(LABELS))


def _events(starts, ends, kinds, t, x, y, raw_valid, interval_ms) -> pd.DataFrame:
    """Event table (fixation table + ``event_type``) from runs, in time order."""
    order = np.argsort(starts, kind="stable")
    starts, ends, kinds = starts[order], ends[order], kinds[order]
    out = _table(starts, ends, t, x, y, raw_valid, interval_ms)
    out["event_type"] = pd.Series(np.where(kinds == _PUR, "pursuit", "fixation"),
                                  dtype=object)
    return out


def _codes_from_events(events: pd.DataFrame, seg: np.ndarray, valid: np.ndarray) -> np.ndarray:
    """Per-sample codes: event rows by type, loss without measurement, else saccade."""
    n = len(seg)
    codes = np.full(n, _SAC, dtype=np.int8)
    if len(events):
        st = events["start_row"].to_numpy(np.int64)
        en = events["end_row"].to_numpy(np.int64)
        kind = np.where(events["event_type"].to_numpy() == "pursuit", _PUR, _FIX)
        # events never overlap: paint them with a difference array of kinds
        mark = np.zeros(n + 1, dtype=np.int64)
        np.add.at(mark, st, kind + 1)
        np.add.at(mark, en, -(kind + 1))
        paint = np.cumsum(mark)[:n]
        codes[paint > 0] = (paint[paint > 0] - 1).astype(np.int8)
    codes[(seg < 0) | ~valid] = _LOSS
    return codes


def _position_noise_deg(ax, ay, use, group) -> float:
    """Robust per-axis SD of white position noise from second differences.

    ``x[i+1] - 2 x[i] + x[i-1]`` cancels any constant velocity (fixation or
    pursuit alike) and has variance ``6 sigma^2`` for white noise; sigma is
    taken from its median absolute value (x 1.4826, the normal consistency
    constant).  Only triples of measured samples in one interval count.
    """
    if len(ax) < 3:
        return 0.0
    ok = (use[:-2] & use[1:-1] & use[2:] & (group[:-2] >= 0)
          & (group[:-2] == group[1:-1]) & (group[1:-1] == group[2:]))
    if ok.sum() < 10:
        return 0.0
    d2x = (ax[2:] - 2.0 * ax[1:-1] + ax[:-2])[ok]
    d2y = (ay[2:] - 2.0 * ay[1:-1] + ay[:-2])[ok]
    sx = 1.4826 * np.median(np.abs(d2x)) / np.sqrt(6.0)
    sy = 1.4826 * np.median(np.abs(d2y)) / np.sqrt(6.0)
    return float(np.sqrt((sx * sx + sy * sy) / 2.0))


def _fitted_velocity(t, ax, ay, use, group, g_start, g_end, h):
    """Least-squares gaze velocity (deg/s) over +-h samples, cut at the interval.

    Returns ``vx, vy, sxx, count`` where ``sxx`` is the sum of squared time
    deviations (s^2) of the window's measured samples: the standard error of
    each velocity component is ``sigma / sqrt(sxx)``.  All sums come from
    cumulative sums of times and positions taken relative to the start of
    each interval (small numbers, so differences of sums stay accurate).
    """
    n = len(t)
    idx = np.arange(n)
    inside = group >= 0
    base = np.where(inside, g_start, idx)
    tau = np.where(inside, (t - t[base]) / 1000.0, 0.0)
    px = np.where(use, ax - ax[base], 0.0)
    py = np.where(use, ay - ay[base], 0.0)
    w = use.astype(float)
    tau = tau * w

    def csum(a):
        return np.concatenate([[0.0], np.cumsum(a)])

    cw, ct, ctt = csum(w), csum(tau), csum(tau * tau)
    cx, cxt = csum(px), csum(px * tau)
    cy, cyt = csum(py), csum(py * tau)
    lo = np.where(inside, np.maximum(idx - h, g_start), idx)
    hi = np.where(inside, np.minimum(idx + h + 1, g_end), idx)
    cnt = cw[hi] - cw[lo]
    st, stt = ct[hi] - ct[lo], ctt[hi] - ctt[lo]
    sx, sxt = cx[hi] - cx[lo], cxt[hi] - cxt[lo]
    sy, syt = cy[hi] - cy[lo], cyt[hi] - cyt[lo]
    with np.errstate(invalid="ignore", divide="ignore"):
        sxx = stt - st * st / cnt
        vx = (sxt - st * sx / cnt) / sxx
        vy = (syt - st * sy / cnt) / sxx
    bad = (cnt < 3) | ~(sxx > 0)
    vx[bad] = np.nan
    vy[bad] = np.nan
    sxx = np.where(bad, np.nan, sxx)
    return vx, vy, sxx, cnt


def _run_duration_ms(starts, ends, t, interval_ms):
    return t[ends - 1] - t[starts] + interval_ms


def ivt_pursuit(samples: pd.DataFrame, *, display: "Display", interval_ms: float | None = None,
                saccade_threshold_deg_s: float = 60.0, saccade_onset_deg_s: float = 30.0,
                noise_factor: float = 5.0,
                velocity_window_ms: float = 20.0, pursuit_window_ms: float = 200.0,
                pursuit_min_speed_deg_s: float = 1.5, pursuit_z: float = 3.5,
                min_fixation_ms: float = 60.0, min_pursuit_ms: float = 100.0,
                jump_alpha: float = 0.001) -> tuple[pd.Categorical, pd.DataFrame]:
    """Fixations, saccades and smooth pursuit: I-VT for saccades, fitted velocity for pursuit.

    Stage 1 finds saccades by velocity (noise-adaptive threshold as
    :func:`aoi_fix.detect.ivt`, onset threshold for their flanks, edge
    refinement).  Stage 2 splits each intersaccadic interval into fixation
    and pursuit: a sample is pursuit when the least-squares gaze velocity
    over ``pursuit_window_ms`` around it (cut at the interval's ends) is at
    least ``pursuit_min_speed_deg_s`` and at least ``pursuit_z`` standard
    errors (from the measured position noise).  Pursuit runs are then
    cleaned (ends at half speed, short fixations between pursuit absorbed,
    runs shorter than ``min_pursuit_ms`` dropped) and cut at jumps left by
    missed saccades.  See the module docstring for the reasoning.

    Parameters
    ----------
    samples : DataFrame
        Gap-filled samples (:func:`aoi_fix.clean.fill_gaps` output: ``t_ms,
        x_px, y_px, valid, filled, segment``); plain tidy samples are
        treated with no gap filling.
    display : Display
        Screen geometry for visual angles.
    interval_ms : float, optional
        Nominal sample interval; default the median time step.
    saccade_threshold_deg_s : float
        Lowest saccade velocity threshold, default 60 deg/s: above the
        fastest pursuit to be kept (~30 deg/s) plus noise, below the peak
        velocity of the smallest saccades of interest (a 2 deg saccade peaks
        near 150 deg/s on the main sequence; REFERENCES.md, from memory).
        I-VT's usual 30 deg/s would cut fast pursuit into saccades.
    saccade_onset_deg_s : float
        A saccade's flanks belong to it while the speed falls away from its
        peak and stays at or above ``max(this, noise_factor * sigma)``
        (capped at the detection threshold); default 30 deg/s, I-VT's
        usual threshold (common practice).  Without it the higher detection
        threshold would leave saccade flanks in fixations.
    noise_factor : float
        The threshold is at least this many robust SDs of the velocity noise
        (Engbert & Kliegl 2003), default 5 as in :func:`aoi_fix.detect.ivt`.
    velocity_window_ms : float
        Span of the central difference for saccade velocity, default 20 ms.
    pursuit_window_ms : float
        Span of the least-squares velocity fit, default 200 ms (the 100-200
        ms windows of pursuit classifiers, from memory): longer windows see
        slower pursuit through more noise but blur its onset and offset by
        about half a window.
    pursuit_min_speed_deg_s : float
        Floor on the fitted speed, default 1.5 deg/s: slower movement is
        treated as fixational drift (a few deg/s separates the two in the
        pursuit literature, from memory).  Our simulated fixations may follow
        a target at up to 2 deg/s; lower the floor only for quiet data.
    pursuit_z : float
        How many standard errors the fitted speed must exceed, default 3.5.
        For a still eye the ratio is Rayleigh distributed, so about
        ``exp(-z^2 / 2)`` of windows (0.2 % at 3.5) pass by chance, and most
        such blips are shorter than ``min_pursuit_ms``.
    min_fixation_ms : float
        Fixation pieces shorter than this that touch a pursuit in the same
        interval are absorbed into it; default 60 ms as the fixation
        minimum of the ``[detection]`` section (common practice).  Isolated
        short fixations are kept, as :func:`aoi_fix.detect.ivt` keeps them:
        discarding is :func:`aoi_fix.detect.merge_and_discard`'s job.
    min_pursuit_ms : float
        Pursuit pieces shorter than this become fixation; default 100 ms.
        Keep it above ``merge_max_gap_ms`` so that merging fixations can
        never swallow a pursuit between them.
    jump_alpha : float
        Chance that white noise alone cuts a pursuit run at a "jump" (see
        step 4 of the module docstring); default 0.001.  Smaller values cut
        less often.

    Returns
    -------
    labels : pandas.Categorical
        One label per sample, categories :data:`LABELS` (codes 0 fixation,
        1 saccade, 2 loss, 3 pursuit).  Samples without a measurement are
        ``loss`` even when a bridged dropout lies inside an event.
    events : DataFrame
        One row per fixation or pursuit, in time order, with the columns of
        the fixation table (:data:`aoi_fix.detect.FIXATION_COLUMNS`; the
        ``fixation`` column numbers all events from 1, ``x_px, y_px`` is the
        mean position, for a pursuit the middle of its path) plus
        ``event_type`` (``"fixation"`` or ``"pursuit"``).  ``attrs`` hold
        ``velocity_threshold_used_deg_s``, ``noise_velocity_deg_s`` and
        ``position_noise_deg``.  An empty input gives empty, typed outputs.

    References
    ----------
    Komogortsev, O. V., & Karpov, A. (2013). Automated classification and
    scoring of smooth pursuit eye movements in the presence of fixations and
    saccades. Behavior Research Methods, 45, 203-215 (from memory).
    Larsson, L., Nystrom, M., Andersson, R., & Stridh, M. (2015). Detection of
    fixations and smooth pursuit movements in high-speed eye-tracking data.
    Biomedical Signal Processing and Control, 18, 145-152 (from memory).
    Salvucci, D. D., & Goldberg, J. H. (2000). Identifying fixations and
    saccades in eye-tracking protocols. Proc. ETRA 2000, 71-78.
    Engbert, R., & Kliegl, R. (2003). Microsaccades uncover the orientation of
    covert attention. Vision Research, 43, 1035-1045.

    Examples
    --------
    A still eye, then 400 ms following a target at 10 deg/s (100 Hz,
    noise-free; 0.5 mm pixels at 600 mm, so about 20.9 px per degree):

    >>> from aoi_fix.config import Display
    >>> disp = Display(1000, 1000, 500.0, 500.0, 600.0)
    >>> t = np.arange(80) * 10.0
    >>> x = 500.0 + np.clip(t - 400.0, 0.0, None) * 0.2094
    >>> s = pd.DataFrame({"t_ms": t, "x_px": x, "y_px": 500.0, "valid": True})
    >>> labels, events = ivt_pursuit(s, display=disp)
    >>> events[["onset_ms", "offset_ms", "event_type"]].values.tolist()
    [[0.0, 400.0, 'fixation'], [400.0, 800.0, 'pursuit']]
    """
    t_all = samples["t_ms"].to_numpy(dtype=float)
    if interval_ms is None:
        interval_ms = nominal_interval_ms(t_all) if len(t_all) > 1 else 1.0
    s = _ensure_filled(samples, interval_ms)
    t, x, y, seg, raw_valid = _arrays(s)
    valid = s["valid"].to_numpy(dtype=bool)
    n = len(t)
    empty = np.array([], dtype=np.int64)
    if n == 0:
        ev = _events(empty, empty, empty, t, x, y, raw_valid, interval_ms)
        return _labels(np.zeros(0, np.int8)), ev

    # stage 1: saccades by velocity (as detect.ivt)
    speed, vx, vy = velocity_deg_s(s, display=display, window_ms=velocity_window_ms,
                                   interval_ms=interval_ms)
    sigma_v = noise_velocity_deg_s(vx, vy)
    thr = max(saccade_threshold_deg_s, noise_factor * sigma_v)
    onset = min(max(saccade_onset_deg_s, noise_factor * sigma_v), thr)
    with np.errstate(invalid="ignore"):
        slow = (seg >= 0) & (speed < thr)
    slow = _extend_saccades(slow, speed, seg, onset)
    g_st, g_en = _runs(slow, seg)
    g_st, g_en = _refine_edges(g_st, g_en, x, y, seg)
    # interval number of each sample (-1 outside), its first and one-past-last row
    lengths = g_en - g_st
    rows = np.repeat(g_st, lengths) + (np.arange(lengths.sum())
                                       - np.repeat(np.cumsum(lengths) - lengths, lengths))
    group = np.full(n, -1, dtype=np.int64)
    group[rows] = np.repeat(np.arange(len(g_st)), lengths)
    g_start = np.where(group >= 0, g_st[np.maximum(group, 0)] if len(g_st) else 0, -1)
    g_end = np.where(group >= 0, g_en[np.maximum(group, 0)] if len(g_st) else 0, -1)

    # stage 2: fitted velocity over a window inside each interval
    ax, ay = geometry.px_to_deg(x, y, display)
    use = raw_valid & (group >= 0) & np.isfinite(ax) & np.isfinite(ay)
    # below ~0.01 deg the estimate says more about rounding and the curvature
    # of px -> deg than about the tracker (a floor, from memory of the best
    # trackers' precision): it keeps the tests below from splitting hairs
    sigma_pos = max(_position_noise_deg(ax, ay, use, group), _MIN_NOISE_DEG)
    h = max(1, int(round(pursuit_window_ms / (2.0 * interval_ms))))
    fvx, fvy, sxx, _ = _fitted_velocity(t, ax, ay, use, group, g_start, g_end, h)
    fit_speed = np.hypot(fvx, fvy)
    with np.errstate(invalid="ignore", divide="ignore"):
        se = sigma_pos / np.sqrt(sxx)
        moving = (group >= 0) & (fit_speed >= pursuit_min_speed_deg_s) & (
            fit_speed >= pursuit_z * se)

    # clean-up within intervals: edges at half speed; short fixation next to
    # pursuit -> pursuit (closes gaps that noise tears); short pursuit -> fixation
    moving = _refine_pursuit_edges(moving, group, g_start, g_end, fit_speed,
                                   pursuit_min_speed_deg_s, h)
    moving = _absorb_short_fixations(moving, group, t, interval_ms, min_fixation_ms)
    moving = _drop_short(moving, group, t, interval_ms, min_pursuit_ms)
    # each pursuit run: split at jumps (a missed saccade), then judge each piece
    p_st, p_en = _runs(moving, group)
    moving, cuts = _segment_runs(p_st, p_en, t, ax, ay, use, sigma_pos, interval_ms,
                                 floor_deg_s=pursuit_min_speed_deg_s, z=pursuit_z,
                                 min_pursuit_ms=min_pursuit_ms,
                                 jump_alpha=jump_alpha,
                                 blip_ms=1.5 * pursuit_window_ms, moving=moving)
    if len(cuts):
        boundary = np.zeros(n, dtype=bool)
        boundary[g_st] = True
        boundary[cuts] = True
        group = np.where(group >= 0, np.cumsum(boundary) - 1, -1)
    still = (group >= 0) & ~moving

    p_st, p_en = _runs(moving, group)
    f_st, f_en = _runs(still, group)
    starts = np.concatenate([f_st, p_st])
    ends = np.concatenate([f_en, p_en])
    kinds = np.concatenate([np.full(len(f_st), _FIX), np.full(len(p_st), _PUR)])
    events = _events(starts, ends, kinds, t, x, y, raw_valid, interval_ms)
    events.attrs["velocity_threshold_used_deg_s"] = float(thr)
    events.attrs["noise_velocity_deg_s"] = float(sigma_v)
    events.attrs["position_noise_deg"] = float(sigma_pos)
    log.info("pursuit detection: saccade threshold %.1f deg/s, position noise %.3f deg, "
             "%d fixations, %d pursuits", thr, sigma_pos, len(f_st), len(p_st))
    return _labels(_codes_from_events(events, seg, valid)), events


def _extend_saccades(slow, speed, seg, onset_deg_s):
    """Grow each saccade down both flanks of its velocity peak.

    From the first and last sample above the detection threshold, a saccade
    takes in neighbouring samples while the speed keeps falling away from
    the peak and stays at or above ``onset_deg_s`` (a peak threshold for
    detection and a lower one for the extent, as in Nystrom & Holmqvist
    2010).  Stopping where the fall stops keeps a pursuit next to the
    saccade out of it even when the pursuit is faster than ``onset_deg_s``.
    Vectorised: the flank ends are found with running maxima/minima of the
    positions where the descent breaks.
    """
    n = len(slow)
    if n < 2:
        return slow
    sp = np.where(np.isfinite(speed), speed, -np.inf)
    idx = np.arange(n)
    fast = (seg >= 0) & ~slow
    same_next = np.concatenate([seg[1:] == seg[:-1], [False]])  # i and i + 1 in one segment
    # backward flank: i joins when sp[i] < sp[i + 1] (falling going back) and sp[i] >= onset
    down_back = np.concatenate([sp[:-1] < sp[1:], [False]]) & same_next & (sp >= onset_deg_s)
    # a sample joins if a chain of down_back samples leads to a fast sample after it
    # first index >= i that is not down_back
    nb = np.where(~down_back, idx, n)
    first_break = np.minimum.accumulate(nb[::-1])[::-1]
    join_back = down_back & (first_break < n) & fast[np.minimum(first_break, n - 1)]
    # forward flank: i joins when sp[i] < sp[i - 1] and sp[i] >= onset
    same_prev = np.concatenate([[False], seg[1:] == seg[:-1]])
    down_fwd = np.concatenate([[False], sp[1:] < sp[:-1]]) & same_prev & (sp >= onset_deg_s)
    nf = np.where(~down_fwd, idx, -1)
    last_break = np.maximum.accumulate(nf)
    join_fwd = down_fwd & (last_break >= 0) & fast[np.maximum(last_break, 0)]
    return slow & ~join_back & ~join_fwd


def _absorb_short_fixations(moving, group, t, interval_ms, min_fixation_ms):
    """Fixation runs shorter than ``min_fixation_ms`` touching a pursuit become pursuit."""
    n = len(moving)
    still = (group >= 0) & ~moving
    f_st, f_en = _runs(still, group)
    if len(f_st) == 0:
        return moving
    f_short = _run_duration_ms(f_st, f_en, t, interval_ms) < min_fixation_ms - 1e-9
    before = np.maximum(f_st - 1, 0)
    after = np.minimum(f_en, n - 1)
    touch = (((f_st > 0) & moving[before] & (group[before] == group[f_st]))
             | ((f_en < n) & moving[after] & (group[after] == group[f_st])))
    absorb = f_short & touch
    return _paint(moving, f_st[absorb], f_en[absorb], True)


def _jump_gain(tt, a):
    """RSS gained by adding one jump to a least-squares line, for every jump place.

    Model ``a = c0 + c1 * t + c2 * [i > k]``.  With ``r`` the residual of the
    line and ``u`` the jump regressor made orthogonal to the constant and
    ``tt`` (centred times), the gain is ``(r . u)^2 / |u|^2`` where ``r . u``
    is the sum of ``r`` after ``k`` and ``|u|^2 = n_r - n_r^2 / m -
    (sum of tt after k)^2 / sum(tt^2)``.  ``gain[k]`` is for a jump between
    rows ``k`` and ``k + 1``; all from cumulative sums.
    """
    m = len(tt)
    stt = float(np.dot(tt, tt))
    a = a - a.mean()
    b = float(np.dot(tt, a)) / stt if stt > 0 else 0.0
    r = a - b * tt
    r_tail = r.sum() - np.cumsum(r)[:-1]
    t_tail = tt.sum() - np.cumsum(tt)[:-1]
    n_r = m - np.arange(1, m, dtype=float)
    with np.errstate(invalid="ignore", divide="ignore"):
        uu = n_r - n_r * n_r / m - (t_tail * t_tail / stt if stt > 0 else 0.0)
        gain = np.where(uu > 1e-12, r_tail * r_tail / uu, 0.0)
    return gain


def _two_level_rss(tt, ax, ay):
    """RSS (both axes) of two constants split after each row, and of one line."""
    m = len(tt)
    stt = float(np.dot(tt, tt))
    nl = np.arange(1, m, dtype=float)
    nr = m - nl
    two = np.zeros(m - 1)
    line = 0.0
    for a in (ax, ay):  # two axes
        a = a - a.mean()
        b = float(np.dot(tt, a)) / stt if stt > 0 else 0.0
        line += float(np.sum((a - b * tt) ** 2))
        c1 = np.cumsum(a)[:-1]
        c2 = np.cumsum(a * a)[:-1]
        tot1, tot2 = float(a.sum()), float((a * a).sum())
        two += (c2 - c1 * c1 / nl) + ((tot2 - c2) - (tot1 - c1) ** 2 / nr)
    return two, line


def _segment_runs(starts, ends, t, ax, ay, use, sigma_pos, interval_ms, *, floor_deg_s, z,
                  min_pursuit_ms, jump_alpha, blip_ms, moving):
    """Binary segmentation of each pursuit run into pieces, each judged on its own.

    A small saccade missed by the velocity threshold (common at low rates
    and high noise) leaves a jump inside an interval, and any window around
    it fits a sizeable velocity; two pursuits separated by a missed saccade
    look like one pursuit.  Each piece (at first the whole run, measured
    samples only) is split at one sample when

    * it is no longer than ``blip_ms`` (1.5 windows: the most a jump's
      blip lasts) and two constant levels fit it better than one line
      (residual sums of squares, both axes; same number of parameters), or
    * a jump added to the line gains more than ``2 (ln m + ln(1/alpha))
      sigma^2`` (each gain of white noise is ``sigma^2`` times a chi-square
      with 2 degrees of freedom, so the best of ``m`` places passes with
      probability about ``alpha``);

    and the two pieces are examined again.  A final piece is pursuit when
    its own least-squares speed reaches ``max(floor, z * standard error)``
    and it lasts ``min_pursuit_ms``; otherwise it is fixation.  Returns the
    new pursuit mask and the rows where a piece starts after a split (to
    keep the pieces apart as events).  A loop over runs and pieces
    (events), vectorised within each.
    """
    out = moving.copy()
    cuts = []
    s2 = max(sigma_pos, 0.0) ** 2
    for j in range(len(starts)):  # loop over pursuit runs
        stack = [(int(starts[j]), int(ends[j]))]
        while stack:  # loop over pieces
            a, b = stack.pop()
            rows = np.arange(a, b)[use[a:b]]
            m = len(rows)
            tt = (t[rows] - t[rows].mean()) / 1000.0 if m else rows.astype(float)
            if m >= 6 and t[b - 1] - t[a] + interval_ms <= blip_ms:
                # a piece no longer than a window's blip that two still
                # stretches around a jump explain better than a steady
                # movement: fixation, missed saccade, fixation
                two_levels, line = _two_level_rss(tt, ax[rows], ay[rows])
                two_levels[:2] = np.inf  # each side keeps at least 3 samples
                two_levels[m - 4:] = np.inf
                k = int(np.argmin(two_levels))
                if two_levels[k] < line:
                    cut = int(rows[k + 1])
                    cuts.append(cut)
                    stack.append((cut, b))
                    stack.append((a, cut))
                    continue
            if m >= 6:
                gain = _jump_gain(tt, ax[rows]) + _jump_gain(tt, ay[rows])
                gain[:2] = 0.0  # each side keeps at least 3 samples
                gain[m - 4:] = 0.0
                k = int(np.argmax(gain))
                # white noise: each gain ~ sigma^2 chi2(2), so the largest of m
                # passes 2 (ln m + ln(1 / alpha)) sigma^2 with probability ~alpha
                if s2 > 0 and gain[k] > 2.0 * (np.log(m) + np.log(1.0 / jump_alpha)) * s2:
                    cut = int(rows[k + 1])
                    cuts.append(cut)
                    stack.append((cut, b))
                    stack.append((a, cut))
                    continue
            dur = t[b - 1] - t[a] + interval_ms
            keep = False
            if m >= 3 and dur >= min_pursuit_ms - 1e-9:
                stt = float(np.dot(tt, tt))
                if stt > 0:
                    vx = float(np.dot(tt, ax[rows] - ax[rows].mean())) / stt
                    vy = float(np.dot(tt, ay[rows] - ay[rows].mean())) / stt
                    sp = np.hypot(vx, vy)
                    keep = sp >= floor_deg_s and sp >= z * np.sqrt(s2 / stt)
            out[a:b] = keep
    return out, np.array(sorted(cuts), dtype=np.int64)


def _drop_short(moving, group, t, interval_ms, min_pursuit_ms):
    """Pursuit runs shorter than ``min_pursuit_ms`` become fixation."""
    p_st, p_en = _runs(moving, group)
    if len(p_st) == 0:
        return moving
    short = _run_duration_ms(p_st, p_en, t, interval_ms) < min_pursuit_ms - 1e-9
    return _paint(moving, p_st[short], p_en[short], False)


def _refine_pursuit_edges(moving, group, g_start, g_end, fit_speed, floor_deg_s, h):
    """Move each pursuit run's ends to where the fitted speed crosses half its own.

    A window straddling the change from a still eye to a pursuit at speed
    ``v`` fits about ``v / 2`` when centred on the change (exactly, for a
    noise-free ramp and a symmetric window), and more or less on either side.
    So each run of pursuit samples is grown or shrunk, by at most the half
    window ``h`` and never out of its interval, to the samples whose fitted
    speed reaches ``max(floor, mean run speed / 2)`` and connect to the run.
    A loop over pursuit runs, vectorised within each.
    """
    p_st, p_en = _runs(moving, group)
    if len(p_st) == 0:
        return moving
    fs = np.where(np.isfinite(fit_speed), fit_speed, 0.0)
    csum = np.concatenate([[0.0], np.cumsum(fs)])
    mean_speed = (csum[p_en] - csum[p_st]) / (p_en - p_st)
    level = np.maximum(floor_deg_s, 0.5 * mean_speed)
    lo = np.maximum(p_st - h, g_start[p_st])
    hi = np.minimum(p_en + h, g_end[p_st])
    new_st, new_en = p_st.copy(), p_en.copy()
    for k in range(len(p_st)):  # loop over pursuit events
        ok = fs[lo[k]:hi[k]] >= level[k]
        a, b = p_st[k] - lo[k], p_en[k] - lo[k]  # the run inside the slice
        core = np.flatnonzero(ok[a:b])
        if len(core) == 0:
            new_st[k] = new_en[k] = p_st[k]
            continue
        first, last = a + core[0], a + core[-1]
        gaps_before = np.flatnonzero(~ok[:first])
        gaps_after = np.flatnonzero(~ok[last + 1:])
        s0 = gaps_before[-1] + 1 if len(gaps_before) else 0
        e0 = last + 1 + gaps_after[0] if len(gaps_after) else len(ok)
        new_st[k], new_en[k] = lo[k] + s0, lo[k] + e0
    out = _paint(moving, p_st, p_en, False)
    return _paint(out, new_st, new_en, True)


def _paint(mask: np.ndarray, starts: np.ndarray, ends: np.ndarray, value: bool) -> np.ndarray:
    """Set ``mask[starts[k]:ends[k]] = value`` for all k (runs do not overlap)."""
    if len(starts) == 0:
        return mask
    mark = np.zeros(len(mask) + 1, dtype=np.int64)
    np.add.at(mark, starts, 1)
    np.add.at(mark, ends, -1)
    inside = np.cumsum(mark)[:-1] > 0
    out = mask.copy()
    out[inside] = value
    return out


def _merge_and_discard_events(events: pd.DataFrame, samples: pd.DataFrame, *,
                              display: "Display", merge_max_gap_ms: float = 75.0,
                              merge_max_angle_deg: float = 1.0, min_fixation_ms: float = 60.0,
                              interval_ms: float | None = None):
    """The pipeline's post-processing applied to an :func:`ivt_pursuit` result.

    Fixation rows go through :func:`aoi_fix.detect.merge_and_discard`
    (merging across a pursuit cannot happen while ``min_pursuit_ms >
    merge_max_gap_ms``); pursuit rows are kept.  Returns new ``labels,
    events`` (events renumbered in time order; samples of discarded
    fixations become ``saccade``, i.e. "no event", as with I-VT).
    """
    if interval_ms is None:
        t_all = samples["t_ms"].to_numpy(dtype=float)
        interval_ms = nominal_interval_ms(t_all) if len(t_all) > 1 else 1.0
    s = _ensure_filled(samples, interval_ms)
    t, x, y, seg, raw_valid = _arrays(s)
    is_p = (events["event_type"] == "pursuit").to_numpy()
    fix = merge_and_discard(events.loc[~is_p, FIXATION_COLUMNS].reset_index(drop=True), s,
                            display=display, merge_max_gap_ms=merge_max_gap_ms,
                            merge_max_angle_deg=merge_max_angle_deg,
                            min_fixation_ms=min_fixation_ms, interval_ms=interval_ms)
    starts = np.concatenate([fix["start_row"].to_numpy(np.int64),
                             events.loc[is_p, "start_row"].to_numpy(np.int64)])
    ends = np.concatenate([fix["end_row"].to_numpy(np.int64),
                           events.loc[is_p, "end_row"].to_numpy(np.int64)])
    kinds = np.concatenate([np.full(len(fix), _FIX), np.full(int(is_p.sum()), _PUR)])
    out = _events(starts, ends, kinds, t, x, y, raw_valid, interval_ms)
    out.attrs.update(events.attrs)
    return _labels(_codes_from_events(out, seg, s["valid"].to_numpy(dtype=bool))), out
