"""Survey data model: readings, grids and targets, and their conventions.

Conventions (also written out in ``docs/conventions.md``)
--------------------------------------------------------
Readings
    An :class:`xarray.Dataset` along the single dimension ``reading``, backed
    by dask arrays. Readings are stored in contiguous *segments*, one per
    (line, sensor) pair: lines in acquisition order, sensors in name order
    within a line, readings in acquisition order within a segment, so each
    sensor's readings are in time order. Dask chunk boundaries fall on
    segment boundaries, so a stage that needs a whole line of one sensor can
    work chunk by chunk with :func:`dask.array.map_blocks` and no overlap.

    Coordinates (all along ``reading``):

    ``time``         datetime64[ns], UTC.
    ``easting``      float64, metres, survey CRS.
    ``northing``     float64, metres, survey CRS.
    ``elevation``    float64, metres, sensor elevation, positive up (a depth
                     below the sea surface ``d`` gives ``-d``).
    ``altitude``     float64, metres, sensor height above seabed or ground;
                     NaN where not known.
    ``line_index``   int32 index into ``attrs["line_names"]``.
    ``sensor_index`` int16 index into ``attrs["sensor_names"]``.
    ``source_file``  int16 index into ``attrs["source_files"]``.
    ``source_row``   int64, data row number in that file (1 = first data row
                     after the header), so every reading can be traced back.

    Data variables:

    ``total_field``  float64, nT, the measured total field; NaN is a dropout.
    ``flags``        uint32 bit flags, CF ``flag_masks``/``flag_meanings``
                     (see :data:`FLAGS`). A flag never deletes a reading.
    Later stages add one variable per correction (``diurnal``,
    ``main_field``...) in nT, so that what each stage removed can be plotted.

    Attributes: ``crs_wkt`` (survey CRS as WKT), ``crs`` (as given, e.g.
    ``EPSG:32631``), ``line_names``, ``line_kinds`` ("survey" or "tie"),
    ``sensor_names``, ``source_files``. Every variable carries a CF
    ``units`` attribute and ``grid_mapping = "crs"`` where positional.

    A companion dataset ``segments`` (dimension ``segment``) gives ``start``
    and ``stop`` (reading indices, stop exclusive), ``line_index`` and
    ``sensor_index`` of every segment.

Grids
    :class:`xarray.Dataset` on dimensions ``("northing", "easting")`` (cell
    centres, metres, survey CRS), chunked in 2-D tiles, with ``crs_wkt`` and
    CF ``units`` on every variable; masked cells are NaN.

Targets
    A :class:`pandas.DataFrame`, one row per target.

References
----------
CF conventions: Eaton et al. (2023), NetCDF Climate and Forecast (CF)
Metadata Conventions, version 1.11 (flag_masks/flag_meanings, units,
grid_mapping).
"""

from __future__ import annotations

import logging
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Callable

import numpy as np
import pandas as pd
import xarray as xr

from .params import Param

__all__ = [
    "FLAGS",
    "DataError",
    "Stage",
    "StageContext",
    "StageResult",
    "flag_mask",
    "flag_attrs",
    "add_flags",
    "current_residual",
    "apply_correction",
    "validate_readings",
    "validate_grid",
    "segment_chunks",
    "segments_dataset",
    "READING_DIM",
]

READING_DIM = "reading"

#: Bit flags of the ``flags`` variable: name -> (bit, meaning).
FLAGS: dict[str, tuple[int, str]] = {
    "spike": (0, "isolated reading far from its neighbours (spike)"),
    "dropout": (1, "no valid field value (sensor dropout)"),
    "gap_before": (2, "time gap before this reading longer than the limit"),
    "time_duplicate": (3, "same timestamp as the previous reading of this sensor"),
    "time_backwards": (4, "timestamp earlier than the previous reading of this sensor"),
    "base_station_gap": (5, "no base-station reading close enough in time for the diurnal correction"),
    "diurnal_rate": (6, "external field changing faster than the limit"),
    "out_of_spec": (7, "sensor altitude, speed or position outside the survey specification"),
    "position_jump": (8, "position jump between consecutive readings"),
    "edge": (9, "within a filter length of a segment end"),
}

#: Flags that, by default, leave a reading out of gridding and target work.
DEFAULT_EXCLUDE = ("spike", "dropout", "time_duplicate", "time_backwards", "base_station_gap")


class DataError(ValueError):
    """Input data that cannot be used as it is (one-line message for the user)."""


def flag_mask(*names: str) -> int:
    """Return the integer bit mask of the named flags."""
    mask = 0
    for name in names:
        if name not in FLAGS:
            raise ValueError(f"unknown flag {name!r}: expected one of {', '.join(FLAGS)}")
        mask |= 1 << FLAGS[name][0]
    return mask


def add_flags(readings: xr.Dataset, condition, name: str) -> xr.Dataset:
    """Return ``readings`` with flag ``name`` set where ``condition`` is true.

    Existing flags are kept; the CF attributes of ``flags`` are kept.

    Parameters
    ----------
    readings : xarray.Dataset
        Readings following this module's conventions.
    condition : xarray.DataArray or array of bool
        Along ``reading``, true where the flag is to be set.
    name : str
        A key of :data:`FLAGS`.
    """
    bit = np.uint32(flag_mask(name))
    cond = condition.data if isinstance(condition, xr.DataArray) else condition
    flags = readings["flags"]
    data = flags.data | (cond.astype(np.uint32) * bit)
    return readings.assign(flags=(flags.dims, data, dict(flags.attrs)))


def current_residual(readings: xr.Dataset) -> xr.DataArray:
    """The field left after the corrections applied so far, nT.

    ``residual`` when a correction stage has run, else ``total_field``.
    """
    return readings["residual"] if "residual" in readings else readings["total_field"]


def apply_correction(readings: xr.Dataset, name: str, correction, long_name: str, **attrs) -> xr.Dataset:
    """Add a correction variable and subtract it from the residual.

    Parameters
    ----------
    readings : xarray.Dataset
        Readings following this module's conventions.
    name : str
        Name of the new variable (``"diurnal"``, ``"main_field"``...).
    correction : xarray.DataArray or dask array
        Along ``reading``, the value removed from each reading, in nT. NaN
        where the correction is unknown (the residual becomes NaN there; flag
        those readings).
    long_name : str
        What the correction is, in words.
    **attrs
        Further attributes (the parameters that made it, for example).

    Returns
    -------
    xarray.Dataset
        With ``name`` (attribute ``role = "correction"``, units nT) and an
        updated ``residual`` (nT) = previous residual - correction.
    """
    data = correction.data if isinstance(correction, xr.DataArray) else correction
    previous = current_residual(readings)
    var_attrs = {"units": "nT", "long_name": long_name, "role": "correction", **attrs}
    out = readings.assign({name: ((READING_DIM,), data, var_attrs)})
    residual = previous.data - data
    return out.assign(
        residual=((READING_DIM,), residual, {"units": "nT", "long_name": "residual anomaly (total field less the corrections applied so far)"})
    )


def flag_attrs() -> dict:
    """CF attributes of the ``flags`` variable."""
    names = sorted(FLAGS, key=lambda n: FLAGS[n][0])
    return {
        "long_name": "quality flags",
        "flag_masks": np.array([1 << FLAGS[n][0] for n in names], dtype="uint32"),
        "flag_meanings": " ".join(names),
        "units": "1",
    }


REQUIRED_COORDS = {
    "time": ("M", None),
    "easting": ("f", "m"),
    "northing": ("f", "m"),
    "elevation": ("f", "m"),
    "altitude": ("f", "m"),
    "line_index": ("i", None),
    "sensor_index": ("i", None),
    "source_file": ("i", None),
    "source_row": ("i", None),
}
REQUIRED_ATTRS = ("crs_wkt", "line_names", "line_kinds", "sensor_names", "source_files")


def validate_readings(ds: xr.Dataset, segments: xr.Dataset | None = None, where: str = "") -> None:
    """Check that a readings dataset follows the conventions of this module.

    Only metadata, dtypes and the small segments table are inspected, so the
    check is cheap on any survey size.

    Raises
    ------
    ValueError
        Naming the first convention broken (this is a programming error of a
        stage, not a user error).
    """
    prefix = f"{where}: " if where else ""
    if tuple(ds.dims) != (READING_DIM,):
        raise ValueError(f"{prefix}readings must have the single dimension {READING_DIM!r}, got {tuple(ds.dims)}")
    for name, (kind, units) in REQUIRED_COORDS.items():
        if name not in ds.variables:
            raise ValueError(f"{prefix}readings lack the coordinate {name!r}")
        if ds[name].dtype.kind not in (kind, "u" if kind == "i" else kind):
            raise ValueError(f"{prefix}{name!r} has dtype {ds[name].dtype}, expected kind {kind!r}")
        if units and ds[name].attrs.get("units") != units:
            raise ValueError(f"{prefix}{name!r} must carry units={units!r}")
    for name in ("total_field", "flags"):
        if name not in ds.data_vars:
            raise ValueError(f"{prefix}readings lack the variable {name!r}")
    if ds["total_field"].attrs.get("units") != "nT":
        raise ValueError(f"{prefix}'total_field' must carry units='nT'")
    if ds["flags"].dtype != np.uint32:
        raise ValueError(f"{prefix}'flags' must be uint32, got {ds['flags'].dtype}")
    for var in ds.data_vars:
        if "units" not in ds[var].attrs:
            raise ValueError(f"{prefix}variable {var!r} has no 'units' attribute")
    for attr in REQUIRED_ATTRS:
        if attr not in ds.attrs:
            raise ValueError(f"{prefix}readings lack the attribute {attr!r}")
    if len(ds.attrs["line_kinds"]) != len(ds.attrs["line_names"]):
        raise ValueError(f"{prefix}line_kinds and line_names differ in length")
    if segments is not None:
        start = np.asarray(segments["start"].values)
        stop = np.asarray(segments["stop"].values)
        n = ds.sizes[READING_DIM]
        if len(start) and (start[0] != 0 or stop[-1] != n or np.any(start[1:] != stop[:-1])):
            raise ValueError(f"{prefix}segments do not tile the readings exactly")
        chunks = ds["total_field"].chunks
        if chunks is not None:
            bounds = np.cumsum((0,) + tuple(chunks[0]))
            if not np.isin(bounds, np.concatenate([start, stop[-1:]])).all():
                raise ValueError(f"{prefix}dask chunk boundaries must fall on segment boundaries")


def validate_grid(ds: xr.Dataset, where: str = "") -> None:
    """Check that a grid dataset follows the conventions of this module."""
    prefix = f"{where}: " if where else ""
    if tuple(ds.dims)[-2:] != ("northing", "easting") and set(ds.dims) != {"northing", "easting"}:
        raise ValueError(f"{prefix}grids must be on ('northing', 'easting'), got {tuple(ds.dims)}")
    if "crs_wkt" not in ds.attrs:
        raise ValueError(f"{prefix}grid lacks the attribute 'crs_wkt'")
    for var in ds.data_vars:
        if "units" not in ds[var].attrs:
            raise ValueError(f"{prefix}grid variable {var!r} has no 'units' attribute")


def segment_chunks(lengths, target: int) -> tuple[int, ...]:
    """Group whole segments into dask chunks of about ``target`` readings.

    Parameters
    ----------
    lengths : array of int
        Number of readings of each segment, in storage order.
    target : int
        Wanted chunk length in readings. A segment longer than this gets a
        chunk of its own; segments are never split.

    Returns
    -------
    tuple of int
        Chunk lengths whose boundaries are all segment boundaries.
    """
    chunks: list[int] = []
    current = 0
    for n in np.asarray(lengths, dtype=np.int64):
        if current and current + n > target:
            chunks.append(current)
            current = 0
        current += int(n)
    if current or not chunks:
        chunks.append(current)
    return tuple(chunks)


def segments_dataset(line_index, sensor_index) -> xr.Dataset:
    """Build the segments table from per-reading line and sensor indices (in memory)."""
    line_index = np.asarray(line_index)
    sensor_index = np.asarray(sensor_index)
    n = line_index.size
    if n == 0:
        starts = np.zeros(0, dtype=np.int64)
    else:
        change = np.flatnonzero((np.diff(line_index) != 0) | (np.diff(sensor_index) != 0)) + 1
        starts = np.concatenate([[0], change]).astype(np.int64)
    stops = np.concatenate([starts[1:], [n]]).astype(np.int64) if n else starts.copy()
    return xr.Dataset(
        {
            "start": ("segment", starts, {"units": "1", "long_name": "first reading index"}),
            "stop": ("segment", stops, {"units": "1", "long_name": "reading index after the last"}),
            "line_index": ("segment", line_index[starts].astype(np.int32) if n else starts.astype(np.int32)),
            "sensor_index": ("segment", sensor_index[starts].astype(np.int16) if n else starts.astype(np.int16)),
        }
    )


@dataclass
class StageContext:
    """What the runner hands to a stage besides its data and parameters.

    Attributes
    ----------
    survey : dict
        The validated ``[survey]`` table (name, crs, crs_wkt...).
    inputs : dict
        The validated ``[inputs]`` tables, with file patterns expanded to
        absolute paths (only for stages that declare file inputs).
    scratch : pathlib.Path
        A private folder for temporary files; removed after the stage.
    log : logging.Logger
        Writes to the run log (and to the terminal unless quiet).
    progress : callable
        ``progress(total, desc)`` returns an object with ``update(n)`` and
        ``close()``; silent when the run is quiet or not on a terminal.
    chunk_readings : int
        Target number of readings per dask chunk.
    config_dir : pathlib.Path
        Folder of the survey TOML file (relative paths are relative to it).
    lineage : dict
        What produced the stage's inputs: ``lodeline_version``,
        ``config_hash`` (of the survey file as parsed) and ``stages`` (name to
        cache key of this stage and every stage upstream of it). Stages that
        write deliverables record it beside them.
    records : dict
        Manifest records (``ledger``, ``summary``, ``wall_s``...) of every
        stage upstream of this one, by name, for stages that report on the
        whole run.
    """

    survey: dict
    inputs: dict
    scratch: Path
    log: logging.Logger
    progress: Callable[..., Any]
    chunk_readings: int = 2_000_000
    config_dir: Path = Path(".")
    lineage: dict = field(default_factory=dict)
    records: dict = field(default_factory=dict)


@dataclass
class StageResult:
    """What a stage returns.

    Attributes
    ----------
    datasets : dict of str to xarray.Dataset
        Named outputs (``"readings"``, ``"segments"``, ``"base_station"``,
        ``"grid"``...). The runner writes each to a chunked store.
    tables : dict of str to pandas.DataFrame
        Small tables written as CSV beside the stores.
    files : dict of str to pathlib.Path
        Files the stage already wrote into its scratch folder (for example a
        rejected-rows CSV streamed while reading); the runner moves them into
        the stage output.
    summary : dict
        Figures for the run log and manifest (what was removed, RMS...).
    rejected : dict of str to int
        Readings this stage removed, by reason; the runner checks that
        readings in = readings out + rejected.
    readings_in : int, optional
        Readings that entered the stage (for the first stage: data rows read
        from the files). The runner fills it from the upstream readings when
        left as None.
    """

    datasets: dict[str, xr.Dataset] = field(default_factory=dict)
    tables: dict[str, pd.DataFrame] = field(default_factory=dict)
    files: dict[str, Path] = field(default_factory=dict)
    summary: dict = field(default_factory=dict)
    rejected: dict[str, int] = field(default_factory=dict)
    readings_in: int | None = None


@dataclass(frozen=True)
class Stage:
    """Declaration of a processing stage, found by the runner in ``lodeline.steps``.

    A module in ``steps/`` becomes a stage by defining a module-level
    ``STAGE = Stage(...)``. Adding a stage needs that module and one table
    in the survey configuration; the runner is not changed.

    Attributes
    ----------
    name : str
        Stage name, also the name of its table in the survey TOML.
    run : callable
        ``run(data, params, context) -> StageResult`` where ``data`` maps each
        upstream stage name to that stage's datasets (a dict of name to
        Dataset).
    params : tuple of Param
        Its parameter table.
    after : tuple of str
        Upstream stages whose outputs it reads (their names).
    file_inputs : tuple of str
        Keys of the ``[inputs]`` table whose files it reads; their contents
        are hashed into the stage's cache key.
    input_params : dict of str to tuple of Param
        For each key of ``file_inputs``, the parameter table of
        ``[inputs.<key>]`` (its ``files`` key is expanded by the runner into
        absolute paths before the stage sees it).
    order : int
        Tie-breaker for stages with the same upstream depth (smaller first).
    summary : str
        One line saying what the stage does.
    """

    name: str
    run: Callable[[dict, dict, StageContext], StageResult]
    params: tuple[Param, ...]
    after: tuple[str, ...] = ()
    file_inputs: tuple[str, ...] = ()
    input_params: dict = field(default_factory=dict)
    order: int = 100
    summary: str = ""
