"""Per-trial tables: fixations clipped to trials, AOI per fixation, percent of fixation time.

Reserved AOI labels in ``aoi_summary``:

``(none)``
    fixation time on the drawn video but inside no AOI of the current frame;
``(off-video)``
    fixation time during the trial with gaze outside the drawn video.

Time weights
------------
Each fixation sample carries the time to the next sample; the last sample of
a fixation carries ``offset_ms - t`` so the weights of a fixation add up to its
duration.  Weights are cut at trial boundaries, and the time cut off goes to
the next sample of the same fixation on the other side: a fixation that runs
across a trial's start or end is clipped exactly at the boundary, and its
parts are listed (and counted in the manifest) separately.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

__all__ = ["NONE_LABEL", "OFF_VIDEO_LABEL", "sample_weights", "carry_weights",
           "fixation_parts", "aoi_summary", "trial_quality"]

NONE_LABEL = "(none)"
OFF_VIDEO_LABEL = "(off-video)"
#: codes used per sample: >= 0 AOI index; these two for the reserved labels
CODE_NONE = -1
CODE_OFF_VIDEO = -2
CODE_NOT_IN_TRIAL = -3


def fixation_of_sample(n: int, fixations: pd.DataFrame) -> np.ndarray:
    """Row number in ``fixations`` of each sample's fixation, -1 outside fixations.

    The fixations must be in time order and must not overlap (every detector's
    output is).  Streaming index arithmetic, no per-fixation expansion.

    >>> fx = pd.DataFrame({"start_row": [1, 4], "end_row": [3, 6]})
    >>> fixation_of_sample(7, fx).tolist()
    [-1, 0, 0, -1, 1, 1, -1]
    """
    fid = np.full(n, -1, dtype=np.int64)
    if len(fixations) == 0 or n == 0:
        return fid
    starts = fixations["start_row"].to_numpy(np.int64)
    ends = fixations["end_row"].to_numpy(np.int64)
    keep = ends > starts
    rows = np.flatnonzero(keep)
    starts, ends = starts[keep], ends[keep]
    mark = np.zeros(n, dtype=np.int64)
    mark[starts] = 1
    k = np.cumsum(mark, out=mark)  # fixations started at or before each sample
    k -= 1
    last = ends[np.maximum(k, 0)]
    inside = (k >= 0) & (np.arange(n) < last)
    fid[inside] = rows[k[inside]]
    return fid


def sample_weights(t_ms: np.ndarray, fid: np.ndarray, fixations: pd.DataFrame,
                   boundaries_ms: np.ndarray) -> np.ndarray:
    """Time (ms) each fixation sample stands for, cut at trial boundaries; 0 elsewhere."""
    n = len(t_ms)
    w = np.zeros(n)
    if n == 0 or len(fixations) == 0:
        return w
    nxt = np.append(t_ms[1:], np.inf)
    is_fix = fid >= 0
    same_next = np.append(fid[1:] == fid[:-1], False) & is_fix
    offset = fixations["offset_ms"].to_numpy(float)
    w = np.where(same_next, nxt - t_ms, 0.0)
    last = is_fix & ~same_next
    w[last] = offset[fid[last]] - t_ms[last]
    if len(boundaries_ms):
        b = np.sort(np.asarray(boundaries_ms, float))
        k = np.searchsorted(b, t_ms, side="right")
        nb = np.where(k < len(b), b[np.minimum(k, len(b) - 1)], np.inf)
        w = np.minimum(w, nb - t_ms)
    w[~is_fix] = 0.0
    return np.maximum(w, 0.0)


def carry_weights(t_ms: np.ndarray, fid: np.ndarray, w_own: np.ndarray) -> np.ndarray:
    """Time a sample lost to a trial boundary, given to the next sample of its fixation.

    ``w_own`` from :func:`sample_weights` stops at a trial boundary; the rest of
    that interval (boundary to next sample) is carried by the next sample of the
    same fixation, on the other side of the boundary, so a fixation in progress
    when a trial starts counts for the trial from its first millisecond.  Use
    ``w_own + carry`` as the time weights.
    """
    n = len(t_ms)
    carry = np.zeros(n)
    if n < 2:
        return carry
    cont = (fid[1:] == fid[:-1]) & (fid[1:] >= 0)
    carry[1:] = np.where(cont, np.maximum(np.diff(t_ms) - w_own[:-1], 0.0), 0.0)
    return carry


def fixation_parts(t_ms: np.ndarray, fid: np.ndarray, trial_idx: np.ndarray,
                   w: np.ndarray, code: np.ndarray, fixations: pd.DataFrame,
                   n_codes: int, w_own: np.ndarray | None = None) -> pd.DataFrame:
    """Fixations split at trial boundaries, each part with its majority AOI code.

    Returns columns ``fixation`` (the detector's number), ``trial_row`` (-1
    outside trials), ``onset_ms, offset_ms, duration_ms, x_px, y_px`` and
    ``code`` (AOI index holding most of the part's time; reserved codes
    below 0), ``clipped`` (the part is not the whole fixation).
    """
    is_fix = fid >= 0
    idx = np.flatnonzero(is_fix)
    cols = ["fixation", "trial_row", "onset_ms", "offset_ms", "duration_ms", "x_px", "y_px",
            "code", "clipped"]
    if len(idx) == 0:
        return pd.DataFrame({c: pd.Series([], dtype=float if c.endswith(("_ms", "_px"))
                                          else (bool if c == "clipped" else "int64"))
                             for c in cols})
    f, tr = fid[idx], trial_idx[idx]
    new = np.ones(len(idx), dtype=bool)
    new[1:] = (f[1:] != f[:-1]) | (tr[1:] != tr[:-1]) | (idx[1:] != idx[:-1] + 1)
    part = np.cumsum(new) - 1
    first = idx[new]
    last = idx[np.append(new[1:], True)]
    n_parts = len(first)
    # a part ends where its last sample's own time ends (``w`` may also carry
    # time cut off at a trial boundary before that sample)
    own = w if w_own is None else w_own
    offset = t_ms[last] + own[last]
    # a part starts where its time starts (a trial boundary for a clipped part)
    onset = offset - np.bincount(part, weights=w[idx], minlength=len(first))
    fx = fixations["x_px"].to_numpy(float)
    fy = fixations["y_px"].to_numpy(float)
    fixno = fixations["fixation"].to_numpy(np.int64)
    # majority code by time: codes shifted to be >= 0
    shift = -CODE_OFF_VIDEO
    key = part * (n_codes + shift) + (np.maximum(code[idx], CODE_OFF_VIDEO) + shift)
    tot = np.bincount(key, weights=w[idx], minlength=n_parts * (n_codes + shift))
    tot = tot.reshape(n_parts, n_codes + shift)
    best = tot.argmax(axis=1) - shift
    whole_on = fixations["onset_ms"].to_numpy(float)[f[new]]
    whole_off = fixations["offset_ms"].to_numpy(float)[f[new]]
    clipped = (np.abs(onset - whole_on) > 1e-9) | (np.abs(offset - whole_off) > 1e-9)
    return pd.DataFrame({
        "fixation": fixno[f[new]], "trial_row": tr[new], "onset_ms": onset,
        "offset_ms": offset, "duration_ms": offset - onset,
        "x_px": fx[f[new]], "y_px": fy[f[new]], "code": best, "clipped": clipped})


def aoi_summary(trials: pd.DataFrame, names_by_trial: list[tuple[str, ...]],
                trial_idx: np.ndarray, code: np.ndarray, w: np.ndarray,
                parts: pd.DataFrame) -> pd.DataFrame:
    """One row per trial and AOI of its stimulus (zeros included) plus the reserved rows.

    Vectorised with ``bincount`` over (trial, code) keys; the only loop builds
    the label list per trial.
    """
    in_trial = trial_idx >= 0
    ti, ci, wi = trial_idx[in_trial], code[in_trial], w[in_trial]
    n_tr = len(trials)
    shift = -CODE_OFF_VIDEO
    width = max((len(n) for n in names_by_trial), default=0) + shift
    key = ti * width + (np.maximum(ci, CODE_OFF_VIDEO) + shift)
    tot = np.bincount(key, weights=wi, minlength=n_tr * width).reshape(n_tr, width)
    p = parts[parts["trial_row"].to_numpy() >= 0]
    pk = p["trial_row"].to_numpy(np.int64) * width + (p["code"].to_numpy(np.int64) + shift)
    n_fix = np.bincount(pk, minlength=n_tr * width).reshape(n_tr, width)
    first = np.full(n_tr * width, np.inf)
    np.minimum.at(first, pk, p["onset_ms"].to_numpy(float))
    first = first.reshape(n_tr, width)
    # per trial: its AOI codes then the two reserved codes
    tr_rows, cols, labels = [], [], []
    for k, names in enumerate(names_by_trial):  # a loop over trials
        codes = list(range(len(names))) + [CODE_NONE, CODE_OFF_VIDEO]
        tr_rows.extend([k] * len(codes))
        cols.extend(c + shift for c in codes)
        labels.extend(list(names) + [NONE_LABEL, OFF_VIDEO_LABEL])
    r = np.asarray(tr_rows, dtype=np.int64)
    c = np.asarray(cols, dtype=np.int64)
    fix_ms = tot[r, c] if len(r) else np.zeros(0)
    total = np.bincount(r, weights=fix_ms, minlength=n_tr)[r] if len(r) else np.zeros(0)
    start = trials["start_ms"].to_numpy(float)[r]
    dur = trials["end_ms"].to_numpy(float)[r] - start
    with np.errstate(invalid="ignore", divide="ignore"):
        pct = np.where(total > 0, 100.0 * fix_ms / total, np.nan)
        pct_trial = np.where(dur > 0, 100.0 * fix_ms / dur, np.nan)
    f = first[r, c] if len(r) else np.zeros(0)
    return pd.DataFrame({
        "trial": trials["trial"].to_numpy()[r], "stimulus": trials["stimulus"].to_numpy()[r],
        "aoi": np.asarray(labels, dtype=object), "fixation_ms": fix_ms,
        "pct_fixation": pct, "pct_trial": pct_trial,
        "n_fixations": (n_fix[r, c] if len(r) else np.zeros(0)).astype("int64"),
        "first_fixation_ms": np.where(np.isfinite(f), f - start, np.nan)})


def trial_quality(trials: pd.DataFrame, trial_idx: np.ndarray, raw_valid: np.ndarray,
                  w: np.ndarray, interval_ms: float, *, min_valid_fraction: float) -> pd.DataFrame:
    """Per-trial validity and fixation time.

    ``valid_fraction`` is the time-weighted share of the trial covered by valid
    raw samples (before gap filling): valid samples x nominal interval /
    trial duration, capped at 1.  A pause in the recording lowers it.
    """
    n_tr = len(trials)
    sel = trial_idx >= 0
    n_samples = np.bincount(trial_idx[sel], minlength=n_tr)
    n_valid = np.bincount(trial_idx[sel], weights=raw_valid[sel].astype(float), minlength=n_tr)
    fix_ms = np.bincount(trial_idx[sel], weights=w[sel], minlength=n_tr)
    dur = trials["end_ms"].to_numpy(float) - trials["start_ms"].to_numpy(float)
    vf = np.minimum(n_valid * interval_ms / dur, 1.0)
    return pd.DataFrame({
        "trial": trials["trial"].to_numpy(), "stimulus": trials["stimulus"].to_numpy(),
        "duration_ms": dur, "n_samples": n_samples.astype(np.int64), "valid_fraction": vf,
        "fixation_ms": fix_ms, "flag_low_validity": vf < min_valid_fraction})
