"""Tests for aoi_fix.simulate: oculomotor model, scene, sessions and their files."""

import gzip
import tomllib

import numpy as np
import pandas as pd
import pytest
import shapely

from aoi_fix.config import Display, study_from_dict
from aoi_fix.evaluate import fixation_mask
from aoi_fix.geometry import angle_between_deg, px_to_deg
from aoi_fix.simulate import (AOI_NONE, AOI_OFF_VIDEO, STYLES, Target, saccade_duration_ms,
                              simulate_gaze, simulate_session, storyteller_scene,
                              true_aoi_percent, true_fixations, true_valid_fraction,
                              trials_for_samples, write_session)

DISP = Display(1920, 1080, 531.0, 299.0, 650.0)


@pytest.fixture(scope="module")
def sessions():
    return {name: simulate_session(name, n_trials=3, trial_ms=4000, seed=5) for name in STYLES}


# --------------------------------------------------------------------------- gaze model

def test_main_sequence_durations():
    # noise-free 1000 Hz: each saccade spans 2.2 * A + 21 ms (Carpenter 1988, from memory)
    rate = 1000.0
    _, tr = simulate_gaze(display=DISP, duration_ms=20000, rate_hz=rate, noise_deg=0.0,
                          seed=4, blink_rate_hz=0.0, dropout_rate_hz=0.0)
    sac = tr[tr["movement"] == "saccade"]
    first = sac.groupby("event").head(1).index.to_numpy()
    last = sac.groupby("event").tail(1).index.to_numpy()
    ok = (first > 0) & (last < len(tr) - 1)
    first, last = first[ok], last[ok]
    x, y = tr["true_x_px"].to_numpy(), tr["true_y_px"].to_numpy()
    amp = angle_between_deg(x[first - 1], y[first - 1], x[last + 1], y[last + 1], DISP)
    dur = (last - first + 1) * 1000.0 / rate
    assert len(amp) > 30
    assert 2.0 <= amp.min() and amp.max() <= 15.0 + 1e-6
    assert np.all(np.abs(dur - saccade_duration_ms(amp)) <= 1000.0 / rate + 1e-9)
    # the minimum-jerk profile peaks at 1.875 A / D in mid-saccade: ~400 deg/s for 10 deg
    assert saccade_duration_ms(10.0) == pytest.approx(43.0)


def test_noise_sd_and_rms_s2s_ratio():
    noise = 0.3
    s, tr = simulate_gaze(display=DISP, duration_ms=30000, rate_hz=500, noise_deg=noise,
                          seed=7, blink_rate_hz=0.0, dropout_rate_hz=0.0)
    fix = (tr["label"] == "fixation").to_numpy()
    mx, my = px_to_deg(s["x_px"], s["y_px"], DISP)
    tx, ty = px_to_deg(tr["true_x_px"], tr["true_y_px"], DISP)
    ex, ey = (mx - tx)[fix], (my - ty)[fix]
    assert np.std(ex) == pytest.approx(noise, rel=0.03)
    assert np.std(ey) == pytest.approx(noise, rel=0.03)
    # precision measures (Holmqvist et al. 2012) inside fixations; for white noise
    # RMS-S2S / STD = sqrt(2) (Niehorster et al. 2020)
    ev = tr["event"].to_numpy()
    same = fix[1:] & fix[:-1] & (ev[1:] == ev[:-1])
    s2s = angle_between_deg(s["x_px"].to_numpy()[:-1][same], s["y_px"].to_numpy()[:-1][same],
                            s["x_px"].to_numpy()[1:][same], s["y_px"].to_numpy()[1:][same], DISP)
    rms_s2s = np.sqrt(np.mean(s2s ** 2))
    df = pd.DataFrame({"ev": ev[fix], "x": mx[fix], "y": my[fix]})
    var = df.groupby("ev")[["x", "y"]].transform(lambda c: c - c.mean()).pow(2).mean()
    std = np.sqrt(var["x"] + var["y"])
    assert rms_s2s / std == pytest.approx(np.sqrt(2.0), rel=0.03)


def test_truth_covers_every_sample_and_missing_contract():
    s, tr = simulate_gaze(display=DISP, duration_ms=20000, rate_hz=120, seed=1,
                          blink_rate_hz=0.5, dropout_rate_hz=2.0, lookaway_rate_hz=0.1,
                          t0_ms=1.7e6)
    assert len(s) == len(tr) == 2400
    assert s["t_ms"].iloc[0] == 1.7e6
    assert np.allclose(np.diff(s["t_ms"]), 1000 / 120)
    assert tr["label"].notna().all()
    assert set(tr["label"].unique()) == {"fixation", "saccade", "loss"}
    assert set(tr["movement"].unique()) == {"fixation", "saccade", "blink", "lookaway"}
    valid = s["valid"].to_numpy()
    assert np.array_equal(~valid, (tr["label"] == "loss").to_numpy())
    assert np.array_equal(~valid, s["x_px"].isna().to_numpy())
    eye_closed = tr["movement"].isin(["blink", "lookaway"]).to_numpy()
    assert np.array_equal(eye_closed, tr["true_x_px"].isna().to_numpy())
    assert np.all(tr["event"].to_numpy()[eye_closed] == -1)
    assert np.all(tr["event"].to_numpy()[~eye_closed] >= 0)
    # blinks last 100-300 ms, look-aways 0.5-3 s (plus at most one sample of rounding)
    ids = np.cumsum(np.r_[True, tr["movement"].to_numpy()[1:] != tr["movement"].to_numpy()[:-1]])
    runs = pd.DataFrame({"id": ids, "m": tr["movement"].astype(str)}).groupby("id").agg(
        m=("m", "first"), n=("m", "size"))
    blink_ms = runs.loc[runs["m"] == "blink", "n"].to_numpy()[:-1] * 1000 / 120
    assert blink_ms.size and blink_ms.min() >= 100 - 8.4 and blink_ms.max() <= 300 + 8.4


def test_fixation_durations_and_table():
    rate = 250.0
    _, tr = simulate_gaze(display=DISP, duration_ms=60000, rate_hz=rate, seed=2,
                          dropout_rate_hz=1.0)
    fx = true_fixations(tr)
    assert list(fx.columns) == ["event", "onset_ms", "offset_ms", "duration_ms", "x_px", "y_px",
                                "n_samples"]
    d = fx["duration_ms"].to_numpy()[:-1]  # the last one is cut by the recording's end
    assert d.min() >= 80.0 - 1000 / rate
    assert d.mean() == pytest.approx(300.0, rel=0.1)
    assert np.all(fx["offset_ms"].to_numpy()[:-1] <= fx["onset_ms"].to_numpy()[1:])
    # the table and the per-sample truth agree: onset <= t < offset = last sample + 1/rate
    mask = fixation_mask(tr["t_ms"], fx)
    assert np.array_equal(mask, (tr["movement"] == "fixation").to_numpy())
    assert np.allclose(fx["duration_ms"], fx["n_samples"] * 1000 / rate)


def test_drift_is_linear_from_zero():
    s, tr = simulate_gaze(display=DISP, duration_ms=10000, rate_hz=200, seed=3,
                          noise_deg=0.05, drift_deg=(2.0, -1.0), blink_rate_hz=0.0,
                          dropout_rate_hz=0.0)
    mx, my = px_to_deg(s["x_px"], s["y_px"], DISP)
    tx, ty = px_to_deg(tr["true_x_px"], tr["true_y_px"], DISP)
    n = len(s)
    ramp = np.arange(n) / (n - 1)  # 0 at the first sample, 1 at the last
    assert np.allclose(tr["drift_x_deg"], 2.0 * ramp)
    assert np.allclose(tr["drift_y_deg"], -1.0 * ramp)
    # measured - true = drift + noise: mean over the last 100 samples of the ramp
    # is 2 * (1 - 99 / 2 / (n - 1)); the noise mean is within 0.05 / sqrt(100) * 3
    assert np.mean((mx - tx)[-100:]) == pytest.approx(2.0 * (1 - 49.5 / (n - 1)), abs=0.015)
    assert np.mean((my - ty)[-100:]) == pytest.approx(-1.0 * (1 - 49.5 / (n - 1)), abs=0.015)
    assert np.mean((mx - tx)[:100]) == pytest.approx(2.0 * 49.5 / (n - 1), abs=0.015)
    resid = (mx - tx) - tr["drift_x_deg"].to_numpy()
    assert np.std(resid) == pytest.approx(0.05, rel=0.05)


def test_following_a_moving_target_stays_slow():
    # a target moving at 10 deg/s horizontally: fixations follow at most 2 deg/s
    ppd = 1920 / 531.0 * 650 * np.tan(np.radians(1))  # px per deg near the centre

    def targets(t_ms, rng):
        return Target(rng.uniform(400, 1500), rng.uniform(300, 800), 10 * ppd / 1000, 0.0)

    _, tr = simulate_gaze(display=DISP, duration_ms=10000, rate_hz=500, targets_px=targets,
                          noise_deg=0.0, seed=8, blink_rate_hz=0, dropout_rate_hz=0)
    fix = (tr["movement"] == "fixation").to_numpy()
    ev = tr["event"].to_numpy()
    same = fix[1:] & fix[:-1] & (ev[1:] == ev[:-1])
    x, y = tr["true_x_px"].to_numpy(), tr["true_y_px"].to_numpy()
    v = angle_between_deg(x[:-1], y[:-1], x[1:], y[1:], DISP)[same] * 500
    assert v.max() <= 2.0 + 0.05 and v.max() >= 1.5


def test_seed_reproduces():
    a = simulate_gaze(display=DISP, duration_ms=3000, rate_hz=300, seed=11)
    b = simulate_gaze(display=DISP, duration_ms=3000, rate_hz=300, seed=11)
    c = simulate_gaze(display=DISP, duration_ms=3000, rate_hz=300, seed=12)
    pd.testing.assert_frame_equal(a[0], b[0])
    pd.testing.assert_frame_equal(a[1], b[1])
    assert not a[0]["x_px"].equals(c[0]["x_px"])


def test_binocular_eyes_differ_by_offset():
    s, _ = simulate_gaze(display=DISP, duration_ms=10000, rate_hz=120, seed=9, binocular=True,
                         eye_offset_deg=(0.4, 0.1), noise_deg=0.1)
    both = s["valid_left"] & s["valid_right"]
    lx, ly = px_to_deg(s["x_left_px"], s["y_left_px"], DISP)
    rx, ry = px_to_deg(s["x_right_px"], s["y_right_px"], DISP)
    assert np.mean((rx - lx)[both]) == pytest.approx(0.4, abs=0.02)
    assert np.mean((ry - ly)[both]) == pytest.approx(0.1, abs=0.02)
    assert np.array_equal(s["valid"], s["valid_left"] | s["valid_right"])
    assert (s["valid_left"] != s["valid_right"]).any()  # single-eye dropouts exist


# --------------------------------------------------------------------------- scene

def test_storyteller_scene_valid_moving_and_book_leaves():
    sc = storyteller_scene(seed=3)
    assert list(sc.columns) == ["stimulus", "frame", "aoi", "wkt"]
    g = shapely.from_wkt(sc["wkt"].to_numpy())
    assert shapely.is_valid(g).all()
    assert set(sc["frame"]) == set(range(240))
    per = sc.assign(g=list(g))
    eyes = per[per["aoi"] == "eyes"]
    assert all(x.geom_type == "MultiPolygon" for x in eyes["g"])
    book_frames = set(per.loc[per["aoi"] == "book", "frame"])
    assert 0 < len(book_frames) < 240  # the book leaves the frame for a stretch
    gone = sorted(set(range(240)) - book_frames)
    assert gone == list(range(gone[0], gone[-1] + 1))  # one stretch
    # the book turns: not just a moved copy of one shape
    areas = per.loc[per["aoi"] == "book", "g"].map(lambda x: x.area)
    assert areas.max() > 1.3 * areas.min()
    # the head sways; eyes and mouth overlap the body (not cut out)
    ex = shapely.get_x(shapely.centroid(np.array(list(eyes["g"]))))
    assert ex.max() - ex.min() > 10
    body = per[per["aoi"] == "body"].set_index("frame")["g"]
    mouth = per[per["aoi"] == "mouth"].set_index("frame")["g"]
    assert all(body[f].contains(mouth[f]) for f in range(0, 240, 20))
    assert sc.equals(storyteller_scene(seed=3))


# --------------------------------------------------------------------------- sessions

@pytest.mark.parametrize("name", list(STYLES))
def test_session_files_parse_back(tmp_path, sessions, name):
    ses, st = sessions[name], STYLES[name]
    paths = write_session(ses, tmp_path, style=name)
    assert set(paths) == {"samples", "study", "trials", "aois", "checks"}
    study = tomllib.loads(paths["study"].read_text(encoding="utf-8"))
    assert study == ses.study
    parsed = study_from_dict(study)
    assert parsed.samples.time_unit == st.time_unit
    assert parsed.display == st.display
    if st.compression == "gzip":
        with gzip.open(paths["samples"], "rt") as fh:
            head = fh.readline()
        assert head.strip().split(";")[0] == st.time_col
    raw = pd.read_csv(paths["samples"], sep=st.delimiter, decimal=st.decimal,
                      keep_default_na=False, na_values=["", "NaN"])
    assert list(raw.columns) == list(ses.raw.columns)
    assert len(raw) == len(ses.raw)
    for col in raw.columns:
        a, b = raw[col].to_numpy(dtype=float), ses.raw[col].to_numpy(dtype=float)
        assert np.array_equal(np.isnan(a), np.isnan(b))
        assert np.allclose(a[~np.isnan(a)], b[~np.isnan(b)], atol=1e-9, rtol=1e-12)
    # time unit: steps of 1/rate
    step = np.median(np.diff(raw[st.time_col].to_numpy(dtype=float)))
    per_ms = {"s": 1e-3, "ms": 1.0, "us": 1e3}[st.time_unit]
    assert step == pytest.approx(1000.0 / st.rate_hz * per_ms, rel=1e-4)
    if st.time_unit == "us":
        assert raw[st.time_col].dtype.kind == "i"
    if st.coords == "norm":
        x = raw[st.x_col].dropna()
        assert x.between(-0.5, 1.5).all() and x.between(0, 1).mean() > 0.95
    if st.valid_kind == "code":
        assert set(raw[st.valid_col].unique()) <= {0, 1, 2}
        assert np.array_equal(raw[st.valid_col] == 0, raw[st.x_col].isna())
    trials = pd.read_csv(paths["trials"])
    assert list(trials.columns[:4]) == ["trial", "stimulus", "start", "end"]
    pd.testing.assert_frame_equal(trials, ses.trials, check_dtype=False)
    if st.placement == "explicit":
        assert {"media_x_px", "media_y_px", "media_width_px", "media_height_px"} <= set(trials)
    aois = pd.read_csv(paths["aois"])
    assert list(aois.columns) == ["stimulus", "frame", "aoi", "wkt"]
    checks = pd.read_csv(paths["checks"])
    assert list(checks.columns) == ["onset", "offset", "x_px", "y_px"]
    assert len(checks) == len(trials) + 1
    pd.testing.assert_frame_equal(checks, ses.checks, check_dtype=False)


@pytest.mark.parametrize("name", list(STYLES))
def test_session_truth_tables(sessions, name):
    ses = sessions[name]
    ts = ses.truth_samples
    assert len(ts) == len(ses.raw) == len(ses.samples)
    assert ts["label"].notna().all()
    pct = true_aoi_percent(ses)
    sums = pct.groupby("trial")["pct_fixation"].sum()
    assert np.allclose(sums, 100.0)
    assert set(pct["aoi"]) == {"eyes", "mouth", "body", "book", AOI_NONE, AOI_OFF_VIDEO}
    # fixation time equals the true-fixation samples inside each trial
    dt = 1000.0 / ses.rate_hz
    n_fix = ts[(ts["trial"] > 0) & (ts["movement"] == "fixation")].groupby("trial").size()
    assert np.allclose(pct.groupby("trial")["fixation_ms"].sum(), n_fix * dt)
    # most fixation time is on the four AOIs
    on_aoi = pct[~pct["aoi"].isin([AOI_NONE, AOI_OFF_VIDEO])]["fixation_ms"].sum()
    assert on_aoi / pct["fixation_ms"].sum() > 0.6
    vf = true_valid_fraction(ses)
    assert vf["valid_fraction"].between(0.3, 1.0).all()
    # trial boundaries are half a sample off the sample grid
    k = (ses.trials_ms["start_ms"] - ts["t_ms"].iloc[0]) / dt
    assert np.allclose(k - np.floor(k), 0.5)
    assert (ses.truth_fixations["trial"] > 0).any()


def test_checks_show_target_plus_drift(sessions):
    ses = sessions["drifting_250hz"]
    disp = ses.style.display
    s = ses.samples
    t = s["t_ms"].to_numpy()
    # the raw time of this style is ms; the last half of each check window
    offs = []
    for _, c in ses.checks.iterrows():
        m = (t >= (c["onset"] + c["offset"]) / 2) & (t < c["offset"]) & s["valid"].to_numpy()
        gx, gy = px_to_deg(np.median(s["x_px"][m]), np.median(s["y_px"][m]), disp)
        cx, cy = px_to_deg(c["x_px"], c["y_px"], disp)
        offs.append((gx - cx, gy - cy))
    offs = np.array(offs)
    frac = (ses.checks["offset"].to_numpy() - t[0]) / (t[-1] - t[0])
    assert np.allclose(offs[:, 0], frac * 2.4, atol=0.25)
    assert np.allclose(offs[:, 1], frac * -1.8, atol=0.25)
    assert ses.truth_drift_deg["dx_deg"].is_monotonic_increasing


def test_binocular_session_columns(sessions):
    ses = sessions["binocular_120hz"]
    raw = ses.raw
    assert {"left_ok", "right_ok"} <= set(raw)
    assert np.array_equal(raw["left_ok"] == 0, raw["left_h_px"].isna())
    assert (raw["left_ok"] != raw["right_ok"]).any()
    assert ses.study["samples"]["x_left"] == "left_h_px"


def test_session_seed_reproduces_and_scales():
    a = simulate_session("infant_60hz_noisy", n_trials=2, trial_ms=3000, seed=1)
    b = simulate_session("infant_60hz_noisy", n_trials=2, trial_ms=3000, seed=1)
    c = simulate_session("infant_60hz_noisy", n_trials=2, trial_ms=3000, seed=2)
    pd.testing.assert_frame_equal(a.raw, b.raw)
    pd.testing.assert_frame_equal(a.aois, b.aois)
    assert not a.raw.equals(c.raw)
    n = trials_for_samples("lab_300hz_seconds", 100_000)
    ses = simulate_session("lab_300hz_seconds", n_trials=n, seed=0)
    assert abs(len(ses.raw) - 100_000) < 3000
    with pytest.raises(ValueError):
        simulate_session("no_such_style")
