"""The ``aoi-fix`` command line: parse arguments, call the library, map errors to exit codes.

No maths here.  Exit codes: 0 success, 1 bad data (one-line message), 2 bad usage.
"""

from __future__ import annotations

import functools
import sys
from pathlib import Path
from typing import List, Optional

import typer

from . import __version__
from .errors import AoiFixError

app = typer.Typer(add_completion=False, no_args_is_help=True,
                  help="Raw gaze samples to fixations, moving-AOI hits and per-trial "
                       "tables. A research tool, not a diagnostic device.")

SET_HELP = "Override a study key, e.g. detection.velocity_threshold_deg_s=40 (repeatable)."
FORMAT_HELP = "Table format: csv or parquet."


def _version(value: bool) -> None:
    if value:
        typer.echo(f"aoi-fix {__version__}")
        raise typer.Exit()


@app.callback()
def _root(version: bool = typer.Option(False, "--version", callback=_version, is_eager=True,
                                       help="Print the version and exit.")) -> None:
    """aoi-fix: eye-tracking samples to fixations and AOI tables (research use only)."""


def _fail(message: str, code: int) -> None:
    typer.echo(f"aoi-fix: error: {message}", err=True)
    raise typer.Exit(code)


def handle_errors(fn):
    """Turn library errors into one line on stderr and the right exit code."""

    @functools.wraps(fn)
    def wrapper(*args, **kwargs):
        try:
            return fn(*args, **kwargs)
        except AoiFixError as e:
            _fail(str(e).splitlines()[0] if str(e) else type(e).__name__, e.exit_code)
        except typer.BadParameter as e:  # raised by our own option checks: one line, exit 2
            _fail(e.format_message().splitlines()[0], 2)
        except MemoryError:
            _fail("out of memory", 1)
    return wrapper


def _check_format(fmt: str) -> str:
    if fmt not in ("csv", "parquet"):
        raise typer.BadParameter(f"found {fmt!r}, expected csv or parquet",
                                 param_hint="--format")
    return fmt


@app.command()
@handle_errors
def fixations(
    samples: Path = typer.Argument(..., metavar="SAMPLES", help="Raw sample file (CSV/TSV/.gz/Parquet)."),
    study: Path = typer.Option(..., "--study", help="Study file (TOML)."),
    out: Path = typer.Option(..., "--out", help="Fixation table to write."),
    set_: Optional[List[str]] = typer.Option(None, "--set", help=SET_HELP),
    fmt: str = typer.Option("csv", "--format", help=FORMAT_HELP),
) -> None:
    """Detect fixations in one recording and write the fixation table."""
    from .pipeline import fixations_from_file

    _check_format(fmt)
    table = fixations_from_file(samples, study, overrides=set_ or (), out=out, fmt=fmt)
    typer.echo(f"{len(table)} fixations written to {out}", err=True)


@app.command()
@handle_errors
def convert(
    samples: Path = typer.Argument(..., metavar="SAMPLES", help="Raw sample file (CSV/TSV/.gz/Parquet)."),
    study: Path = typer.Option(..., "--study", help="Study file (TOML)."),
    trials: Path = typer.Option(..., "--trials", help="Trial table: trial, stimulus, start, end."),
    aois: Path = typer.Option(..., "--aois", help="AOI table (CSV with WKT, or GeoJSON)."),
    checks: Optional[Path] = typer.Option(None, "--checks",
                                          help="Calibration-check targets: onset, offset, "
                                               "x_px, y_px."),
    out_dir: Path = typer.Option(..., "--out-dir", help="Folder for the output tables."),
    set_: Optional[List[str]] = typer.Option(None, "--set", help=SET_HELP),
    fmt: str = typer.Option("csv", "--format", help=FORMAT_HELP),
    plots: bool = typer.Option(False, "--plots", help="Also write QC figures (needs the "
                                                       "plots extra: matplotlib)."),
    participants: Optional[Path] = typer.Option(
        None, "--participants", help="Participants table (participant, session, age_days | "
                                     "birth_date, session_date; or BIDS participants.tsv): "
                                     "adds ages, session_summary and exclusions."),
    session: Optional[str] = typer.Option(
        None, "--session", help="This session's id in --participants (default: the "
                                "--out-dir name session=<id>)."),
) -> None:
    """Convert one session: fixations, AOI hits on moving regions, per-trial tables."""
    from .pipeline import convert as run

    _check_format(fmt)
    tables = run(samples, study=study, trials=trials, aois=aois, checks=checks,
                 out_dir=out_dir, fmt=fmt, overrides=set_ or (), plots=plots,
                 participants=participants, session=session)
    n = tables["manifest"]["samples"]
    typer.echo(f"{len(tables['fixations'])} fixations, {len(tables['trial_quality'])} trials, "
               f"{n['total']} samples accounted for; tables in {out_dir}", err=True)


@app.command()
@handle_errors
def demo(
    directory: Path = typer.Argument(Path("demo_out"), metavar="DIRECTORY", help="Folder for the demo inputs and "
                                                           "outputs."),
    fmt: str = typer.Option("csv", "--format", help=FORMAT_HELP),
) -> None:
    """Run the whole job on an invented storyteller video and a simulated toddler."""
    import pandas as pd

    from .demo import demo_table, run_demo

    _check_format(fmt)
    tables = run_demo(directory, fmt=fmt)
    with pd.option_context("display.width", 120, "display.max_columns", 20):
        typer.echo("Percent of fixation time per AOI (invented storyteller video, "
                   "simulated toddler, noisy 60 Hz tracker):")
        typer.echo(demo_table(tables).to_string())
    typer.echo(f"\nInputs: {Path(directory) / 'inputs'}\nTables: {Path(directory) / 'out'}")
    typer.echo("Research tool, not a diagnostic device: any clinical decision belongs to "
               "qualified clinicians under local rules.")


@app.command()
@handle_errors
def sweep(
    samples: Path = typer.Argument(..., metavar="SAMPLES", help="Raw sample file (CSV/TSV/.gz/Parquet)."),
    study: Path = typer.Option(..., "--study", help="Study file (TOML)."),
    trials: Path = typer.Option(..., "--trials", help="Trial table: trial, stimulus, start, end."),
    aois: Path = typer.Option(..., "--aois", help="AOI table (CSV with WKT, or GeoJSON)."),
    checks: Optional[Path] = typer.Option(None, "--checks",
                                          help="Calibration-check targets: onset, offset, "
                                               "x_px, y_px."),
    grid: List[str] = typer.Option(..., "--grid",
                                   help="Study key and the values to try, e.g. "
                                        "detection.min_fixation_ms=60,100 (repeatable; "
                                        "every combination is run)."),
    out_dir: Path = typer.Option(..., "--out-dir", help="Folder for the sweep tables."),
    jobs: int = typer.Option(1, "-j", "--jobs", help="Worker processes (results do not "
                                                     "depend on it)."),
    set_: Optional[List[str]] = typer.Option(None, "--set", help=SET_HELP),
    fmt: str = typer.Option("csv", "--format", help=FORMAT_HELP),
    plots: bool = typer.Option(False, "--plots", help="Also draw one PNG per AOI (needs "
                                                      "the plots extra)."),
) -> None:
    """Compare detection settings: AOI percentages under every combination of --grid."""
    from .sweep import parse_grid
    from .sweep import sweep as run

    _check_format(fmt)
    tables = run(samples, study=study, trials=trials, aois=aois, checks=checks,
                 grid=parse_grid(grid), out_dir=out_dir, fmt=fmt, jobs=jobs,
                 overrides=set_ or (), plots=plots)
    stab = tables["sweep_stability"]
    typer.echo(f"{len(tables['sweep_settings'])} settings; {int(stab['flag_unstable'].sum())} "
               f"of {len(stab)} trial x AOI rows unstable; tables in {out_dir}", err=True)


aois_app = typer.Typer(no_args_is_help=True, help="Work with AOI files on their own.")
app.add_typer(aois_app, name="aois")


def _parse_frames(text: Optional[str]) -> Optional[List[int]]:
    if not text:
        return None
    try:
        frames = [int(v) for v in text.split(",") if v.strip()]
    except ValueError:
        frames = [-1]
    if not frames or min(frames) < 0:
        raise typer.BadParameter(f"found {text!r}, expected frame numbers >= 0 separated by "
                                 "commas, e.g. 0,10,20", param_hint="--frames")
    return frames


@aois_app.command("check")
@handle_errors
def aois_check(
    aois: Path = typer.Argument(..., metavar="AOIS", help="AOI table (CSV with WKT, or GeoJSON; keyframes "
                                          "allowed)."),
    study: Path = typer.Option(..., "--study", help="Study file (TOML)."),
    plots: bool = typer.Option(False, "--plots", help="Also draw one contact sheet PNG per "
                                                      "stimulus (needs --out and matplotlib)."),
    frames: Optional[str] = typer.Option(None, "--frames", help="Frames on the contact "
                                                                "sheets, e.g. 0,10,20 "
                                                                "(default: six spread out)."),
    out: Optional[Path] = typer.Option(None, "--out", help="Folder for aoi_check.csv and the "
                                                           "contact sheets."),
) -> None:
    """Check an AOI file without samples: invalid polygons, overlaps, off-video, gaps."""
    import pandas as pd

    from .aoicheck import ERROR_CHECKS, run_check

    findings = run_check(aois, study=study, out_dir=out, plots=plots,
                         frames=_parse_frames(frames))
    n_err = int(findings["check"].isin(ERROR_CHECKS).sum())
    if len(findings):
        with pd.option_context("display.width", 160, "display.max_columns", 20,
                               "display.max_colwidth", 40):
            typer.echo(findings.drop(columns=["message"]).to_string())
        typer.echo("")
        for i, msg in enumerate(findings["message"]):
            typer.echo(f"{i}: {findings['severity'].iat[i]}: {msg}")
    typer.echo(f"{n_err} error(s), {len(findings) - n_err} warning(s) in {aois}"
               + (f"; results in {out}" if out is not None else ""), err=True)
    if n_err:
        raise typer.Exit(1)


@app.command()
@handle_errors
def batch(
    sessions: Path = typer.Argument(..., metavar="SESSIONS", help="Session table (CSV): session, samples, trials "
                                              "and optionally checks, study."),
    study: Path = typer.Option(..., "--study", help="Study file (TOML) for sessions without "
                                                    "their own."),
    aois: Path = typer.Option(..., "--aois", help="AOI table (CSV with WKT, or GeoJSON) for "
                                                  "every session."),
    out_dir: Path = typer.Option(..., "--out-dir", help="Folder for session=<id>/, dataset/ "
                                                        "and batch_report.csv."),
    jobs: int = typer.Option(1, "-j", "--jobs", help="Worker processes (results do not "
                                                     "depend on it)."),
    fmt: str = typer.Option("csv", "--format", help=FORMAT_HELP),
    force: bool = typer.Option(False, "--force", help="Convert every session again, even "
                                                      "those already up to date."),
    set_: Optional[List[str]] = typer.Option(None, "--set", help=SET_HELP),
    scheduler: Optional[str] = typer.Option(None, "--scheduler",
                                            help="Run the sessions on a Dask distributed "
                                                 "scheduler at this address (needs the "
                                                 "cluster extra)."),
    participants: Optional[Path] = typer.Option(
        None, "--participants", help="Participants table (participant, session, age_days | "
                                     "birth_date, session_date; or BIDS participants.tsv): "
                                     "adds ages and the cohort session_summary and "
                                     "exclusions tables."),
    plots: bool = typer.Option(False, "--plots", help="With --participants: also draw "
                                                      "qc_exclusions.png (needs the plots "
                                                      "extra)."),
) -> None:
    """Convert a cohort: every session of a table, incremental, parallel, one report."""
    from .batch import batch as run

    _check_format(fmt)
    try:
        from rich.console import Console
        from rich.progress import Progress
        console = Console(stderr=True)
    except ImportError:  # pragma: no cover - rich comes with typer
        console = None
    bar: dict = {}

    def progress(done: int, total: int, row) -> None:
        if console is not None and console.is_terminal:
            if "p" not in bar:
                bar["p"] = Progress(console=console)
                bar["p"].start()
                bar["task"] = bar["p"].add_task("sessions", total=total)
            if row is not None:
                bar["p"].update(bar["task"], completed=done,
                                description=f"{row['session']}: {row['status']}")
                if row["status"] == "failed":
                    bar["p"].console.print(f"{row['session']}: failed: {row['message']}",
                                           markup=False, highlight=False)
        elif row is not None:
            tail = f": {row['message']}" if row["status"] == "failed" else ""
            typer.echo(f"[{done}/{total}] {row['session']}: {row['status']} "
                       f"({row['seconds']:.1f} s){tail}", err=True)

    try:
        report = run(sessions, study=study, aois=aois, out_dir=out_dir, jobs=jobs, fmt=fmt,
                     force=force, overrides=set_ or (), scheduler=scheduler,
                     progress=progress, participants=participants, plots=plots)
    finally:
        if "p" in bar:
            bar["p"].stop()
    n = report["status"].value_counts()
    typer.echo(f"{n.get('converted', 0)} converted, {n.get('skipped', 0)} skipped, "
               f"{n.get('failed', 0)} failed; report in {out_dir / 'batch_report.csv'}",
               err=True)
    if n.get("failed", 0):
        raise typer.Exit(1)


def main() -> None:  # console-script entry point
    """Run the app; a usage error (unknown option, missing argument) is one line, exit 2."""
    from typer._click import exceptions as click_exc  # the click typer ships with

    from ._memory import keep_freed_memory

    keep_freed_memory()  # a short-lived process: reuse freed columns (aoi_fix/_memory.py)
    try:
        rv = app(standalone_mode=False)
    except click_exc.NoArgsIsHelpError as e:  # bare `aoi-fix`: help was shown
        e.show()
        sys.exit(2)
    except click_exc.UsageError as e:
        path = e.ctx.command_path if e.ctx is not None else "aoi-fix"
        typer.echo(f"aoi-fix: usage error: {e.format_message()} (try '{path} --help')",
                   err=True)
        sys.exit(2)
    except typer.Exit as e:
        sys.exit(e.exit_code)
    except typer.Abort:
        typer.echo("aoi-fix: aborted", err=True)
        sys.exit(1)
    sys.exit(rv if isinstance(rv, int) else 0)


def run() -> None:  # console-script entry point
    """Run :func:`main`, then leave the process without interpreter teardown.

    Arrow's native thread pools can abort a process that is being torn down
    ("terminate called without an active exception", SIGABRT; apache/arrow
    issue 34314), intermittently and after all work is done: we saw it once in
    the bad-input corpus.  A Makefile would take that for a failed conversion.
    So once ``main`` has finished (outputs published or nothing written), the
    streams are flushed and the process exits with ``os._exit`` and the same
    code.  ``main`` itself still raises ``SystemExit`` (tests call it).
    """
    import logging
    import os

    try:
        main()
        code = 0
    except SystemExit as e:
        code = e.code
    if code is None:
        code = 0
    elif not isinstance(code, int):
        print(code, file=sys.stderr)
        code = 1
    logging.shutdown()
    for stream in (sys.stdout, sys.stderr):
        try:
            stream.flush()
        except (OSError, ValueError):  # a closed pipe: nothing more to say
            pass
    os._exit(code)


if __name__ == "__main__":  # pragma: no cover
    run()
