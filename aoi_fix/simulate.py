"""Simulated gaze with exact ground truth, an invented video scene and whole sessions.

Three layers, each usable on its own:

* :func:`simulate_gaze` -- an oculomotor model: fixations (optionally
  following a slowly moving target), saccades on the main sequence, blinks,
  short dropouts and long look-aways, plus white measurement noise and a
  linear calibration drift.  Returns the measured samples and, per sample,
  the truth.
* :func:`storyteller_scene` -- an invented scenario, "a storyteller at a
  table reads a picture book to the camera", as per-frame AOI polygons (WKT).
* :func:`simulate_session` / :func:`write_session` -- a recording session in
  one of the raw layouts of :data:`STYLES` (rates, units, delimiters,
  validity conventions), with trial windows, AOIs, calibration checks and the
  truth needed to score a pipeline (:func:`true_aoi_percent`,
  :func:`true_valid_fraction`).

Everything is reproducible from ``seed`` (a :class:`numpy.random.Generator`)
and vectorised per event: a loop runs over fixations and saccades, never over
samples.

Truth conventions
-----------------
Samples are taken at ``t_ms = t0_ms + i * 1000 / rate_hz``.  An event covers
the samples whose time falls in ``[onset, onset + duration)`` of its
continuous-time interval.  ``movement`` is what the eye did (fixation,
saccade, blink, lookaway); ``label`` is what an ideal detector could say from
the measurement: the movement for valid samples and ``"loss"`` for every
sample without a measurement (blinks, look-aways and short dropouts).  A
fixation's table row (:func:`true_fixations`) runs from its first sample time
to its last sample time plus one sample interval and includes short dropouts
inside it.

References
----------
.. [1] Carpenter, R. H. S. (1988). *Movements of the Eyes* (2nd ed.). Pion.
   Saccade duration ``2.2 * A + 21`` ms for amplitude ``A`` in degrees (from
   memory).
.. [2] Niehorster, D. C., Zemblys, R., Beelders, T., & Holmqvist, K. (2020).
   Characterizing gaze position signals and synthesizing noise during
   fixations in eye-tracking data. *Behavior Research Methods*, 52,
   2515-2534: white noise has RMS-S2S / STD = sqrt(2).
"""

from __future__ import annotations

import dataclasses
import json
import math
from bisect import bisect_right
from dataclasses import dataclass, field
from pathlib import Path
from typing import Callable, NamedTuple

import numpy as np
import pandas as pd
import shapely
from shapely.geometry import MultiPolygon, Polygon, box

from .config import Display
from .geometry import deg_to_px, pixel_pitch_mm, px_to_deg

__all__ = [
    "Target",
    "simulate_gaze",
    "true_fixations",
    "saccade_duration_ms",
    "storyteller_scene",
    "SessionStyle",
    "STYLES",
    "Session",
    "simulate_session",
    "trials_for_samples",
    "write_session",
    "true_aoi_percent",
    "true_valid_fraction",
    "AOI_NONE",
    "AOI_OFF_VIDEO",
]

AOI_NONE = "(none)"
AOI_OFF_VIDEO = "(off-video)"

MOVEMENTS = ("fixation", "saccade", "blink", "lookaway")
LABELS = ("fixation", "saccade", "loss")
_FIX, _SAC, _BLINK, _LOOK = 0, 1, 2, 3
# smooth pursuit (only when asked for): appended, so the codes above never change
PURSUIT = "pursuit"
_PUR = 4


class Target(NamedTuple):
    """Where the next fixation goes, as returned by a ``targets_px`` callable.

    ``x_px, y_px`` is the target at the time the callable was asked;
    ``vx_px_ms, vy_px_ms`` its velocity (the fixation follows it, capped at
    ``max_follow_deg_s``); the fixation lasts at least until
    ``hold_until_ms`` (NaN = no minimum), e.g. for a calibration-check target.
    """

    x_px: float
    y_px: float
    vx_px_ms: float = 0.0
    vy_px_ms: float = 0.0
    hold_until_ms: float = float("nan")


def saccade_duration_ms(amplitude_deg):
    """Saccade duration from the main sequence, ``2.2 * A + 21`` ms.

    Carpenter (1988), *Movements of the Eyes*, from memory.

    >>> float(saccade_duration_ms(10.0))
    43.0
    """
    return 2.2 * np.asarray(amplitude_deg, dtype=float) + 21.0


def _min_jerk(u):
    """Minimum-jerk position profile on [0, 1] (smooth bell-shaped velocity)."""
    u = np.clip(u, 0.0, 1.0)
    return u * u * u * (10.0 - 15.0 * u + 6.0 * u * u)


def _deg_to_screen_px(xd, yd, display: Display):
    """Inverse of :func:`aoi_fix.geometry.px_to_deg` (per-axis angles to px)."""
    pw, ph = pixel_pitch_mm(display)
    d = float(display.distance_mm)
    x = d * np.tan(np.radians(xd)) / pw + display.width_px / 2.0
    y = d * np.tan(np.radians(yd)) / ph + display.height_px / 2.0
    return x, y


class _Geo:
    """Scalar geometry helpers for the event loop (no numpy overhead)."""

    def __init__(self, display: Display):
        self.pw, self.ph = pixel_pitch_mm(display)
        self.cx, self.cy = display.width_px / 2.0, display.height_px / 2.0
        self.d = float(display.distance_mm)
        ppx, ppy = deg_to_px(1.0, display)
        self.ppx, self.ppy = float(ppx), float(ppy)

    def angle_deg(self, x1, y1, x2, y2) -> float:
        a = ((x1 - self.cx) * self.pw, (y1 - self.cy) * self.ph, self.d)
        b = ((x2 - self.cx) * self.pw, (y2 - self.cy) * self.ph, self.d)
        cx = a[1] * b[2] - a[2] * b[1]
        cy = a[2] * b[0] - a[0] * b[2]
        cz = a[0] * b[1] - a[1] * b[0]
        dot = a[0] * b[0] + a[1] * b[1] + a[2] * b[2]
        return math.degrees(math.atan2(math.sqrt(cx * cx + cy * cy + cz * cz), dot))

    def speed_deg_s(self, vx_px_ms, vy_px_ms) -> float:
        return 1000.0 * math.hypot(vx_px_ms / self.ppx, vy_px_ms / self.ppy)


def _as_target(value) -> Target:
    if isinstance(value, Target):
        return value
    vals = [float(v) for v in value]
    if not 2 <= len(vals) <= 5:
        raise ValueError("targets_px must return (x_px, y_px[, vx_px_ms, vy_px_ms"
                         f"[, hold_until_ms]]), got {len(vals)} values")
    return Target(*vals)


def _plan_events(*, display, t0_ms, end_ms, rng, next_target, fixation_ms_mean,
                 fixation_ms_min, fixation_shape, amplitude_deg, blink_rate_hz, blink_ms,
                 lookaway_rate_hz, lookaway_ms, max_follow_deg_s, cut_times_ms, latency_ms,
                 pursuit_fraction=0.0, pursuit_speed_deg_s=(2.0, 30.0),
                 pursuit_ms=(300.0, 1500.0)):
    """Sequence of events in continuous time; a loop over events, not samples.

    With ``pursuit_fraction == 0`` no extra random numbers are drawn, so the
    plan is exactly the one without pursuit support.
    """
    geo = _Geo(display)
    cuts = sorted(float(c) for c in cut_times_ms)
    amp_lo, amp_hi = float(amplitude_deg[0]), float(amplitude_deg[1])
    scale = max(fixation_ms_mean - fixation_ms_min, 1e-9) / fixation_shape
    rows = []  # (onset, kind, xa, ya, xb, yb, vx, vy, dur)

    def capped(tg: Target) -> Target:
        s = geo.speed_deg_s(tg.vx_px_ms, tg.vy_px_ms)
        if s > max_follow_deg_s:
            f = max_follow_deg_s / s
            return tg._replace(vx_px_ms=tg.vx_px_ms * f, vy_px_ms=tg.vy_px_ms * f)
        return tg

    t = float(t0_ms)
    raw = next_target(t, display.width_px / 2.0, display.height_px / 2.0)
    tg = capped(raw)
    while t < end_ms:
        holds = tg.hold_until_ms == tg.hold_until_ms and tg.hold_until_ms > t
        if pursuit_fraction > 0 and not holds and rng.random() < pursuit_fraction:
            d, vx, vy = _plan_pursuit(raw, tg, geo, display, rng, pursuit_speed_deg_s,
                                      pursuit_ms)
            ci = bisect_right(cuts, t)
            if ci < len(cuts) and t + d > cuts[ci]:
                d = min(d, max(fixation_ms_min, cuts[ci] + rng.uniform(*latency_ms) - t))
            rows.append((t, _PUR, tg.x_px, tg.y_px, np.nan, np.nan, vx, vy, d))
            xe, ye = tg.x_px + vx * d, tg.y_px + vy * d
        else:
            d = fixation_ms_min + rng.gamma(fixation_shape, scale)
            ci = bisect_right(cuts, t)
            if ci < len(cuts) and t + d > cuts[ci]:
                d = min(d, max(fixation_ms_min, cuts[ci] + rng.uniform(*latency_ms) - t))
            if holds:
                d = max(d, tg.hold_until_ms - t)
            rows.append((t, _FIX, tg.x_px, tg.y_px, np.nan, np.nan, tg.vx_px_ms, tg.vy_px_ms,
                         d))
            xe, ye = tg.x_px + tg.vx_px_ms * d, tg.y_px + tg.vy_px_ms * d
        t += d
        if t >= end_ms:
            break
        r = rng.random()
        p_look = -math.expm1(-lookaway_rate_hz * d / 1000.0)
        p_blink = -math.expm1(-blink_rate_hz * d / 1000.0)
        if r < p_look + p_blink:
            kind, rng_ms = (_LOOK, lookaway_ms) if r < p_look else (_BLINK, blink_ms)
            dur = rng.uniform(*rng_ms)
            rows.append((t, kind, np.nan, np.nan, np.nan, np.nan, 0.0, 0.0, dur))
            t += dur
            raw = next_target(t, xe, ye)
            tg = capped(raw)
            continue
        for _ in range(8):
            raw = next_target(t, xe, ye)
            cand = capped(raw)
            amp = geo.angle_deg(xe, ye, cand.x_px, cand.y_px)
            if amp_lo <= amp <= amp_hi:
                break
        sd = 2.2 * amp + 21.0  # main sequence, Carpenter (1988), from memory
        xl, yl = cand.x_px + cand.vx_px_ms * sd, cand.y_px + cand.vy_px_ms * sd
        rows.append((t, _SAC, xe, ye, xl, yl, 0.0, 0.0, sd))
        t += sd
        tg = cand._replace(x_px=xl, y_px=yl)
        raw = raw._replace(x_px=xl, y_px=yl)
    arr = np.array(rows, dtype=float).reshape(-1, 9)
    return arr


def _plan_pursuit(raw: Target, start: Target, geo: "_Geo", display: Display, rng,
                  speed_deg_s, duration_ms):
    """Duration (ms) and velocity (px/ms) of one smooth pursuit from ``start``.

    The eye follows the target's own velocity when its speed lies in
    ``speed_deg_s``; otherwise it follows an invented target moving in a
    random direction at a speed drawn uniformly from ``speed_deg_s``.  The
    path is kept on the display (5 % margin): up to 8 random directions are
    tried, then the pursuit heads through the display centre and is cut
    where it would leave.  Degrees are converted to px at the display centre.
    """
    lo, hi = float(speed_deg_s[0]), float(speed_deg_s[1])
    d = float(rng.uniform(*duration_ms))
    W, H = display.width_px, display.height_px
    mx, my = 0.05 * W, 0.05 * H
    x0, y0 = start.x_px, start.y_px
    s = geo.speed_deg_s(raw.vx_px_ms, raw.vy_px_ms)
    if lo <= s <= hi and s > 0:
        vx, vy = raw.vx_px_ms, raw.vy_px_ms
    else:
        speed = float(rng.uniform(lo, hi)) / 1000.0  # deg/ms
        th = rng.uniform(0.0, 2.0 * np.pi, 8)
        vxs, vys = speed * np.cos(th) * geo.ppx, speed * np.sin(th) * geo.ppy
        xe, ye = x0 + vxs * d, y0 + vys * d
        ok = (xe >= mx) & (xe <= W - mx) & (ye >= my) & (ye <= H - my)
        if ok.any():
            k = int(np.argmax(ok))
            return d, float(vxs[k]), float(vys[k])
        dx, dy = W / 2.0 - x0, H / 2.0 - y0
        th0 = math.atan2(dy / geo.ppy, dx / geo.ppx) if (dx or dy) else float(th[0])
        vx, vy = speed * math.cos(th0) * geo.ppx, speed * math.sin(th0) * geo.ppy
    # cut the pursuit where it would leave the display (margin included)
    limit = np.inf
    for p0, v, a, b in ((x0, vx, mx, W - mx), (y0, vy, my, H - my)):
        if v > 0:
            limit = min(limit, (b - p0) / v)
        elif v < 0:
            limit = min(limit, (a - p0) / v)
    return max(min(d, limit), 1.0), float(vx), float(vy)


def _random_walk_targets(display: Display, rng, amplitude_deg, margin_frac=0.05):
    """Default target choice: a saccade of typical amplitude in a random direction."""
    geo = _Geo(display)
    W, H = display.width_px, display.height_px
    lo, hi = amplitude_deg
    mx, my = margin_frac * W, margin_frac * H

    def next_target(t, x, y):
        amp = np.minimum(lo + rng.gamma(2.0, (hi - lo) / 6.0, 8), hi)
        th = rng.uniform(0.0, 2.0 * np.pi, 8)
        xs = x + amp * np.cos(th) * geo.ppx
        ys = y + amp * np.sin(th) * geo.ppy
        ok = (xs >= mx) & (xs <= W - mx) & (ys >= my) & (ys <= H - my)
        if ok.any():
            k = int(np.argmax(ok))
            return Target(float(xs[k]), float(ys[k]))
        return Target(float(rng.uniform(mx, W - mx)), float(rng.uniform(my, H - my)))

    return next_target


def _dropout_mask(n, rate_hz, duration_ms, n_samples_range, rng):
    k = rng.poisson(rate_hz * duration_ms / 1000.0)
    mask = np.zeros(n + 1, dtype=np.int32)
    if k and n:
        starts = rng.integers(0, n, k)
        lens = rng.integers(n_samples_range[0], n_samples_range[1] + 1, k)
        np.add.at(mask, starts, 1)
        np.add.at(mask, np.minimum(starts + lens, n), -1)
    return np.cumsum(mask)[:n] > 0


def simulate_gaze(*, display: Display, duration_ms: float, rate_hz: float,
                  targets_px: Callable | None = None, noise_deg: float = 0.2, seed=0,
                  fixation_ms_mean: float = 300.0, fixation_ms_min: float = 80.0,
                  fixation_shape: float = 3.0, amplitude_deg=(2.0, 15.0),
                  blink_rate_hz: float = 0.2, blink_ms=(100.0, 300.0),
                  dropout_rate_hz: float = 0.5, dropout_samples=(1, 3),
                  lookaway_rate_hz: float = 0.0, lookaway_ms=(500.0, 3000.0),
                  drift_deg=(0.0, 0.0), t0_ms: float = 0.0, max_follow_deg_s: float = 2.0,
                  cut_times_ms=(), latency_ms=(150.0, 250.0), binocular: bool = False,
                  eye_offset_deg=(0.3, 0.1), pursuit_fraction: float = 0.0,
                  pursuit_speed_deg_s=(2.0, 30.0), pursuit_ms=(300.0, 1500.0)):
    """Simulate gaze samples with exact per-sample truth.

    The eye alternates fixations and saccades.  Fixation durations are
    ``fixation_ms_min`` plus a gamma variate (shape ``fixation_shape``) with
    mean ``fixation_ms_mean`` overall.  Saccades follow the main sequence,
    ``2.2 * A + 21`` ms (Carpenter 1988, from memory), with a minimum-jerk
    position profile (peak velocity ``1.875 * A / duration``).  Between two
    fixations, instead of a saccade, a blink or a look-away may occur (a
    Poisson hazard per ms of fixation); the next fixation then starts at a
    new target.  Short dropouts of a few samples fall anywhere.  Measured
    gaze is the true gaze plus a linear drift (0 at the first sample,
    ``drift_deg`` at the last) plus white Gaussian noise of SD ``noise_deg``
    per axis, added in per-axis degrees and converted back to screen pixels.

    Parameters
    ----------
    display : Display
        Screen geometry.
    duration_ms, rate_hz : float
        Length of the recording and sampling rate; ``round(duration_ms *
        rate_hz / 1000)`` samples.
    targets_px : callable, optional
        ``targets_px(t_ms, rng) -> (x_px, y_px[, vx_px_ms, vy_px_ms[,
        hold_until_ms]])`` or a :class:`Target`: where to look next when a
        saccade or loss starts at ``t_ms``.  A fixation follows the target's
        velocity (capped at ``max_follow_deg_s``, so it stays a fixation).
        Candidates outside ``amplitude_deg`` are redrawn up to 8 times.
        Default: random saccades of 2-15 deg inside the display.
    noise_deg : float
        SD of the white measurement noise per axis, in degrees (adults
        ~0.1-0.3, infants ~0.5: common practice / from memory).
    seed : int or numpy.random.Generator
        Everything is reproducible from it.
    fixation_ms_mean, fixation_ms_min, fixation_shape : float
        Fixation duration distribution (defaults from memory: mean 300 ms).
    amplitude_deg : (float, float)
        Range of saccade amplitudes.
    blink_rate_hz, blink_ms : float, (float, float)
        Blink rate and duration range (100-300 ms, from memory).
    dropout_rate_hz, dropout_samples : float, (int, int)
        Short tracker dropouts (1-3 samples) per second.
    lookaway_rate_hz, lookaway_ms : float, (float, float)
        Long losses (infant-like look-aways), labelled ``loss``.
    drift_deg : (float, float)
        Calibration drift at the last sample, growing linearly from 0.
    t0_ms : float
        Time of the first sample (a tracker clock may start anywhere).
    max_follow_deg_s : float
        Fastest target-following during a fixation (~2 deg/s).
    cut_times_ms : sequence of float
        Scene changes (a trial or a check target starts): a fixation spanning
        one ends a saccadic latency (``latency_ms``, ~150-250 ms from memory)
        after it, but not before ``fixation_ms_min``.
    binocular : bool
        Also return per-eye columns; each eye is offset by -/+ half of
        ``eye_offset_deg``, has its own noise of SD ``noise_deg`` and its own
        dropouts.  ``x_px, y_px`` are then the mean of the valid eyes and
        ``valid`` means at least one eye valid.
    pursuit_fraction : float
        Probability that the eye, after a saccade or a loss, smoothly pursues
        a moving target instead of fixating (default 0: no pursuit, and the
        output is exactly that of a simulator without pursuit support).
        Never during a target with ``hold_until_ms`` (a check target).
    pursuit_speed_deg_s : (float, float)
        Pursuit speed range.  A target from ``targets_px`` whose own speed
        lies in it is followed at that velocity; otherwise the eye follows an
        invented target in a random direction at a speed drawn uniformly from
        the range, kept on the display.  2-30 deg/s covers the slow pursuit
        of faces and hands (from memory; pursuit gain falls off above ~30
        deg/s, and young children's pursuit is slower than adults').
    pursuit_ms : (float, float)
        Pursuit duration range (uniform).  The eye pursues from its landing
        point without latency or catch-up saccades (a simplification).

    Returns
    -------
    samples : DataFrame
        ``t_ms, x_px, y_px, valid`` (NaN positions when not valid), plus
        ``x_left_px, y_left_px, valid_left, x_right_px, y_right_px,
        valid_right`` when binocular.
    truth : DataFrame
        ``t_ms, label`` (fixation/saccade/loss), ``movement``
        (fixation/saccade/blink/lookaway), ``event`` (id of the fixation or
        saccade, increasing in time, -1 for blinks and look-aways),
        ``true_x_px, true_y_px`` (true gaze: no noise, no drift; NaN during
        blinks and look-aways), ``drift_x_deg, drift_y_deg``.  With
        ``pursuit_fraction > 0`` both categoricals gain a last category
        ``"pursuit"`` (label code 3, movement code 4); a pursuit has an
        ``event`` id like a fixation.

    Examples
    --------
    >>> disp = Display(1920, 1080, 531.0, 299.0, 650.0)
    >>> s, tr = simulate_gaze(display=disp, duration_ms=2000, rate_hz=250, seed=1)
    >>> len(s), set(tr["label"].unique()) <= {"fixation", "saccade", "loss"}
    (500, True)
    """
    rng = seed if isinstance(seed, np.random.Generator) else np.random.default_rng(seed)
    n = int(round(duration_ms * rate_hz / 1000.0))
    dt = 1000.0 / rate_hz
    t = t0_ms + np.arange(n) * dt
    if targets_px is None:
        next_target = _random_walk_targets(display, rng, amplitude_deg)
    else:
        def next_target(tt, x, y):
            return _as_target(targets_px(tt, rng))
    ev = _plan_events(display=display, t0_ms=t0_ms, end_ms=t0_ms + n * dt, rng=rng,
                      next_target=next_target, fixation_ms_mean=fixation_ms_mean,
                      fixation_ms_min=fixation_ms_min, fixation_shape=fixation_shape,
                      amplitude_deg=amplitude_deg, blink_rate_hz=blink_rate_hz,
                      blink_ms=blink_ms, lookaway_rate_hz=lookaway_rate_hz,
                      lookaway_ms=lookaway_ms, max_follow_deg_s=max_follow_deg_s,
                      cut_times_ms=cut_times_ms, latency_ms=latency_ms,
                      pursuit_fraction=pursuit_fraction,
                      pursuit_speed_deg_s=pursuit_speed_deg_s, pursuit_ms=pursuit_ms)
    onset, kind = ev[:, 0], ev[:, 1].astype(np.int8)
    idx = np.searchsorted(onset, t, side="right") - 1
    idx = np.clip(idx, 0, None)
    k = kind[idx]
    tau = t - onset[idx]
    per = ev[idx]  # one gather, then columns
    xa, ya, xb, yb, vx, vy, dur = (per[:, j] for j in range(2, 9))
    is_sac = k == _SAC
    p = _min_jerk(np.where(is_sac, tau / np.where(is_sac, dur, 1.0), 0.0))
    tx = np.where(is_sac, xa + (xb - xa) * p, xa + vx * tau)
    ty = np.where(is_sac, ya + (yb - ya) * p, ya + vy * tau)
    lost_eye = (k == _BLINK) | (k == _LOOK)
    tx[lost_eye] = np.nan
    ty[lost_eye] = np.nan
    event = np.where(lost_eye, -1, idx).astype(np.int64)

    frac = (t - t0_ms) / max((n - 1) * dt, 1e-12) if n > 1 else np.zeros(n)
    drift_x, drift_y = frac * drift_deg[0], frac * drift_deg[1]
    xd, yd = px_to_deg(tx, ty, display)
    xd, yd = xd + drift_x, yd + drift_y

    shared = lost_eye | _dropout_mask(n, dropout_rate_hz, duration_ms, dropout_samples, rng)
    cols = {"t_ms": t}
    if binocular:
        eyes = {}
        for sign, eye in ((-0.5, "left"), (0.5, "right")):
            lost = shared | _dropout_mask(n, dropout_rate_hz, duration_ms, dropout_samples, rng)
            ex, ey = _deg_to_screen_px(xd + sign * eye_offset_deg[0] + rng.normal(0, noise_deg, n),
                                       yd + sign * eye_offset_deg[1] + rng.normal(0, noise_deg, n),
                                       display)
            ex[lost], ey[lost] = np.nan, np.nan
            eyes[eye] = (ex, ey, ~lost)
        vl, vr = eyes["left"][2], eyes["right"][2]
        cnt = vl.astype(float) + vr
        with np.errstate(invalid="ignore", divide="ignore"):
            for j, axis in ((0, "x_px"), (1, "y_px")):
                tot = np.where(vl, eyes["left"][j], 0.0) + np.where(vr, eyes["right"][j], 0.0)
                cols[axis] = np.where(cnt > 0, tot / cnt, np.nan)
        valid = eyes["left"][2] | eyes["right"][2]
        cols["valid"] = valid
        for eye in ("left", "right"):
            cols[f"x_{eye}_px"], cols[f"y_{eye}_px"], cols[f"valid_{eye}"] = eyes[eye]
    else:
        mx, my = _deg_to_screen_px(xd + rng.normal(0, noise_deg, n),
                                   yd + rng.normal(0, noise_deg, n), display)
        valid = ~shared
        mx[~valid], my[~valid] = np.nan, np.nan
        cols.update(x_px=mx, y_px=my, valid=valid)
    samples = pd.DataFrame(cols)

    mcode = k.astype(np.int8)
    lcode = np.where(valid, np.minimum(mcode, 2), 2).astype(np.int8)
    labels, movements = list(LABELS), list(MOVEMENTS)
    if pursuit_fraction > 0:
        lcode[valid & (mcode == _PUR)] = len(labels)
        labels.append(PURSUIT)
        movements.append(PURSUIT)
    truth = pd.DataFrame({
        "t_ms": t,
        "label": pd.Categorical.from_codes(lcode, categories=labels),
        "movement": pd.Categorical.from_codes(mcode, categories=movements),
        "event": event,
        "true_x_px": tx,
        "true_y_px": ty,
        "drift_x_deg": drift_x,
        "drift_y_deg": drift_y,
    })
    return samples, truth


def true_fixations(truth: pd.DataFrame, *, rate_hz: float | None = None) -> pd.DataFrame:
    """The true fixation table of a truth frame from :func:`simulate_gaze`.

    One row per fixation event: ``event, onset_ms`` (first sample time),
    ``offset_ms`` (last sample time + one sample interval), ``duration_ms``,
    ``x_px, y_px`` (mean true position), ``n_samples``.  Short dropouts inside
    a fixation belong to it (the eye kept fixating).

    Parameters
    ----------
    truth : DataFrame
        With ``t_ms, movement, event, true_x_px, true_y_px``.
    rate_hz : float, optional
        Sampling rate; default from the median time step.
    """
    sel = (truth["movement"] == "fixation").to_numpy()
    t = truth["t_ms"].to_numpy()[sel]
    ev = truth["event"].to_numpy()[sel]
    cols = ["event", "onset_ms", "offset_ms", "duration_ms", "x_px", "y_px", "n_samples"]
    if t.size == 0:
        return pd.DataFrame({c: pd.Series(dtype=float if c not in ("event", "n_samples")
                                          else np.int64) for c in cols})
    if rate_hz is None:
        dt = float(np.median(np.diff(truth["t_ms"].to_numpy()))) if len(truth) > 1 else 0.0
    else:
        dt = 1000.0 / rate_hz
    start = np.flatnonzero(np.r_[True, ev[1:] != ev[:-1]])
    stop = np.r_[start[1:], ev.size]
    x = truth["true_x_px"].to_numpy()[sel]
    y = truth["true_y_px"].to_numpy()[sel]
    cnt = stop - start
    onset, offset = t[start], t[stop - 1] + dt
    return pd.DataFrame({
        "event": ev[start].astype(np.int64),
        "onset_ms": onset,
        "offset_ms": offset,
        "duration_ms": offset - onset,
        "x_px": np.add.reduceat(x, start) / cnt,
        "y_px": np.add.reduceat(y, start) / cnt,
        "n_samples": cnt.astype(np.int64),
    })


# --------------------------------------------------------------------------- scene

def _ellipse(cx, cy, rx, ry, angle_rad=0.0, n=28) -> Polygon:
    th = np.linspace(0.0, 2.0 * np.pi, n, endpoint=False)
    x, y = rx * np.cos(th), ry * np.sin(th)
    c, s = np.cos(angle_rad), np.sin(angle_rad)
    return Polygon(np.column_stack([cx + c * x - s * y, cy + s * x + c * y]))


def storyteller_scene(*, stimulus: str = "story1", fps: float = 30, width_px: int = 1280,
                      height_px: int = 720, duration_ms: float = 8000, seed=0) -> pd.DataFrame:
    """Per-frame AOIs of an invented video: a storyteller reads a picture book.

    A storyteller sits behind a table facing the camera; the head sways
    slowly and tilts, the mouth opens and closes while reading.  The book is
    first on the table, is lifted and turned towards the camera (its outline
    changes from a rectangle to a narrowing trapezoid), is put aside out of
    the frame for a while (no rows then) and comes back.

    Parameters
    ----------
    stimulus : str
        Name written in the ``stimulus`` column.
    fps, width_px, height_px, duration_ms : float, int, int, float
        Video frame rate and size; ``round(duration_ms * fps / 1000)`` frames.
    seed : int or numpy.random.Generator
        Varies sway phases, amplitudes and the book's path.

    Returns
    -------
    DataFrame
        ``stimulus, frame, aoi, wkt`` with frames 0-based and polygons in
        video pixels (x right, y down), rounded to 0.01 px; AOIs ``eyes``
        (two ellipses as one MULTIPOLYGON), ``mouth``, ``body`` (head and
        torso; eyes and mouth are not cut out, so they overlap it) and
        ``book`` (absent from some frames).  Every polygon is valid.

    Examples
    --------
    >>> sc = storyteller_scene(duration_ms=1000)
    >>> sorted(sc["aoi"].unique())
    ['body', 'book', 'eyes', 'mouth']
    """
    rng = seed if isinstance(seed, np.random.Generator) else np.random.default_rng(seed)
    W, H = float(width_px), float(height_px)
    n_frames = int(round(duration_ms * fps / 1000.0))
    t_s = np.arange(n_frames) / fps
    frac = np.arange(n_frames) * (1000.0 / fps) / max(duration_ms, 1e-9)
    ph = rng.uniform(0, 2 * np.pi, 5)
    amp = rng.uniform(0.8, 1.2, 3)
    # head: slow sway (periods of a few seconds), small tilt
    hx = 0.5 * W + amp[0] * 0.025 * W * np.sin(2 * np.pi * t_s / 5.3 + ph[0])
    hy = 0.34 * H + amp[1] * 0.012 * H * np.sin(2 * np.pi * t_s / 3.7 + ph[1])
    tilt = np.radians(amp[2] * 4.0 * np.sin(2 * np.pi * t_s / 6.1 + ph[2]))
    # a close shot: the face fills about a quarter of the frame height (eyes
    # and mouth a few degrees wide on a typical display)
    rx, ry = 0.15 * H, 0.19 * H
    mouth_open = 0.5 + 0.5 * np.sin(2 * np.pi * t_s / 0.27 + ph[3]) ** 2
    # book keyframes (fraction of the video): centre, turn angle
    jit = rng.uniform(-0.02, 0.02, 4)
    key_s = [0.0, 0.18, 0.3, 0.45, 0.55, 0.75, 0.9, 1.0]
    key_x = np.array([0.70, 0.70, 0.66, 0.66, 1.40, 1.40, 0.72, 0.72]) * W + jit[0] * W
    key_y = np.array([0.74, 0.74, 0.60, 0.60, 0.55, 0.55, 0.68, 0.68]) * H + jit[1] * H
    key_th = np.radians([0, 0, 30, 65, 65, 65, 10, 0])
    bx, by = np.interp(frac, key_s, key_x), np.interp(frac, key_s, key_y)
    bth = np.interp(frac, key_s, key_th)
    bw, bh = (0.12 + jit[2]) * W, (0.13 + jit[3]) * H
    frame_box = box(0.0, 0.0, W, H)
    table_y = 0.8 * H

    geoms, frames, names = [], [], []
    for f in range(n_frames):  # loop over frames
        c, s = math.cos(tilt[f]), math.sin(tilt[f])

        def rot(dx, dy):
            return hx[f] + c * dx - s * dy, hy[f] + s * dx + c * dy

        ex1, ey1 = rot(-0.42 * rx, -0.12 * ry)
        ex2, ey2 = rot(0.42 * rx, -0.12 * ry)
        eyes = MultiPolygon([_ellipse(ex1, ey1, 0.3 * rx, 0.17 * rx, tilt[f]),
                             _ellipse(ex2, ey2, 0.3 * rx, 0.17 * rx, tilt[f])])
        mx, my = rot(0.0, 0.5 * ry)
        mouth = _ellipse(mx, my, 0.4 * rx, 0.2 * rx * mouth_open[f], tilt[f])
        head = _ellipse(hx[f], hy[f], 1.12 * rx, 1.1 * ry, tilt[f], n=36)
        sx = hx[f] * 0.3 + 0.7 * 0.5 * W  # shoulders sway less than the head
        torso = Polygon([(hx[f] - 0.35 * rx, hy[f] + 0.9 * ry),
                         (hx[f] + 0.35 * rx, hy[f] + 0.9 * ry),
                         (sx + 2.3 * rx, hy[f] + 1.55 * ry),
                         (sx + 2.6 * rx, table_y), (sx - 2.6 * rx, table_y),
                         (sx - 2.3 * rx, hy[f] + 1.55 * ry)])
        body = head.union(torso)
        if body.geom_type != "Polygon":  # pragma: no cover - shapes always touch
            body = body.convex_hull
        k = 0.15 * math.sin(bth[f])
        half_w = bw * math.cos(bth[f]) / 2.0
        book = Polygon([(bx[f] - half_w, by[f] - bh * (1 + k) / 2),
                        (bx[f] + half_w, by[f] - bh * (1 - k) / 2),
                        (bx[f] + half_w, by[f] + bh * (1 - k) / 2),
                        (bx[f] - half_w, by[f] + bh * (1 + k) / 2)])
        book = book.intersection(frame_box)
        row = [("eyes", eyes), ("mouth", mouth), ("body", body)]
        if book.geom_type == "Polygon" and book.area >= 1.0:
            row.append(("book", book))
        for name, g in row:
            geoms.append(g)
            frames.append(f)
            names.append(name)
    wkt = shapely.to_wkt(np.array(geoms, dtype=object), rounding_precision=2, trim=True)
    return pd.DataFrame({"stimulus": stimulus, "frame": np.array(frames, dtype=np.int64),
                         "aoi": names, "wkt": wkt})


class _SceneIndex:
    """Parsed per-frame AOIs of one stimulus with candidate target points."""

    def __init__(self, scene: pd.DataFrame, n_frames: int, rng, pool: int = 16):
        self.names = sorted(scene["aoi"].unique())
        self.n_frames = n_frames
        a = len(self.names)
        self.geom = np.full((n_frames, a), None, dtype=object)
        code = pd.Categorical(scene["aoi"], categories=self.names).codes
        fr = scene["frame"].to_numpy()
        ok = (fr >= 0) & (fr < n_frames)
        self.geom[fr[ok], code[ok]] = shapely.from_wkt(scene["wkt"].to_numpy()[ok])
        present = self.geom != None  # noqa: E711
        self.present = present
        self.area = np.where(present, shapely.area(np.where(present, self.geom, None)), np.inf)
        cen = shapely.centroid(np.where(present, self.geom, None))
        self.cx = np.where(present, shapely.get_x(cen), np.nan)
        self.cy = np.where(present, shapely.get_y(cen), np.nan)
        # velocity of each AOI (video px per frame), 0 when it is not there next frame
        vx = np.zeros_like(self.cx)
        vy = np.zeros_like(self.cy)
        if n_frames > 1:
            vx[:-1] = np.nan_to_num(self.cx[1:] - self.cx[:-1])
            vy[:-1] = np.nan_to_num(self.cy[1:] - self.cy[:-1])
        self.vx, self.vy = vx, vy
        # candidate points inside each AOI: bbox samples, one contains_xy per geometry
        self.pool_x = np.full((n_frames, a, pool), np.nan)
        self.pool_y = np.full((n_frames, a, pool), np.nan)
        bounds = shapely.bounds(np.where(present, self.geom, None))
        for f, j in zip(*np.nonzero(present)):  # loop over frames x AOIs
            x0, y0, x1, y1 = bounds[f, j]
            px = rng.uniform(x0, x1, 8 * pool)
            py = rng.uniform(y0, y1, 8 * pool)
            inside = shapely.contains_xy(self.geom[f, j], px, py)
            px, py = px[inside][:pool], py[inside][:pool]
            if px.size == 0:
                px, py = np.array([self.cx[f, j]]), np.array([self.cy[f, j]])
            reps = -(-pool // px.size)
            self.pool_x[f, j] = np.tile(px, reps)[:pool]
            self.pool_y[f, j] = np.tile(py, reps)[:pool]

    def label_points(self, frame, u, v) -> np.ndarray:
        """AOI code (index into names, -1 none) of video points; smallest area wins."""
        out = np.full(u.shape, -1, dtype=np.int64)
        order = np.argsort(frame, kind="stable")
        fs = frame[order]
        bounds = np.flatnonzero(np.r_[True, fs[1:] != fs[:-1], True])
        for b0, b1 in zip(bounds[:-1], bounds[1:]):  # loop over frames
            f = fs[b0]
            rows = order[b0:b1]
            hit = np.full(rows.size, -1, dtype=np.int64)
            for j in np.argsort(self.area[f], kind="stable"):  # smallest area first
                if not self.present[f, j]:
                    continue
                free = hit < 0
                if not free.any():
                    break
                inside = shapely.contains_xy(self.geom[f, j], u[rows[free]], v[rows[free]])
                idx = np.flatnonzero(free)[inside]
                hit[idx] = j
            out[rows] = hit
        return out


# --------------------------------------------------------------------------- sessions

@dataclass(frozen=True)
class SessionStyle:
    """A raw recording layout and the recording's quality.

    Column names are our own inventions; ``valid_kind`` is ``"none"`` (loss
    = empty cells), ``"flag"`` (1/0), ``"bool"`` (True/False), ``"code"``
    (integer: 0 = lost, nonzero = valid) or ``"per_eye"`` (1/0 per eye).
    """

    name: str
    description: str
    rate_hz: float
    noise_deg: float
    display: Display
    time_col: str
    time_unit: str  # s, ms, us
    x_col: str = ""
    y_col: str = ""
    valid_col: str = ""
    valid_kind: str = "none"
    eye_cols: tuple = ()  # (x_left, y_left, valid_left, x_right, y_right, valid_right)
    coords: str = "px"
    delimiter: str = ","
    decimal: str = "."
    compression: str | None = None
    extension: str = "csv"
    na_rep: str = ""
    float_format: str = "%.3f"
    placement: str = "fit"  # fit = centred & scaled to fit; explicit = media_* columns
    media_rect_px: tuple | None = None  # (x, y, width, height) when explicit
    fixation_ms_mean: float = 300.0
    blink_rate_hz: float = 0.2
    dropout_rate_hz: float = 0.5
    lookaway_rate_hz: float = 0.0
    drift_deg: tuple = (0.0, 0.0)
    eye_offset_deg: tuple = (0.3, 0.1)


STYLES: dict[str, SessionStyle] = {s.name: s for s in [
    SessionStyle(
        name="infant_60hz_noisy",
        description="60 Hz, noise 0.5 deg, many blinks, dropouts and look-aways; "
                    "loss as empty cells, no validity column; time in ms",
        rate_hz=60.0, noise_deg=0.5,  # infant noise ~0.5 deg: common practice / from memory
        display=Display(1920, 1200, 518.4, 324.0, 600.0),
        time_col="clock_ms", time_unit="ms", x_col="gaze_h_px", y_col="gaze_v_px",
        fixation_ms_mean=350.0, blink_rate_hz=0.35, dropout_rate_hz=1.5,
        lookaway_rate_hz=0.08, drift_deg=(0.6, 0.4)),
    SessionStyle(
        name="binocular_120hz",
        description="120 Hz binocular, per-eye 0/1 validity columns, eyes offset "
                    "0.3/0.1 deg; explicit media rectangle; time in ms",
        rate_hz=120.0, noise_deg=0.25,
        display=Display(1920, 1080, 531.4, 298.9, 650.0),
        time_col="time_ms",
        eye_cols=("left_h_px", "left_v_px", "left_ok", "right_h_px", "right_v_px", "right_ok"),
        valid_kind="per_eye", placement="explicit", media_rect_px=(320, 180, 1280, 720),
        blink_rate_hz=0.25, dropout_rate_hz=0.5, time_unit="ms"),
    SessionStyle(
        name="lab_300hz_seconds",
        description="300 Hz, noise 0.15 deg, time in seconds, 1/0 validity, "
                    "missing positions written as NaN",
        rate_hz=300.0, noise_deg=0.15,
        display=Display(1680, 1050, 473.8, 296.1, 600.0),
        time_col="time_s", time_unit="s", x_col="x_screen", y_col="y_screen",
        valid_col="tracked", valid_kind="flag", na_rep="NaN", float_format="%.6f"),
    SessionStyle(
        name="gzip_500hz_semicolon_comma_us",
        description="500 Hz, gzip, ';' delimiter, decimal comma, integer time in "
                    "microseconds, 1/0 validity",
        rate_hz=500.0, noise_deg=0.1,
        display=Display(1920, 1080, 531.4, 298.9, 700.0),
        time_col="time_us", time_unit="us", x_col="point_x", y_col="point_y",
        valid_col="status", valid_kind="flag", delimiter=";", decimal=",",
        compression="gzip", extension="csv.gz"),
    SessionStyle(
        name="normalised_tsv_codes",
        description="150 Hz tab-separated, positions as 0..1 of the display, "
                    "integer quality code (0 lost, 1 good, 2 fair); explicit "
                    "off-centre media rectangle; time in ms",
        rate_hz=150.0, noise_deg=0.2,
        display=Display(1280, 1024, 376.3, 301.0, 650.0),
        time_col="t_ms", time_unit="ms", x_col="nx", y_col="ny",
        valid_col="quality", valid_kind="code", coords="norm", delimiter="\t",
        extension="tsv", float_format="%.6f", placement="explicit",
        media_rect_px=(100, 200, 960, 540)),
    SessionStyle(
        name="drifting_250hz",
        description="250 Hz, calibration drifting linearly from 0 to 3 deg "
                    "(2.4 right, 1.8 up) over the session; True/False validity",
        rate_hz=250.0, noise_deg=0.2,
        display=Display(1920, 1080, 531.4, 298.9, 650.0),
        time_col="ms", time_unit="ms", x_col="px_x", y_col="px_y",
        valid_col="valid", valid_kind="bool", drift_deg=(2.4, -1.8)),
]}

_UNIT_PER_MS = {"s": 1e-3, "ms": 1.0, "us": 1e3}
_LEAD_MS, _CHECK_MS, _GAP_MS, _TAIL_MS = 500.0, 1000.0, 300.0, 500.0
_STIMULI = ("story1", "story2")
_VIDEO = {"fps": 30.0, "width_px": 1280, "height_px": 720}
# share of fixation targets: eyes, mouth, body, book, background, off-video
_TARGET_P = np.array([0.3, 0.2, 0.15, 0.2, 0.1, 0.05])


@dataclass
class Session:
    """A simulated recording session and its truth (see :func:`simulate_session`)."""

    style: SessionStyle
    rate_hz: float
    study: dict = field(repr=False)
    raw: pd.DataFrame = field(repr=False)
    trials: pd.DataFrame = field(repr=False)
    aois: pd.DataFrame = field(repr=False)
    checks: pd.DataFrame = field(repr=False)
    samples: pd.DataFrame = field(repr=False)
    truth_samples: pd.DataFrame = field(repr=False)
    truth_fixations: pd.DataFrame = field(repr=False)
    truth_drift_deg: pd.DataFrame = field(repr=False)
    trials_ms: pd.DataFrame = field(repr=False)


def _style(style) -> SessionStyle:
    if isinstance(style, SessionStyle):
        return style
    try:
        return STYLES[style]
    except KeyError:
        raise ValueError(f"unknown session style {style!r}; expected one of "
                         + ", ".join(STYLES)) from None


def trials_for_samples(style, n_samples: int, *, trial_ms: float = 8000.0) -> int:
    """Number of trials that gives about ``n_samples`` samples in a session.

    >>> trials_for_samples("lab_300hz_seconds", 2_000_000)
    717
    """
    st = _style(style)
    per_trial = (trial_ms + _CHECK_MS + _GAP_MS) * st.rate_hz / 1000.0
    fixed = (_LEAD_MS + _CHECK_MS + _TAIL_MS) * st.rate_hz / 1000.0
    return max(1, int(round((n_samples - fixed) / per_trial)))


def _media_rect(st: SessionStyle) -> tuple[float, float, float, float]:
    if st.placement == "explicit":
        return tuple(float(v) for v in st.media_rect_px)
    W, H = st.display.width_px, st.display.height_px
    s = min(W / _VIDEO["width_px"], H / _VIDEO["height_px"])
    w, h = _VIDEO["width_px"] * s, _VIDEO["height_px"] * s
    return (W - w) / 2.0, (H - h) / 2.0, w, h


def simulate_session(style, *, n_trials: int = 6, trial_ms: float = 8000.0,
                     seed=0, pursuit_fraction: float = 0.0,
                     pursuit_speed_deg_s=(2.0, 30.0),
                     pursuit_ms=(300.0, 1500.0)) -> Session:
    """Simulate a recording session: trials watching the storyteller videos.

    Timeline (times snapped half a sample interval off the sample grid, so
    no sample falls exactly on a trial boundary or a video-frame boundary):
    a 0.5 s lead-in, a 1 s calibration-check target, then per trial a 0.3 s
    central fixation point, the video (``story1`` and ``story2`` alternate),
    and another check target; a 0.5 s tail.  During videos, fixation targets
    are drawn inside the AOIs of the current frame mapped to the screen
    (eyes 30 %, mouth 20 %, body 15 %, book 20 %, elsewhere on the video
    10 %, off the video 5 %) and follow the AOI's motion up to 2 deg/s.
    During a check the gaze lands on the target within a saccadic latency
    and holds it until the check ends; the measured gaze then shows the
    drift of the style.

    Parameters
    ----------
    style : str or SessionStyle
        A key of :data:`STYLES` or a custom style.
    n_trials : int
        Number of video trials (scales the session: see
        :func:`trials_for_samples`).
    trial_ms : float
        Video length; the trial lasts the whole number of sample intervals
        that fit in it.
    seed : int
        Everything is reproducible from it.
    pursuit_fraction, pursuit_speed_deg_s, pursuit_ms
        Smooth pursuit, as in :func:`simulate_gaze` (default: none).  Pursuit
        samples are labelled ``"pursuit"`` in ``truth_samples`` and count in
        neither ``truth_fixations`` nor :func:`true_aoi_percent`.

    Returns
    -------
    Session
        ``study`` (nested dict for :func:`aoi_fix.config.study_from_dict`),
        ``raw`` (the sample file's table in the style's columns and units),
        ``trials`` (``trial, stimulus, start, end`` in the raw time unit, plus
        ``media_x_px, media_y_px, media_width_px, media_height_px`` for
        explicit placement), ``aois`` (``stimulus, frame, aoi, wkt``),
        ``checks`` (``onset, offset, x_px, y_px`` in the raw time unit),
        ``samples`` (tidy measured gaze in ms and px), ``truth_samples``
        (``t_ms, label, movement, event, true_x_px, true_y_px, trial``;
        trial -1 outside trials), ``truth_fixations`` (from
        :func:`true_fixations`, with the ``trial`` holding the onset),
        ``truth_drift_deg`` (``trial, t_ms, dx_deg, dy_deg`` at trial
        mid-time), ``trials_ms`` (trial windows in ms with the media
        rectangle).
    """
    st = _style(style)
    if n_trials < 1:
        raise ValueError(f"n_trials must be >= 1, found {n_trials}")
    rng = np.random.default_rng(seed)
    disp = st.display
    W, H = float(disp.width_px), float(disp.height_px)
    dt = 1000.0 / st.rate_hz
    t0 = float(1_700_000 + int(rng.integers(0, 100_000)))  # a tracker clock in ms

    def snap(x):  # half a sample off the grid
        return t0 + (math.floor((x - t0) / dt) + 0.5) * dt

    trial_len = math.floor(trial_ms / dt) * dt
    check_len = math.floor(_CHECK_MS / dt) * dt
    starts, check_on = [], []
    t = snap(t0 + _LEAD_MS)
    for i in range(n_trials + 1):
        check_on.append(t)
        t = snap(t + check_len + _GAP_MS)
        if i < n_trials:
            starts.append(t)
            t = t + trial_len
    starts, check_on = np.array(starts), np.array(check_on)
    ends = starts + trial_len
    check_off = check_on + check_len
    duration_ms = check_off[-1] + _TAIL_MS - t0
    mx0, my0, mw, mh = _media_rect(st)
    vw, vh, fps = _VIDEO["width_px"], _VIDEO["height_px"], _VIDEO["fps"]
    n_frames = int(round(trial_ms * fps / 1000.0))
    sx, sy = mw / vw, mh / vh
    stim_of_trial = [_STIMULI[i % len(_STIMULI)] for i in range(n_trials)]

    scenes = {name: storyteller_scene(stimulus=name, fps=fps, width_px=vw, height_px=vh,
                                      duration_ms=trial_ms, seed=k + int(seed) * 7919)
              for k, name in enumerate(_STIMULI)}
    index = {name: _SceneIndex(scenes[name], n_frames, rng) for name in _STIMULI}
    aoi_names = index[_STIMULI[0]].names

    # check targets: centre and four points at +-25 % of the display
    check_pts = np.array([(0.5, 0.5), (0.25, 0.25), (0.75, 0.25), (0.75, 0.75), (0.25, 0.75)])
    cx = W * check_pts[np.arange(n_trials + 1) % 5, 0]
    cy = H * check_pts[np.arange(n_trials + 1) % 5, 1]
    video_fills = mx0 <= 0 and my0 <= 0 and mx0 + mw >= W and my0 + mh >= H
    p = _TARGET_P.copy()
    if video_fills:
        p[4] += p[5]
        p[5] = 0.0
    p = p / p.sum()
    p_cum = np.cumsum(p).tolist()
    check_on_l, starts_l = check_on.tolist(), starts.tolist()
    aoi_order = ["eyes", "mouth", "body", "book"]
    aoi_col = [aoi_names.index(a) for a in aoi_order]

    def targets(tt, g):
        c = bisect_right(check_on_l, tt) - 1
        if c >= 0 and tt < check_off[c]:
            return Target(cx[c], cy[c], 0.0, 0.0, check_off[c])
        i = bisect_right(starts_l, tt) - 1
        if i < 0 or tt >= ends[i]:  # lead-in, gap or tail: central fixation point
            return Target(W / 2 + g.normal(0, 5), H / 2 + g.normal(0, 5))
        f = min(int((tt - starts[i]) * fps / 1000.0), n_frames - 1)
        ix = index[stim_of_trial[i]]
        choice = min(bisect_right(p_cum, g.random()), 5)
        if choice < 4:
            avail = [k for k in range(4) if ix.present[f, aoi_col[k]]]
            if choice not in avail:
                choice = avail[int(g.integers(len(avail)))] if avail else 4
        if choice < 4:
            j = aoi_col[choice]
            k = int(g.integers(ix.pool_x.shape[2]))
            u, v = ix.pool_x[f, j, k], ix.pool_y[f, j, k]
            return Target(mx0 + u * sx, my0 + v * sy,
                          ix.vx[f, j] * sx * fps / 1000.0, ix.vy[f, j] * sy * fps / 1000.0)
        if choice == 4:
            return Target(mx0 + g.uniform(0.03, 0.97) * mw, my0 + g.uniform(0.03, 0.97) * mh)
        for _ in range(20):
            x, y = g.uniform(0.02 * W, 0.98 * W), g.uniform(0.02 * H, 0.98 * H)
            if not (mx0 <= x < mx0 + mw and my0 <= y < my0 + mh):
                return Target(x, y)
        return Target(mx0 + g.uniform(0.03, 0.97) * mw, my0 + g.uniform(0.03, 0.97) * mh)

    cuts = np.sort(np.r_[check_on, starts])
    samples, truth = simulate_gaze(
        display=disp, duration_ms=duration_ms, rate_hz=st.rate_hz, targets_px=targets,
        noise_deg=st.noise_deg, seed=rng, fixation_ms_mean=st.fixation_ms_mean,
        amplitude_deg=(1.0, 20.0), blink_rate_hz=st.blink_rate_hz,
        dropout_rate_hz=st.dropout_rate_hz, lookaway_rate_hz=st.lookaway_rate_hz,
        drift_deg=st.drift_deg, t0_ms=t0, cut_times_ms=cuts,
        binocular=bool(st.eye_cols), eye_offset_deg=st.eye_offset_deg,
        pursuit_fraction=pursuit_fraction, pursuit_speed_deg_s=pursuit_speed_deg_s,
        pursuit_ms=pursuit_ms)
    tt = truth["t_ms"].to_numpy()
    ti = np.searchsorted(starts, tt, side="right") - 1
    in_trial = (ti >= 0) & (tt < ends[np.clip(ti, 0, None)])
    trial_no = np.where(in_trial, ti + 1, -1).astype(np.int64)
    truth_samples = truth.assign(trial=trial_no)

    fx = true_fixations(truth, rate_hz=st.rate_hz)
    fi = np.searchsorted(starts, fx["onset_ms"].to_numpy(), side="right") - 1
    fin = (fi >= 0) & (fx["onset_ms"].to_numpy() < ends[np.clip(fi, 0, None)])
    fx["trial"] = np.where(fin, fi + 1, -1).astype(np.int64)

    # raw table in the style's units
    unit = _UNIT_PER_MS[st.time_unit]

    def raw_time(x):
        x = np.asarray(x, dtype=float) * unit
        return np.round(x).astype(np.int64) if st.time_unit == "us" else x

    def coord(x, axis):
        return x / (W if axis == 0 else H) if st.coords == "norm" else x

    raw = {st.time_col: raw_time(samples["t_ms"].to_numpy())}
    if st.eye_cols:
        xl, yl, vl, xr, yr, vr = st.eye_cols
        raw[xl], raw[yl] = samples["x_left_px"].to_numpy(), samples["y_left_px"].to_numpy()
        raw[vl] = samples["valid_left"].to_numpy().astype(np.int8)
        raw[xr], raw[yr] = samples["x_right_px"].to_numpy(), samples["y_right_px"].to_numpy()
        raw[vr] = samples["valid_right"].to_numpy().astype(np.int8)
    else:
        valid = samples["valid"].to_numpy()
        raw[st.x_col] = coord(samples["x_px"].to_numpy(), 0)
        raw[st.y_col] = coord(samples["y_px"].to_numpy(), 1)
        if st.valid_kind == "flag":
            raw[st.valid_col] = valid.astype(np.int8)
        elif st.valid_kind == "bool":
            raw[st.valid_col] = valid
        elif st.valid_kind == "code":
            raw[st.valid_col] = np.where(valid, np.where(rng.random(valid.size) < 0.15, 2, 1),
                                         0).astype(np.int8)
    raw = pd.DataFrame(raw)
    # round floats as the file will hold them, so ``raw`` equals the parsed file
    decimals = int(st.float_format.strip("%f").lstrip("."))
    for col in raw.columns:
        if raw[col].dtype.kind == "f":
            raw[col] = raw[col].round(decimals)

    trials = pd.DataFrame({"trial": np.arange(1, n_trials + 1, dtype=np.int64),
                           "stimulus": stim_of_trial,
                           "start": raw_time(starts), "end": raw_time(ends)})
    trials_ms = pd.DataFrame({"trial": trials["trial"], "stimulus": stim_of_trial,
                              "start_ms": starts, "end_ms": ends,
                              "media_x_px": mx0, "media_y_px": my0,
                              "media_width_px": mw, "media_height_px": mh})
    if st.placement == "explicit":
        for c in ("media_x_px", "media_y_px", "media_width_px", "media_height_px"):
            trials[c] = trials_ms[c].round().astype(np.int64)
    checks = pd.DataFrame({"onset": raw_time(check_on), "offset": raw_time(check_off),
                           "x_px": cx, "y_px": cy})
    tdec = 6 if st.time_unit == "s" else 3  # as written by write_session
    for tbl, cols in ((trials, ("start", "end")), (checks, ("onset", "offset"))):
        for c in cols:
            if tbl[c].dtype.kind == "f":
                tbl[c] = tbl[c].round(tdec)
    mid = (starts + ends) / 2.0
    last_t = t0 + (len(tt) - 1) * dt
    fr = (mid - t0) / (last_t - t0)
    drift = pd.DataFrame({"trial": trials["trial"], "t_ms": mid,
                          "dx_deg": fr * st.drift_deg[0], "dy_deg": fr * st.drift_deg[1]})

    samples_spec: dict = {"time": st.time_col, "time_unit": st.time_unit}
    if st.eye_cols:
        for key, col in zip(("x_left", "y_left", "valid_left", "x_right", "y_right",
                             "valid_right"), st.eye_cols):
            samples_spec[key] = col
    else:
        samples_spec.update(x=st.x_col, y=st.y_col)
        if st.valid_col:
            samples_spec["valid"] = st.valid_col
    samples_spec.update(coords=st.coords, delimiter=st.delimiter, decimal=st.decimal,
                        rate_hz=float(st.rate_hz))
    study = {"display": dataclasses.asdict(disp), "samples": samples_spec,
             "stimuli": {name: dict(_VIDEO) for name in _STIMULI}}
    aois = pd.concat([scenes[n] for n in _STIMULI], ignore_index=True)
    return Session(style=st, rate_hz=float(st.rate_hz), study=study, raw=raw, trials=trials,
                   aois=aois, checks=checks, samples=samples, truth_samples=truth_samples,
                   truth_fixations=fx, truth_drift_deg=drift, trials_ms=trials_ms)


def true_aoi_percent(session: Session) -> pd.DataFrame:
    """True share of fixation time per trial and AOI.

    Every true-fixation sample inside a trial (short dropouts included)
    contributes one sample interval to the AOI containing its true gaze point
    on that sample's video frame, ``floor((t_ms - start_ms) * fps / 1000)``;
    where AOIs overlap the smallest-area one wins.  Points on the video but
    in no AOI count as ``"(none)"``, points off the video as
    ``"(off-video)"``.

    Returns
    -------
    DataFrame
        ``trial, aoi, fixation_ms, pct_fixation``: one row per trial and label
        (AOIs in name order, then ``(none)``, ``(off-video)``), zeros
        included; ``pct_fixation`` sums to 100 per trial (NaN if a trial has
        no fixation time).
    """
    tr = session.truth_samples
    tm = session.trials_ms
    dt = 1000.0 / session.rate_hz
    sel = (tr["trial"].to_numpy() > 0) & (tr["movement"] == "fixation").to_numpy()
    t = tr["t_ms"].to_numpy()[sel]
    trial = tr["trial"].to_numpy()[sel]
    x = tr["true_x_px"].to_numpy()[sel]
    y = tr["true_y_px"].to_numpy()[sel]
    row = trial - 1  # trials are numbered 1..n in order
    stim = tm["stimulus"].to_numpy()[row]
    names = sorted(session.aois["aoi"].unique())
    labels = names + [AOI_NONE, AOI_OFF_VIDEO]
    code = np.full(t.size, len(names) + 1, dtype=np.int64)  # off-video by default
    for sname in pd.unique(tm["stimulus"]):
        spec = session.study["stimuli"][sname]
        vw, vh, fps = spec["width_px"], spec["height_px"], spec["fps"]
        m = stim == sname
        r = row[m]
        u = (x[m] - tm["media_x_px"].to_numpy()[r]) / tm["media_width_px"].to_numpy()[r] * vw
        v = (y[m] - tm["media_y_px"].to_numpy()[r]) / tm["media_height_px"].to_numpy()[r] * vh
        on = (u >= 0) & (u < vw) & (v >= 0) & (v < vh)
        frame = np.floor((t[m] - tm["start_ms"].to_numpy()[r]) * fps / 1000.0).astype(np.int64)
        n_frames = int(round((tm["end_ms"] - tm["start_ms"]).max() * fps / 1000.0)) + 1
        scene = session.aois[session.aois["stimulus"] == sname]
        n_frames = max(n_frames, int(scene["frame"].max()) + 1)
        ix = _SceneIndex(scene, n_frames, np.random.default_rng(0), pool=1)
        hit = ix.label_points(frame[on], u[on], v[on])
        sub = np.full(u.size, len(names) + 1, dtype=np.int64)
        mapped = np.where(hit >= 0, np.array([names.index(nm) for nm in ix.names]
                                             + [0])[hit], len(names))
        sub[on] = mapped
        code[m] = sub
    n_tr = len(tm)
    ms = np.zeros((n_tr, len(labels)))
    np.add.at(ms, (row, code), dt)
    tot = ms.sum(axis=1, keepdims=True)
    with np.errstate(invalid="ignore", divide="ignore"):
        pct = np.where(tot > 0, 100.0 * ms / tot, np.nan)
    return pd.DataFrame({"trial": np.repeat(tm["trial"].to_numpy(), len(labels)),
                         "aoi": np.tile(labels, n_tr),
                         "fixation_ms": ms.ravel(), "pct_fixation": pct.ravel()})


def true_valid_fraction(session: Session) -> pd.DataFrame:
    """Share of samples with a valid measurement per trial (``trial, valid_fraction``).

    For binocular styles a sample is valid when at least one eye is.
    """
    trial = session.truth_samples["trial"].to_numpy()
    valid = session.samples["valid"].to_numpy()
    m = trial > 0
    n_tr = len(session.trials_ms)
    cnt = np.bincount(trial[m] - 1, minlength=n_tr)
    ok = np.bincount(trial[m] - 1, weights=valid[m].astype(float), minlength=n_tr)
    with np.errstate(invalid="ignore", divide="ignore"):
        frac = np.where(cnt > 0, ok / np.maximum(cnt, 1), np.nan)
    return pd.DataFrame({"trial": session.trials_ms["trial"].to_numpy(),
                         "valid_fraction": frac})


# --------------------------------------------------------------------------- writing

def _toml_value(v) -> str:
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, int):
        return str(v)
    if isinstance(v, float):
        if not math.isfinite(v):
            raise ValueError(f"cannot write non-finite number {v!r} to TOML")
        return repr(v)
    if isinstance(v, str):
        return json.dumps(v)  # JSON string escapes are valid TOML basic strings
    if isinstance(v, (list, tuple)):
        return "[" + ", ".join(_toml_value(x) for x in v) + "]"
    raise TypeError(f"cannot write {type(v).__name__} to TOML")


def _to_toml(data: dict) -> str:
    lines: list[str] = []

    def table(prefix: str, tbl: dict):
        scalars = {k: v for k, v in tbl.items() if not isinstance(v, dict)}
        subs = {k: v for k, v in tbl.items() if isinstance(v, dict)}
        if prefix and (scalars or not subs):
            lines.append(f"[{prefix}]")
            lines.extend(f"{k} = {_toml_value(v)}" for k, v in scalars.items())
            lines.append("")
        for k, v in subs.items():
            table(f"{prefix}.{k}" if prefix else k, v)

    table("", data)
    return "\n".join(lines)


def write_session(session: Session, directory, *, style=None) -> dict[str, Path]:
    """Write a session's input files in its style's raw format.

    Files: ``samples.<csv|tsv|csv.gz>`` (delimiter, decimal mark, missing
    cells, time unit and compression of the style), ``study.toml``,
    ``trials.csv``, ``aois.csv`` and ``checks.csv``.

    Parameters
    ----------
    session : Session
    directory : path
        Created if needed.
    style : str or SessionStyle, optional
        Defaults to the session's own style.

    Returns
    -------
    dict of str to Path
        Keys ``samples, study, trials, aois, checks``.
    """
    st = session.style if style is None else _style(style)
    out = Path(directory)
    out.mkdir(parents=True, exist_ok=True)
    paths = {"samples": out / f"samples.{st.extension}", "study": out / "study.toml",
             "trials": out / "trials.csv", "aois": out / "aois.csv",
             "checks": out / "checks.csv"}
    comp = {"method": "gzip", "mtime": 0} if st.compression == "gzip" else None
    session.raw.to_csv(paths["samples"], sep=st.delimiter, decimal=st.decimal, index=False,
                       na_rep=st.na_rep, float_format=st.float_format, compression=comp)
    paths["study"].write_text(
        "# Simulated session: style " + st.name + "\n" + _to_toml(session.study),
        encoding="utf-8")
    tfmt = "%.6f" if st.time_unit == "s" else "%.3f"
    session.trials.to_csv(paths["trials"], index=False, float_format=tfmt)
    session.aois.to_csv(paths["aois"], index=False)
    session.checks.to_csv(paths["checks"], index=False, float_format=tfmt)
    return paths
