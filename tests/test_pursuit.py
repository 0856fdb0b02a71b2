"""Tests for aoi_fix.pursuit (fixation vs smooth pursuit) and the simulator's pursuit.

Sources beside the checks: the worked I-VT/I-DT trace is from REFERENCES.md
(Salvucci & Goldberg 2000); Cohen's kappa as the agreement measure follows
Andersson et al. (2017, from memory); pursuit speeds of 2-30 deg/s and
durations of 300-1500 ms are the brief's range (from memory of the pursuit
literature).  Kappa floors below are our own measurements on the simulator
with some margin, not published values.
"""

from __future__ import annotations

import math

import numpy as np
import pandas as pd
import pytest

from aoi_fix.clean import fill_gaps
from aoi_fix.config import Display
from aoi_fix.detect import FIXATION_COLUMNS, ivt, merge_and_discard
from aoi_fix.evaluate import cohen_kappa, fixation_mask
from aoi_fix.geometry import angle_between_deg
from aoi_fix.pursuit import EVENT_COLUMNS, LABELS, _merge_and_discard_events, ivt_pursuit
from aoi_fix.simulate import simulate_gaze

SIM_DISPLAY = Display(1920, 1080, 531.0, 299.0, 650.0)
# an invented display: 1000 x 1000 px of 0.5 mm, eye 600 mm from the centre
DISPLAY = Display(width_px=1000, height_px=1000, width_mm=500.0, height_mm=500.0,
                  distance_mm=600.0)
C = 500.0


def _samples(t, x, y, valid=None) -> pd.DataFrame:
    x = np.asarray(x, dtype=float)
    y = np.broadcast_to(np.asarray(y, dtype=float), x.shape)
    valid = np.isfinite(x) if valid is None else np.asarray(valid, dtype=bool)
    return pd.DataFrame({"t_ms": np.asarray(t, dtype=float), "x_px": np.where(valid, x, np.nan),
                         "y_px": np.where(valid, y, np.nan), "valid": valid})


def _run(samples, rate_hz, display=SIM_DISPLAY, **kw):
    """fill_gaps (75 ms, common practice) -> ivt_pursuit -> pipeline post-processing."""
    dt = 1000.0 / rate_hz
    f = fill_gaps(samples, max_gap_ms=75.0, interval_ms=dt)
    raw_labels, events = ivt_pursuit(f, display=display, interval_ms=dt, **kw)
    labels, final = _merge_and_discard_events(events, f, display=display, interval_ms=dt)
    return f, raw_labels, events, labels, final


def _ivt_fixation_labels(f, samples, rate_hz):
    dt = 1000.0 / rate_hz
    fx = merge_and_discard(ivt(f, display=SIM_DISPLAY, interval_ms=dt), f,
                           display=SIM_DISPLAY, interval_ms=dt)
    return fixation_mask(samples["t_ms"].to_numpy(), fx) & samples["valid"].to_numpy()


def _truth(tr):
    return np.asarray(tr["label"]).astype(str)


# --------------------------------------------------------------------------- contract

def test_empty_input_gives_empty_typed_outputs():
    s = _samples([], [], [])
    labels, events = ivt_pursuit(s, display=DISPLAY, interval_ms=10.0)
    assert isinstance(labels, pd.Categorical) and len(labels) == 0
    assert list(labels.categories) == list(LABELS)
    assert list(events.columns) == EVENT_COLUMNS == FIXATION_COLUMNS + ["event_type"]
    assert len(events) == 0
    assert events["onset_ms"].dtype == float and events["start_row"].dtype == np.int64
    assert events["event_type"].dtype == object


def test_label_codes_match_the_simulator_categories():
    # codes 0 fixation, 1 saccade, 2 loss, 3 pursuit == simulate_gaze's label codes
    _, tr = simulate_gaze(display=SIM_DISPLAY, duration_ms=3000, rate_hz=250, seed=1,
                          pursuit_fraction=0.5)
    assert LABELS == ("fixation", "saccade", "loss", "pursuit")
    assert list(tr["label"].cat.categories) == list(LABELS)


def test_worked_trace_gives_two_fixations():
    # REFERENCES.md worked trace (Salvucci & Goldberg 2000): 10 samples at 100 Hz in
    # a 0.2 deg cluster, a 5 deg jump, 10 samples in another cluster => two fixations
    # of 100 ms at the cluster centroids, no pursuit.  Cluster: 10 points in a 4 px
    # box (2 mm at 600 mm: 0.19 deg) whose offsets sum to zero.
    cluster = np.array([(0, 0), (2, 0), (2, 2), (0, 2), (-2, 2), (-2, 0), (-2, -2),
                        (0, -2), (2, -2), (0, 0)], dtype=float)
    jump = DISPLAY.distance_mm * math.tan(math.radians(5.0)) / 0.5  # 5 deg to the right
    t = np.arange(20) * 10.0
    x = np.concatenate([C + cluster[:, 0], C + jump + cluster[:, 0]])
    y = np.concatenate([C + cluster[:, 1], C + cluster[:, 1]])
    assert float(angle_between_deg(C, C, C + jump, C, DISPLAY)) == pytest.approx(5.0)
    labels, ev = ivt_pursuit(_samples(t, x, y), display=DISPLAY)
    assert ev["event_type"].tolist() == ["fixation", "fixation"]
    np.testing.assert_allclose(ev["onset_ms"], [0.0, 100.0])
    np.testing.assert_allclose(ev["duration_ms"], [100.0, 100.0])
    np.testing.assert_allclose(ev["x_px"], [C, C + jump], atol=1e-9)
    np.testing.assert_allclose(ev["y_px"], [C, C], atol=1e-9)
    assert ev["start_row"].tolist() == [0, 10] and ev["end_row"].tolist() == [10, 20]
    assert set(np.asarray(labels)) == {"fixation"}


def test_noise_free_ramp_starts_at_the_hinge():
    # still for 400 ms, then 10 deg/s to the right (100 Hz, no noise).  A window
    # centred on the change fits exactly half the speed, so the half-speed edge
    # rule puts the pursuit onset on the change (worked on paper: LS slope of a
    # hinge over a symmetric window is v/2).
    t = np.arange(80) * 10.0
    px_per_ms = 10.0 / 1000.0 * DISPLAY.distance_mm * math.tan(math.radians(1.0)) / 0.5
    x = C + np.clip(t - 400.0, 0.0, None) * px_per_ms
    labels, ev = ivt_pursuit(_samples(t, x, C), display=DISPLAY)
    assert ev["event_type"].tolist() == ["fixation", "pursuit"]
    np.testing.assert_allclose(ev["onset_ms"], [0.0, 400.0])
    np.testing.assert_allclose(ev["offset_ms"], [400.0, 800.0])
    assert (np.asarray(labels)[40:] == "pursuit").all()


def test_every_sample_accounted_and_events_do_not_overlap():
    s, _ = simulate_gaze(display=SIM_DISPLAY, duration_ms=20000, rate_hz=120, noise_deg=0.3,
                         seed=5, pursuit_fraction=0.4, dropout_rate_hz=2.0,
                         lookaway_rate_hz=0.2)
    f, labels, ev, _, _ = _run(s, 120)
    assert len(labels) == len(s)
    codes = labels.codes
    assert set(np.unique(codes)) <= {0, 1, 2, 3}
    # loss exactly where there is no measurement
    np.testing.assert_array_equal(codes == 2, ~s["valid"].to_numpy())
    st, en = ev["start_row"].to_numpy(), ev["end_row"].to_numpy()
    assert (st[1:] >= en[:-1]).all() and (en > st).all()
    # measured samples inside an event carry its type; outside any event: saccade
    inside = np.zeros(len(s), dtype=int)
    for a, b, kind in zip(st, en, ev["event_type"]):  # loop over events
        inside[a:b] = 1 if kind == "fixation" else 4
    measured = s["valid"].to_numpy()
    np.testing.assert_array_equal((codes == 0)[measured], (inside == 1)[measured])
    np.testing.assert_array_equal((codes == 3)[measured], (inside == 4)[measured])
    np.testing.assert_array_equal((codes == 1)[measured], (inside == 0)[measured])
    # no event crosses a segment boundary
    seg = f["segment"].to_numpy()
    assert (seg[st] == seg[en - 1]).all() and (seg[st] >= 0).all()


def test_still_noise_is_not_pursuit_at_any_rate():
    # a still eye with white noise of an infant-like 0.5 deg at 60 Hz, or 0.15 deg at
    # 300 Hz (noise levels: REFERENCES.md, from memory), 10 s: no pursuit at all
    rng = np.random.default_rng(3)
    for rate, noise in ((60.0, 0.5), (300.0, 0.15)):
        n = int(10 * rate)
        t = np.arange(n) * 1000.0 / rate
        ppd = 1920 / 531.0 * 650.0 * math.tan(math.radians(1.0))
        x = 960.0 + rng.normal(0, noise, n) * ppd
        y = 540.0 + rng.normal(0, noise, n) * ppd
        labels, ev = ivt_pursuit(_samples(t, x, y), display=SIM_DISPLAY)
        assert (ev["event_type"] == "fixation").all()
        assert ev.attrs["position_noise_deg"] == pytest.approx(noise, rel=0.1)


# --------------------------------------------------------------------------- agreement

@pytest.mark.parametrize("speed_deg_s", [2.0, 5.0, 10.0, 20.0, 30.0])
def test_agreement_with_truth_on_pursuit_traces(speed_deg_s):
    # 300 Hz, 0.15 deg noise (a lab tracker), 40 % of gaze events are pursuits at one
    # speed.  Measured (seeds 0, 1; 30 s): 4-class kappa 0.94 at 2 deg/s, >= 0.97 at
    # 5-30 deg/s; I-VT's fixation kappa ~0.08 (it calls pursuit fixation).
    s, tr = simulate_gaze(display=SIM_DISPLAY, duration_ms=30000, rate_hz=300, noise_deg=0.15,
                          seed=0, pursuit_fraction=0.4,
                          pursuit_speed_deg_s=(speed_deg_s, speed_deg_s))
    truth = _truth(tr)
    assert (truth == "pursuit").mean() > 0.3
    f, _, _, labels, _ = _run(s, 300)
    found = np.asarray(labels).astype(str)
    k4 = cohen_kappa(truth, found)
    kfix = cohen_kappa(truth == "fixation", found == "fixation")
    kivt = cohen_kappa(truth == "fixation", _ivt_fixation_labels(f, s, 300))
    floor = 0.85 if speed_deg_s < 5 else 0.93
    assert k4 >= floor and kfix >= floor
    assert kivt < 0.3 < kfix


def test_mixed_speeds_in_one_session():
    # all speeds from 2 to 30 deg/s in one trace at 500 Hz, 0.1 deg noise
    s, tr = simulate_gaze(display=SIM_DISPLAY, duration_ms=30000, rate_hz=500, noise_deg=0.1,
                          seed=4, pursuit_fraction=0.4, pursuit_speed_deg_s=(2.0, 30.0))
    _, _, _, labels, _ = _run(s, 500)
    found = np.asarray(labels).astype(str)
    assert cohen_kappa(_truth(tr), found) >= 0.93


@pytest.mark.parametrize("rate_hz,noise_deg", [(120.0, 0.25), (300.0, 0.15), (500.0, 0.1)])
def test_static_traces_fixation_kappa_not_below_ivt(rate_hz, noise_deg):
    # no pursuit at all: the new method must not lose fixation agreement against I-VT
    # (both with the pipeline's merge/discard).  Measured: equal or higher on every
    # seed tried (0.86-0.97).
    for seed in (100, 101, 102):
        s, tr = simulate_gaze(display=SIM_DISPLAY, duration_ms=20000, rate_hz=rate_hz,
                              noise_deg=noise_deg, seed=seed)
        truth = (tr["label"] == "fixation").to_numpy()
        f, _, _, labels, _ = _run(s, rate_hz)
        mine = cohen_kappa(truth, np.asarray(labels) == "fixation")
        theirs = cohen_kappa(truth, _ivt_fixation_labels(f, s, rate_hz))
        assert mine >= theirs - 1e-9, (seed, mine, theirs)


def test_static_infant_like_traces_close_to_ivt():
    # 60 Hz, 0.5 deg: a 2 deg saccade can hide in the noise, and the jump it leaves
    # may pass for a short pursuit.  Known limitation, kept small (measured mean
    # gap 0.006 over these seeds; up to 0.03 on others).
    mine, theirs = [], []
    for seed in (100, 101, 102, 103):
        s, tr = simulate_gaze(display=SIM_DISPLAY, duration_ms=20000, rate_hz=60,
                              noise_deg=0.5, seed=seed)
        truth = (tr["label"] == "fixation").to_numpy()
        f, _, _, labels, _ = _run(s, 60)
        mine.append(cohen_kappa(truth, np.asarray(labels) == "fixation"))
        theirs.append(cohen_kappa(truth, _ivt_fixation_labels(f, s, 60)))
    assert np.mean(mine) >= np.mean(theirs) - 0.03


def test_post_processing_keeps_pursuit_and_merges_only_fixations():
    s, _ = simulate_gaze(display=SIM_DISPLAY, duration_ms=20000, rate_hz=250, noise_deg=0.2,
                         seed=8, pursuit_fraction=0.4)
    _, raw_labels, ev, labels, final = _run(s, 250)
    p_raw = ev[ev["event_type"] == "pursuit"][["start_row", "end_row"]].to_numpy()
    p_fin = final[final["event_type"] == "pursuit"][["start_row", "end_row"]].to_numpy()
    np.testing.assert_array_equal(p_raw, p_fin)
    fx = final[final["event_type"] == "fixation"]
    assert (fx["duration_ms"] >= 60.0 - 1e-9).all()
    assert final["fixation"].tolist() == list(range(1, len(final) + 1))
    np.testing.assert_array_equal(np.asarray(labels) == "pursuit",
                                  np.asarray(raw_labels) == "pursuit")


# --------------------------------------------------------------------------- simulator

def test_simulator_without_pursuit_is_unchanged():
    a = simulate_gaze(display=SIM_DISPLAY, duration_ms=5000, rate_hz=250, seed=3)
    b = simulate_gaze(display=SIM_DISPLAY, duration_ms=5000, rate_hz=250, seed=3,
                      pursuit_fraction=0.0)
    pd.testing.assert_frame_equal(a[0], b[0])
    pd.testing.assert_frame_equal(a[1], b[1])
    assert list(a[1]["label"].cat.categories) == ["fixation", "saccade", "loss"]


@pytest.mark.parametrize("speed_deg_s", [2.0, 30.0])
def test_simulated_pursuit_speed_and_duration(speed_deg_s):
    rate = 500.0
    _, tr = simulate_gaze(display=SIM_DISPLAY, duration_ms=30000, rate_hz=rate, noise_deg=0.0,
                          seed=2, pursuit_fraction=0.5, blink_rate_hz=0.0,
                          dropout_rate_hz=0.0, pursuit_speed_deg_s=(speed_deg_s, speed_deg_s))
    mov = tr["movement"].to_numpy()
    ev = tr["event"].to_numpy()
    assert list(tr["movement"].cat.categories)[-1] == "pursuit"
    pur = mov == "pursuit"
    same = pur[1:] & pur[:-1] & (ev[1:] == ev[:-1])
    x, y = tr["true_x_px"].to_numpy(), tr["true_y_px"].to_numpy()
    v = angle_between_deg(x[:-1], y[:-1], x[1:], y[1:], SIM_DISPLAY)[same] * rate
    # px/ms set at the display centre: off-centre a pixel subtends less (REFERENCES.md)
    assert v.max() <= speed_deg_s * 1.001 and np.median(v) >= 0.85 * speed_deg_s
    dur = pd.Series(ev[pur]).value_counts().to_numpy() * 1000.0 / rate
    assert dur.max() <= 1500.0 + 2.0
    # all on the display
    assert np.nanmin(x) >= 0 and np.nanmax(x) <= 1920 and np.nanmin(y) >= 0
    assert np.nanmax(y) <= 1080


def test_simulator_pursues_a_target_moving_in_range():
    # a target moving at 10 deg/s: with pursuit on, the eye follows it at its speed
    ppd = 1920 / 531.0 * 650.0 * math.tan(math.radians(1.0))

    def targets(t_ms, rng):
        return (rng.uniform(700, 1200), rng.uniform(400, 700), 10.0 * ppd / 1000.0, 0.0)

    rate = 500.0
    _, tr = simulate_gaze(display=SIM_DISPLAY, duration_ms=10000, rate_hz=rate,
                          targets_px=targets, noise_deg=0.0, seed=8, blink_rate_hz=0.0,
                          dropout_rate_hz=0.0, pursuit_fraction=1.0)
    pur = (tr["movement"] == "pursuit").to_numpy()
    ev = tr["event"].to_numpy()
    same = pur[1:] & pur[:-1] & (ev[1:] == ev[:-1])
    dx = np.diff(tr["true_x_px"].to_numpy())[same]
    dy = np.diff(tr["true_y_px"].to_numpy())[same]
    assert pur.mean() > 0.5
    np.testing.assert_allclose(dx, 10.0 * ppd / rate, rtol=1e-9)
    np.testing.assert_allclose(dy, 0.0, atol=1e-9)
