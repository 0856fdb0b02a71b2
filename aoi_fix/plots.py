"""Optional quality-control figures (needs matplotlib, the ``plots`` extra).

The core never imports this module unless ``--plots`` is asked for.  Figures
use matplotlib's object API (no pyplot, no global state) and the Agg canvas.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd

from .errors import UsageError

__all__ = ["require_matplotlib", "quality_timeline", "trial_gaze"]


def require_matplotlib() -> None:
    """Raise a usage error (exit 2) when matplotlib is missing."""
    try:
        import matplotlib  # noqa: F401
    except ImportError:
        raise UsageError("--plots needs matplotlib; install the plots extra: "
                         "pip install 'aoi-fix[plots]'") from None


def _figure(w=9.0, h=4.0):
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    fig = Figure(figsize=(w, h), dpi=100)
    FigureCanvasAgg(fig)
    return fig


def quality_timeline(trial_quality: pd.DataFrame, check_quality: pd.DataFrame | None,
                     trials: pd.DataFrame, path: str | Path, *,
                     max_offset_deg: float, min_valid_fraction: float) -> None:
    """Offset (deg) at checks and per trial, and valid fraction per trial, over session time."""
    fig = _figure()
    ax1, ax2 = fig.subplots(2, 1, sharex=True)
    t0 = float(trials["start_ms"].min()) if len(trials) else 0.0
    mid_s = ((trials["start_ms"] + trials["end_ms"]) / 2.0 - t0).to_numpy(float) / 1000.0
    if "offset_deg" in trial_quality and trial_quality["offset_deg"].notna().any():
        ax1.plot(mid_s, trial_quality["offset_deg"].to_numpy(float), "o-", label="trial (model)")
    if check_quality is not None and len(check_quality):
        cm = ((check_quality["onset_ms"] + check_quality["offset_ms"]) / 2.0 - t0) / 1000.0
        ax1.plot(cm, check_quality["accuracy_deg"], "s", label="check accuracy")
    ax1.axhline(max_offset_deg, ls="--", lw=1, color="grey")
    ax1.set_ylabel("offset (deg)")
    ax1.legend(loc="upper left", fontsize=8)
    ax2.bar(mid_s, trial_quality["valid_fraction"].to_numpy(float),
            width=max(0.5, 0.6 * float(np.median(np.diff(mid_s))) if len(mid_s) > 1 else 1.0))
    ax2.axhline(min_valid_fraction, ls="--", lw=1, color="grey")
    ax2.set_ylim(0, 1.05)
    ax2.set_ylabel("valid fraction")
    ax2.set_xlabel("session time (s from first trial start)")
    fig.suptitle("Data quality over the session (research use only)", fontsize=10)
    fig.savefig(path, format="png")


def trial_gaze(samples: pd.DataFrame, fixations: pd.DataFrame, trials: pd.DataFrame,
               aois, stimuli, trial_row: int, path: str | Path) -> None:
    """One trial's gaze and fixations over the AOIs of its middle frame (video px)."""
    import shapely

    from .trials import assign_trials, frame_index, screen_to_video

    fig = _figure(7.0, 4.5)
    ax = fig.subplots()
    tr = trials.iloc[[trial_row]].reset_index(drop=True)
    stim = tr["stimulus"].iat[0]
    spec = stimuli[stim]
    t = samples["t_ms"].to_numpy(float)
    idx = assign_trials(t, tr)
    sel = idx == 0
    xv, yv = screen_to_video(samples["x_px"].to_numpy(float)[sel],
                             samples["y_px"].to_numpy(float)[sel], idx[sel], tr, stimuli)
    frames = frame_index(t[sel], idx[sel], tr, stimuli)
    mid = int(np.median(frames)) if len(frames) else 0
    if stim in aois.stimuli():
        for j, name in enumerate(aois.names(stim)):
            g = aois.geometry(stim, name, mid)
            if g is None:
                continue
            for k, poly in enumerate(getattr(g, "geoms", [g])):
                x, y = np.asarray(poly.exterior.coords).T
                ax.fill(x, y, alpha=0.25, color=f"C{j}", label=name if k == 0 else None)
    ax.plot(xv, yv, ".", ms=1.5, color="0.4", label="samples")
    f = fixations[fixations["trial"].astype("string") == str(tr["trial"].iat[0])]
    if len(f):
        fx, fy = screen_to_video(f["x_px"].to_numpy(float), f["y_px"].to_numpy(float),
                                 np.zeros(len(f), dtype=np.int64), tr, stimuli)
        ax.scatter(fx, fy, s=np.clip(f["duration_ms"].to_numpy(float) / 5, 5, 200),
                   facecolors="none", edgecolors="k", label="fixations")
    ax.set_xlim(0, spec.width_px)
    ax.set_ylim(spec.height_px, 0)
    ax.set_aspect("equal")
    ax.set_title(f"trial {tr['trial'].iat[0]} ({stim}), AOIs of frame {mid}", fontsize=10)
    ax.legend(loc="upper right", fontsize=7)
    del shapely
    fig.savefig(path, format="png")
