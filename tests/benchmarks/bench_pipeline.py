"""Benchmark of the whole lodeline pipeline on a synthetic survey, stage by stage.

Run from the repository root with the project's environment active::

    python tests/benchmarks/bench_pipeline.py --readings 1e6 [--profile] [--byhand] [--kernels] [--cluster 2]

What it does
    1. Generates a survey of about ``--readings`` readings with the demo
       generator (``demo_survey/generate.py``; the scale is chosen from the
       generator's own reading count, about 2.51e5 readings per unit of
       scale plus 2.45e4) under ``--work`` (default ``/tmp/bench``), once:
       an existing survey of the same scale is reused.
    2. Runs the stages one at a time, each as its own ``lodeline run
       --until STAGE`` process, so that the peak resident memory of that
       process (``ru_maxrss`` of ``os.wait4``, the operating system's own
       figure) belongs to that stage alone (plus the start-up of the
       command, measured by a run in which every stage is fresh). The
       stage's own wall and CPU time come from the run's ``manifest.json``.
    3. With ``--profile``, runs each stage again on the synchronous dask
       scheduler under ``cProfile`` (threads hide work from the profiler)
       and keeps the top entries by internal time.
    4. With ``--byhand``, runs the by-hand comparison script
       (``_bench_byhand.py``) on the same survey in its own process and
       scores both target tables against the truth table
       (``tests/_scoring.py``).
    5. With ``--cluster N``, runs the whole pipeline again on a dask
       ``LocalCluster`` of N worker processes (``_bench_cluster.py``) and
       compares its tables with the threaded run's, byte for byte.
    6. With ``--kernels``, runs the kernel measurements of
       ``_bench_kernels.py`` (memory bandwidth, gridding throughput and
       accuracy, lattice against direct model, FFT filters against
       harmonica).

Results go to ``--json`` (default ``tests/benchmarks/results/<readings>.json``)
with the machine (cores, memory, CPU model) and library versions.
``bench_tables.py`` turns result files into the Markdown tables of
``docs/performance.md``.

Outputs support, and never replace, the judgement of qualified specialists;
a target list is no clearance certificate.
"""

from __future__ import annotations

import argparse
import cProfile  # noqa: F401 - used in the child command line
import io
import json
import os
import platform
import pstats
import shutil
import subprocess
import sys
import time
from pathlib import Path

HERE = Path(__file__).resolve().parent
ROOT = HERE.parents[1]
sys.path.insert(0, str(HERE))

STAGES = (
    "ingest", "spikes", "positions", "diurnal", "main_field", "heading", "levelling",
    "gridding", "enhancement", "picking", "euler", "dipole_fit", "sizing", "ranking",
)
#: Stages whose throughput is counted in readings per second; the others in grid cells per second.
READING_STAGES = STAGES[:7]
#: Readings per unit of generator scale and the fixed part (fitted to the
#: generator's counts at scales 1 and 3.88: 275,745 and 1,002,080).
PER_SCALE, FIXED = 251_229.0, 24_516.0


def scale_for(readings: float) -> float:
    """Generator scale giving about ``readings`` readings (two decimals)."""
    return round(max(0.05, (readings - FIXED) / PER_SCALE), 2)


def machine() -> dict:
    """Cores, memory, CPU model and library versions of this machine."""
    import importlib.metadata as md

    cpu = "unknown"
    try:
        for line in Path("/proc/cpuinfo").read_text().splitlines():
            if line.startswith("model name"):
                cpu = line.split(":", 1)[1].strip()
                break
    except OSError:
        pass
    mem = os.sysconf("SC_PAGE_SIZE") * os.sysconf("SC_PHYS_PAGES")
    libs = {}
    for name in ("lodeline", "numpy", "scipy", "pandas", "dask", "xarray", "zarr", "numba", "verde",
                 "harmonica", "pyproj", "ppigrf", "rasterio", "matplotlib"):
        try:
            libs[name] = md.version(name)
        except md.PackageNotFoundError:
            libs[name] = None
    load = os.getloadavg()
    return {
        "nproc": os.cpu_count(),
        "memory_GB": round(mem / 1e9, 1),
        "cpu_model": cpu,
        "python": platform.python_version(),
        "platform": platform.platform(),
        "libraries": libs,
        "load_average_at_start": [round(x, 2) for x in load],
    }


def make_survey(work: Path, scale: float) -> Path:
    """Generate (once) the survey of ``scale`` and write its survey TOML; returns the TOML path."""
    folder = work / f"scale_{scale:g}"
    data = folder / "data"
    if not (data / "truth.csv").exists():
        sys.path.insert(0, str(ROOT))
        from demo_survey.generate import generate, load_config

        shutil.rmtree(data, ignore_errors=True)
        t0 = time.perf_counter()
        generate(load_config(ROOT / "demo_survey" / "generator.toml"), data, scale=scale)
        print(f"generated scale {scale:g} in {time.perf_counter() - t0:.0f} s", file=sys.stderr)
    text = (ROOT / "demo_survey" / "survey.toml").read_text()
    text = text.replace('files = ["data/readings_*.csv.gz"]', f'files = ["{data}/readings_*.csv.gz"]')
    text = text.replace('files = ["data/base_station.csv"]', f'files = ["{data}/base_station.csv"]')
    text = text.replace('folder = "run"', f'folder = "{folder}/run"')
    toml = folder / "survey.toml"
    toml.write_text(text)
    return toml


def run_child(args: list[str], log: Path) -> dict:
    """Run a command; its wall time, CPU time and peak RSS (``os.wait4``)."""
    t0 = time.perf_counter()
    with open(log, "a") as fh:
        fh.write(f"$ {' '.join(args)}\n")
        fh.flush()
        proc = subprocess.Popen(args, stdout=fh, stderr=subprocess.STDOUT, cwd=ROOT)
        _, status, usage = os.wait4(proc.pid, 0)
    proc.returncode = os.waitstatus_to_exitcode(status)
    wall = time.perf_counter() - t0
    return {
        "returncode": proc.returncode,
        "process_wall_s": round(wall, 3),
        "process_cpu_s": round(usage.ru_utime + usage.ru_stime, 3),
        "peak_rss_MB": round(usage.ru_maxrss / 1024, 1),  # ru_maxrss is in KiB on Linux
    }


def lodeline(*args: str) -> list[str]:
    return [sys.executable, "-m", "lodeline", *args]


def stage_names() -> list[str]:
    from lodeline.runner import discover_stages

    return [s.name for s in discover_stages()]


def run_stages(toml: Path, sets: list[str], log: Path, fresh: bool) -> dict:
    """Every stage in its own process; manifest times and per-process peak RSS."""
    run_folder = toml.parent / "run"
    if fresh:
        shutil.rmtree(run_folder, ignore_errors=True)
    overrides = [x for s in sets for x in ("--set", s)]
    results = {}
    for name in stage_names():
        child = run_child(lodeline("run", str(toml), "--quiet", "--until", name, *overrides), log)
        manifest = json.loads((run_folder / "manifest.json").read_text())
        record = manifest["stages"].get(name, {})
        results[name] = {**child, "wall_s": record.get("wall_s"), "cpu_s": record.get("cpu_s"),
                         "summary": _small(record.get("summary", {})), "ledger_in": (record.get("ledger") or {}).get("readings_in")}
        print(f"{name:12s} wall {record.get('wall_s')} s, cpu {record.get('cpu_s')} s, "
              f"peak {child['peak_rss_MB']} MB (rc {child['returncode']})", file=sys.stderr)
        if child["returncode"] != 0:
            break
    # Start-up cost of the command itself: a run in which every stage is fresh.
    results["_startup"] = run_child(lodeline("run", str(toml), "--quiet", *overrides), log)
    return results


def _small(summary: dict) -> dict:
    return {k: v for k, v in summary.items() if isinstance(v, (int, float, str, bool)) or v is None}


#: Profile entries of importing modules (the start-up of the command), left out of the top entries.
_IMPORT_NOISE = ("marshal.loads", "builtins.compile", "importlib", "inspect.py", "_imp.", "cleandoc",
                 "builtins.exec", "builtins.__build_class__")


def summarise_profile(prof: Path, stage: str, top: int = 12) -> dict:
    """Top entries of a profile by own time, import machinery left out, and the stage's own run() time."""
    stats = pstats.Stats(str(prof))
    total = stats.total_tt
    run_s = None
    for (file, line, func), (cc, nc, tt, ct, _) in stats.stats.items():
        if func == "run" and file.endswith(f"steps/{stage}.py"):
            run_s = ct
    rows = []
    for (file, line, func), (cc, nc, tt, ct, _) in sorted(stats.stats.items(), key=lambda kv: -kv[1][2]):
        name = f"{file}:{line}({func})"
        if any(x in name for x in _IMPORT_NOISE):
            continue
        short = file.replace(str(ROOT) + "/", "").split("site-packages/")[-1]
        rows.append({"function": f"{short}:{line}({func})", "tottime_s": round(tt, 3), "cumtime_s": round(ct, 3),
                     "calls": nc, "share_of_run": round(tt / run_s, 3) if run_s else None})
        if len(rows) >= top:
            break
    return {"profile_total_s": round(total, 3), "stage_run_s": round(run_s, 3) if run_s else None, "top": rows}


def profile_stages(toml: Path, sets: list[str], log: Path, out: Path, top: int = 12) -> dict:
    """Each stage rerun alone on the synchronous scheduler under cProfile; top entries by own time."""
    overrides = [x for s in sets for x in ("--set", s)]
    out.mkdir(parents=True, exist_ok=True)
    found = {}
    for name in stage_names():
        prof = out / f"{name}.prof"
        cmd = [sys.executable, "-m", "cProfile", "-o", str(prof), "-m", "lodeline", "run", str(toml), "--quiet",
               "--redo", name, "--until", name, "--scheduler", "synchronous", *overrides]
        child = run_child(cmd, log)
        if child["returncode"] != 0 or not prof.exists():
            found[name] = {"error": f"exit {child['returncode']}"}
            continue
        found[name] = summarise_profile(prof, name, top)
        print(f"profiled {name}: {found[name]['stage_run_s']} s in run()", file=sys.stderr)
    return found


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--readings", type=float, default=1e6, help="about this many readings (default 1e6)")
    parser.add_argument("--work", type=Path, default=Path("/tmp/bench"), help="folder for surveys and runs")
    parser.add_argument("--json", type=Path, help="result file (default tests/benchmarks/results/<readings>.json)")
    parser.add_argument("--set", dest="sets", action="append", default=[], help="configuration override for every stage run")
    parser.add_argument("--profile", action="store_true", help="profile every stage (cProfile, synchronous scheduler)")
    parser.add_argument("--byhand", action="store_true", help="run the by-hand comparison on the same survey")
    parser.add_argument("--kernels", action="store_true", help="run the kernel measurements")
    parser.add_argument("--cluster", type=int, default=0, metavar="WORKERS",
                        help="also run the whole pipeline on a dask LocalCluster of this many worker processes and "
                             "compare its tables with the threaded run's")
    parser.add_argument("--reuse-byhand", action="store_true", help="take the by-hand figures of its last run on this survey")
    parser.add_argument("--keep-run", action="store_true", help="reuse an existing run folder (only stale stages run)")
    parser.add_argument("--skip-stages", action="store_true", help="do not run the pipeline (kernels or by-hand only)")
    parser.add_argument("--note", default="", help="free text stored with the results (e.g. 'shared machine')")
    args = parser.parse_args(argv)

    scale = scale_for(args.readings)
    args.work.mkdir(parents=True, exist_ok=True)
    toml = make_survey(args.work, scale)
    label = f"{args.readings:.0e}".replace("+0", "").replace("+", "")
    out_json = args.json or HERE / "results" / f"{label}.json"
    out_json.parent.mkdir(parents=True, exist_ok=True)
    result = json.loads(out_json.read_text()) if out_json.exists() else {}
    result.update({"when": time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime()), "machine": machine(),
                   "scale": scale, "survey": str(toml), "overrides": args.sets, "note": args.note})
    log = toml.parent / "bench.log"
    if not args.skip_stages:
        result["stages"] = run_stages(toml, args.sets, log, fresh=not args.keep_run)
        manifest = json.loads((toml.parent / "run" / "manifest.json").read_text())
        result["readings"] = manifest["stages"]["ingest"]["ledger"]["readings_out"]
        ran = [v for k, v in result["stages"].items() if not k.startswith("_") and v.get("wall_s") is not None]
        result["end_to_end"] = {
            "wall_s": round(sum(v["wall_s"] for v in ran), 2),
            "process_wall_s": round(sum(v["process_wall_s"] for v in ran), 2),
            "peak_rss_MB": max(v["peak_rss_MB"] for v in ran),
        }
        out_json.write_text(json.dumps(result, indent=1) + "\n")
    if args.profile:
        result["profiles"] = profile_stages(toml, args.sets, log, toml.parent / "profiles")
        out_json.write_text(json.dumps(result, indent=1) + "\n")
    if args.byhand:
        from _bench_compare import compare

        result["byhand"] = compare(toml, log, reuse=args.reuse_byhand)
        out_json.write_text(json.dumps(result, indent=1) + "\n")
    if args.cluster:
        from _bench_cluster import cluster_run

        result["cluster"] = cluster_run(toml, log, run_child, lodeline, args.cluster)
        out_json.write_text(json.dumps(result, indent=1) + "\n")
    if args.kernels:
        from _bench_kernels import all_kernels

        result["kernels"] = all_kernels(toml, result.get("stages"))
        out_json.write_text(json.dumps(result, indent=1) + "\n")
    print(f"results in {out_json}", file=sys.stderr)
    return 0


if __name__ == "__main__":
    sys.exit(main())
