"""Per-reading stages work chunk by chunk: no dask task ever holds more readings
than one chunk.

The demo survey is run with chunks of 20,000 readings (about 1/14 of the
survey) and every dask task's result is watched. A stage that pulled a whole
variable into memory (``.values``, ``np.asarray``, ``.load()`` on readings)
would show as a task result of all 275,745 readings, because dask assembles
such a result in a final task. The limit is the chunk length: segments are
never split, and the demo's longest segment (17,360 readings) is shorter.
"""

from __future__ import annotations

import sys
from pathlib import Path

import numpy as np
from dask.callbacks import Callback

sys.path.insert(0, str(Path(__file__).parent))

CHUNK = 20_000


class _LargestResult(Callback):
    def __init__(self):
        super().__init__()
        self.largest = (0, "")

    def _posttask(self, key, result, dsk, state, worker_id):
        for item in result if isinstance(result, (tuple, list)) else (result,):
            if isinstance(item, np.ndarray) and item.ndim >= 1 and item.shape[0] > self.largest[0]:
                self.largest = (item.shape[0], str(key)[:100])


def test_no_stage_materialises_more_than_a_chunk(tmp_path, monkeypatch):
    import lodeline.store
    from lodeline.config import load_config
    from lodeline.runner import discover_stages, run_survey
    from test_cli import _survey

    monkeypatch.setattr(lodeline.store, "STORE_CHUNK", CHUNK)
    survey = _survey(tmp_path, extra="")
    text = survey.read_text().replace('scheduler = "threads"', f'scheduler = "threads"\nchunk_readings = {CHUNK}')
    survey.write_text(text)
    stages = discover_stages()
    config = load_config(survey, [], [s.name for s in stages])
    watch = _LargestResult()
    with watch:
        report = run_survey(config, quiet=True, stages=stages, until="levelling")
    assert report.ran[-1] == "levelling"
    n = report.manifest["stages"]["ingest"]["ledger"]["readings_out"]
    assert n > 10 * CHUNK  # the check means something only if the survey spans many chunks
    assert watch.largest[0] <= CHUNK, f"a task held {watch.largest[0]} readings: {watch.largest[1]}"
