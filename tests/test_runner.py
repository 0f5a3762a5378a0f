"""Runner: stage order, caching by hash, reruns after a changed parameter, status."""

from __future__ import annotations

import json
import sys
from pathlib import Path

import numpy as np
import pytest

sys.path.insert(0, str(Path(__file__).parent))

from _toy import make_readings  # noqa: E402

from lodeline.config import ConfigError, load_config  # noqa: E402
from lodeline.model import Stage, StageResult, add_flags  # noqa: E402
from lodeline.params import Param  # noqa: E402
from lodeline.runner import discover_stages, load_stage_data, run_survey, stage_status  # noqa: E402


def _source(data, params, context):
    ds, segs = make_readings(offset=params["offset_nT"], crs_wkt=context.survey["crs_wkt"])
    return StageResult(datasets={"readings": ds, "segments": segs}, readings_in=ds.sizes["reading"])


def _flag_high(data, params, context):
    ds = data["source"]["readings"]
    high = ds["total_field"] > 50000.0 + params["level_nT"]
    return StageResult(
        datasets={"readings": add_flags(ds, high, "out_of_spec"), "segments": data["source"]["segments"]},
        summary={"flagged_high": int(high.sum())},
    )


def _drop_flagged(data, params, context):
    ds = data["flag_high"]["readings"]
    keep = (ds["flags"] == 0).values
    out = ds.isel(reading=np.flatnonzero(keep))
    from lodeline.model import segments_dataset, segment_chunks

    segs = segments_dataset(out["line_index"].values, out["sensor_index"].values)
    out = out.chunk({"reading": segment_chunks((segs.stop - segs.start).values, 10_000)})
    return StageResult(datasets={"readings": out, "segments": segs}, rejected={"flagged": int((~keep).sum())})


STAGES = [
    Stage("source", _source, (Param("offset_nT", 0.0, "Level added, nT."),), order=0),
    Stage("flag_high", _flag_high, (Param("level_nT", 0.5, "Flag above this, nT."),), after=("source",)),
    Stage("drop", _drop_flagged, (), after=("flag_high",)),
]


def _config(tmp_path: Path, overrides=()):
    path = tmp_path / "survey.toml"
    if not path.exists():
        path.write_text('[survey]\nname = "toy"\ncrs = "EPSG:32631"\n[run]\nfolder = "run"\n[flag_high]\nlevel_nT = 0.5\n')
    return load_config(path, list(overrides), [s.name for s in STAGES])


def test_second_run_skips_every_stage(tmp_path):
    first = run_survey(_config(tmp_path), stages=STAGES, quiet=True)
    assert first.ran == ["source", "flag_high", "drop"]
    second = run_survey(_config(tmp_path), stages=STAGES, quiet=True)
    assert second.ran == [] and second.skipped == ["source", "flag_high", "drop"]
    manifest = json.loads((tmp_path / "run" / "manifest.json").read_text())
    assert set(manifest["stages"]) == {"source", "flag_high", "drop"}
    assert (tmp_path / "run" / "drop" / "readings.zarr").is_dir()


def test_changed_parameter_reruns_that_stage_and_downstream_only(tmp_path):
    run_survey(_config(tmp_path), stages=STAGES, quiet=True)
    report = run_survey(_config(tmp_path, ["flag_high.level_nT=0.9"]), stages=STAGES, quiet=True)
    assert report.ran == ["flag_high", "drop"]
    assert report.skipped == ["source"]
    rows = {r["stage"]: r for r in stage_status(_config(tmp_path), STAGES)}
    # Without the override the file's value applies again, so flag_high is stale.
    assert rows["source"]["state"] == "fresh"
    assert rows["flag_high"]["state"] == "stale"
    assert "level_nT" in rows["flag_high"]["reason"]
    assert rows["drop"]["reason"] == "upstream stage flag_high changed"


def test_ledger_adds_up_and_rejects_counted(tmp_path):
    report = run_survey(_config(tmp_path), stages=STAGES, quiet=True)
    ledger = report.manifest["stages"]["drop"]["ledger"]
    flagged = report.manifest["stages"]["flag_high"]["ledger"]["flagged"]["out_of_spec"]
    # sin() exceeds 0.5 on one third of each period: a substantial, exact count.
    assert flagged == report.manifest["stages"]["flag_high"]["summary"]["flagged_high"] > 0
    assert ledger["readings_in"] == 1500
    assert ledger["rejected"] == {"flagged": flagged}
    assert ledger["readings_out"] == 1500 - flagged


def test_redo_forces_stage_and_downstream(tmp_path):
    run_survey(_config(tmp_path), stages=STAGES, quiet=True)
    report = run_survey(_config(tmp_path), stages=STAGES, quiet=True, redo=("flag_high",))
    assert report.ran == ["flag_high", "drop"]


def test_outputs_reopen_segment_aligned(tmp_path):
    run_survey(_config(tmp_path), stages=STAGES, quiet=True)
    data = load_stage_data((tmp_path / "run" / "source").resolve(), chunk_readings=1000)
    assert data["readings"].chunks["reading"] == (1000, 500)


def test_unknown_key_and_table_refused(tmp_path):
    with pytest.raises(ConfigError, match=r"unknown key flag_high\.levl_nT; did you mean 'level_nT'"):
        run_survey(_config(tmp_path, ["flag_high.levl_nT=1"]), stages=STAGES, quiet=True)
    with pytest.raises(ConfigError, match=r"unknown table \[flag_hihg\]; did you mean \[flag_high\]"):
        _config(tmp_path, ["flag_hihg.level_nT=1"])
    with pytest.raises(ConfigError, match="wrong type"):
        run_survey(_config(tmp_path, ['flag_high.level_nT="high"']), stages=STAGES, quiet=True)


def test_leftover_temporary_output_is_removed(tmp_path):
    run_survey(_config(tmp_path), stages=STAGES, quiet=True)
    junk = tmp_path / "run" / "store" / ".tmp-drop-0000-dead"
    junk.mkdir()
    (junk / "half.zarr").mkdir()
    run_survey(_config(tmp_path), stages=STAGES, quiet=True)
    assert not junk.exists()


def test_stage_modules_are_discovered():
    names = [s.name for s in discover_stages()]
    # The two stages of the foundation; later stages append to this list.
    assert names[:2] == ["ingest", "spikes"]


def test_code_hash_covers_a_stage_own_helpers_only():
    from lodeline.runner import code_files

    stages = {s.name: s for s in discover_stages()}
    ingest = {p.name for p in code_files(stages["ingest"])}
    assert {"ingest.py", "_ingest_read.py", "_ingest_store.py", "model.py", "params.py"} <= ingest
    assert not any(name.startswith("_levelling") for name in ingest)
    levelling = {p.name for p in code_files(stages["levelling"])}
    assert "_levelling_tie.py" in levelling and "_ingest_read.py" not in levelling
