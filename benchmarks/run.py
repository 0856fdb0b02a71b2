"""Benchmarks that report ratios (not timed tests): ``make bench``.

Generates simulated sessions (aoi_fix.simulate, 300 Hz style, moving AOIs) of
two sizes and measures, as whole child processes in the same run:

* ``aoi-fix fixations`` (I-VT and I-DT) and ``aoi-fix convert``;
* a bare ``pyarrow.csv.read_csv`` of the same samples file (the parse floor);
* a per-sample Python loop labelling gaze samples with shapely
  ``Point.contains`` against the polygons of their frame (the naive way),
  timed on a subsample and scaled per sample;
* a 12-setting ``aoi-fix sweep`` (I-VT 4 velocities x 2 minimum durations,
  I-DT 2 dispersions x 2 minimum durations) with ``-j 2``;
* peak memory of ``convert`` (``ru_maxrss`` of the child);
* ``aoi-fix --version`` start-up.

Ratios use the marginal cost per sample, (t_big - t_small) / (n_big - n_small),
so interpreter start-up and imports do not hide the real cost.  Each time is the
best of five runs (three for the sweep), taken in rounds that run every command
at both sizes: on shared virtual machines single runs vary by up to 2x, and a
slow spell (seconds long) must not fall on one command or one size only.  A cProfile of
``convert`` on the largest case goes to ``benchmarks/out/profile_convert.txt``.
"""

from __future__ import annotations

import argparse
import cProfile
import io
import pstats
import subprocess
import sys
import time
from pathlib import Path

OUT = Path(__file__).resolve().parent / "out"
BIN = Path(sys.executable).parent


# A small launcher reports its child's peak RSS: a child forked straight from this
# (large) benchmark process would count our own memory in its ru_maxrss, since
# Linux keeps the high-water mark of the pre-exec copy.
_LAUNCH = ("import resource, subprocess, sys; "
           "r = subprocess.run(sys.argv[1:], stdout=subprocess.DEVNULL, "
           "stderr=subprocess.DEVNULL).returncode; "
           "print(resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss); sys.exit(r)")


def _child(cmd: list[str], *, memory: bool = True) -> tuple[float, float]:
    """Run a command; return wall seconds and its own peak RSS in MB (0 if not asked).

    With ``memory`` the command runs under a small launcher process (a constant
    start-up cost that cancels in marginal costs); without, directly (start-up
    timings).
    """
    full = [sys.executable, "-c", _LAUNCH, *cmd] if memory else cmd
    t0 = time.perf_counter()
    proc = subprocess.run(full, stdout=subprocess.PIPE, stderr=subprocess.DEVNULL, text=True)
    dt = time.perf_counter() - t0
    if proc.returncode != 0:
        raise subprocess.CalledProcessError(proc.returncode, cmd)
    mb = float(proc.stdout.split()[-1]) / 1024.0 if memory else 0.0
    return dt, mb


def make_session(n_samples: int, folder: Path) -> dict:
    from aoi_fix import simulate

    style = "lab_300hz_seconds"
    n_trials = simulate.trials_for_samples(style, n_samples)
    ses = simulate.simulate_session(style, n_trials=n_trials, seed=1)
    paths = simulate.write_session(ses, folder)
    paths["n"] = len(ses.raw)
    return paths


def naive_loop_seconds_per_sample(paths: dict, n_sub: int = 20000) -> float:
    """Per-sample Python loop with shapely Point.contains (the reference, not our code)."""
    import numpy as np
    import pandas as pd
    import shapely
    from shapely.geometry import Point

    from aoi_fix.config import load_study
    from aoi_fix.samples import read_samples
    from aoi_fix.trials import assign_trials, frame_index, read_trials, screen_to_video

    study = load_study(paths["study"])
    s = read_samples(paths["samples"], study.samples, study.display).iloc[:n_sub * 3]
    trials = read_trials(paths["trials"], study=study)
    aois = pd.read_csv(paths["aois"])
    polys = {(r.stimulus, int(r.frame), r.aoi): shapely.from_wkt(r.wkt)
             for r in aois.itertuples()}
    t = s["t_ms"].to_numpy()
    tr = assign_trials(t, trials)
    fr = frame_index(t, tr, trials, study.stimuli)
    xv, yv = screen_to_video(s["x_px"].to_numpy(), s["y_px"].to_numpy(), tr, trials,
                             study.stimuli)
    sel = np.flatnonzero((tr >= 0) & np.isfinite(xv))[:n_sub]
    names = sorted(aois["aoi"].unique())
    best = float("inf")
    for _ in range(3):  # best of three
        t0 = time.perf_counter()
        labels = []
        for i in sel:  # the naive per-sample loop this benchmark compares against
            stim = trials["stimulus"].iat[tr[i]]
            p = Point(xv[i], yv[i])
            hit = None
            for name in names:
                g = polys.get((stim, int(fr[i]), name))
                if g is not None and g.contains(p):
                    hit = name
                    break
            labels.append(hit)
        best = min(best, time.perf_counter() - t0)
    return best / max(len(sel), 1)


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description="aoi_fix benchmarks (ratios)")
    ap.add_argument("--small", type=int, default=400_000)
    ap.add_argument("--big", type=int, default=4_000_000)
    ap.add_argument("--jobs", type=int, default=2, help="-j of the sweep")
    args = ap.parse_args(argv)
    OUT.mkdir(parents=True, exist_ok=True)
    aoi_fix = str(BIN / "aoi-fix")
    py = sys.executable
    res = {}
    for label, n in (("small", args.small), ("big", args.big)):
        folder = OUT / f"session_{label}"
        paths = make_session(n, folder)
        res[label] = dict(n=paths["n"], paths=paths, folder=folder)

    def commands(label: str) -> dict[str, list[str]]:
        p, folder = res[label]["paths"], res[label]["folder"]
        s, st, tr, ao = (str(p[k]) for k in ("samples", "study", "trials", "aois"))
        return {
            "read": [py, "-c", f"import pyarrow.csv as c; c.read_csv({s!r})"],
            "ivt": [aoi_fix, "fixations", s, "--study", st, "--out", str(folder / "f.csv")],
            "idt": [aoi_fix, "fixations", s, "--study", st, "--out", str(folder / "f2.csv"),
                    "--set", "detection.method=idt"],
            "convert": [aoi_fix, "convert", s, "--study", st, "--trials", tr, "--aois", ao,
                        "--out-dir", str(folder / "out")],
            "sweep": [aoi_fix, "sweep", s, "--study", st, "--trials", tr, "--aois", ao,
                      "--grid", "detection.method=ivt,idt",
                      "--grid", "detection.velocity_threshold_deg_s=20,30,45,70",
                      "--grid", "detection.dispersion_threshold_deg=0.75,1.0",
                      "--grid", "detection.min_fixation_ms=60,100",
                      "--out-dir", str(folder / "sweep"), "-j", str(args.jobs)],
        }

    # Rounds: each round runs every command once at each size, so that a slow spell
    # of a shared machine (they last seconds) falls on all commands and both sizes
    # rather than on every run of one of them; the best run of each (command, size)
    # counts.  The sweep, the slowest, runs in the first three rounds only.
    cmds = {label: commands(label) for label in res}
    runs = {(key, label): [] for key in cmds["small"] for label in res}
    for rnd in range(5):
        for key in cmds["small"]:
            if key == "sweep" and rnd >= 3:
                continue
            for label in res:
                runs[key, label].append(_child(cmds[label][key]))
    for (key, label), rs in runs.items():
        res[label][key] = min(r[0] for r in rs)
        res[label][key + "_mb"] = max(r[1] for r in rs)
    for label in res:
        r = res[label]
        print(f"{label}: {r['n']} samples  read {r['read']:.2f}s  fixations(ivt) {r['ivt']:.2f}s  "
              f"fixations(idt) {r['idt']:.2f}s  convert {r['convert']:.2f}s  "
              f"sweep(12) {r['sweep']:.2f}s  peak convert {r['convert_mb']:.0f} MB", flush=True)
    a, b = res["small"], res["big"]
    dn = b["n"] - a["n"]

    def marg(k):
        return (b[k] - a[k]) / dn

    naive = naive_loop_seconds_per_sample(b["paths"])
    start = min(_child([aoi_fix, "--version"], memory=False)[0] for _ in range(3))
    helps = min(_child([aoi_fix, "--help"], memory=False)[0] for _ in range(3))
    print("\nratios of marginal cost per sample (targets in brackets):")
    print(f"  fixations (I-VT) / pyarrow read_csv : {marg('ivt') / marg('read'):.2f}  [<= 2.0]")
    print(f"  convert / pyarrow read_csv          : {marg('convert') / marg('read'):.2f}  "
          "[<= 2.0]")
    print(f"  fixations I-DT / I-VT               : {marg('idt') / marg('ivt'):.2f}  [<= 1.5]")
    print(f"  12-setting sweep (-j {args.jobs}) / convert  : {marg('sweep') / marg('convert'):.2f}  "
          "[<= 3]")
    print(f"  naive per-sample shapely loop / convert: {naive / marg('convert'):.0f}x  "
          "[>= 100x]")
    print(f"  time per sample big/small (convert) : "
          f"{(b['convert'] / b['n']) / (a['convert'] / a['n']):.2f}  [<= 1, linear]")
    print(f"  peak memory convert at {b['n']}: {b['convert_mb']:.0f} MB "
          f"= {b['convert_mb'] / (b['n'] / 1e6):.0f} MB per million samples [<= 150]")
    print(f"  peak memory fixations: {b['ivt_mb']:.0f} MB [< 800]")
    print(f"  start-up: --version {start:.2f}s, --help {helps:.2f}s [<= 0.5 s]")
    # profile of the largest case
    from aoi_fix.pipeline import convert

    prof = cProfile.Profile()
    p = b["paths"]
    prof.enable()
    convert(p["samples"], study=p["study"], trials=p["trials"], aois=p["aois"])
    prof.disable()
    buf = io.StringIO()
    pstats.Stats(prof, stream=buf).sort_stats("cumulative").print_stats(15)
    (OUT / "profile_convert.txt").write_text(buf.getvalue())
    print(f"  profile: {OUT / 'profile_convert.txt'}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
