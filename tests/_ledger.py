"""Checks of the reading ledger in a run's manifest (nothing lost).

Used by ``tests/test_cli.py`` (the demo survey) and
``tests/test_reliability.py`` (a small survey, also after killed runs).
"""

from __future__ import annotations

import gzip
from pathlib import Path


def raw_data_rows(paths) -> int:
    """Data rows of readings files (lines after the header that are not blank), gzip or plain."""
    rows = 0
    for path in paths:
        path = Path(path)
        opener = gzip.open if path.suffix == ".gz" else open
        with opener(path, "rt", encoding="utf-8") as fh:
            next(fh, None)  # the header line
            rows += sum(1 for line in fh if line.strip())
    return rows


def check_ledger(manifest: dict, stages, raw_rows: int) -> list[str]:
    """Assert that the reading counts add up at every stage boundary.

    For every stage of ``stages`` (run order, :class:`lodeline.model.Stage`)
    that wrote readings: readings in = kept (out) + rejected (by reason);
    its readings in are the readings out of the upstream stage whose
    readings it reads (the first of its ``after`` that wrote readings),
    and the first such stage's readings in are the raw files' data rows;
    no flag, and not "any flag", counts more readings than were kept; every
    flag count is at most the "any flag" count, and a flag newly set by a
    stage at most that flag's count.

    Returns
    -------
    list of str
        The stages checked, in run order.
    """
    entries = manifest["stages"]
    checked: list[str] = []
    for stage in stages:
        entry = entries.get(stage.name)
        if entry is None:
            continue
        ledger = entry.get("ledger") or {}
        if "readings.zarr" in entry.get("outputs", []):
            assert ledger, f"{stage.name} wrote readings but has no ledger"
        if not ledger:
            continue
        name = stage.name
        n_in, n_out = ledger["readings_in"], ledger["readings_out"]
        rejected = ledger.get("rejected", {})
        assert all(v > 0 for v in rejected.values()), (name, rejected)
        assert n_in == n_out + sum(rejected.values()), (name, n_in, n_out, rejected)
        flagged = ledger["flagged"]
        assert 0 <= flagged["any"] <= n_out, (name, flagged)
        for flag, count in flagged.items():
            assert 0 <= count <= flagged["any"], (name, flag, count)
        for flag, count in ledger.get("new_flags", {}).items():
            assert 0 <= count <= flagged.get(flag, 0), (name, flag, count)
        sources = [u for u in stage.after if (entries.get(u, {}).get("ledger") or {})]
        if sources:
            up = entries[sources[0]]["ledger"]
            assert n_in == up["readings_out"], f"{name} reads {n_in} readings, {sources[0]} kept {up['readings_out']}"
        else:
            assert not checked, f"{name} has no upstream readings but is not the first stage"
            assert n_in == raw_rows, f"{name} read {n_in} readings; the raw files hold {raw_rows} data rows"
        checked.append(name)
    return checked
