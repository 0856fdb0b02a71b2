"""Tests for aoi_fix.evaluate: Cohen's kappa, fixation masks, event F1."""

import itertools

import numpy as np
import pandas as pd
import pytest

from aoi_fix.evaluate import cohen_kappa, event_f1, fixation_mask


def _events(pairs):
    return pd.DataFrame(pairs, columns=["onset_ms", "offset_ms"], dtype=float)


# --------------------------------------------------------------------------- kappa

def test_kappa_two_labels_worked_on_paper():
    # Confusion table (rows: rater A, columns: rater B), n = 10:
    #              B=fix  B=sac
    #   A=fix        5      1      -> A: fix 6/10, sac 4/10
    #   A=sac        1      3      -> B: fix 6/10, sac 4/10
    # p_o = (5 + 3) / 10 = 0.8
    # p_e = 0.6 * 0.6 + 0.4 * 0.4 = 0.36 + 0.16 = 0.52
    # kappa = (0.8 - 0.52) / (1 - 0.52) = 0.28 / 0.48 = 7 / 12 = 0.58333...
    a = ["fix"] * 5 + ["fix"] + ["sac"] + ["sac"] * 3
    b = ["fix"] * 5 + ["sac"] + ["fix"] + ["sac"] * 3
    assert cohen_kappa(a, b) == pytest.approx(7 / 12)


def test_kappa_three_labels_worked_on_paper():
    # n = 8 pairs (A, B):
    #   (fix,fix) x3, (sac,sac) x1, (loss,loss) x1, (fix,sac) x1, (sac,fix) x1, (loss,fix) x1
    # p_o = 5 / 8 = 0.625
    # A marginals: fix 4, sac 2, loss 2;  B marginals: fix 5, sac 2, loss 1
    # p_e = (4*5 + 2*2 + 2*1) / 64 = 26 / 64 = 0.40625
    # kappa = (0.625 - 0.40625) / (1 - 0.40625) = 0.21875 / 0.59375 = 7 / 19
    pairs = ([("fix", "fix")] * 3 + [("sac", "sac"), ("loss", "loss"), ("fix", "sac"),
                                     ("sac", "fix"), ("loss", "fix")])
    a, b = zip(*pairs)
    assert cohen_kappa(a, b) == pytest.approx(7 / 19)


def test_kappa_special_cases():
    assert cohen_kappa([1, 2, 3, 1], [1, 2, 3, 1]) == pytest.approx(1.0)
    # complete disagreement with balanced marginals: p_o = 0, p_e = 0.5 -> -1
    assert cohen_kappa([0, 1, 0, 1], [1, 0, 1, 0]) == pytest.approx(-1.0)
    assert np.isnan(cohen_kappa(["a", "a"], ["a", "a"]))  # p_e = 1: undefined
    assert np.isnan(cohen_kappa([], []))
    with pytest.raises(ValueError):
        cohen_kappa([1, 2], [1])


def test_kappa_symmetric_and_order_free():
    rng = np.random.default_rng(0)
    a = rng.choice(["fixation", "saccade", "loss"], 300)
    b = np.where(rng.random(300) < 0.7, a, rng.choice(["fixation", "saccade", "loss"], 300))
    k = cohen_kappa(a, b)
    perm = rng.permutation(300)
    assert cohen_kappa(b, a) == pytest.approx(k)
    assert cohen_kappa(a[perm], b[perm]) == pytest.approx(k)


def test_kappa_matches_sklearn():
    metrics = pytest.importorskip("sklearn.metrics")
    rng = np.random.default_rng(1)
    for _ in range(5):
        a = rng.integers(0, 4, 200)
        b = np.where(rng.random(200) < 0.6, a, rng.integers(0, 4, 200))
        assert cohen_kappa(a, b) == pytest.approx(metrics.cohen_kappa_score(a, b))


# --------------------------------------------------------------------------- mask

def test_fixation_mask_half_open_intervals():
    fx = _events([(40.0, 50.0), (10.0, 30.0)])  # unsorted on purpose
    t = np.array([0, 10, 20, 29.999, 30, 39.9, 40, 49.9, 50, np.nan])
    assert fixation_mask(t, fx).tolist() == [False, True, True, True, False, False,
                                             True, True, False, False]


def test_fixation_mask_overlapping_and_empty():
    fx = _events([(0.0, 100.0), (10.0, 20.0)])  # a short one inside a long one
    assert fixation_mask([5, 15, 50, 99, 100], fx).tolist() == [True, True, True, True, False]
    assert fixation_mask([1.0, 2.0], _events([])).tolist() == [False, False]


def test_fixation_mask_matches_brute_force():
    rng = np.random.default_rng(2)
    on = np.sort(rng.uniform(0, 1000, 30))
    fx = _events(np.column_stack([on, on + rng.uniform(1, 80, 30)]))
    t = rng.uniform(-10, 1100, 2000)
    brute = ((t[:, None] >= fx["onset_ms"].to_numpy()) &
             (t[:, None] < fx["offset_ms"].to_numpy())).any(axis=1)
    assert np.array_equal(fixation_mask(t, fx), brute)


# --------------------------------------------------------------------------- event F1

def test_event_f1_worked_example():
    # true: [0,100) [200,300) [400,500); detected: [10,100) IoU 0.9 -> match,
    # [200,240) IoU 0.4 -> no, [390,520) IoU 100/130 = 0.77 -> match, [600,700) -> no.
    true = _events([(0, 100), (200, 300), (400, 500)])
    det = _events([(10, 100), (200, 240), (390, 520), (600, 700)])
    r = event_f1(true, det)
    assert (r["n_true"], r["n_detected"], r["n_matched"]) == (3, 4, 2)
    assert r["precision"] == pytest.approx(2 / 4)
    assert r["recall"] == pytest.approx(2 / 3)
    assert r["f1"] == pytest.approx(2 * 2 / 7)  # = 2PR / (P + R)


def test_event_f1_iou_threshold_inclusive_and_one_to_one():
    # a true event split exactly in halves: each half has IoU 0.5 (a tie);
    # matching stays one-to-one.
    r = event_f1(_events([(0, 100)]), _events([(0, 50), (50, 100)]))
    assert r["n_matched"] == 1
    r = event_f1(_events([(0, 100)]), _events([(0, 50), (50, 100)]), min_iou=0.51)
    assert r["n_matched"] == 0


def test_event_f1_empty_and_identical():
    e = _events([(0, 10), (20, 30)])
    assert event_f1(e, e) == {"precision": 1.0, "recall": 1.0, "f1": 1.0,
                              "n_true": 2, "n_detected": 2, "n_matched": 2}
    r = event_f1(e, _events([]))
    assert r["recall"] == 0.0 and np.isnan(r["precision"]) and r["f1"] == 0.0
    assert np.isnan(event_f1(_events([]), _events([]))["f1"])
    with pytest.raises(ValueError):
        event_f1(e, e, min_iou=0.0)


def test_event_f1_matches_brute_force():
    rng = np.random.default_rng(3)
    for _ in range(20):
        on = np.sort(rng.uniform(0, 2000, 15))
        true = _events(np.column_stack([on, on + rng.uniform(20, 120, 15)]))
        jit = rng.normal(0, 15, (15, 2))
        det = _events(np.column_stack([on + jit[:, 0], on + 60 + jit[:, 1]]))
        det = det[det["offset_ms"] > det["onset_ms"]].sample(frac=1, random_state=0)
        # brute force: all pairs, best IoU first, each event used once
        cand = []
        for (i, (a0, a1)), (j, (b0, b1)) in itertools.product(enumerate(true.to_numpy()),
                                                              enumerate(det.to_numpy())):
            iou = max(0.0, min(a1, b1) - max(a0, b0)) / (max(a1, b1) - min(a0, b0))
            if iou >= 0.5:
                cand.append((-iou, i, j))
        used_i, used_j = set(), set()
        for _, i, j in sorted(cand):
            if i not in used_i and j not in used_j:
                used_i.add(i)
                used_j.add(j)
        assert event_f1(true, det)["n_matched"] == len(used_i)
