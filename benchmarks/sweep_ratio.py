"""Cost of a 12-setting sweep relative to one convert, on a ~2,000,000-sample session.

Not a test: prints the timings and the ratio (target: the sweep takes at most
3x one convert).  Both runs read the same files from disk and write their
tables to a scratch folder, in the same process, one after the other.
Run: ``.venv/bin/python benchmarks/sweep_ratio.py [--samples N] [-j N] [--style S]``

The grid is detection.method = ivt, idt x detection.min_fixation_ms = 60, 100
x (I-VT) detection.velocity_threshold_deg_s = 20, 30, 45, 70 or (I-DT)
detection.dispersion_threshold_deg = 0.75, 1.0: 2 x 4 + 2 x 2 = 12 settings
(a method-specific key is swept only with its method).
"""

from __future__ import annotations

import argparse
import tempfile
import time
from pathlib import Path

from aoi_fix import simulate
from aoi_fix.pipeline import convert
from aoi_fix.sweep import sweep

GRID = {
    "detection.method": ["ivt", "idt"],
    "detection.velocity_threshold_deg_s": [20, 30, 45, 70],
    "detection.dispersion_threshold_deg": [0.75, 1.0],
    "detection.min_fixation_ms": [60, 100],
}


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--samples", type=int, default=2_000_000)
    ap.add_argument("--style", default="lab_300hz_seconds")
    ap.add_argument("-j", "--jobs", type=int, nargs="+", default=[1, 2],
                    help="worker counts to time the sweep with (default: 1 2)")
    ap.add_argument("--seed", type=int, default=0)
    args = ap.parse_args()

    with tempfile.TemporaryDirectory() as tmp:
        tmp = Path(tmp)
        n_trials = simulate.trials_for_samples(args.style, args.samples)
        t0 = time.perf_counter()
        ses = simulate.simulate_session(args.style, n_trials=n_trials, seed=args.seed)
        paths = simulate.write_session(ses, tmp / "in")
        print(f"simulated {len(ses.raw):,} samples in {n_trials} trials "
              f"({args.style}) in {time.perf_counter() - t0:.1f} s")
        del ses
        inputs = dict(study=paths["study"], trials=paths["trials"], aois=paths["aois"],
                      checks=paths["checks"])

        t0 = time.perf_counter()
        convert(paths["samples"], out_dir=tmp / "convert", **inputs)
        convert_s = time.perf_counter() - t0
        print(f"convert: {convert_s:.1f} s")

        for jobs in args.jobs:
            t0 = time.perf_counter()
            out = sweep(paths["samples"], grid=GRID, out_dir=tmp / f"sweep_j{jobs}",
                        jobs=jobs, **inputs)
            sweep_s = time.perf_counter() - t0
            n = len(out["sweep_settings"])
            print(f"sweep of {n} settings with -j {jobs}: {sweep_s:.1f} s; "
                  f"ratio sweep / convert = {sweep_s / convert_s:.2f} (target <= 3)")


if __name__ == "__main__":
    main()
