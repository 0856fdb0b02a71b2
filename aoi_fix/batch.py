"""Batch conversion of a cohort: one ``convert`` per session, incremental, parallel.

A session table (CSV) lists the sessions::

    session,samples,trials,checks,study
    s01,s01/samples.csv,s01/trials.csv,s01/checks.csv,
    s02,s02/samples.csv,s02/trials.csv,,study_60hz.toml

``session``, ``samples`` and ``trials`` are required; ``checks`` and ``study``
(a study file used *instead of* the main one for that session) are optional
and may be empty; other columns are ignored.  Relative paths are relative to
the table's folder.  A ``samples`` path ending in ``_physio.tsv.gz`` is read as
a BIDS eye-tracking recording (:mod:`aoi_fix.bids`): its ``[samples]`` and
``[display]`` come from the sidecars, so the study needs neither.

Each session is converted exactly as ``convert`` would
(:func:`aoi_fix.pipeline.convert_session` and
:func:`aoi_fix.pipeline.write_outputs`) into ``OUT/session=<id>/``, and its
tables are also written as one partition of a Hive-partitioned Parquet
dataset, ``OUT/dataset/<table>/session=<id>/part-0.parquet``, which pandas,
pyarrow, polars, DuckDB, R arrow or Spark read as one table with a
``session`` column.  ``OUT/batch_report.csv`` lists every session with its
status (``converted``, ``skipped`` or ``failed``), a one-line message and the
seconds it took.

With a participants table (``participants=``, :mod:`aoi_fix.cohort`) every
table gets ``participant, age_days, age_months``, each session also gets
``session_summary`` and ``exclusions`` (in its folder and in the dataset),
and the cohort is stacked into ``OUT/cohort_session_summary.csv`` and
``OUT/cohort_exclusions.csv`` with a JSON data dictionary per table.  The
session's participant row is part of its fingerprint.

Incremental runs
----------------
A session is *skipped* when its folder holds a complete earlier conversion
whose ``manifest.json`` records the same fingerprint: the SHA-256 of every
input file (samples, trials, checks, the study file used, the AOI file, and
for BIDS the sidecars), the resolved study (after ``--set``), the table format
and the aoi_fix version.  Files are compared by content, not by date or path.
``force=True`` converts every session again.

Fault isolation
---------------
Problems with the session table itself (a missing column, an unsafe or
repeated session id, an empty path) stop the run before anything is done.
Everything else is per session: a session that fails (a missing or malformed
file, a bad study key, no valid samples, even an unexpected error) is reported
as ``failed`` with its one-line message and the others go on.  The combined
dataset holds exactly the sessions reported ``converted`` or ``skipped``; a
failed session's folder keeps the outputs of its last successful conversion,
whose ``manifest.json`` says which inputs they came from.
"""

from __future__ import annotations

import csv
import json
import logging
import re
import shutil
import time
from concurrent.futures import ProcessPoolExecutor, as_completed
from dataclasses import dataclass, field
from pathlib import Path
from typing import Callable, Iterable

import numpy as np
import pandas as pd

from .config import read_study_dict
from .errors import (AoiFixError, ConfigError, InputFormatError, OutputError, UsageError,
                     read_text)

__all__ = ["batch", "read_session_table", "run_session", "combine_sessions", "read_combined",
           "session_folder", "SessionTask", "REPORT_COLUMNS", "SESSION_TABLES",
           "SESSION_ID_PATTERN"]

log = logging.getLogger(__name__)

#: Columns of ``batch_report.csv``.
REPORT_COLUMNS = ["session", "status", "message", "seconds"]
#: Tables a session may produce (``check_quality`` only with checks).
SESSION_TABLES = ("fixations", "aoi_summary", "trial_quality", "check_quality",
                  "session_summary", "exclusions")
#: A session id: 1-64 letters, digits, ``.``, ``_`` or ``-``, starting with a letter or digit.
SESSION_ID_PATTERN = r"[A-Za-z0-9][A-Za-z0-9._-]{0,63}"
_SESSION_ID = re.compile(rf"^{SESSION_ID_PATTERN}$")
_REQUIRED = ("session", "samples", "trials")
_OPTIONAL = ("checks", "study")
DATASET = "dataset"
REPORT = "batch_report.csv"
INDEX = "_sessions.csv"
_PART = "part-0.parquet"
_TEXT_COLUMNS = {"trial", "stimulus", "aoi", "status"}


def session_folder(out_dir: str | Path, session: str) -> Path:
    """``out_dir/session=<id>``.

    >>> session_folder("out", "s01").as_posix()
    'out/session=s01'
    """
    return Path(out_dir) / f"session={session}"


# --------------------------------------------------------------------------- session table

def read_session_table(path: str | Path) -> list[dict]:
    """Read and check a session table.

    Returns
    -------
    list of dict
        One dict per session, in file order: ``session``, ``row`` (line in
        the file, header = 1), ``samples``, ``trials``, ``checks`` and
        ``study`` (absolute paths, ``None`` when empty).

    Raises
    ------
    InputFormatError
        A missing file or required column, an empty ``session``,
        ``samples`` or ``trials`` cell, a session id that is not a safe folder
        name (letters, digits, ``.``, ``_``, ``-``; at most 64 characters), or
        a session id given twice (also when differing only in case, since
        some file systems ignore case).  The message names the line.
    """
    path = Path(path)
    text = read_text(path, what="session table", expected="a session table (CSV)")
    lines = text.splitlines()
    reader = csv.reader(lines)
    header = None
    for lineno, cells in enumerate(reader, start=1):
        if any(c.strip() for c in cells):
            header = [c.strip() for c in cells]
            header_line = lineno
            break
    if header is None:
        raise InputFormatError(f"{path}: the file is empty; expected a header line "
                               "'session,samples,trials' and one row per session")
    for name in _REQUIRED:
        if name not in header:
            raise InputFormatError(f"{path}: line {header_line}: column '{name}' is missing; "
                                   f"found columns: {', '.join(header)}")
    base = path.resolve().parent
    sessions: list[dict] = []
    seen: dict[str, int] = {}
    for lineno, cells in enumerate(csv.reader(lines[header_line:]), start=header_line + 1):
        if not any(c.strip() for c in cells):
            continue  # a loop over sessions, not samples
        if len(cells) != len(header):
            raise InputFormatError(f"{path}: line {lineno}: found {len(cells)} fields, "
                                   f"expected {len(header)}")
        row = {h: c.strip() for h, c in zip(header, cells)}
        sid = row["session"]
        if not _SESSION_ID.match(sid):
            raise InputFormatError(
                f"{path}: line {lineno}, column 'session': found {sid!r}, expected a safe "
                "folder name (1-64 letters, digits, '.', '_' or '-', starting with a letter "
                "or digit)")
        key = sid.lower()
        if key in seen:
            raise InputFormatError(f"{path}: line {lineno}, column 'session': {sid!r} is "
                                   f"already used on line {seen[key]}; session ids must be "
                                   "unique (ignoring case)")
        seen[key] = lineno
        entry = {"session": sid, "row": lineno}
        for name in _REQUIRED[1:]:
            if not row[name]:
                raise InputFormatError(f"{path}: line {lineno}, column '{name}': empty; "
                                       f"expected the session's {name} file")
            entry[name] = base / row[name]
        for name in _OPTIONAL:
            value = row.get(name, "")
            entry[name] = base / value if value else None
        sessions.append(entry)
    return sessions


# --------------------------------------------------------------------------- one session

@dataclass(frozen=True)
class SessionTask:
    """Everything a worker needs to convert one session (picklable)."""

    session: str
    samples: Path
    trials: Path
    checks: Path | None
    study: Path
    aois: Path
    out_dir: Path
    fmt: str = "csv"
    force: bool = False
    overrides: tuple = ()
    known_sha256: dict = field(default_factory=dict)
    participant: dict | None = None  # {"participant", "age_days"} with --participants


def _resolve(task: SessionTask):
    """The session's Study, whether it is BIDS, and its input files by role."""
    from .bids import bids_inputs, is_bids_physio, study_for_bids
    from .config import study_from_dict

    data = read_study_dict(task.study)
    bids = is_bids_physio(task.samples)
    inputs: dict[str, Path] = {"samples": task.samples, "trials": task.trials,
                               "aois": task.aois, "study": task.study}
    if task.checks is not None:
        inputs["checks"] = task.checks
    for role in ("samples", "trials", "checks"):
        p = inputs.get(role)
        if p is not None and not p.is_file():
            raise InputFormatError(f"{p}: {role} file not found" if not p.exists() else
                                   f"{p}: expected a {role} file, found a folder")
    if bids:
        data = study_for_bids(task.samples, data)
        extra = bids_inputs(task.samples)
        extra.pop("physio")
        inputs.update(extra)
    study = study_from_dict(data, source=str(task.study), overrides=task.overrides)
    return study, bids, inputs


def _fingerprint(task: SessionTask, study, inputs: dict[str, Path]) -> dict:
    from . import __version__
    from .output import sha256_file

    sha = {}
    for role, p in inputs.items():
        key = str(Path(p).resolve())
        sha[role] = task.known_sha256.get(key) or sha256_file(p)
    fp = {"aoi_fix_version": __version__, "format": task.fmt, "inputs_sha256": sha,
          "parameters": study.to_dict()}
    if task.participant is not None:
        fp["participant"] = {k: v for k, v in task.participant.items() if k != "file"}
    return json.loads(json.dumps(fp, default=str))  # as it reads back from the manifest


def _expected_files(out_dir: Path, session: str, fmt: str, with_checks: bool,
                    with_cohort: bool = False) -> list[Path]:
    from .cohort import COHORT_TABLES
    from .output import table_suffix

    names = [t for t in SESSION_TABLES if (with_checks or t != "check_quality")
             and (with_cohort or t not in COHORT_TABLES)]
    folder = session_folder(out_dir, session)
    files = [folder / "manifest.json"] + [folder / f"{t}{table_suffix(fmt)}" for t in names]
    files += [Path(out_dir) / DATASET / t / f"session={session}" / _PART for t in names]
    return files


def _up_to_date(task: SessionTask, fp: dict, with_checks: bool) -> bool:
    files = _expected_files(task.out_dir, task.session, task.fmt, with_checks,
                            task.participant is not None)
    if not all(f.is_file() for f in files):
        return False
    try:
        manifest = json.loads(files[0].read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return False
    return isinstance(manifest, dict) and manifest.get("batch", {}).get("fingerprint") == fp


def _load(study, inputs: dict[str, Path], bids: bool):
    """Read and cross-check a session's inputs (``pipeline.load_session``; BIDS-aware there)."""
    from .pipeline import load_session

    del bids  # read_samples recognises a BIDS recording by its name
    return load_session(inputs["samples"], study, inputs["trials"], inputs["aois"],
                        inputs.get("checks"))


def _arrow_table(df: pd.DataFrame):
    """One partition with a schema that does not depend on the session.

    Text columns become plain strings (not dictionaries, whose index width
    varies), ``flag_*`` columns nullable booleans, integer columns int64,
    other numbers float64, so that every partition of a table has the same
    schema and readers can merge them.
    """
    import pyarrow as pa

    arrays, names = [], []
    for c in df.columns:
        s = df[c]
        if c in _TEXT_COLUMNS or not (pd.api.types.is_numeric_dtype(s)
                                      or pd.api.types.is_bool_dtype(s)):
            if c.startswith("flag_"):
                low = s.astype("string").str.strip().str.lower()
                vals = low.map({"true": True, "false": False, "1": True, "0": False})
                arr = pa.array(vals.astype("boolean"), type=pa.bool_())
            else:
                arr = pa.array(s.astype("string").array, type=pa.large_string())
        elif c.startswith("flag_") or pd.api.types.is_bool_dtype(s):
            arr = pa.array(s.astype("boolean"), type=pa.bool_())
        elif pd.api.types.is_integer_dtype(s):
            arr = pa.array(s.astype("Int64"), type=pa.int64())
        else:
            arr = pa.array(s.to_numpy(dtype=float, na_value=np.nan), type=pa.float64(),
                           from_pandas=True)
        arrays.append(arr)
        names.append(str(c))
    return pa.Table.from_arrays(arrays, names=names)


def _write_partitions(out_dir: Path, session: str, tables: dict) -> None:
    """Write the session's partitions (all or none), then drop stale ones."""
    import pyarrow.parquet as pq

    from .output import AtomicOutputs

    root = Path(out_dir) / DATASET
    present = [t for t in SESSION_TABLES if t in tables]
    with AtomicOutputs() as w:
        for t in present:
            table = _arrow_table(tables[t].drop(columns="session", errors="ignore"))
            w.file(root / t / f"session={session}" / _PART,
                   lambda tmp, table=table: pq.write_table(table, tmp))
    for t in SESSION_TABLES:
        if t not in present:
            shutil.rmtree(root / t / f"session={session}", ignore_errors=True)


def _remove_stale_tables(folder: Path, written: Iterable[Path]) -> None:
    keep = {Path(p).name for p in written}
    for t in SESSION_TABLES:
        for suffix in (".csv", ".parquet"):
            f = folder / f"{t}{suffix}"
            if f.name not in keep and f.is_file():
                f.unlink()


def _convert_one(task: SessionTask) -> tuple[str, str]:
    from .pipeline import convert_session, write_outputs

    study, bids, inputs = _resolve(task)
    fp = _fingerprint(task, study, inputs)
    with_checks = "checks" in inputs
    if not task.force and _up_to_date(task, fp, with_checks):
        return "skipped", "inputs and parameters unchanged"
    session = _load(study, inputs, bids)
    same = {role: fp["inputs_sha256"][role] for role, p in session.paths.items()
            if role in inputs and Path(inputs[role]).resolve() == Path(p).resolve()
            and role in fp["inputs_sha256"]}  # hashed once, for the fingerprint
    tables = convert_session(session, input_sha256=same)
    if task.participant is not None:
        from .cohort import add_cohort_tables
        tables = add_cohort_tables(tables, session=task.session, quality=study.quality,
                                   participant=task.participant["participant"],
                                   age_days=task.participant["age_days"],
                                   participants_path=task.participant.get("file"))
    tables["manifest"]["batch"] = {
        "session": task.session,
        "inputs": {k: str(v) for k, v in inputs.items()},
        "overrides": list(task.overrides),
        "fingerprint": fp,
    }
    folder = session_folder(task.out_dir, task.session)
    _write_partitions(task.out_dir, task.session, tables)
    from .cohort import write_session_outputs
    written = write_session_outputs(tables, folder, task.fmt, session=session)
    _remove_stale_tables(folder, written)
    acc = tables["manifest"]["samples"]
    tail = ""
    if "exclusions" in tables["manifest"]:
        ex = tables["manifest"]["exclusions"]
        tail = (", session excluded" if ex["session_excluded"] else
                f", {ex['trials_excluded']} excluded")
    return "converted", (f"{len(tables['fixations'])} fixations, "
                         f"{len(tables['trial_quality'])} trials{tail}, "
                         f"{acc['total']} samples")


def run_session(task: SessionTask) -> dict:
    """Convert one session (or skip it); never raises.

    Returns
    -------
    dict
        A report row: ``session``, ``status`` (``converted``, ``skipped`` or
        ``failed``), ``message`` (one line) and ``seconds``.
    """
    t0 = time.perf_counter()
    try:
        status, message = _convert_one(task)
    except AoiFixError as e:
        status, message = "failed", (str(e).splitlines() or [type(e).__name__])[0]
    except MemoryError:
        status, message = "failed", "out of memory"
    except Exception as e:  # fault isolation: one session's bug must not stop the cohort
        log.exception("session %s: unexpected error", task.session)
        text = (str(e).splitlines() or [""])[0]
        status, message = "failed", f"unexpected error (please report): " \
                                    f"{type(e).__name__}: {text}"
    seconds = round(time.perf_counter() - t0, 3)
    log.info("session %s: %s (%s) in %.3f s", task.session, status, message, seconds)
    return {"session": task.session, "status": status, "message": message,
            "seconds": seconds}


# --------------------------------------------------------------------------- the dataset

def _prune_dataset(out_dir: Path, keep: set[str]) -> None:
    """Remove partitions of sessions not in ``keep`` (only ``session=...`` folders)."""
    root = Path(out_dir) / DATASET
    if not root.is_dir():
        return
    for table_dir in root.iterdir():
        if not table_dir.is_dir():
            continue
        for part in table_dir.glob("session=*"):
            if part.is_dir() and part.name.split("=", 1)[1] not in keep:
                shutil.rmtree(part, ignore_errors=True)


def _write_index(out_dir: Path, sessions: list[str]) -> None:
    from .output import sha256_file, write_table

    rows = []
    for s in sessions:
        m = session_folder(out_dir, s) / "manifest.json"
        rows.append({"session": s, "manifest_sha256": sha256_file(m) if m.is_file() else ""})
    write_table(pd.DataFrame(rows, columns=["session", "manifest_sha256"]),
                Path(out_dir) / DATASET / INDEX)


def combine_sessions(out_dir: str | Path) -> pd.DataFrame:
    """(Re)build ``out_dir/dataset`` from the ``session=<id>`` folders in ``out_dir``.

    For tables written by ``aoi-fix convert --out-dir OUT/session=<id>``
    (e.g. by the Makefile recipe in ``docs/Makefile.example``): every folder
    with a ``manifest.json`` becomes one partition per table, partitions of
    sessions without such a folder are removed, and
    ``out_dir/dataset/_sessions.csv`` lists the sessions with the SHA-256 of
    their manifests.

    Returns
    -------
    DataFrame
        ``session, manifest_sha256``.
    """
    from .output import read_table

    out_dir = Path(out_dir)
    sessions = []
    for folder in sorted(out_dir.glob("session=*")):
        sid = folder.name.split("=", 1)[1]
        if not (folder.is_dir() and (folder / "manifest.json").is_file()
                and _SESSION_ID.match(sid)):
            continue
        tables = {}
        for t in SESSION_TABLES:
            for suffix in (".parquet", ".csv"):
                f = folder / f"{t}{suffix}"
                if f.is_file():
                    tables[t] = read_table(f)
                    break
        if "session_summary" in tables or "exclusions" in tables:
            from .cohort import typed_tables
            tables = typed_tables(tables)
        _write_partitions(out_dir, sid, tables)
        sessions.append(sid)
    _prune_dataset(out_dir, set(sessions))
    _write_index(out_dir, sessions)
    if (out_dir / DATASET / "session_summary").is_dir():
        from .cohort import write_cohort
        write_cohort(out_dir, sessions=sessions)
    return pd.read_csv(out_dir / DATASET / INDEX, dtype=str, keep_default_na=False)


def read_combined(out_dir: str | Path, table: str) -> pd.DataFrame:
    """Read one combined table of a batch output folder, ``session`` as text.

    ``pd.read_parquet(out_dir / "dataset" / table)`` works too, but pyarrow
    then guesses the type of ``session`` from its values (ids like ``01``
    become the integer 1) and takes the columns from one partition only (a
    column that only some sessions have, e.g. from a setting that adds one,
    may be left out).  This reads ``session`` as text, every column of every
    partition (missing where a session lacks it), and sorts rows by session.
    """
    import pyarrow as pa
    import pyarrow.dataset as ds
    import pyarrow.parquet as pq

    root = Path(out_dir) / DATASET / table
    if not root.is_dir():
        raise InputFormatError(f"{root}: no such combined table; expected one of "
                               + ", ".join(SESSION_TABLES))
    files = sorted(root.glob(f"session=*/{_PART}"))
    schema = pa.unify_schemas([pq.read_schema(f) for f in files]
                              + [pa.schema([("session", pa.string())])])
    part = ds.partitioning(pa.schema([("session", pa.string())]), flavor="hive")
    df = ds.dataset(root, schema=schema, format="parquet",
                    partitioning=part).to_table().to_pandas()
    cols = ["session"] + [c for c in df.columns if c != "session"]
    return df[cols].sort_values("session", kind="stable").reset_index(drop=True)


# --------------------------------------------------------------------------- batch

def _check_scheduler(scheduler: str | None):
    if scheduler is None:
        return None
    try:
        import distributed  # noqa: F401
    except ImportError:
        raise UsageError("--scheduler needs Dask distributed; install the cluster extra: "
                         "pip install 'aoi-fix[cluster]'") from None
    return scheduler


def _run_local(tasks: list[SessionTask], jobs: int, done: Callable[[dict], None]) -> None:
    if jobs == 1 or len(tasks) <= 1:
        for t in tasks:  # a loop over sessions
            done(run_session(t))
        return
    from concurrent.futures.process import BrokenProcessPool

    from ._chunks import single_thread_worker

    with ProcessPoolExecutor(max_workers=min(jobs, len(tasks)),
                             initializer=single_thread_worker) as pool:
        futures = {pool.submit(run_session, t): t for t in tasks}
        for fut in as_completed(futures):
            try:
                row = fut.result()
            except BrokenProcessPool:
                row = {"session": futures[fut].session, "status": "failed",
                       "message": "the worker process died (out of memory?)", "seconds": 0.0}
            done(row)


def _run_dask(tasks: list[SessionTask], scheduler: str, done: Callable[[dict], None]) -> None:
    from distributed import Client
    from distributed import as_completed as dask_completed

    with Client(scheduler) as client:
        futures = {client.submit(run_session, t, pure=False): t for t in tasks}
        for fut in dask_completed(list(futures)):
            try:
                row = fut.result()
            except Exception as e:  # a worker lost, a pickling problem, ...
                row = {"session": futures[fut].session, "status": "failed",
                       "message": f"Dask worker failed: {type(e).__name__}: {e}",
                       "seconds": 0.0}
            done(row)


def batch(sessions_csv, *, study, aois, out_dir, jobs: int = 1, fmt: str = "csv",
          force: bool = False, overrides=(), scheduler: str | None = None,
          progress: Callable[[int, int, dict | None], None] | None = None,
          participants=None, plots: bool = False) -> pd.DataFrame:
    """Convert every session of a session table; skip those already up to date.

    Parameters
    ----------
    sessions_csv : path
        The session table (see the module docstring): ``session, samples,
        trials`` and optionally ``checks`` and ``study``.
    study : path
        Study file (TOML) for sessions without their own ``study``.  For
        BIDS sessions it may lack ``[samples]`` and ``[display]``.
    aois : path
        AOI file (CSV with WKT, or GeoJSON) shared by all sessions.
    out_dir : path
        Output folder: ``session=<id>/`` per session, ``dataset/`` and
        ``batch_report.csv``.
    jobs : int
        Worker processes (default 1: in this process).  Results do not
        depend on it.
    fmt : {"csv", "parquet"}
        Format of the per-session tables (the combined dataset is Parquet).
    force : bool
        Convert every session, even when its outputs are up to date.
    overrides : sequence of str
        ``section.key=value`` applied to every session's study.
    scheduler : str, optional
        Address of a Dask distributed scheduler (``tcp://host:8786``); the
        sessions then run on its workers, which must see the same paths.
        Needs the ``cluster`` extra.
    progress : callable, optional
        Called as ``progress(0, n, None)`` before the first session and
        ``progress(done, n, row)`` as each session finishes (in completion
        order) with its report row.
    participants : path, optional
        Participants table (:func:`aoi_fix.cohort.read_participants`): adds
        ``participant, age_days, age_months`` to every table, writes
        ``session_summary`` and ``exclusions`` per session and the cohort
        files ``cohort_session_summary.csv`` and ``cohort_exclusions.csv``
        with their data dictionary (``docs/cohort.md``).  Every session must
        have a row.
    plots : bool
        With ``participants``: also ``qc_exclusions.png``, trials used and
        excluded per session (needs matplotlib).

    Returns
    -------
    DataFrame
        The report (``session, status, message, seconds``) in table order,
        also written to ``out_dir/batch_report.csv``.

    Raises
    ------
    UsageError
        A bad ``fmt``, ``jobs`` or override, ``scheduler`` without Dask, or
        ``plots`` without ``participants`` or matplotlib.
    InputFormatError, ConfigError, OutputError
        A bad session table (naming the line), an unreadable main study or
        AOI file, or an output folder that is a file; raised before any
        session is converted.
    """
    from .config import parse_override, study_from_dict
    from .output import sha256_file, write_table

    if fmt not in ("csv", "parquet"):
        raise UsageError(f"--format: found {fmt!r}, expected csv or parquet")
    if isinstance(jobs, bool) or not isinstance(jobs, int) or jobs < 1:
        raise UsageError(f"-j/--jobs: found {jobs!r}, expected a whole number >= 1")
    overrides = tuple(overrides or ())
    for o in overrides:
        parse_override(o)
    scheduler = _check_scheduler(scheduler)
    out_dir = Path(out_dir)
    if out_dir.exists() and not out_dir.is_dir():
        raise OutputError(f"{out_dir}: expected an output folder, found a file")
    study, aois = Path(study), Path(aois)
    data = read_study_dict(study)
    if "display" in data and "samples" in data:
        study_from_dict(data, source=str(study), overrides=overrides)  # fail fast
    if not aois.is_file():
        raise InputFormatError(f"{aois}: AOI file not found" if not aois.exists() else
                               f"{aois}: expected an AOI file, found a folder")
    rows = read_session_table(sessions_csv)
    who: dict[str, dict] = {}
    if plots:
        if participants is None:
            raise UsageError("--plots on batch draws the cohort QC figure and needs "
                             "--participants")
        from .plots import require_matplotlib
        require_matplotlib()
    if participants is not None:
        from .cohort import participant_of_sessions, read_participants
        ptable = read_participants(participants)
        for sid, info in participant_of_sessions(ptable, [r["session"] for r in rows]).items():
            who[sid] = {"participant": info["participant"], "age_days": info["age_days"],
                        "file": str(Path(participants).resolve())}
    known = {str(study.resolve()): sha256_file(study), str(aois.resolve()): sha256_file(aois)}
    tasks = [SessionTask(session=r["session"], samples=r["samples"], trials=r["trials"],
                         checks=r["checks"], study=r["study"] or study.resolve(),
                         aois=aois.resolve(), out_dir=out_dir, fmt=fmt, force=force,
                         overrides=overrides, known_sha256=known,
                         participant=who.get(r["session"]))
             for r in rows]
    out_dir.mkdir(parents=True, exist_ok=True)
    results: dict[str, dict] = {}
    n = len(tasks)
    if progress is not None:
        progress(0, n, None)

    def done(row: dict) -> None:
        results[row["session"]] = row
        if progress is not None:
            progress(len(results), n, row)

    log.info("batch: %d sessions, %s", n, f"Dask at {scheduler}" if scheduler
             else f"{jobs} worker(s)")
    if scheduler is not None:
        _run_dask(tasks, scheduler, done)
    else:
        _run_local(tasks, jobs, done)
    report = pd.DataFrame([results[t.session] for t in tasks], columns=REPORT_COLUMNS)
    report["seconds"] = report["seconds"].astype(float)
    ok = [t.session for t in tasks if results[t.session]["status"] != "failed"]
    _prune_dataset(out_dir, set(ok))
    _write_index(out_dir, ok)
    from .cohort import remove_cohort_files, write_cohort
    if participants is not None:
        write_cohort(out_dir, sessions=[t.session for t in tasks], plots=plots,
                     failed=[{"session": t.session, **who[t.session]} for t in tasks
                             if results[t.session]["status"] == "failed"])
    else:
        remove_cohort_files(out_dir)
    write_table(report, out_dir / REPORT)
    return report
