"""Crash safety and determinism of whole runs, on a small survey that yields targets.

The survey is the tiny invented survey of the bad-input catalogue with three
buried point dipoles added (``tests/_reliability_survey.py``: 1,640
readings, three survey lines, a tie line; the run finds the three items and
one more smooth anomaly). Every run stops after the ranking stage
(``--until ranking``): the target table and the grids are what is compared,
and the stages after it only read them.

What a run leaves that is compared between two runs (:func:`products`): the
bytes of the target table and of the tables it is made from (picks, Euler
solutions, dipole fits, sizing, crossovers, line corrections), the
features of the GeoJSON target layer, the bytes of the gridding and
enhancement GeoTIFFs, and the values, coordinates and attributes of the grids and of
the levelled readings (zarr stores are compared by content: their file
bytes hold compressor metadata, not results).

* Two runs of one configuration are identical; so are runs on 1 and on 2
  worker threads, and on threads and on a local dask distributed cluster.
* A run killed with SIGKILL at random moments of several stages (three
  kills, moments drawn with a fixed seed), then run again, gives the same
  products as an uninterrupted run, leaves no temporary folder, and its
  manifest and reading ledger add up.
* A disk that fills up, or a run folder that cannot be written, gives exit
  code 2 and one line naming the run folder and what to do; the manifest
  and every existing stage output are left as they were, and the next run
  finds every earlier stage fresh.
"""

from __future__ import annotations

import builtins
import errno
import io
import json
import os
import random
import re
import shutil
import signal
import subprocess
import sys
import time
from pathlib import Path

import pytest
import xarray as xr

sys.path.insert(0, str(Path(__file__).parent))

from _bad_input_cases import to_toml  # noqa: E402
from _ledger import check_ledger, raw_data_rows  # noqa: E402
from _reliability_survey import DIPOLES, ORIGIN, make_target_survey  # noqa: E402

from lodeline.cli import main  # noqa: E402
from lodeline.runner import discover_stages  # noqa: E402
from lodeline.store import RunStore  # noqa: E402

UNTIL = "ranking"
STAGES = discover_stages()
#: Tables compared byte for byte (stage, file).
TABLES = [
    ("ranking", "targets.csv"), ("ranking", "unconfirmed.csv"), ("ranking", "merged_picks.csv"),
    ("picking", "picks.csv"), ("picking", "feature_picks.csv"), ("euler", "euler.csv"),
    ("dipole_fit", "dipoles.csv"), ("sizing", "dipoles.csv"),
    ("levelling", "crossovers.csv"), ("levelling", "line_corrections.csv"),
]
#: Stages a kill is aimed at: those that read or write readings or grids (0.2 to 1.5 s each here, long
#: enough for a moment inside them to be hit; the few short stages in between are hit by chance).
KILL_STAGES = ("ingest", "spikes", "positions", "diurnal", "main_field", "heading", "levelling", "gridding",
               "enhancement", "picking", "ranking")
#: Zarr stores compared by content (stage, store).
STORES = [("gridding", "grid.zarr"), ("enhancement", "grid.zarr"), ("levelling", "readings.zarr")]


@pytest.fixture(scope="module")
def survey(tmp_path_factory):
    s = make_target_survey(tmp_path_factory.mktemp("reliability"))
    s.write()
    return s


def survey_file(survey, name: str, folder: Path, **run) -> Path:
    """A survey file beside the data (same inputs) whose run folder is ``folder``."""
    config = json.loads(json.dumps(survey.config))
    config["run"].update({"folder": str(folder), "scheduler": "threads", "workers": 2, **run})
    path = survey.folder / f"{name}.toml"
    path.write_text(to_toml(config))
    return path


def run_in_process(toml: Path, *args: str) -> int:
    return main(["run", str(toml), "--quiet", "--until", UNTIL, *args])


@pytest.fixture(scope="module")
def reference(survey):
    """An uninterrupted run on two worker threads."""
    folder = survey.folder / "run_reference"
    assert run_in_process(survey_file(survey, "reference", folder)) == 0
    return folder


def products(run: Path) -> dict:
    """What is compared between runs (see the module docstring)."""
    out = {f"{stage}/{name}": (run / stage / name).read_bytes() for stage, name in TABLES}
    out["ranking/targets.geojson features"] = json.loads((run / "ranking" / "targets.geojson").read_text())["features"]
    for stage in ("gridding", "enhancement"):
        for tif in sorted((run / stage).glob("*.tif")):
            out[f"{stage}/{tif.name}"] = tif.read_bytes()
    assert "gridding/grid_residual.tif" in out
    for stage, name in STORES:
        out[f"{stage}/{name}"] = RunStore.open_dataset(run / stage / name).load()
    return out


def assert_same_products(ours: dict, theirs: dict) -> None:
    assert ours.keys() == theirs.keys()
    for key, value in theirs.items():
        if isinstance(value, xr.Dataset):
            xr.testing.assert_identical(ours[key], value)
        else:
            assert ours[key] == value, f"{key} differs"


def assert_store_sound(run: Path) -> None:
    """No temporary leftovers; every manifest entry points at a sealed output its link names."""
    assert not list((run / "store").glob(".tmp-*")), sorted(p.name for p in (run / "store").iterdir())
    assert not list(run.glob(".*.link")) and not list(run.glob(".*.tmp"))
    manifest = json.loads((run / "manifest.json").read_text())
    for name, entry in manifest["stages"].items():
        target = run / "store" / f"{name}-{entry['key'][:16]}"
        assert (target / "stage.json").is_file(), name
        assert (run / name).resolve() == target.resolve(), name


# --------------------------------------------------------------------------
# The reference run itself
# --------------------------------------------------------------------------
def test_reference_run_finds_the_items_inside_the_mask(survey, reference):
    """The small survey is worth comparing: its table holds the three buried
    items, every target on a filled grid cell, and its ledger adds up."""
    import numpy as np
    import pandas as pd
    from scipy.spatial import cKDTree

    targets = pd.read_csv(reference / "ranking" / "targets.csv")
    xy = targets[["easting_m", "northing_m"]].to_numpy()
    for e0, n0, _depth, _moment in DIPOLES:
        # 1 m: two cells of 0.5 m, a quarter of the 4 m line spacing (the item found, not a neighbour)
        assert np.hypot(xy[:, 0] - (ORIGIN[0] + e0), xy[:, 1] - (ORIGIN[1] + n0)).min() < 1.0, (e0, n0)
    grid = xr.open_zarr(reference / "gridding" / "grid.zarr")
    cell = float(grid.attrs["cell_size_m"])
    e, n = np.meshgrid(grid["easting"].values, grid["northing"].values)
    filled = np.isfinite(grid["residual"].values)
    dist, _ = cKDTree(np.column_stack([e[filled], n[filled]])).query(xy)
    assert (dist <= cell * np.sqrt(0.5) + 1e-9).all(), dist  # on a filled cell: within half its diagonal
    manifest = json.loads((reference / "manifest.json").read_text())
    assert check_ledger(manifest, STAGES, raw_data_rows(sorted(survey.data.glob("readings_*.csv"))))[0] == "ingest"


# --------------------------------------------------------------------------
# Determinism
# --------------------------------------------------------------------------
def test_two_runs_of_one_configuration_are_identical(survey, reference):
    folder = survey.folder / "run_again"
    assert run_in_process(survey_file(survey, "again", folder)) == 0
    assert_same_products(products(folder), products(reference))


def test_one_and_two_worker_threads_are_identical(survey, reference):
    folder = survey.folder / "run_one_thread"
    assert run_in_process(survey_file(survey, "one_thread", folder, workers=1)) == 0
    assert_same_products(products(folder), products(reference))


def test_distributed_cluster_and_threads_are_identical(survey, reference):
    distributed = pytest.importorskip("distributed")
    folder = survey.folder / "run_cluster"
    toml = survey_file(survey, "cluster", folder)
    with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True, dashboard_address=None) as cluster:
        assert run_in_process(toml, "--scheduler", cluster.scheduler_address) == 0
    assert_same_products(products(folder), products(reference))


# --------------------------------------------------------------------------
# Crash safety: SIGKILL at random moments, then run again
# --------------------------------------------------------------------------
def _stage_in_progress(log_text: str) -> str | None:
    """The stage a run log (of one run) shows running and not done, if any."""
    running = re.findall(r"\[(\w+)\] running", log_text)
    done = set(re.findall(r"\[(\w+)\] done in", log_text))
    open_ = [s for s in running if s not in done]
    return open_[-1] if open_ else None


def test_killed_runs_repair_themselves(survey, reference):
    """Three SIGKILLs, each at a random moment of a stage drawn with a fixed
    seed (later stages each time, so each run gets further), then a run to
    the end: the products equal the uninterrupted run's."""
    folder = survey.folder / "run_killed"
    toml = survey_file(survey, "killed", folder)
    walls = {name: e["wall_s"] for name, e in json.loads((reference / "manifest.json").read_text())["stages"].items()}
    order = [s.name for s in STAGES if s.name in walls]
    candidates = [name for name in order if name in KILL_STAGES]
    rng = random.Random(20261203)
    chosen = sorted(rng.sample(candidates, 3), key=order.index)
    env = {**os.environ, "PYTHONUNBUFFERED": "1"}
    log = folder / "run.log"
    landed, finished_early = [], 0
    for stage in chosen:
        offset = log.stat().st_size if log.exists() else 0
        args = [sys.executable, "-m", "lodeline", "run", str(toml), "--quiet", "--until", UNTIL]
        if finished_early:
            args += ["--redo", stage]  # the last run got to the end: make this stage run again
        proc = subprocess.Popen(args, env=env, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
        marker = f"[{stage}] running"
        deadline = time.time() + 120
        while time.time() < deadline and proc.poll() is None:
            if log.exists() and marker in log.read_text()[offset:]:
                break
            time.sleep(0.01)
        time.sleep(rng.uniform(0.0, walls[stage]))
        if proc.poll() is None:
            proc.send_signal(signal.SIGKILL)
            proc.wait(timeout=60)
            landed.append(_stage_in_progress(log.read_text()[offset:]) or "between stages")
        else:
            finished_early += 1
            landed.append("after the end")
    print("kills landed in:", dict(zip(chosen, landed)))
    assert sum(x not in ("after the end",) for x in landed) >= 2, f"kills {landed}: the kill moments need adjusting"
    assert run_in_process(toml) == 0
    assert_store_sound(folder)
    assert_same_products(products(folder), products(reference))
    manifest = json.loads((folder / "manifest.json").read_text())
    check_ledger(manifest, STAGES, raw_data_rows(sorted(survey.data.glob("readings_*.csv"))))


# --------------------------------------------------------------------------
# Disk full, unwritable run folder
# --------------------------------------------------------------------------
def _copy_of(reference: Path, survey, name: str, tmp_path: Path) -> tuple[Path, Path]:
    """A copy of the reference run folder (all stages fresh) and a survey file using it."""
    folder = tmp_path / name
    shutil.copytree(reference, folder, symlinks=True)
    return folder, survey_file(survey, name, folder)


def _snapshot(folder: Path) -> dict:
    store = folder / "store"
    return {
        "manifest": (folder / "manifest.json").read_bytes(),
        "store": sorted(p.name for p in store.iterdir()),
        "links": {p.name: os.readlink(p) for p in folder.iterdir() if p.is_symlink()},
        "files": {str(p.relative_to(store)): p.stat().st_size for p in store.rglob("*") if p.is_file()},
    }


def _one_line(capsys) -> str:
    captured = capsys.readouterr()
    lines = captured.err.strip().splitlines()
    assert len(lines) == 1 and not captured.out, captured
    assert "Traceback" not in captured.err
    return lines[0]


def _all_fresh(toml: Path, folder: Path, capsys) -> None:
    """Every stage the run folder has (the stages up to UNTIL) is fresh."""
    assert main(["status", str(toml)]) == 0
    states = {l.split()[0]: l.split()[1] for l in capsys.readouterr().out.splitlines()[1:]}
    ran = json.loads((folder / "manifest.json").read_text())["stages"]
    assert UNTIL in ran and all(states[n] == "fresh" for n in ran), states


@pytest.mark.parametrize("code", [errno.ENOSPC, errno.EACCES])
def test_disk_full_or_refused_mid_stage_is_one_line_and_changes_nothing(survey, reference, tmp_path, monkeypatch, capsys, code):
    """The grid store fails half written (no space left / permission
    refused): exit 2, one line naming the run folder; the manifest, links and
    stage outputs as before; nothing half-written left; all stages fresh."""
    folder, toml = _copy_of(reference, survey, "full", tmp_path)
    before = _snapshot(folder)
    real = RunStore.write_dataset

    def failing(ds, path):
        path.mkdir(parents=True)
        (path / ".zgroup").write_text("{}")  # a first file, then the disk is full
        if code == errno.ENOSPC:
            raise OSError(code, os.strerror(code))  # as a full disk reports it (no file name)
        raise PermissionError(code, os.strerror(code), str(path / "residual"))

    monkeypatch.setattr(RunStore, "write_dataset", staticmethod(lambda ds, path: failing(ds, path) if path.name == "grid.zarr" else real(ds, path)))
    assert run_in_process(toml, "--set", "gridding.blank_distance_m=2.1") == 2
    line = _one_line(capsys)
    assert line.startswith(f"lodeline: error: {folder}: cannot write to the run folder"), line
    assert ("free space" if code == errno.ENOSPC else "permissions") in line and "choose another [run] folder" in line
    assert _snapshot(folder) == before
    monkeypatch.undo()
    _all_fresh(toml, folder, capsys)


def test_manifest_write_failing_is_one_line_and_repaired_next_run(survey, reference, tmp_path, monkeypatch, capsys):
    """The stage output is sealed but the manifest cannot be replaced: exit 2,
    one line naming the manifest; the old manifest is intact; the next run
    finds the output and records it without running the stage again."""
    folder, toml = _copy_of(reference, survey, "manifest", tmp_path)
    before = (folder / "manifest.json").read_bytes()
    real = os.replace

    def replace(src, dst, *a, **k):
        if Path(dst).name == "manifest.json":
            raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))
        return real(src, dst, *a, **k)

    monkeypatch.setattr(os, "replace", replace)
    assert main(["run", str(toml), "--quiet", "--until", "gridding", "--set", "gridding.blank_distance_m=2.1"]) == 2
    line = _one_line(capsys)
    assert str(folder / "manifest.json") in line and "free space" in line, line
    assert (folder / "manifest.json").read_bytes() == before
    monkeypatch.undo()
    assert main(["run", str(toml), "--until", "gridding", "--set", "gridding.blank_distance_m=2.1"]) == 0
    assert "stages run: none" in capsys.readouterr().out
    manifest = json.loads((folder / "manifest.json").read_text())
    assert manifest["stages"]["gridding"]["components"]["params"]["blank_distance_m"] == 2.1
    assert_store_sound(folder)


def test_unwritable_run_folder_is_one_line(survey, reference, tmp_path, monkeypatch, capsys):
    """A run folder under a regular file, and a read-only run folder after a
    good run: exit 2, one line naming the folder; nothing changed."""
    blocker = tmp_path / "a_file"
    blocker.write_text("not a folder")
    toml = survey_file(survey, "under_file", blocker / "run")
    assert run_in_process(toml) == 2
    line = _one_line(capsys)
    assert f"{blocker / 'run'}: run folder is not writable" in line and "choose another [run] folder" in line, line

    folder, toml = _copy_of(reference, survey, "read_only", tmp_path)
    before = _snapshot(folder)
    modes = {p: p.stat().st_mode for p in (folder, folder / "store")}
    try:
        for p in modes:
            p.chmod(0o500)
        probe = folder / ".probe"
        try:
            probe.write_text("x")
            probe.unlink()
            writable = True  # as root, permission bits do not stop writes: refuse them here instead
        except PermissionError:
            writable = False
        if writable:
            inside = str(folder.resolve())

            def refuse(path) -> bool:
                return str(Path(os.fsdecode(path)).resolve()).startswith(inside)

            real_open, real_mkdir = builtins.open, os.mkdir

            def guarded_open(file, mode="r", *a, **k):
                if isinstance(file, (str, bytes, os.PathLike)) and set(mode) & set("wax+") and refuse(file):
                    raise PermissionError(errno.EACCES, os.strerror(errno.EACCES), os.fsdecode(file))
                return real_open(file, mode, *a, **k)

            def guarded_mkdir(path, *a, **k):
                if refuse(path):
                    raise PermissionError(errno.EACCES, os.strerror(errno.EACCES), os.fsdecode(path))
                return real_mkdir(path, *a, **k)

            monkeypatch.setattr(builtins, "open", guarded_open)
            monkeypatch.setattr(io, "open", guarded_open)
            monkeypatch.setattr(os, "mkdir", guarded_mkdir)
        assert run_in_process(toml, "--set", "gridding.blank_distance_m=2.1") == 2
        monkeypatch.undo()
        line = _one_line(capsys)
        assert f"{folder}: run folder is not writable (Permission denied)" in line and "fix its permissions" in line, line
    finally:
        monkeypatch.undo()
        for p, mode in modes.items():
            p.chmod(mode)
    assert _snapshot(folder) == before
