"""Markdown tables of benchmark result files (for docs/performance.md).

    python tests/benchmarks/bench_tables.py tests/benchmarks/results/1e6.json [more.json ...]
"""

from __future__ import annotations

import json
import sys
from pathlib import Path

READING_STAGES = ("ingest", "spikes", "positions", "diurnal", "main_field", "heading", "levelling")
#: Stages whose throughput is counted in picks per second (the picking stage's candidates).
TARGET_STAGES = ("euler", "dipole_fit", "sizing", "ranking", "reacquisition", "report")


def _f(x, digits=1):
    if x is None:
        return "-"
    if isinstance(x, float):
        return f"{x:,.{digits}f}"
    return f"{x:,}"


def machine_table(r: dict) -> str:
    m = r["machine"]
    libs = ", ".join(f"{k} {v}" for k, v in m["libraries"].items() if v)
    return "\n".join([
        "| | |", "| --- | --- |",
        f"| cores (nproc) | {m['nproc']} |", f"| memory | {m['memory_GB']} GB |", f"| CPU | {m['cpu_model']} |",
        f"| Python | {m['python']} |", f"| libraries | {libs} |",
        f"| load average at start | {', '.join(map(str, m['load_average_at_start']))} |",
        f"| note | {r.get('note', '')} |",
    ])


def stage_table(r: dict) -> str:
    readings = r.get("readings", 0)
    rows = ["| stage | wall s | CPU s | throughput | peak RSS MB | process wall s |", "| --- | ---: | ---: | ---: | ---: | ---: |"]
    for name, s in r["stages"].items():
        if name.startswith("_") or s.get("wall_s") is None:
            continue
        picks = (r["stages"].get("picking", {}).get("summary") or {}).get("candidates")
        if name in READING_STAGES:
            thr = f"{readings / s['wall_s'] / 1e6:.2f} M readings/s" if s["wall_s"] else "-"
        elif name in TARGET_STAGES:
            thr = f"{picks / s['wall_s']:,.0f} picks/s" if picks and s["wall_s"] else "-"
        else:
            cells = (r["stages"].get("gridding", {}).get("summary") or {}).get("cells")
            thr = f"{cells / s['wall_s'] / 1e6:.1f} M cells/s" if cells and s["wall_s"] else "-"
        rows.append(f"| {name} | {_f(s['wall_s'])} | {_f(s['cpu_s'])} | {thr} | {_f(s['peak_rss_MB'], 0)} | {_f(s['process_wall_s'])} |")
    e = r["end_to_end"]
    start = r["stages"].get("_startup", {})
    rows.append(f"| **all stages** | **{_f(e['wall_s'])}** | | {readings / e['wall_s'] / 1e3:.1f} k readings/s | **{_f(e['peak_rss_MB'], 0)}** | {_f(e['process_wall_s'])} |")
    if start:
        rows.append(f"| (start-up of one `lodeline run`, all fresh) | | | | {_f(start.get('peak_rss_MB'), 0)} | {_f(start.get('process_wall_s'))} |")
    return "\n".join(rows)


def profile_tables(r: dict, top: int = 5) -> str:
    out = []
    for name, p in (r.get("profiles") or {}).items():
        if "top" not in p:
            out.append(f"**{name}**: {p.get('error')}\n")
            continue
        out.append(f"**{name}**: {p.get('stage_run_s') or 0:.1f} s in the stage's run() under the profiler "
                   f"(whole process {p['profile_total_s']:.1f} s)\n")
        out.append("| function | own s | share of run() | calls |\n| --- | ---: | ---: | ---: |")
        for row in p["top"][:top]:
            out.append(f"| `{row['function']}` | {row['tottime_s']:.2f} | {100 * (row['share_of_run'] or 0):.0f} % | {row['calls']} |")
        out.append("")
    return "\n".join(out)


def byhand_table(r: dict) -> str:
    b = r.get("byhand")
    if not b:
        return ""
    e = r["end_to_end"]
    p = b["process"]
    ps, bs = b.get("pipeline_score", {}), b.get("byhand_score", {})
    rows = ["| | pipeline | by hand | ratio |", "| --- | ---: | ---: | ---: |",
            f"| wall time, s | {_f(e['process_wall_s'])} | {_f(p['process_wall_s'])} | {p['process_wall_s'] / e['process_wall_s']:.1f}x |",
            f"| peak RSS, MB | {_f(e['peak_rss_MB'], 0)} | {_f(p['peak_rss_MB'], 0)} | {p['peak_rss_MB'] / e['peak_rss_MB']:.1f}x |"]
    for key in ("pd", "n_detected", "n_eligible", "false_alarms", "false_alarms_per_ha", "median_horizontal_error_m",
                "linear_reported", "extended_reported"):
        a, c = ps.get(key), bs.get(key)
        fmt = (lambda x: f"{x:.3f}") if isinstance(a, float) else str
        rows.append(f"| {key} | {fmt(a) if a is not None else '-'} | {fmt(c) if c is not None else '-'} | |")
    steps = (b.get("steps") or {}).get("steps") or {}
    if steps:
        rows.append("")
        rows.append("| by-hand step | wall s | CPU s |\n| --- | ---: | ---: |")
        rows.extend(f"| {k} | {_f(v['wall_s'])} | {_f(v['cpu_s'])} |" for k, v in steps.items())
    return "\n".join(rows)


def main(paths):
    for path in paths:
        r = json.loads(Path(path).read_text())
        print(f"## {Path(path).name}: {r.get('readings', 0):,} readings (scale {r['scale']})\n")
        print(machine_table(r), "\n")
        if "stages" in r:
            print(stage_table(r), "\n")
        print(byhand_table(r), "\n")
        if r.get("kernels"):
            print("```json\n" + json.dumps(r["kernels"], indent=1) + "\n```\n")
        print(profile_tables(r))


if __name__ == "__main__":
    main(sys.argv[1:])
