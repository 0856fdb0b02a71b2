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
           "fixation_parts", "aoi_summary", "trial_quality", "per_trial_sums"]

NONE_LABEL = "(none)"
OFF_VIDEO_LABEL = "(off-video)"
#: codes used per sample: >= 0 AOI index; these two for the reserved labels
CODE_NONE = -1
CODE_OFF_VIDEO = -2
CODE_NOT_IN_TRIAL = -3


def fixation_of_sample(n: int, fixations: pd.DataFrame) -> np.ndarray:
    """Row number in ``fixations`` of each sample's fixation, -1 outside fixations.

    The fixations must be in time order and must not overlap (every detector's
    output is).  Two prefix sums over start/end marks, no per-fixation expansion.

    >>> fx = pd.DataFrame({"start_row": [1, 4, 6], "end_row": [3, 6, 6]})
    >>> fixation_of_sample(7, fx).tolist()
    [-1, 0, 0, -1, 1, 1, -1]
    """
    if len(fixations) == 0 or n == 0:
        return np.full(n, -1, dtype=np.int32)
    starts = fixations["start_row"].to_numpy(np.int64)
    ends = fixations["end_row"].to_numpy(np.int64)
    keep = ends > starts
    rows = np.flatnonzero(keep)
    starts, ends = starts[keep], ends[keep]
    mark = np.zeros(n + 1, dtype=np.int32)
    mark[starts] += 1
    mark[ends] -= 1
    inside = np.cumsum(mark[:n], dtype=np.int32) > 0
    mark[:] = 0
    mark[starts] = 1
    fid = np.cumsum(mark[:n], dtype=np.int32)  # fixations started so far (int32 fits)
    fid -= 1
    fid[~inside] = -1
    if len(rows) < len(keep):  # empty fixations were skipped: back to table rows
        got = fid >= 0
        fid[got] = rows[fid[got]]
    return fid


def _boundary_rows(t_ms: np.ndarray, boundaries_ms: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """For each boundary: the last sample before it (-1 when none), and the boundary."""
    b = np.unique(np.asarray(boundaries_ms, float))
    b = b[np.isfinite(b)]
    return np.searchsorted(t_ms, b, side="left") - 1, b


def sample_weights(t_ms: np.ndarray, fid: np.ndarray, fixations: pd.DataFrame,
                   boundaries_ms: np.ndarray) -> np.ndarray:
    """Time (ms) each fixation sample stands for, cut at trial boundaries; 0 elsewhere.

    ``t_ms`` must increase.  A fixation sample stands for the time to the
    next sample; its fixation's last sample for ``offset_ms - t``.  A
    boundary can only cut the last sample before it (every other sample's
    time ends at the next sample, before the boundary), so the cut is one
    binary search per boundary.

    >>> t = np.array([0.0, 10, 20, 30])
    >>> fx = pd.DataFrame({"offset_ms": [40.0], "start_row": [0], "end_row": [4]})
    >>> sample_weights(t, fixation_of_sample(4, fx), fx, np.array([15.0])).tolist()
    [10.0, 5.0, 10.0, 10.0]
    """
    n = len(t_ms)
    w = np.zeros(n)
    if n == 0 or len(fixations) == 0:
        return w
    np.subtract(t_ms[1:], t_ms[:-1], out=w[:-1])
    w *= fid >= 0
    starts = fixations["start_row"].to_numpy(np.int64)
    ends = fixations["end_row"].to_numpy(np.int64)
    nonempty = ends > starts
    last = ends[nonempty] - 1
    w[last] = fixations["offset_ms"].to_numpy(float)[nonempty] - t_ms[last]
    if len(boundaries_ms):
        j, b = _boundary_rows(t_ms, boundaries_ms)
        ok = j >= 0
        j, b = j[ok], b[ok]
        np.minimum.at(w, j, b - t_ms[j])
        touched = np.concatenate([last, j])
    else:
        touched = last
    w[touched] = np.maximum(w[touched], 0.0)
    w[touched[fid[touched] < 0]] = 0.0
    return w


def carry_weights(t_ms: np.ndarray, fid: np.ndarray, w_own: np.ndarray,
                  boundaries_ms: np.ndarray | None = None) -> np.ndarray:
    """Time a sample lost to a trial boundary, given to the next sample of its fixation.

    ``w_own`` from :func:`sample_weights` stops at a trial boundary; the rest of
    that interval (boundary to next sample) is carried by the next sample of the
    same fixation, on the other side of the boundary, so a fixation in progress
    when a trial starts counts for the trial from its first millisecond.  Use
    ``w_own + carry`` as the time weights.  With ``boundaries_ms`` (those given
    to :func:`sample_weights`) only the sample after each boundary is looked
    at; without, every sample (same result for ``w_own`` from
    :func:`sample_weights`).
    """
    n = len(t_ms)
    carry = np.zeros(n)
    if n < 2:
        return carry
    if boundaries_ms is not None:
        i, _ = _boundary_rows(t_ms, boundaries_ms)
        i = np.unique(i[(i >= 0) & (i < n - 1)])
        j = i + 1
        cont = (fid[j] == fid[i]) & (fid[j] >= 0)
        i, j = i[cont], j[cont]
        carry[j] = np.maximum((t_ms[j] - t_ms[i]) - w_own[i], 0.0)
        return carry
    cont = (fid[1:] == fid[:-1]) & (fid[1:] >= 0)
    carry[1:] = np.where(cont, np.maximum(np.diff(t_ms) - w_own[:-1], 0.0), 0.0)
    return carry


def _run_starts(*keys: np.ndarray) -> np.ndarray:
    """First row of every run of rows on which all ``keys`` stay the same.

    >>> _run_starts(np.array([0, 0, 1, 1, 1]), np.array([5, 6, 6, 6, 7])).tolist()
    [0, 1, 2, 4]
    """
    n = len(keys[0])
    if n == 0:
        return np.zeros(0, dtype=np.int64)
    change = keys[0][1:] != keys[0][:-1]
    for k in keys[1:]:
        change |= k[1:] != k[:-1]
    starts = np.flatnonzero(change)
    starts += 1
    return np.concatenate([np.zeros(1, dtype=starts.dtype), starts])


def fixation_parts(t_ms: np.ndarray, fid: np.ndarray, trial_idx: np.ndarray,
                   w: np.ndarray, code: np.ndarray, fixations: pd.DataFrame,
                   n_codes: int, w_own: np.ndarray | None = None) -> pd.DataFrame:
    """Fixations split at trial boundaries, each part with its majority AOI code.

    Returns columns ``fixation`` (the detector's number), ``trial_row`` (-1
    outside trials), ``onset_ms, offset_ms, duration_ms, x_px, y_px`` and
    ``code`` (AOI index holding most of the part's time; reserved codes
    below 0), ``clipped`` (the part is not the whole fixation).

    ``w`` must be 0 outside fixations (as :func:`sample_weights` makes it):
    per-part sums run over whole columns with one ``bincount`` each.
    """
    cols = ["fixation", "trial_row", "onset_ms", "offset_ms", "duration_ms", "x_px", "y_px",
            "code", "clipped"]
    n = len(fid)
    is_fix = fid >= 0
    if n == 0 or not is_fix.any():
        return pd.DataFrame({c: pd.Series([], dtype=float if c.endswith(("_ms", "_px"))
                                          else (bool if c == "clipped" else "int64"))
                             for c in cols})
    # runs of samples with one fixation, trial and AOI code: every sum below is over
    # runs (np.add.reduceat), not over samples
    rs = _run_starts(fid, trial_idx, code)
    f_r, t_r = fid[rs], trial_idx[rs]
    w_r = np.add.reduceat(w, rs) if len(rs) else np.zeros(0)
    # a part starts where the fixation or the trial changes, on a fixation sample
    fix_r = f_r >= 0
    new_part = fix_r.copy()
    new_part[1:] &= (f_r[1:] != f_r[:-1]) | (t_r[1:] != t_r[:-1])
    first = rs[new_part]
    n_parts = len(first)
    part_r = np.cumsum(new_part) - 1  # part of each run (fixation runs only)
    part_r, w_fr, c_r = part_r[fix_r], w_r[fix_r], code[rs[fix_r]]
    f_first = fid[first]
    # a part ends at the next part's start or at its fixation's end
    fix_end = fixations["end_row"].to_numpy(np.int64)[f_first]
    nxt = np.append(first[1:], n)
    last = np.minimum(nxt, fix_end) - 1
    # a part ends where its last sample's own time ends (``w`` may also carry
    # time cut off at a trial boundary before that sample)
    own = w if w_own is None else w_own
    offset = t_ms[last] + own[last]
    # a part starts where its time starts (a trial boundary for a clipped part)
    onset = offset - np.bincount(part_r, weights=w_fr, minlength=n_parts)[:n_parts]
    fx = fixations["x_px"].to_numpy(float)
    fy = fixations["y_px"].to_numpy(float)
    fixno = fixations["fixation"].to_numpy(np.int64)
    # majority code by time: codes shifted to be >= 0
    shift = -CODE_OFF_VIDEO
    width = n_codes + shift
    key = part_r * width + (np.maximum(c_r, CODE_OFF_VIDEO).astype(np.int64) + shift)
    tot = np.bincount(key, weights=w_fr, minlength=n_parts * width)[:n_parts * width]
    best = tot.reshape(n_parts, width).argmax(axis=1) - shift
    whole_on = fixations["onset_ms"].to_numpy(float)[f_first]
    whole_off = fixations["offset_ms"].to_numpy(float)[f_first]
    clipped = (np.abs(onset - whole_on) > 1e-9) | (np.abs(offset - whole_off) > 1e-9)
    return pd.DataFrame({
        "fixation": fixno[f_first], "trial_row": trial_idx[first].astype(np.int64),
        "onset_ms": onset, "offset_ms": offset, "duration_ms": offset - onset,
        "x_px": fx[f_first], "y_px": fy[f_first], "code": best, "clipped": clipped})


def aoi_summary(trials: pd.DataFrame, names_by_trial: list[tuple[str, ...]],
                trial_idx: np.ndarray, code: np.ndarray, w: np.ndarray,
                parts: pd.DataFrame) -> pd.DataFrame:
    """One row per trial and AOI of its stimulus (zeros included) plus the reserved rows.

    Vectorised with ``bincount`` over (trial, code) keys; the only loop builds
    the label list per trial.
    """
    n_tr = len(trials)
    shift = -CODE_OFF_VIDEO
    width = max((len(n) for n in names_by_trial), default=0) + shift
    # time per run of samples with one trial and code, then per (trial, code); samples
    # outside trials go to a first row of bins that is dropped
    rs = _run_starts(trial_idx, code)
    w_r = np.add.reduceat(w, rs) if len(rs) else np.zeros(0)
    key = np.maximum(trial_idx[rs], -1).astype(np.int64)
    key += 1
    key *= width
    key += np.maximum(code[rs], CODE_OFF_VIDEO)
    key += shift
    tot = np.bincount(key, weights=w_r, minlength=(n_tr + 1) * width)
    del key
    tot = tot[width:(n_tr + 1) * width].reshape(n_tr, width)
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


def per_trial_sums(trial_idx: np.ndarray, n_trials: int, *values) -> list[np.ndarray]:
    """Per trial: the sum of each of ``values`` over its samples (None = sample count).

    Samples outside trials (-1) are not counted.  The recording is cut into
    runs of equal ``trial_idx`` (a trial's samples are one or a few runs, as
    samples are in time order), each value is summed per run with one
    ``np.add.reduceat`` (integers and booleans as int64, so counts are exact),
    and the runs are added up per trial.  No full-length temporary is made
    besides the run boundaries, and the result does not depend on blocks or
    threads.

    >>> per_trial_sums(np.array([-1, 0, 0, 1]), 2, None, np.array([1., 2, 3, 4]))
    [array([2, 1]), array([5., 4.])]
    >>> per_trial_sums(np.array([0, 1, 0]), 2, np.array([True, True, False]))
    [array([1, 1])]
    """
    ti = np.asarray(trial_idx)
    n = len(ti)
    if n == 0:
        return [np.zeros(n_trials, dtype=np.int64 if v is None or np.asarray(v).dtype.kind
                         in "biu" else float) for v in values]
    starts = _run_starts(ti)
    run_trial = ti[starts].astype(np.int64)
    keep = run_trial >= 0
    run_trial = run_trial[keep]
    out = []
    for v in values:
        if v is None:
            per_run = np.diff(np.append(starts, n))
            exact = True
        else:
            a = np.asarray(v)
            exact = a.dtype.kind in "biu"
            per_run = np.add.reduceat(a, starts, dtype=np.int64 if exact else np.float64)
        if exact:
            total = np.zeros(n_trials, dtype=np.int64)
            np.add.at(total, run_trial, per_run[keep].astype(np.int64))
        else:
            total = np.zeros(n_trials)
            np.add.at(total, run_trial, per_run[keep])
        out.append(total)
    return out


def trial_quality(trials: pd.DataFrame, trial_idx: np.ndarray, raw_valid: np.ndarray,
                  w: np.ndarray, interval_ms: float, *, min_valid_fraction: float) -> pd.DataFrame:
    """Per-trial validity and fixation time.

    ``valid_fraction`` is the time-weighted share of the trial covered by valid
    raw samples (before gap filling): valid samples x nominal interval /
    trial duration, capped at 1.  A pause in the recording lowers it.
    """
    n_tr = len(trials)
    n_samples, n_valid, fix_ms = per_trial_sums(trial_idx, n_tr, None, raw_valid, w)
    dur = trials["end_ms"].to_numpy(float) - trials["start_ms"].to_numpy(float)
    vf = np.minimum(n_valid * interval_ms / dur, 1.0)
    return pd.DataFrame({
        "trial": trials["trial"].to_numpy(), "stimulus": trials["stimulus"].to_numpy(),
        "duration_ms": dur, "n_samples": n_samples.astype(np.int64), "valid_fraction": vf,
        "fixation_ms": fix_ms, "flag_low_validity": vf < min_valid_fraction})
