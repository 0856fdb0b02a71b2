"""Sample-level agreement of the pursuit-aware detector, I-VT and I-DT with simulated truth.

Not a test: prints tables of Cohen's kappa for the closing notes and docs.
Run: ``.venv/bin/python benchmarks/pursuit_agreement.py [--seeds K] [--duration-s S]``

For every sampling rate (60, 120, 300, 500 Hz) and noise level (a low and a
high one per rate) it simulates traces with :func:`aoi_fix.simulate.simulate_gaze`:

* ``static``  -- fixations and saccades only (a still picture);
* ``pursuit`` -- 40 % of gaze events are smooth pursuits at 2-30 deg/s
  (uniform), 300-1500 ms long.

Each trace goes through ``fill_gaps`` (75 ms) and then

* ``ivt_pursuit`` + the pipeline's merge/discard of fixations
  (``aoi_fix.pursuit._merge_and_discard_events``);
* ``detect.ivt`` + ``detect.merge_and_discard`` (defaults);
* ``detect.idt`` + ``detect.merge_and_discard`` (defaults).

Columns: ``k_fix_*`` is kappa on the fixation label (fixation vs anything
else), ``k4_pursuit`` is kappa on the four labels fixation / saccade / loss /
pursuit (I-VT and I-DT have no pursuit label, so only the new method has a
4-class figure), ``pursuit_recall`` the share of true pursuit samples called
pursuit and ``false_pursuit`` the share of samples called pursuit that are
not.  Values are means over seeds.  Samples without a measurement count as
``loss`` in the truth; every detector's fixation samples are limited to
measured samples likewise.
"""

from __future__ import annotations

import argparse

import numpy as np
import pandas as pd

from aoi_fix.clean import fill_gaps
from aoi_fix.config import Display
from aoi_fix.detect import idt, ivt, merge_and_discard
from aoi_fix.evaluate import cohen_kappa, fixation_mask
from aoi_fix.pursuit import _merge_and_discard_events, ivt_pursuit
from aoi_fix.simulate import simulate_gaze

DISPLAY = Display(1920, 1080, 531.0, 299.0, 650.0)
# (rate, noise): adult-lab and infant-like noise per rate (common practice / from memory)
CONDITIONS = [(60.0, 0.3), (60.0, 0.5), (120.0, 0.15), (120.0, 0.3), (300.0, 0.1),
              (300.0, 0.25), (500.0, 0.05), (500.0, 0.2)]


def score(rate_hz: float, noise_deg: float, kind: str, seed: int, duration_ms: float) -> dict:
    frac = 0.4 if kind == "pursuit" else 0.0
    s, tr = simulate_gaze(display=DISPLAY, duration_ms=duration_ms, rate_hz=rate_hz,
                          noise_deg=noise_deg, seed=seed, pursuit_fraction=frac,
                          pursuit_speed_deg_s=(2.0, 30.0))
    dt = 1000.0 / rate_hz
    f = fill_gaps(s, max_gap_ms=75.0, interval_ms=dt)
    truth = np.asarray(tr["label"]).astype(str)
    t = s["t_ms"].to_numpy()
    measured = s["valid"].to_numpy()
    _, events = ivt_pursuit(f, display=DISPLAY, interval_ms=dt)
    labels, _ = _merge_and_discard_events(events, f, display=DISPLAY, interval_ms=dt)
    found = np.asarray(labels).astype(str)
    out = {"k_fix_new": cohen_kappa(truth == "fixation", found == "fixation"),
           "k4_pursuit": cohen_kappa(truth, found)}
    for name, det in (("ivt", ivt), ("idt", idt)):
        fx = merge_and_discard(det(f, display=DISPLAY, interval_ms=dt), f, display=DISPLAY,
                               interval_ms=dt)
        out[f"k_fix_{name}"] = cohen_kappa(truth == "fixation",
                                           fixation_mask(t, fx) & measured)
    tp, dp = truth == "pursuit", found == "pursuit"
    out["pursuit_recall"] = (tp & dp).sum() / tp.sum() if tp.any() else np.nan
    out["false_pursuit"] = (dp & ~tp).sum() / (~tp).sum()
    return out


def main(argv=None) -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--seeds", type=int, default=3)
    ap.add_argument("--duration-s", type=float, default=30.0)
    args = ap.parse_args(argv)
    rows = []
    for kind in ("static", "pursuit"):
        for rate, noise in CONDITIONS:
            res = [score(rate, noise, kind, seed, args.duration_s * 1000.0)
                   for seed in range(args.seeds)]
            mean = pd.DataFrame(res).mean(numeric_only=True)
            rows.append({"trace": kind, "rate_hz": int(rate), "noise_deg": noise, **mean})
    table = pd.DataFrame(rows)
    with pd.option_context("display.width", 160, "display.max_columns", 20,
                           "display.float_format", "{:.3f}".format):
        print(f"{args.seeds} seeds x {args.duration_s:g} s per condition; pursuit traces: "
              "40 % of gaze events are pursuits at 2-30 deg/s")
        print(table.to_string(index=False))


if __name__ == "__main__":
    main()
