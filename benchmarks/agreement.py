"""Agreement of default settings with simulated ground truth, per tracker style.

Not a test: prints a table of figures for the closing notes and README.
Run: ``.venv/bin/python benchmarks/agreement.py [--trials N] [--seeds K] [--set key=value ...]``

Per style it simulates sessions (aoi_fix.simulate), writes them in the style's
raw format, runs ``aoi_fix.convert`` on the files with default settings and
reports:

* sample-level Cohen's kappa on the fixation label (fixation vs not), against
  the measured label (dropouts are loss) and the eye's movement (dropouts
  inside a fixation are fixation);
* event-level F1 of fixations (one-to-one matches with IoU >= 0.5);
* share of (trial, AOI) cells whose pct_fixation is within 3 points of truth;
* largest |valid_fraction - truth|, largest |offset_deg - truth|;
* whether flag_low_validity and flag_drift equal the truth on every trial;
* whether the manifest accounts for every sample.
"""

from __future__ import annotations

import argparse
import sys
import tempfile
from pathlib import Path

import numpy as np
import pandas as pd

from aoi_fix import geometry, simulate
from aoi_fix.config import study_from_dict
from aoi_fix.evaluate import cohen_kappa, event_f1, fixation_mask
from aoi_fix.pipeline import convert


def evaluate_session(style: str, *, n_trials: int, seed: int, overrides=(),
                     workdir: Path) -> dict:
    ses = simulate.simulate_session(style, n_trials=n_trials, seed=seed)
    paths = simulate.write_session(ses, workdir / f"{style}_{seed}")
    out = convert(paths["samples"], study=paths["study"], trials=paths["trials"],
                  aois=paths["aois"], checks=paths.get("checks"), overrides=overrides)
    study = study_from_dict(ses.study, overrides=overrides)
    t = ses.truth_samples["t_ms"].to_numpy(float)
    truth_fix = (ses.truth_samples["label"] == "fixation").to_numpy()
    eye_fix = (ses.truth_samples["movement"] == "fixation").to_numpy()
    det = out["fixations"]
    det_mask = fixation_mask(t, det)
    # two truths: what the measurement shows (a dropout inside a fixation is
    # "loss") and what the eye did (the dropout is still part of the fixation)
    kappa = cohen_kappa(truth_fix, det_mask)
    kappa_eye = cohen_kappa(eye_fix, det_mask)
    # event F1 on whole fixations: merge parts split at trial boundaries back
    whole = det.groupby("fixation", as_index=False).agg(onset_ms=("onset_ms", "min"),
                                                        offset_ms=("offset_ms", "max"))
    f1 = event_f1(ses.truth_fixations, whole)["f1"]
    tp = simulate.true_aoi_percent(ses)
    tp["trial"] = tp["trial"].astype(str)
    mine = out["aoi_summary"][["trial", "aoi", "pct_fixation"]].astype({"trial": str})
    m = tp.merge(mine, on=["trial", "aoi"], how="left", suffixes=("_true", "_found"))
    both = m.dropna(subset=["pct_fixation_true"])
    diff = (both["pct_fixation_true"] - both["pct_fixation_found"].fillna(np.inf)).abs()
    within3 = float((diff <= 3.0).mean())
    q = out["trial_quality"]
    q = q.astype({"trial": str})
    tvf = simulate.true_valid_fraction(ses).astype({"trial": str})
    tv = tvf.merge(q[["trial", "valid_fraction",
                                                   "flag_low_validity"]], on="trial",
                                                 suffixes=("_true", "_found"))
    vf_err = float((tv["valid_fraction_true"] - tv["valid_fraction_found"]).abs().max())
    vflag_ok = bool(((tv["valid_fraction_true"] < study.quality.min_valid_fraction)
                     == tv["flag_low_validity"]).all())
    td = ses.truth_drift_deg
    true_off = np.hypot(td["dx_deg"].to_numpy(float), td["dy_deg"].to_numpy(float))
    found_off = q["offset_deg"].to_numpy(float)
    off_err = float(np.nanmax(np.abs(true_off - found_off))) if len(found_off) else np.nan
    dflag_ok = bool(((true_off > study.quality.max_offset_deg)
                     == q["flag_drift"].to_numpy(dtype=bool, na_value=False)).all())
    acc = out["manifest"]["samples"]
    accounted = (acc["total"] == acc["valid"] + acc["gap_filled"] + acc["lost"]
                 == acc["inside_trials"] + acc["outside_trials"] == len(ses.raw))
    return {"style": style, "seed": seed, "kappa": kappa, "kappa_eye": kappa_eye,
            "event_f1": f1,
            "pct_within_3": within3, "valid_fraction_max_err": vf_err,
            "low_validity_flags_ok": vflag_ok, "offset_deg_max_err": off_err,
            "drift_flags_ok": dflag_ok, "all_samples_accounted": bool(accounted),
            "n_samples": len(ses.raw)}


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--trials", type=int, default=8)
    ap.add_argument("--seeds", type=int, default=2)
    ap.add_argument("--style", action="append", default=None)
    ap.add_argument("--set", action="append", default=[], dest="overrides")
    args = ap.parse_args(argv)
    styles = args.style or list(simulate.STYLES)
    rows = []
    with tempfile.TemporaryDirectory() as tmp:
        for style in styles:
            for seed in range(args.seeds):
                rows.append(evaluate_session(style, n_trials=args.trials, seed=seed,
                                             overrides=args.overrides, workdir=Path(tmp)))
    df = pd.DataFrame(rows)
    pd.set_option("display.width", 200)
    print(df.drop(columns=["seed"]).groupby("style", sort=False).agg(
        kappa=("kappa", "min"), kappa_eye=("kappa_eye", "min"),
        event_f1=("event_f1", "min"),
        pct_within_3=("pct_within_3", "min"),
        vf_err=("valid_fraction_max_err", "max"), off_err=("offset_deg_max_err", "max"),
        vflags=("low_validity_flags_ok", "all"), dflags=("drift_flags_ok", "all"),
        accounted=("all_samples_accounted", "all")).round(3).to_string())
    print("(minimum over seeds for kappa/F1/pct; maximum for errors)")
    return 0


if __name__ == "__main__":
    sys.exit(main())
