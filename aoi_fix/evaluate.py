"""Agreement between two labelings of the same gaze samples or events.

Used to score a detector against simulated ground truth
(:mod:`aoi_fix.simulate`) or two detectors against each other.

References
----------
.. [1] Cohen, J. (1960). A coefficient of agreement for nominal scales.
   *Educational and Psychological Measurement*, 20, 37-46 (citation details
   from memory).
.. [2] Andersson, R., Larsson, L., Holmqvist, K., Stridh, M., & Nystrom, M.
   (2017). One algorithm to rule them all? *Behavior Research Methods*, 49,
   616-637: sample-level Cohen's kappa between detectors and human coders
   (citation details from memory).
"""

from __future__ import annotations

import numpy as np
import pandas as pd

__all__ = ["cohen_kappa", "fixation_mask", "event_f1"]


def cohen_kappa(labels_a, labels_b) -> float:
    """Cohen's kappa between two labelings of the same items.

    ``kappa = (p_o - p_e) / (1 - p_e)`` where ``p_o`` is the share of items
    given the same label and ``p_e`` the agreement expected by chance from
    the two labelings' marginal label frequencies [1]_.

    Parameters
    ----------
    labels_a, labels_b : array-like of hashable
        One label per item (strings, integers, booleans...); NaN/None count
        as a label of their own.

    Returns
    -------
    float
        Kappa in [-1, 1]; NaN when there are no items or when chance
        agreement is 1 (both labelings use one and the same single label),
        where kappa is undefined.

    Raises
    ------
    ValueError
        The two labelings differ in length.

    References
    ----------
    .. [1] Cohen, J. (1960). *Educational and Psychological Measurement*, 20,
       37-46 (from memory).

    Examples
    --------
    >>> cohen_kappa(["fix", "fix", "sac", "sac"], ["fix", "sac", "sac", "sac"])
    0.5
    """
    a = np.asarray(labels_a, dtype=object).ravel()
    b = np.asarray(labels_b, dtype=object).ravel()
    if a.shape != b.shape:
        raise ValueError(f"cohen_kappa: labelings differ in length ({a.size} vs {b.size})")
    n = a.size
    if n == 0:
        return float("nan")
    codes, uniques = pd.factorize(np.concatenate([a, b]), use_na_sentinel=False)
    ca, cb = codes[:n], codes[n:]
    k = len(uniques)
    p_o = float(np.mean(ca == cb))
    pa = np.bincount(ca, minlength=k) / n
    pb = np.bincount(cb, minlength=k) / n
    p_e = float(np.sum(pa * pb))
    if np.isclose(p_e, 1.0):
        return float("nan")
    return (p_o - p_e) / (1.0 - p_e)


def _intervals(events) -> tuple[np.ndarray, np.ndarray]:
    if len(events) == 0:
        return np.empty(0), np.empty(0)
    on = np.asarray(events["onset_ms"], dtype=float)
    off = np.asarray(events["offset_ms"], dtype=float)
    return on, off


def fixation_mask(t_ms, fixations) -> np.ndarray:
    """Which sample times fall inside a fixation.

    A sample is in a fixation iff ``onset_ms <= t < offset_ms`` for some row
    of ``fixations``.  Rows may come in any order and may overlap.

    Parameters
    ----------
    t_ms : array-like of float
        Sample times in ms.
    fixations : DataFrame
        With columns ``onset_ms`` and ``offset_ms``.

    Returns
    -------
    numpy.ndarray of bool
        One flag per sample; NaN times are never inside.

    Examples
    --------
    >>> fx = pd.DataFrame({"onset_ms": [10.0, 40.0], "offset_ms": [30.0, 50.0]})
    >>> fixation_mask([0, 10, 29.9, 30, 45, 50], fx).tolist()
    [False, True, True, False, True, False]
    """
    t = np.asarray(t_ms, dtype=float)
    on, off = _intervals(fixations)
    if on.size == 0:
        return np.zeros(t.shape, dtype=bool)
    order = np.argsort(on, kind="stable")
    on, off = on[order], off[order]
    # the largest offset among all intervals that start at or before t decides
    reach = np.maximum.accumulate(off)
    idx = np.searchsorted(on, t, side="right") - 1
    inside = idx >= 0
    inside[inside] = t[inside] < reach[idx[inside]]
    return inside


def event_f1(true_events, detected_events, *, min_iou: float = 0.5) -> dict:
    """Precision, recall and F1 of detected events against true events.

    Events are time intervals ``[onset_ms, offset_ms)``.  A true and a
    detected event may match when their intersection-over-union (IoU) is at
    least ``min_iou``; matching is one-to-one, best IoU first (greedy).

    With ``min_iou > 0.5`` and non-overlapping events within each table, an
    event can overlap at most one event of the other table that well, so the
    matching is unique and greedy order does not matter.  At exactly 0.5 a tie
    is possible only in a degenerate case (an event split into two exact
    halves); the greedy rule then keeps the earlier one.

    Parameters
    ----------
    true_events, detected_events : DataFrame
        With columns ``onset_ms`` and ``offset_ms``.
    min_iou : float, optional
        Smallest IoU that counts as a match, in (0, 1]; 0.5 by default
        (common practice).

    Returns
    -------
    dict
        ``precision`` (matched / detected), ``recall`` (matched / true),
        ``f1`` (``2 * matched / (true + detected)``), ``n_true``,
        ``n_detected``, ``n_matched``.  A ratio with a zero denominator is NaN.

    Examples
    --------
    >>> t = pd.DataFrame({"onset_ms": [0.0, 100.0], "offset_ms": [80.0, 200.0]})
    >>> d = pd.DataFrame({"onset_ms": [5.0, 170.0], "offset_ms": [80.0, 200.0]})
    >>> r = event_f1(t, d)
    >>> r["n_matched"], r["precision"], r["recall"]
    (1, 0.5, 0.5)
    """
    if not 0.0 < min_iou <= 1.0:
        raise ValueError(f"event_f1: min_iou must be in (0, 1], found {min_iou!r}")
    t_on, t_off = _intervals(true_events)
    d_on, d_off = _intervals(detected_events)
    n_true, n_det = int(t_on.size), int(d_on.size)
    n_match = 0
    if n_true and n_det:
        order = np.argsort(d_on, kind="stable")
        d_on, d_off = d_on[order], d_off[order]
        reach = np.maximum.accumulate(d_off)
        # candidates: detected j with d_on[j] < t_off and reach[j] > t_on
        lo = np.searchsorted(reach, t_on, side="right")
        hi = np.searchsorted(d_on, t_off, side="left")
        counts = np.maximum(hi - lo, 0)
        ti = np.repeat(np.arange(n_true), counts)
        starts = np.repeat(lo, counts)
        offsets = np.arange(counts.sum()) - np.repeat(np.cumsum(counts) - counts, counts)
        dj = starts + offsets
        inter = np.minimum(t_off[ti], d_off[dj]) - np.maximum(t_on[ti], d_on[dj])
        union = np.maximum(t_off[ti], d_off[dj]) - np.minimum(t_on[ti], d_on[dj])
        with np.errstate(invalid="ignore", divide="ignore"):
            iou = np.where(union > 0, np.clip(inter, 0, None) / union, 0.0)
        keep = iou >= min_iou
        ti, dj, iou = ti[keep], dj[keep], iou[keep]
        rank = np.lexsort((ti, -iou))
        used_t = np.zeros(n_true, bool)
        used_d = np.zeros(n_det, bool)
        for k in rank:  # loop over candidate event pairs, not samples
            if not used_t[ti[k]] and not used_d[dj[k]]:
                used_t[ti[k]] = used_d[dj[k]] = True
                n_match += 1
    precision = n_match / n_det if n_det else float("nan")
    recall = n_match / n_true if n_true else float("nan")
    f1 = 2.0 * n_match / (n_true + n_det) if (n_true + n_det) else float("nan")
    return {"precision": precision, "recall": recall, "f1": f1,
            "n_true": n_true, "n_detected": n_det, "n_matched": n_match}
