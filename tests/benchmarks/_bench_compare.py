"""Pipeline against the by-hand script on the same survey: time, memory and detection scores.

The by-hand script (``_bench_byhand.py``) runs in its own process; its peak
resident memory is ``ru_maxrss`` of ``os.wait4``. The pipeline's figures are
those of the stage-by-stage run of ``bench_pipeline.py`` (sum of the stage
processes' wall times, largest peak of any stage process).

Both target tables are scored with ``tests/_scoring.py`` against the
generator's truth table (compact items with a predicted peak of at least 10
times the 0.05 nT noise, matched one to one within 1 m).
"""

from __future__ import annotations

import json
import sys
from pathlib import Path

import numpy as np
import pandas as pd

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE.parent))

NOISE_NT = 0.05  # the generator's sensor noise (generator.toml [sensors] noise_nT)


def pipeline_targets(run: Path) -> pd.DataFrame:
    """The pipeline's target table: ``ranking/targets.csv`` when that stage exists, else
    the picks with the dipole fit's position, depth and moment where the fit is accepted."""
    ranked = run / "ranking" / "targets.csv"
    if ranked.exists():
        return pd.read_csv(ranked)
    picks = pd.read_csv(run / "picking" / "picks.csv")
    fits = pd.read_csv(run / "sizing" / "dipoles.csv")
    fits = fits[fits["ok"].astype(bool) & np.isfinite(fits["easting_m"])]
    cols = ["easting_m", "northing_m", "elevation_m", "depth_below_sensor_m", "moment_Am2"]
    out = picks.merge(fits[["pick_id", *cols]], on="pick_id", how="left", suffixes=("_pick", ""))
    for c in ("easting_m", "northing_m"):
        out[c] = out[c].fillna(out[f"{c}_pick"])
    return out


def _score(targets: pd.DataFrame, truth: pd.DataFrame, area_ha: float) -> dict:
    from _scoring import score

    s = score(targets, truth, NOISE_NT, area_ha, halo_m=1.0)
    s.pop("pairs", None)
    return {k: (v if not isinstance(v, (np.floating, np.integer)) else v.item()) for k, v in s.items()}


def compare(toml: Path, log: Path, reuse: bool = False) -> dict:
    """Run the by-hand script on the survey of ``toml`` (or, with ``reuse``, take the
    figures of its last run there) and score both target tables."""
    from bench_pipeline import run_child

    folder = toml.parent
    data = folder / "data"
    out = folder / "byhand"
    saved = out / "process.json"
    if reuse and saved.exists() and (out / "result.json").exists():
        child = json.loads(saved.read_text())
    else:
        child = run_child([sys.executable, str(HERE / "_bench_byhand.py"), str(data), str(out)], log)
        out.mkdir(parents=True, exist_ok=True)
        saved.write_text(json.dumps(child) + "\n")
    steps = json.loads((out / "result.json").read_text()) if child["returncode"] == 0 else {}
    truth = pd.read_csv(data / "truth.csv")
    manifest = json.loads((folder / "run" / "manifest.json").read_text())
    area_ha = manifest["stages"]["gridding"]["summary"]["filled_area_m2"] / 1e4
    result = {"process": child, "steps": steps, "area_ha": area_ha}
    result["pipeline_score"] = _score(pipeline_targets(folder / "run"), truth, area_ha)
    if child["returncode"] == 0:
        result["byhand_score"] = _score(pd.read_csv(out / "targets.csv"), truth, area_ha)
    return result
