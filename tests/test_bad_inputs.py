"""Bad input never crashes, never lies, never leaves half a result.

One parametrised test runs the installed command line (``python -m aoi_fix``)
as a subprocess on every case of the corpus in ``tests/bad_inputs/``:

* ``cases.toml`` -- hand-written cases: a good base session (simulated once
  per test session) plus a list of mutations of its files, the command, the
  expected exit code and fragments of the expected message;
* generated cases -- one per key of every study-file section (taken from the
  config dataclasses, so a new key is covered without editing anything):
  a wrong type, a negative, zero or too large value, a bad choice, a missing
  required key and an unknown key per section (NaN and inf: see cases.toml).

Every case must obey the same rules, asserted in :func:`test_bad_input`:

* exit 0 (success), 1 (bad data) or 2 (bad usage), as the case says;
* no ``Traceback`` on stderr;
* on failure: a message of at most 3 lines that names the culprit (file
  name, ``--set`` or ``--format``) and contains every expected fragment
  (row, column or key; what was found or expected);
* on failure: nothing new or changed in the run's folder -- no output file,
  no ``.tmp`` leftover, earlier outputs untouched;
* on success: every output file written, the sample accounting adds up,
  and -- for ``same_as_clean`` cases (byte-order mark, CRLF, blank lines) --
  tables identical to those of the clean input.

The corpus format is described at the top of ``tests/bad_inputs/cases.toml``.
"""

from __future__ import annotations

import csv
import dataclasses
import hashlib
import io
import json
import math
import os
import shutil
import subprocess
import sys
import tomllib
from pathlib import Path

import pytest

from aoi_fix.config import SECTIONS, Stimulus

HERE = Path(__file__).resolve().parent
CASES_FILE = HERE / "bad_inputs" / "cases.toml"
ROLES = {"samples": "samples.csv", "study": "study.toml", "trials": "trials.csv",
         "aois": "aois.csv", "checks": "checks.csv"}
TABLES = ("fixations", "aoi_summary", "trial_quality", "check_quality")
COMMANDS = {
    "convert": ["convert", "{samples}", "--study", "{study}", "--trials", "{trials}",
                "--aois", "{aois}", "--checks", "{checks}", "--out-dir", "{out}"],
    "convert_nochecks": ["convert", "{samples}", "--study", "{study}", "--trials",
                         "{trials}", "--aois", "{aois}", "--out-dir", "{out}"],
    "fixations": ["fixations", "{samples}", "--study", "{study}", "--out",
                  "{out}/fixations.csv"],
}
# Above this many lines a failure message is not "one line" any more.
MAX_MESSAGE_LINES = 3


# --------------------------------------------------------------------------- the corpus

def _load_manual_cases() -> list[dict]:
    with open(CASES_FILE, "rb") as fh:
        cases = tomllib.load(fh)["case"]
    for c in cases:
        c.setdefault("command", "convert")
        c.setdefault("mutations", [])
    return cases


def _bad_type_value(kind: str):
    """A TOML value of the wrong type for a field of this type."""
    return {"int": "many", "float": "wide", "str": 5, "bool": "yes",
            "tuple": 5}[kind]


def _generated_cases() -> list[dict]:
    """Per study key: wrong type, out of range, bad choice, missing, unknown."""
    cases = []
    sections = [(name, cls) for name, cls in SECTIONS.items()]
    sections.append(("stimuli.story1", Stimulus))
    for section, cls in sections:
        for f in dataclasses.fields(cls):
            kind = f.type if isinstance(f.type, str) else f.type.__name__
            key = f"{section}.{f.name}"
            meta = f.metadata

            def case(tag, value, exit_code, message, _key=key, **extra):
                c = {"name": f"study-{_key}-{tag}", "command": "convert",
                     "mutations": [{"file": "study", "op": "toml_set", "key": _key,
                                    "value": value}],
                     "exit": exit_code, "message": message, "generated": True}
                c.update(extra)
                return c

            cases.append(case("wrong-type", _bad_type_value(kind), 1, [f"'{key}'", "expected"]))
            if meta.get("choices"):
                cases.append(case("bad-choice", "no-such-choice", 1,
                                  [f"'{key}'", "no-such-choice", "expected one of"]))
            if kind in ("int", "float"):
                lo, hi = meta.get("min"), meta.get("max")
                assert lo is not None, f"{key}: every number needs a lower bound"
                zero_ok = lo < 0 or (lo == 0 and meta.get("min_inclusive", True))
                if zero_ok:
                    cases.append(case("negative", -1, 1, [f"'{key}'", "-1", "expected a value"]))
                    # the edge of the allowed range must run, not crash
                    cases.append(case("zero", 0 if kind == "int" else 0.0, 0, []))
                else:
                    cases.append(case("zero", 0, 1, [f"'{key}'", "expected a value"]))
                if hi is not None:
                    cases.append(case("too-large", hi + 1, 1, [f"'{key}'", "expected a value <="]))
            if f.default is dataclasses.MISSING and f.default_factory is dataclasses.MISSING:
                cases.append({"name": f"study-{key}-missing", "command": "convert",
                              "mutations": [{"file": "study", "op": "toml_del", "key": key}],
                              "exit": 1, "message": [f"'{key}'", "missing"],
                              "generated": True})
        cases.append({"name": f"study-{section}-unknown-key", "command": "convert",
                      "mutations": [{"file": "study", "op": "toml_set",
                                     "key": f"{section}.no_such_key", "value": 1}],
                      "exit": 1, "message": [f"'{section}.no_such_key'", "unknown"],
                      "generated": True})
    return cases


def _cases() -> list[dict]:
    cases = _load_manual_cases() + _generated_cases()
    names = [c["name"] for c in cases]
    dup = {n for n in names if names.count(n) > 1}
    assert not dup, f"case names must be unique: {sorted(dup)}"
    return cases


ALL_CASES = _cases()


# --------------------------------------------------------------------------- mutations

def _toml_scalar(v) -> str:
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, int):
        return str(v)
    if isinstance(v, float):
        if math.isnan(v):
            return "nan"
        if math.isinf(v):
            return "inf" if v > 0 else "-inf"
        return repr(v)
    if isinstance(v, str):
        return json.dumps(v)
    if isinstance(v, (list, tuple)):
        return "[" + ", ".join(_toml_scalar(x) for x in v) + "]"
    raise TypeError(type(v).__name__)


def _dump_toml(data: dict) -> str:
    lines: list[str] = []

    def table(prefix: str, tbl: dict):
        scalars = {k: v for k, v in tbl.items() if not isinstance(v, dict)}
        subs = {k: v for k, v in tbl.items() if isinstance(v, dict)}
        if prefix:
            lines.append(f"[{prefix}]")
        lines.extend(f"{k} = {_toml_scalar(v)}" for k, v in scalars.items())
        lines.append("")
        for k, v in subs.items():
            table(f"{prefix}.{k}" if prefix else k, v)

    table("", data)
    return "\n".join(lines)


def _toml_path(data: dict, key: str) -> tuple[dict, str]:
    section, name = key.rsplit(".", 1)
    node = data
    for part in section.split("."):
        node = node.setdefault(part, {})
    return node, name


def _split_lines(text: str) -> list[str]:
    return text.split("\n")


def _row(line: str) -> list[str]:
    return next(csv.reader([line]))


def _unrow(cells: list[str]) -> str:
    buf = io.StringIO()
    csv.writer(buf, lineterminator="").writerow(cells)
    return buf.getvalue()


def _set_cells(text: str, column: str, value: str, lines: list[int] | None) -> str:
    rows = _split_lines(text)
    header = _row(rows[0])
    assert column in header, f"test corpus: no column {column!r} in {header}"
    i = header.index(column)
    targets = lines if lines is not None else [n for n in range(2, len(rows) + 1)
                                              if rows[n - 1].strip()]
    for n in targets:
        cells = _row(rows[n - 1])
        cells[i] = value
        rows[n - 1] = _unrow(cells)
    return "\n".join(rows)


def _apply(m: dict, paths: dict[str, Path]) -> None:
    path = paths[m["file"]]
    op = m["op"]
    if op == "delete":
        path.unlink()
        return
    if op == "mkdir":
        if path.exists():
            path.unlink()
        path.mkdir(parents=True)
        return
    if op == "make_file":  # e.g. the output folder is a regular file
        path.parent.mkdir(parents=True, exist_ok=True)
        path.write_text(m.get("text", "not a folder\n"))
        return
    if op == "put":
        path.mkdir(parents=True, exist_ok=True)
        (path / m["name"]).write_text(m["text"])
        return
    if op == "write":
        path.parent.mkdir(parents=True, exist_ok=True)
        if "hex" in m:
            path.write_bytes(bytes.fromhex(m["hex"]))
        else:
            path.write_bytes(m["text"].encode("utf-8"))
        return
    if op == "copy_from":  # start from another role's file (e.g. a .gz copy)
        shutil.copyfile(paths[m["source"]], path)
        return
    if op in ("toml_set", "toml_del"):
        data = tomllib.loads(path.read_text(encoding="utf-8"))
        node, name = _toml_path(data, m["key"])
        if op == "toml_set":
            node[name] = m["value"]
        else:
            del node[name]
        path.write_text(_dump_toml(data), encoding="utf-8")
        return
    if op == "bom":
        path.write_bytes(b"\xef\xbb\xbf" + path.read_bytes())
        return
    if op == "crlf":
        path.write_bytes(path.read_bytes().replace(b"\r\n", b"\n").replace(b"\n", b"\r\n"))
        return
    if op == "trailing_blank":
        path.write_bytes(path.read_bytes() + b"\n\n  \n\n")
        return
    if op == "gzip":
        import gzip
        path.write_bytes(gzip.compress(paths[m["source"]].read_bytes(), mtime=0))
        return
    text = path.read_text(encoding="utf-8")
    if op == "empty":
        text = ""
    elif op == "keep_lines":
        text = "\n".join(_split_lines(text)[: m["n"]]) + "\n"
    elif op == "header_only":
        text = _split_lines(text)[0] + "\n"
    elif op == "replace":
        rows = _split_lines(text)
        if "line" in m:
            n = m["line"] - 1
            assert m["old"] in rows[n], f"test corpus: {m['old']!r} not on line {m['line']}"
            rows[n] = rows[n].replace(m["old"], m["new"])
            text = "\n".join(rows)
        else:
            assert m["old"] in text, f"test corpus: {m['old']!r} not in {path.name}"
            text = text.replace(m["old"], m["new"])
    elif op == "set_cell":
        text = _set_cells(text, m["column"], m["value"], [m["line"]])
    elif op == "set_column":
        text = _set_cells(text, m["column"], m["value"], None)
    elif op == "swap_lines":
        rows = _split_lines(text)
        a, b = m["a"] - 1, m["b"] - 1
        rows[a], rows[b] = rows[b], rows[a]
        text = "\n".join(rows)
    elif op == "dup_line":
        rows = _split_lines(text)
        rows.insert(m["line"], rows[m["line"] - 1])
        text = "\n".join(rows)
    elif op == "delete_line":
        rows = _split_lines(text)
        del rows[m["line"] - 1]
        text = "\n".join(rows)
    elif op == "insert_line":
        rows = _split_lines(text)
        rows.insert(m["line"] - 1, m["text"])
        text = "\n".join(rows)
    elif op == "append":
        text = text + m["text"]
    elif op == "cut":  # the file ends inside this line (a copy cut short)
        rows = _split_lines(text)
        line = rows[m["line"] - 1]
        text = "\n".join(rows[: m["line"] - 1] + [line[: int(len(line) * m["keep"])]])
    else:
        raise AssertionError(f"test corpus: unknown op {op!r}")
    path.write_text(text, encoding="utf-8")


# --------------------------------------------------------------------------- running

@pytest.fixture(scope="session")
def base_session(tmp_path_factory):
    """A small good session (2 trials, 300 Hz, time in s) and its clean results."""
    from aoi_fix.simulate import simulate_session, write_session

    root = tmp_path_factory.mktemp("bad_inputs_base")
    session = simulate_session("lab_300hz_seconds", n_trials=2, seed=7)
    write_session(session, root / "in")
    clean = {}
    for command in ("convert", "convert_nochecks", "fixations"):
        out = root / f"clean_{command}"
        args = [a.format(samples="in/samples.csv", study="in/study.toml",
                         trials="in/trials.csv", aois="in/aois.csv",
                         checks="in/checks.csv", out=out.name) for a in COMMANDS[command]]
        r = _run(args, root)
        assert r.returncode == 0, r.stderr
        clean[command] = out
    return root, clean


def _run(args: list[str], cwd: Path, *, in_process: bool = False
         ) -> subprocess.CompletedProcess:
    if in_process:
        return _run_in_process(args, cwd)
    return subprocess.run([sys.executable, "-m", "aoi_fix", *args], cwd=cwd,
                          capture_output=True, text=True, timeout=120)


def _run_in_process(args: list[str], cwd: Path) -> subprocess.CompletedProcess:
    """The console script's ``main`` in this process (no interpreter start-up).

    Same contract as a subprocess: exit code from ``SystemExit``; anything
    else escaping ``main`` is printed as a traceback on stderr, which the test
    rejects.  Not thread-safe (cwd, argv, stdio): run these one at a time.
    """
    import contextlib
    import traceback

    from aoi_fix.cli import main

    out, err = io.StringIO(), io.StringIO()
    old_cwd, old_argv = os.getcwd(), sys.argv
    code = 0
    try:
        os.chdir(cwd)
        sys.argv = ["aoi-fix", *args]
        with contextlib.redirect_stdout(out), contextlib.redirect_stderr(err):
            try:
                main()
            except SystemExit as e:
                code = e.code if isinstance(e.code, int) else (0 if e.code is None else 1)
            except BaseException:  # noqa: BLE001 - reported as the traceback it would be
                traceback.print_exc(file=err)
                code = 1
    finally:
        os.chdir(old_cwd)
        sys.argv = old_argv
    return subprocess.CompletedProcess(["aoi-fix", *args], code, out.getvalue(),
                                       err.getvalue())


def _snapshot(root: Path) -> dict[str, str]:
    out = {}
    for p in sorted(root.rglob("*")):
        if p.is_file():
            out[str(p.relative_to(root))] = hashlib.sha256(p.read_bytes()).hexdigest()
        elif p.is_dir():
            out[str(p.relative_to(root)) + "/"] = "dir"
    return out


def _manifest_ok(manifest: dict) -> None:
    s = manifest["samples"]
    assert s["total"] == s["valid"] + s["gap_filled"] + s["lost"]
    assert s["total"] == s["inside_trials"] + s["outside_trials"]
    assert s["in_fixations"] == s["in_fixations_inside_trials"] + s["in_fixations_outside_trials"]
    assert sum(t["samples"] for t in manifest["trials"]) == s["inside_trials"]


def _culprit(case: dict, paths: dict[str, Path]) -> str:
    if "culprit" in case:
        return case["culprit"]
    for m in case["mutations"]:
        if m["file"] in paths and m["file"] != "out":
            return paths[m["file"]].name
    raise AssertionError(f"test corpus: case {case['name']} needs a culprit")


SUBPROCESS_EVERY = 8


def _execute(case: dict, base: Path, work: Path, *, in_process: bool = False) -> dict:
    """Copy the base session into ``work``, mutate it, run the command line once."""
    shutil.copytree(base / "in", work / "in")
    paths = {role: work / "in" / case.get("paths", {}).get(role, name)
             for role, name in ROLES.items()}
    paths["out"] = work / "out"
    for m in case["mutations"]:
        _apply(m, paths)
    rel = {role: str(p.relative_to(work)) for role, p in paths.items()}
    args = case.get("args", COMMANDS[case["command"]])
    args = [a.format(**rel) for a in args] + case.get("extra_args", [])
    before = _snapshot(work)
    result = _run(args, work, in_process=in_process)
    return {"result": result, "before": before, "after": _snapshot(work), "paths": paths}


@pytest.fixture(scope="session")
def prefetched(request, base_session, tmp_path_factory):
    """Run every selected case up front, a few subprocesses at a time.

    Only the waiting is shared: each case still gets its own folder and its own
    process, and :func:`test_bad_input` asserts on it exactly as if it had run
    there.  ``AOI_FIX_TEST_JOBS`` sets the number of parallel runs.
    """
    from concurrent.futures import ThreadPoolExecutor

    selected = [item.callspec.params["case"] for item in request.session.items
                if getattr(item, "originalname", "") == "test_bad_input"
                and "case" in getattr(getattr(item, "callspec", None), "params", {})]
    root = tmp_path_factory.mktemp("bad_inputs_runs")
    jobs = int(os.environ.get("AOI_FIX_TEST_JOBS", min(4, os.cpu_count() or 1)))

    def one(case, in_process=False):
        try:
            return case["name"], _execute(case, base_session[0], root / case["name"],
                                          in_process=in_process)
        except Exception as e:  # re-raised by the test of that case
            return case["name"], e

    # every SUBPROCESS_EVERY-th case runs the installed entry point as a real
    # process (start-up, no traceback, exit code through the interpreter); the
    # rest call the same ``main`` in this process, which saves the 0.5 s import
    # of pandas per case.  AOI_FIX_TEST_SUBPROCESS=1 runs every case as a process.
    every = 1 if os.environ.get("AOI_FIX_TEST_SUBPROCESS") == "1" else SUBPROCESS_EVERY
    as_process = [c for i, c in enumerate(selected) if i % every == 0]
    in_process = [c for i, c in enumerate(selected) if i % every != 0]
    with ThreadPoolExecutor(max_workers=max(1, jobs)) as pool:
        results = dict(pool.map(one, as_process))
    results.update(one(c, in_process=True) for c in in_process)
    return results


@pytest.mark.parametrize("case", [pytest.param(c, id=c["name"], marks=(
    [pytest.mark.xfail(reason=c["xfail"], strict=True)] if "xfail" in c else []))
    for c in ALL_CASES])
def test_bad_input(case, base_session, prefetched, tmp_path):
    base, clean = base_session
    run = prefetched.get(case["name"])
    if run is None:
        run = _execute(case, base, tmp_path)
    if isinstance(run, Exception):
        raise run
    r, before, after, paths = run["result"], run["before"], run["after"], run["paths"]

    err = r.stderr
    assert "Traceback" not in err and "Traceback" not in r.stdout, err
    assert r.returncode == case["exit"], f"exit {r.returncode}, expected {case['exit']}:\n{err}"
    if case["exit"] != 0:
        lines = [ln for ln in err.splitlines() if ln.strip()]
        assert 1 <= len(lines) <= MAX_MESSAGE_LINES, err
        assert _culprit(case, paths) in err, err
        for fragment in case.get("message", []):
            assert fragment in err, f"{fragment!r} not in message:\n{err}"
        assert after == before, f"files changed by a failed run:\n{set(after) ^ set(before)}"
        return
    assert not [p for p in after if p.endswith(".tmp")], after
    out = paths["out"]
    if case["command"] == "fixations":
        got = {"fixations": out / "fixations.csv"}
    else:
        names = TABLES if case["command"] == "convert" else TABLES[:3]
        got = {n: out / f"{n}.csv" for n in names}
        got["manifest"] = out / "manifest.json"
    for p in got.values():
        assert p.is_file(), f"{p.name} missing after a successful run"
    if "manifest" in got:
        _manifest_ok(json.loads(got["manifest"].read_text()))
    if case.get("same_as_clean"):
        ref = clean[case["command"]]
        for name, p in got.items():
            if name == "manifest":
                a, b = json.loads(p.read_text()), json.loads((ref / p.name).read_text())
                for k in ("samples", "fixations", "trials", "detection_used"):
                    assert a[k] == b[k], k
            else:
                assert p.read_bytes() == (ref / p.name).read_bytes(), f"{p.name} differs"
