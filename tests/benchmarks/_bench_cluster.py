"""The whole pipeline on a dask distributed cluster against the threaded scheduler, on one survey.

Used by ``bench_pipeline.py --cluster``. Starts a
``dask.distributed.LocalCluster`` of ``workers`` worker processes (one
thread each), runs ``lodeline run --scheduler <its address>`` into a run
folder of its own (``run_cluster`` beside the threaded run), and reports the
wall time of the whole command against the threaded run's, and whether the
target tables and the tables they are built from are byte for byte the
same.

Outputs support, and never replace, the judgement of qualified specialists;
a target list is no clearance certificate.
"""

from __future__ import annotations

import filecmp
import json
import sys
import time
from pathlib import Path

#: Stage outputs compared byte for byte between the two runs.
COMPARED = ("ranking/targets.csv", "ranking/unconfirmed.csv", "ranking/targets.geojson", "dipole_fit/dipoles.csv",
            "euler/euler.csv", "picking/picks.csv", "sizing/dipoles.csv", "levelling/crossovers.csv",
            "levelling/line_corrections.csv")


def _features(path: Path) -> list:
    return json.loads(path.read_text())["features"]


def cluster_run(toml: Path, log: Path, run_child, lodeline, workers: int = 2) -> dict:
    """Run the survey of ``toml`` on a LocalCluster; timings and the comparison with ``<survey>/run``."""
    from dask.distributed import Client, LocalCluster

    threaded = toml.parent / "run"
    folder = toml.parent / "run_cluster"
    text = toml.read_text().replace(f'folder = "{threaded}"', f'folder = "{folder}"')
    if str(folder) not in text:
        raise SystemExit(f"{toml}: [run] folder is not {threaded}; cannot place the cluster run beside it")
    ctoml = toml.parent / "survey_cluster.toml"
    ctoml.write_text(text)
    if folder.exists():
        import shutil

        shutil.rmtree(folder)
    t0 = time.perf_counter()
    with LocalCluster(n_workers=workers, threads_per_worker=1, processes=True, dashboard_address=None) as cluster, \
            Client(cluster) as client:
        start_s = time.perf_counter() - t0
        child = run_child(lodeline("run", str(ctoml), "--quiet", "--scheduler", cluster.scheduler_address), log)
        client.close()
    manifest = json.loads((folder / "manifest.json").read_text())
    ref = json.loads((threaded / "manifest.json").read_text())
    same, differ, missing = [], [], []
    for rel in COMPARED:
        a, b = threaded / rel, folder / rel
        if not a.exists() or not b.exists():
            missing.append(rel)
        elif filecmp.cmp(a, b, shallow=False) or (rel.endswith(".geojson") and _features(a) == _features(b)):
            # the GeoJSON header carries the config hash, which differs with the run folder: its features are compared
            same.append(rel)
        else:
            differ.append(rel)
    stages = {name: {"cluster_wall_s": rec.get("wall_s"), "threads_wall_s": ref["stages"].get(name, {}).get("wall_s")}
              for name, rec in manifest["stages"].items()}
    wall_c = sum(v["cluster_wall_s"] or 0 for v in stages.values())
    wall_t = sum(v["threads_wall_s"] or 0 for v in stages.values())
    out = {"workers": workers, "threads_per_worker": 1, "cluster_start_s": round(start_s, 2),
           "returncode": child["returncode"], "process_wall_s": child["process_wall_s"],
           "stages_wall_s": round(wall_c, 2), "threads_stages_wall_s": round(wall_t, 2),
           "overhead": round(wall_c / wall_t, 3) if wall_t else None, "identical": same, "different": differ,
           "missing": missing, "stages": stages}
    print(f"cluster: {wall_c:.1f} s of stages against {wall_t:.1f} s threaded; identical {len(same)}, "
          f"different {differ}, missing {missing}", file=sys.stderr)
    return out
