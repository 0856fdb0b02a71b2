"""Cost of keyframed AOIs relative to the same AOIs given per frame, in ``convert``.

Not a test: prints the timings and the ratio (target: keyframes cost at most
1.10x per-frame input).  A simulated session (``simulate_session``) is
written once; its ``aois.csv`` is replaced by a set of AOIs that move
piecewise linearly (an ellipse, a MULTIPOLYGON of two ellipses, a square
with a hole, and a 12-gon that leaves the video for a while), written twice:
once per frame (every vertex computed directly for every frame, full
precision) and once as keyframes at the ends of the linear pieces.  Both
files go through the same ``convert`` (read from disk, tables written), in
alternating order, ``--repeat`` times.  Wall and CPU times are printed (CPU
time is steadier on a shared machine), and the only stage that differs (reading
the AOI file and matching every sample) is timed on its own.  The script also
checks that the two runs give identical ``aoi_summary`` tables.
Run: ``.venv/bin/python benchmarks/keyframes_ratio.py [--samples N] [--repeat R]``
"""

from __future__ import annotations

import argparse
import dataclasses
import tempfile
import time
from pathlib import Path

import numpy as np
import pandas as pd
import shapely

from aoi_fix import simulate
from aoi_fix.aois import read_aois
from aoi_fix.pipeline import convert, load_session, match_session

N_FRAMES = 240          # 8 s at 30 fps, the simulated videos
KEY_EVERY = 40          # a keyframe every 40 frames (plus the last frame)
W, H = 1280, 720


def _ellipse(cx, cy, rx, ry, n):
    th = np.linspace(0, 2 * np.pi, n, endpoint=False)
    return np.column_stack([cx + rx * np.cos(th), cy + ry * np.sin(th)])


def _shapes(rng):
    """Vertex rings (first vertex not repeated) and a path of centres per AOI."""
    keys = np.r_[np.arange(0, N_FRAMES, KEY_EVERY), N_FRAMES - 1]

    def path(x0, y0, step):
        pts = np.cumsum(rng.uniform(-step, step, (keys.size, 2)), axis=0) + (x0, y0)
        return pts

    face = [[_ellipse(0, 0, 140, 180, 36)]]
    eyes = [[_ellipse(-55, -30, 40, 22, 20)], [_ellipse(55, -30, 40, 22, 20)]]
    frame_sq = np.array([[-80, -80], [80, -80], [80, 80], [-80, 80]], float)
    hole = np.array([[-30, -30], [-30, 30], [30, 30], [30, -30]], float)
    toy = [[_ellipse(0, 0, 60, 60, 12)]]
    face_path = path(640, 300, 60)
    return keys, {
        "face": (face, face_path, None),
        "eyes": (eyes, face_path, None),
        "card": ([[frame_sq, hole]], path(300, 500, 80), None),
        "toy": (toy, path(950, 450, 120), (3, 4)),  # absent between keys[3] and keys[4]
    }


def _geom(parts, centre):
    polys = [shapely.Polygon(rings[0] + centre, [r + centre for r in rings[1:]])
             for rings in parts]
    return polys[0] if len(polys) == 1 else shapely.MultiPolygon(polys)


def aoi_tables(stimuli, seed=0):
    """(per-frame table, keyframe table) with ``stimulus, frame, aoi, wkt[, keyframe]``."""
    rng = np.random.default_rng(seed)
    per_frame, keyed = [], []
    for stim in stimuli:
        keys, shapes = _shapes(rng)
        f = np.arange(N_FRAMES)
        for name, (parts, centres, gap) in shapes.items():
            cx = np.interp(f, keys, centres[:, 0])  # per frame, computed directly
            cy = np.interp(f, keys, centres[:, 1])
            present = np.ones(N_FRAMES, bool)
            absent_key = np.zeros(keys.size, bool)
            if gap is not None:
                present[keys[gap[0]]:keys[gap[1]]] = False
                absent_key[gap[0]] = True
                # a polygon keyframe followed by an absent one holds until it
                held = slice(keys[gap[0] - 1], keys[gap[0]])
                cx[held], cy[held] = centres[gap[0] - 1]
            g = [_geom(parts, (cx[k], cy[k])) for k in f[present]]  # loop over frames
            per_frame.append(pd.DataFrame({"stimulus": stim, "frame": f[present], "aoi": name,
                                           "wkt": shapely.to_wkt(np.array(g, dtype=object),
                                                                 rounding_precision=-1)}))
            kw = [("absent" if absent_key[i] else
                   shapely.to_wkt(_geom(parts, centres[i]), rounding_precision=-1))
                  for i in range(keys.size)]
            keyed.append(pd.DataFrame({"stimulus": stim, "frame": keys, "aoi": name,
                                       "wkt": kw, "keyframe": "true"}))
    return pd.concat(per_frame, ignore_index=True), pd.concat(keyed, ignore_index=True)


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--samples", type=int, default=1_000_000)
    ap.add_argument("--style", default="lab_300hz_seconds")
    ap.add_argument("--repeat", type=int, default=5)
    ap.add_argument("--seed", type=int, default=0)
    args = ap.parse_args()

    with tempfile.TemporaryDirectory() as tmp:
        tmp = Path(tmp)
        n_trials = simulate.trials_for_samples(args.style, args.samples)
        ses = simulate.simulate_session(args.style, n_trials=n_trials, seed=args.seed)
        paths = simulate.write_session(ses, tmp / "in")
        per_frame, keyed = aoi_tables(sorted(ses.trials["stimulus"].unique()), args.seed)
        per_frame.to_csv(tmp / "in" / "aois_per_frame.csv", index=False)
        keyed.to_csv(tmp / "in" / "aois_keyframes.csv", index=False)
        print(f"simulated {len(ses.raw):,} samples in {n_trials} trials ({args.style}); "
              f"AOI rows: {len(per_frame):,} per frame, {len(keyed)} keyframes")
        del ses
        inputs = dict(study=paths["study"], trials=paths["trials"], checks=paths["checks"])
        aoi_paths = {k: tmp / "in" / f"aois_{k}.csv" for k in ("per_frame", "keyframes")}
        wall = {k: [] for k in aoi_paths}
        cpu = {k: [] for k in aoi_paths}
        summaries = {}
        for r in range(args.repeat):
            for kind in (("per_frame", "keyframes") if r % 2 == 0
                         else ("keyframes", "per_frame")):
                w0, c0 = time.perf_counter(), time.process_time()
                out = convert(paths["samples"], aois=aoi_paths[kind],
                              out_dir=tmp / f"out_{kind}", **inputs)
                wall[kind].append(time.perf_counter() - w0)
                cpu[kind].append(time.process_time() - c0)
                summaries[kind] = out["aoi_summary"]
                del out
        same = summaries["per_frame"].equals(summaries["keyframes"])

        # the only stage that differs: reading the AOI file and matching every sample
        session = load_session(paths["samples"], paths["study"], paths["trials"],
                               aoi_paths["per_frame"])
        stage = {k: [] for k in aoi_paths}
        for r in range(args.repeat):
            for kind in aoi_paths:
                c0 = time.process_time()
                table = read_aois(aoi_paths[kind], stimuli=session.study.stimuli)
                match_session(dataclasses.replace(session, aois=table))
                stage[kind].append(time.process_time() - c0)

        def ratio(d, how):
            return how(d["keyframes"]) / how(d["per_frame"])

        for label, d in (("wall", wall), ("CPU", cpu)):
            print(f"convert {label} time: per-frame AOIs best {min(d['per_frame']):.2f} s, "
                  f"median {np.median(d['per_frame']):.2f} s; keyframed AOIs best "
                  f"{min(d['keyframes']):.2f} s, median {np.median(d['keyframes']):.2f} s")
        print(f"AOI stage (read_aois + match_session) CPU: per-frame "
              f"{np.median(stage['per_frame']):.3f} s, keyframes "
              f"{np.median(stage['keyframes']):.3f} s (medians of {args.repeat})")
        print(f"ratio keyframes / per-frame (target <= 1.10): convert CPU best "
              f"{ratio(cpu, min):.3f}, median {ratio(cpu, np.median):.3f}; convert wall best "
              f"{ratio(wall, min):.3f}; AOI stage {ratio(stage, np.median):.3f}")
        print(f"aoi_summary identical: {same}")

if __name__ == "__main__":
    main()
