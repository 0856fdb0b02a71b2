"""Head-to-head timing of two versions of aoi_fix (prints times and a ratio; not a test).

    python benchmarks/head_to_head.py REV [--command convert|fixations] [--runs 7]
                                          [--set section.key=value ...]

Runs the same ``aoi-fix`` command on the benchmark sessions of ``benchmarks/run.py``
(400k and 4M samples; simulated first when missing) alternately from a temporary
git worktree of ``REV`` and from this checkout, as whole processes with the same
interpreter, and prints the best and mean wall time of each version at each size
and the marginal cost, (t_4M - t_400k), of each.  Alternating runs share every slow
spell of a busy machine, so the comparison holds where single benchmark runs vary
by 10 % or more.
"""

from __future__ import annotations

import argparse
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

HERE = Path(__file__).resolve().parent
ROOT = HERE.parent
OUT = HERE / "out"


def _session(label: str, n: int) -> dict:
    folder = OUT / f"session_{label}"
    names = ("samples", "study", "trials", "aois")
    paths = {k: folder / f"{k}.{'toml' if k == 'study' else 'csv'}" for k in names}
    if not all(p.exists() for p in paths.values()):
        sys.path.insert(0, str(HERE))
        from run import make_session

        paths = make_session(n, folder)
    return paths


def _command(kind: str, p: dict, out: Path, sets: list[str]) -> list[str]:
    s, st = str(p["samples"]), str(p["study"])
    extra = [a for kv in sets for a in ("--set", kv)]
    if kind == "fixations":
        return ["fixations", s, "--study", st, "--out", str(out / "f.csv"), *extra]
    return ["convert", s, "--study", st, "--trials", str(p["trials"]), "--aois",
            str(p["aois"]), "--out-dir", str(out / "convert"), *extra]


def _run(src: Path, args: list[str]) -> float:
    code = (f"import sys; sys.path.insert(0, {str(src)!r}); sys.argv[0] = 'aoi-fix'; "
            "from aoi_fix.cli import run; run()")
    t0 = time.perf_counter()
    proc = subprocess.run([sys.executable, "-c", code, *args], stdout=subprocess.DEVNULL,
                          stderr=subprocess.DEVNULL)
    dt = time.perf_counter() - t0
    if proc.returncode != 0:
        raise SystemExit(f"head_to_head: {src}: aoi-fix {args[0]} exited {proc.returncode}")
    return dt


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("rev", help="the other version: a commit, tag or branch")
    ap.add_argument("--command", choices=("convert", "fixations"), default="convert")
    ap.add_argument("--runs", type=int, default=7)
    ap.add_argument("--set", dest="sets", action="append", default=[],
                    help="study override passed to both versions (repeatable)")
    args = ap.parse_args(argv)
    sessions = {"400k": _session("small", 400_000), "4M": _session("big", 4_000_000)}
    with tempfile.TemporaryDirectory() as tmp:
        old = Path(tmp) / "old"
        subprocess.run(["git", "-C", str(ROOT), "worktree", "add", "--detach", "-q", str(old),
                        args.rev], check=True)
        try:
            versions = {args.rev: old, "this checkout": ROOT}
            times = {(v, s): [] for v in versions for s in sessions}
            for _ in range(args.runs):  # rounds: every version at every size
                for size, paths in sessions.items():
                    for name, src in versions.items():
                        out = Path(tmp) / "out"
                        out.mkdir(exist_ok=True)
                        cmd = _command(args.command, paths, out, args.sets)
                        times[name, size].append(_run(src, cmd))
        finally:
            subprocess.run(["git", "-C", str(ROOT), "worktree", "remove", "--force", str(old)],
                           check=False)
    print(f"aoi-fix {args.command}, {args.runs} alternating runs (seconds, best / mean):")
    for name in versions:
        row = [f"{s} {min(times[name, s]):.3f} / {statistics.mean(times[name, s]):.3f}"
               for s in sessions]
        marg = min(times[name, "4M"]) - min(times[name, "400k"])
        print(f"  {name:>14}: " + "   ".join(row) + f"   marginal {marg:.3f}")
    base, new = (min(times[v, "4M"]) - min(times[v, "400k"]) for v in versions)
    print(f"  marginal cost, this checkout / {args.rev}: {new / base:.2f}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
