"""Ingest stage: read raw total-field readings and base-station readings into
the survey data model (:mod:`lodeline.model`).

Methods
-------
Reading
    Each file is streamed block by block (CSV through
    :func:`pyarrow.csv.open_csv`, gzip recognised by its magic bytes, Parquet
    through :meth:`pyarrow.parquet.ParquetFile.iter_batches`); the mapped
    columns are parsed with vectorised pyarrow / NumPy / pandas operations.
Row ledger
    Every data row is kept or rejected with one reason (see
    ``_ingest_ledger.REASONS``); rejected rows are written with their file,
    data-row number, reason and raw values to ``rejected_rows.csv``. Empty or
    "nan" total-field values are kept as NaN (dropouts). Whole-file mistakes
    (wrong unit, projected coordinates given as longitude/latitude, swapped
    x/y, wrong delimiter, missing column, too many rejects) stop the run with
    a one-line :class:`lodeline.model.DataError` naming the file.
Time
    ISO 8601 times with a zone designator are converted to UTC; naive times
    and seconds of day are taken in the configured time zone. Seconds of day
    that fall back by more than 12 h from the previous row of the same file
    are read as crossing midnight (one day added, logged). Several readings
    files on one configured date whose times leave a gap of more than 12 h
    are refused (a midnight crossed between files cannot be told from the
    rows): a date column or ISO 8601 times are then needed.
Positions
    x/y are projected from ``position_crs`` to the survey CRS with
    :class:`pyproj.Transformer` (``always_xy=True``), one call per batch.
Storage order (out of core, two passes)
    Pass 1 spools the kept columns to raw files and counts readings per
    (line, sensor); pass 2 scatters them into output memory-mapped files in
    segment order: lines by first appearance, sensors by name within a line,
    file order within a segment (never sorted by time). Readings whose time
    equals or precedes the previous reading of the same segment are flagged
    ``time_duplicate`` / ``time_backwards``, never reordered. The outputs are
    dask arrays chunked on segment boundaries; memory is bounded by the block
    size, not by the survey size.
Base station
    Read the same way into memory (about one reading a second), kept in file
    order with its own time-order flags.

References
----------
Alken, P. et al. (2021), International Geomagnetic Reference Field: the
thirteenth generation, Earth, Planets and Space 73:49 (range of the Earth's
surface total field, about 22,000-67,000 nT).
Eaton, B. et al. (2023), NetCDF Climate and Forecast (CF) Metadata
Conventions, version 1.11 (units, standard_name, flag attributes).
"""

from __future__ import annotations

import fnmatch
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.compute as pc
import xarray as xr
from pyproj import CRS

from lodeline.model import READING_DIM, DataError, Stage, StageContext, StageResult, flag_attrs, segment_chunks

from ._ingest_config import BASE_INPUT, PARAMS, READINGS_INPUT, InputSpec, check_stage_params, input_spec
from ._ingest_ledger import REASONS, FileLedger, RejectLog, files_table
from ._ingest_parse import MIDNIGHT_FALLBACK_S, NS_PER_S, MidnightTracker
from ._ingest_read import Batch, TableReader, detect_format, file_stem
from ._ingest_rows import FileSample, Limits, Parsed, check_rejected_fraction, parse_base, parse_readings
from ._ingest_store import OUTPUT_DTYPES, Layout, Spool, lazy_column, plan_layout, scatter, time_order_flags

__all__ = ["STAGE", "PARAMS", "READINGS_INPUT", "BASE_INPUT", "run"]

BASE_DIM = "base_reading"
_MAX_FILES = np.iinfo(np.int16).max
_MAX_SENSORS = np.iinfo(np.int16).max
#: A file of at least this many kept readings averaging fewer than
#: _MIN_READINGS_PER_LINE readings per new line name has a mis-mapped line column.
_LINE_CHECK_ROWS = 1000
_MIN_READINGS_PER_LINE = 10
_TIME_ENCODING = {"units": "nanoseconds since 1970-01-01", "calendar": "proleptic_gregorian", "dtype": "int64"}


@dataclass
class _Catalogue:
    """Codes of line and sensor names, in order of first appearance."""

    lines: dict[str, int] = field(default_factory=dict)
    sensors: dict[str, int] = field(default_factory=dict)

    def codes(self, names: pa.Array, table: dict[str, int]) -> np.ndarray:
        """Code of each name (new names get the next code, in order of first appearance)."""
        encoded = pc.dictionary_encode(names)
        local = [table.setdefault(name, len(table)) for name in encoded.dictionary.to_pylist()]
        return np.asarray(local, dtype=np.int64)[np.asarray(encoded.indices.to_numpy(zero_copy_only=False))]

    def constant(self, name: str, table: dict[str, int], n: int) -> np.ndarray:
        return np.full(n, table.setdefault(name, len(table)), dtype=np.int64)


@dataclass
class _Pass1:
    """State of the first pass over the readings files."""

    spool: Spool
    catalogue: _Catalogue = field(default_factory=_Catalogue)
    time_min: int | None = None
    time_max: int | None = None
    crossings: int = 0
    file_ranges: list = field(default_factory=list)

    def add_times(self, t: np.ndarray) -> None:
        if t.size:
            lo, hi = int(t.min()), int(t.max())
            self.time_min = lo if self.time_min is None else min(self.time_min, lo)
            self.time_max = hi if self.time_max is None else max(self.time_max, hi)


def _record_malformed(batch: Batch, ledger: FileLedger, rejects: RejectLog, spec: InputSpec, path: Path) -> None:
    """Ledger and reject file entries of the rows the CSV parser skipped."""
    if not batch.malformed:
        return
    rows = np.array([m[0] for m in batch.malformed], dtype=np.int64)
    reasons = np.full(rows.size, "malformed_row", dtype=object)
    raw = {"text": pa.array([m[1] for m in batch.malformed], pa.string())}
    ledger.add(rows, reasons, raw)
    rejects.write(spec.name, path, rows, reasons, raw)


def _record_rejects(batch: Batch, parsed: Parsed, ledger: FileLedger, rejects: RejectLog, spec: InputSpec, path: Path) -> None:
    """Ledger and reject file entries of the rows of a batch that failed a check."""
    idx = np.flatnonzero(~parsed.kept)
    if idx.size == 0:
        return
    take = pa.array(idx)
    raw = {name: col.take(take) for name, col in batch.columns.items()}
    reasons = parsed.reason_names()
    ledger.add(batch.rows[idx], reasons, raw)
    rejects.write(spec.name, path, batch.rows[idx], reasons, raw)


def _open(path: Path, spec: InputSpec, block_bytes: int) -> TableReader:
    fmt = detect_format(path, spec["format"], spec.where)
    return TableReader(path, fmt, spec.mapping, spec["delimiter"], block_bytes, spec.where)


def _finish_file(reader, ledger, sample, tracker, spec, params, context) -> None:
    """End-of-file checks, log lines and the rejected-fraction test."""
    sample.finish()
    ledger.rows_read = reader.rows_read
    ledger.check()
    for row, before, after in tracker.crossings:
        context.log.info(
            "%s: row %d: seconds of day fall back from %.3f to %.3f s: taken as crossing midnight (one day added)",
            ledger.file, row, before, after,
        )
    reasons = ", ".join(f"{k} {v}" for k, v in ledger.by_reason.items() if v)
    context.log.info(
        "%s: %d rows read, %d kept, %d rejected%s",
        ledger.file, ledger.rows_read, ledger.rows_kept, ledger.rows_rejected, f" ({reasons})" if reasons else "",
    )
    check_rejected_fraction(ledger, params["max_rows_rejected_fraction"], spec)


def _readings_file(path: Path, index: int, spec: InputSpec, params: dict, limits: Limits, state: _Pass1,
                   rejects: RejectLog, context: StageContext, survey_crs: CRS) -> FileLedger:
    """Pass 1 over one readings file: parse, reject, code and spool the kept rows."""
    block_bytes = int(params["block_size_mb"] * 2**20)
    reader = _open(path, spec, block_bytes)
    ledger = FileLedger("readings", path)
    tracker = MidnightTracker()
    sample = FileSample(path, spec, limits, context.log, survey_crs)
    stem = file_stem(path)
    cat = state.catalogue
    lines_before = len(cat.lines)
    first, last = None, None
    for batch in reader:
        _record_malformed(batch, ledger, rejects, spec, path)
        if batch.size == 0:
            continue
        parsed = parse_readings(batch, spec, limits, tracker, sample)
        _record_rejects(batch, parsed, ledger, rejects, spec, path)
        rejects.flush()
        kept = parsed.kept
        n = int(np.count_nonzero(kept))
        ledger.rows_kept += n
        if n == 0:
            continue
        mask = pa.array(kept)
        line = cat.codes(parsed.line.filter(mask), cat.lines) if parsed.line is not None else cat.constant(stem, cat.lines, n)
        sensor = (
            cat.codes(parsed.sensor.filter(mask), cat.sensors)
            if parsed.sensor is not None
            else cat.constant(spec["sensor_default"], cat.sensors, n)
        )
        columns = {k: v[kept] for k, v in parsed.values.items()}
        columns.update(line=line, sensor=sensor, source_file=np.full(n, index), source_row=batch.rows[kept])
        state.add_times(columns["time"])
        lo, hi = int(columns["time"].min()), int(columns["time"].max())
        first, last = (lo, hi) if first is None else (min(first, lo), max(last, hi))
        state.spool.append(columns)
        _check_names(path, spec, cat, ledger.rows_kept, len(cat.lines) - lines_before)
    _finish_file(reader, ledger, sample, tracker, spec, params, context)
    state.crossings += len(tracker.crossings)
    if first is not None:
        state.file_ranges.append((path, first, last))
    return ledger


def _check_day_split(state: _Pass1, spec: InputSpec) -> None:
    """Refuse files of seconds of day on one configured date that lie more than
    12 h apart: files recorded after a midnight that no file shows (each file's
    own crossings are found row by row) would be placed a day early."""
    if spec["time_format"] != "seconds_of_day" or "date" in spec.mapping or len(state.file_ranges) < 2:
        return
    ranges = sorted(state.file_ranges, key=lambda r: r[1])
    path0, lo0, reach = ranges[0]
    for path1, lo1, hi1 in ranges[1:]:
        if lo1 - reach > MIDNIGHT_FALLBACK_S * NS_PER_S:
            raise DataError(
                f"{path0}: its times (seconds of day on {spec.where}.date, {_iso(lo0)} to {_iso(reach)}) end more than "
                f"{MIDNIGHT_FALLBACK_S / 3600:g} h before {path1.name} begins ({_iso(lo1)}): the survey seems to cross "
                f"midnight between files: map a date column ({spec.where}.columns.date) or give ISO 8601 date-times"
            )
        if hi1 >= reach:
            path0, lo0, reach = path1, lo1, hi1


def _check_names(path: Path, spec: InputSpec, cat: _Catalogue, kept: int, new_lines: int) -> None:
    """Stop early when the sensor or line column cannot be what it is mapped as."""
    if len(cat.sensors) > _MAX_SENSORS:
        raise DataError(
            f"{path}: more than {_MAX_SENSORS} distinct sensor names: check that {spec.where}.columns.sensor names the sensor column"
        )
    if kept >= _LINE_CHECK_ROWS and new_lines * _MIN_READINGS_PER_LINE > kept:
        raise DataError(
            f"{path}: {new_lines} distinct line names in {kept} kept readings (fewer than {_MIN_READINGS_PER_LINE} readings a line): "
            f"check that {spec.where}.columns.line names the line column"
        )


def _base_file(path: Path, index: int, spec: InputSpec, params: dict, limits: Limits, rejects: RejectLog,
               context: StageContext) -> tuple[FileLedger, dict[str, np.ndarray]]:
    """Read one base-station file into memory (kept rows only)."""
    reader = _open(path, spec, int(params["block_size_mb"] * 2**20))
    ledger = FileLedger("base_station", path)
    tracker = MidnightTracker()
    sample = FileSample(path, spec, limits, context.log)
    parts: dict[str, list[np.ndarray]] = {"time": [], "total_field": [], "source_row": []}
    for batch in reader:
        _record_malformed(batch, ledger, rejects, spec, path)
        if batch.size == 0:
            continue
        parsed = parse_base(batch, spec, limits, tracker, sample)
        _record_rejects(batch, parsed, ledger, rejects, spec, path)
        rejects.flush()
        kept = parsed.kept
        ledger.rows_kept += int(np.count_nonzero(kept))
        parts["time"].append(parsed.values["time"][kept])
        parts["total_field"].append(parsed.values["total_field"][kept])
        parts["source_row"].append(batch.rows[kept])
    _finish_file(reader, ledger, sample, tracker, spec, params, context)
    out = {k: np.concatenate(v) if v else np.zeros(0) for k, v in parts.items()}
    out["source_file"] = np.full(out["time"].size, index, dtype=np.int16)
    return ledger, out


def _pass2_rows(params: dict) -> int:
    """Readings per pass-2 block: about 64 bytes of working memory per reading, at least 256."""
    return max(256, int(params["block_size_mb"] * 2**20) // 64)


def _check_file_count(spec: InputSpec) -> None:
    if len(spec.files) > _MAX_FILES:
        raise DataError(f"{spec.files[0]}: {spec.where} has {len(spec.files)} files, more than {_MAX_FILES}: merge some files")


def _line_kinds(names: list[str], patterns: list[str]) -> list[str]:
    return ["tie" if any(fnmatch.fnmatchcase(n, p) for p in patterns) else "survey" for n in names]


def _sensor_order(sensors: dict[str, int]) -> tuple[list[str], np.ndarray]:
    """Sensor names in name order and the final index of each provisional code."""
    names = sorted(sensors)
    rank = np.zeros(len(sensors), dtype=np.int64)
    for final, name in enumerate(names):
        rank[sensors[name]] = final
    return names, rank


def _coord_attrs() -> dict[str, dict]:
    return {
        "time": {"standard_name": "time", "long_name": "time of the reading, UTC"},
        "easting": {"units": "m", "standard_name": "projection_x_coordinate", "long_name": "easting, survey CRS"},
        "northing": {"units": "m", "standard_name": "projection_y_coordinate", "long_name": "northing, survey CRS"},
        "elevation": {"units": "m", "long_name": "sensor elevation, positive up", "positive": "up"},
        "altitude": {"units": "m", "standard_name": "height", "long_name": "sensor height above seabed or ground"},
        "line_index": {"units": "1", "long_name": "index into the line_names attribute"},
        "sensor_index": {"units": "1", "long_name": "index into the sensor_names attribute"},
        "source_file": {"units": "1", "long_name": "index into the source_files attribute"},
        "source_row": {"units": "1", "long_name": "data row number in the source file (1 = first row after the header)"},
    }


def _readings_dataset(paths: dict[str, Path], layout: Layout, attrs: dict, chunk_readings: int) -> tuple[xr.Dataset, xr.Dataset]:
    """Wrap the pass-2 output files as the readings and segments datasets."""
    n = int(layout.stop[-1])
    chunks = segment_chunks(layout.lengths, chunk_readings)
    arrays = {name: lazy_column(paths[name], OUTPUT_DTYPES[name], n, chunks, name) for name in OUTPUT_DTYPES}
    coord_attrs = _coord_attrs()
    coords = {name: (READING_DIM, arrays[name], coord_attrs[name]) for name in coord_attrs}
    total_field_attrs = {"units": "nT", "long_name": "total magnetic field, measured", "grid_mapping": "crs"}
    ds = xr.Dataset(
        {
            "total_field": (READING_DIM, arrays["total_field"], total_field_attrs),
            "flags": (READING_DIM, arrays["flags"], flag_attrs()),
        },
        coords=coords,
        attrs=attrs,
    )
    ds["time"].encoding.update(_TIME_ENCODING)
    return ds, _segments(layout)


def _segments(layout: Layout) -> xr.Dataset:
    """The segments table, with the layout of :func:`lodeline.model.segments_dataset`."""
    return xr.Dataset(
        {
            "start": ("segment", layout.start.astype(np.int64), {"units": "1", "long_name": "first reading index"}),
            "stop": ("segment", layout.stop.astype(np.int64), {"units": "1", "long_name": "reading index after the last"}),
            "line_index": ("segment", layout.line_index.astype(np.int32)),
            "sensor_index": ("segment", layout.sensor_index.astype(np.int16)),
        }
    )


def _base_dataset(parts: list[dict[str, np.ndarray]], files: list[Path]) -> xr.Dataset:
    """The base-station dataset, in file order, with its own time-order flags."""
    time = np.concatenate([p["time"] for p in parts]).astype(np.int64)
    flags = time_order_flags(time, np.zeros(time.size, dtype=np.int64), np.zeros(1, np.int64), np.zeros(1, bool))
    ds = xr.Dataset(
        {
            "total_field": (BASE_DIM, np.concatenate([p["total_field"] for p in parts]).astype(np.float64),
                            {"units": "nT", "long_name": "base-station total magnetic field"}),
            "flags": (BASE_DIM, flags, flag_attrs()),
        },
        coords={
            "time": (BASE_DIM, time.view("M8[ns]"), {"standard_name": "time", "long_name": "time of the base-station reading, UTC"}),
            "source_file": (BASE_DIM, np.concatenate([p["source_file"] for p in parts]).astype(np.int16),
                            {"units": "1", "long_name": "index into the source_files attribute"}),
            "source_row": (BASE_DIM, np.concatenate([p["source_row"] for p in parts]).astype(np.int64),
                           {"units": "1", "long_name": "data row number in the source file (1 = first row after the header)"}),
        },
        attrs={"source_files": [str(f) for f in files]},
    )
    ds["time"].encoding.update(_TIME_ENCODING)
    return ds


def _iso(ns: int | None) -> str | None:
    return None if ns is None else pd.Timestamp(ns, unit="ns", tz="UTC").isoformat()


def _read_readings(spec, params, limits, context, rejects, survey_crs):
    """Pass 1 over every readings file."""
    state = _Pass1(Spool(context.scratch))
    ledgers = []
    bar = context.progress(len(spec.files), "ingest: reading files")
    try:
        for index, path in enumerate(spec.files):
            ledgers.append(_readings_file(path, index, spec, params, limits, state, rejects, context, survey_crs))
            bar.update(1)
    finally:
        bar.close()
        state.spool.close()
    return state, ledgers


def _read_base(context, params, limits, rejects):
    """Every base-station file, or nothing (with a warning) when the input is absent."""
    if "base_station" not in context.inputs:
        context.log.warning("no [inputs.base_station] table: no base_station dataset is produced (the diurnal correction needs one)")
        return None, []
    spec = input_spec(context.inputs["base_station"], "base_station", context.survey, context.config_dir)
    _check_file_count(spec)
    ledgers, parts = [], []
    for index, path in enumerate(spec.files):
        ledger, kept = _base_file(path, index, spec, params, limits, rejects, context)
        ledgers.append(ledger)
        parts.append(kept)
    if sum(p["time"].size for p in parts) == 0:
        raise DataError(f"{spec.files[0]}: no base-station reading kept: see the rejected rows")
    return _base_dataset(parts, spec.files), ledgers


def run(data: dict, params: dict, context: StageContext) -> StageResult:
    """Read the readings (and base-station) files into the survey data model.

    Parameters
    ----------
    data : dict
        Empty (ingest has no upstream stage).
    params : dict
        The validated ``[ingest]`` table (see :data:`PARAMS`).
    context : lodeline.model.StageContext
        ``inputs["readings"]`` (and optionally ``inputs["base_station"]``),
        ``survey`` (crs, crs_wkt), ``scratch``, ``log``, ``progress`` and
        ``chunk_readings``.

    Returns
    -------
    lodeline.model.StageResult
        Datasets "readings", "segments" and, when configured, "base_station";
        table "files"; file "rejected_rows"; rejects by reason (readings).

    Raises
    ------
    lodeline.model.DataError
        A file that cannot be used as configured (one line naming the file).
    lodeline.params.ParameterError
        An input table whose values do not fit together.
    """
    check_stage_params(params)
    limits = Limits(params["field_min_nT"], params["field_max_nT"])
    spec = input_spec(context.inputs["readings"], "readings", context.survey, context.config_dir)
    _check_file_count(spec)
    survey_crs = spec.transformer.target_crs
    if not any(k in spec.mapping for k in ("elevation", "depth")):
        context.log.warning("inputs.readings maps neither columns.elevation nor columns.depth: sensor elevation set to 0.0 m")
    reject_path = Path(context.scratch) / "rejected_rows.csv"
    rejects = RejectLog(reject_path, {
        "field_out_of_range": f"total field outside [{limits.field_min_nT:g}, {limits.field_max_nT:g}] nT (after field_unit conversion)",
    })
    try:
        state, ledgers = _read_readings(spec, params, limits, context, rejects, survey_crs)
        _check_day_split(state, spec)
        base, base_ledgers = _read_base(context, params, limits, rejects)
    finally:
        rejects.close()
    if state.spool.n == 0:
        raise DataError(f"{spec.files[0]}: no reading kept from the {len(spec.files)} readings files: see the rejected rows")
    sensor_names, rank = _sensor_order(state.catalogue.sensors)
    layout = plan_layout(state.spool.counts, len(state.catalogue.lines), rank)
    bar = context.progress(state.spool.n, "ingest: ordering readings")
    try:
        paths = scatter(state.spool, layout, Path(context.scratch), _pass2_rows(params), bar)
    finally:
        bar.close()
    for path in state.spool.paths.values():
        path.unlink(missing_ok=True)
    line_names = list(state.catalogue.lines)
    attrs = {
        "crs": context.survey.get("crs") or "",
        "crs_wkt": context.survey.get("crs_wkt") or survey_crs.to_wkt(),
        "line_names": line_names,
        "line_kinds": _line_kinds(line_names, spec.tie_lines),
        "sensor_names": sensor_names,
        "source_files": [str(p) for p in spec.files],
    }
    readings, segments = _readings_dataset(paths, layout, attrs, context.chunk_readings)
    datasets = {"readings": readings, "segments": segments}
    if base is not None:
        datasets["base_station"] = base
    rejected = {r: sum(led.by_reason[r] for led in ledgers) for r in REASONS}
    summary = _summary(state, ledgers, base_ledgers, layout, attrs, base)
    context.log.info(
        "ingest: %d readings read, %d kept, %d rejected; %d lines, %d sensors, %d segments",
        summary["readings_read"], summary["readings_kept"], summary["readings_rejected"],
        len(line_names), len(sensor_names), summary["segments"],
    )
    return StageResult(
        datasets=datasets,
        tables={"files": files_table(ledgers + base_ledgers)},
        files={"rejected_rows": reject_path},
        summary=summary,
        rejected=rejected,
        readings_in=sum(led.rows_read for led in ledgers),
    )


def _summary(state: _Pass1, ledgers, base_ledgers, layout: Layout, attrs: dict, base) -> dict:
    """Figures for the run log and manifest."""
    kinds = np.array(attrs["line_kinds"], dtype=object)
    seg_kinds = kinds[layout.line_index]
    lengths = layout.lengths
    by_kind = {k: int(lengths[seg_kinds == k].sum()) for k in ("survey", "tie")}
    lines_by_kind = {k: int(np.count_nonzero(kinds == k)) for k in ("survey", "tie")}
    return {
        "readings_read": int(sum(led.rows_read for led in ledgers)),
        "readings_kept": int(sum(led.rows_kept for led in ledgers)),
        "readings_rejected": int(sum(led.rows_rejected for led in ledgers)),
        "rejected_by_reason": {r: int(sum(led.by_reason[r] for led in ledgers)) for r in REASONS if any(led.by_reason[r] for led in ledgers)},
        "readings_by_line_kind": by_kind,
        "lines_by_kind": lines_by_kind,
        "sensors": list(attrs["sensor_names"]),
        "segments": int(lengths.size),
        "time_start": _iso(state.time_min),
        "time_end": _iso(state.time_max),
        "midnight_crossings": state.crossings,
        "readings_files": len(ledgers),
        "base_station_files": len(base_ledgers),
        "base_station_readings_read": int(sum(led.rows_read for led in base_ledgers)),
        "base_station_readings_kept": int(sum(led.rows_kept for led in base_ledgers)),
        "base_station_readings_rejected": int(sum(led.rows_rejected for led in base_ledgers)),
        "base_station_time_start": None if base is None else _iso(int(base["time"].values.view("i8").min())),
        "base_station_time_end": None if base is None else _iso(int(base["time"].values.view("i8").max())),
    }


STAGE = Stage(
    name="ingest",
    run=run,
    params=PARAMS,
    after=(),
    file_inputs=("readings", "base_station"),
    input_params={"readings": READINGS_INPUT, "base_station": BASE_INPUT},
    order=0,
    summary="Read total-field readings and base-station files, reject bad rows with reasons, project positions and store readings by line and sensor.",
)
