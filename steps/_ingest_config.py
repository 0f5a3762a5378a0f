"""Parameter tables of the ingest stage and the checks that ``Param`` cannot do.

Methods
-------
:func:`lodeline.params.validate_table` checks the types, choices and ranges
of each table; :func:`input_spec` then checks what depends on several keys
or on outside knowledge (the column mapping, the coordinate reference system
through :class:`pyproj.CRS`, the time zone through :mod:`zoneinfo`, the date)
and gathers the result in an :class:`InputSpec`.

References
----------
Alken, P. et al. (2021), International Geomagnetic Reference Field: the
thirteenth generation, Earth, Planets and Space 73:49 (the total field at
the Earth's surface lies between about 22,000 and 67,000 nT, which sets the
default accepted range of 15,000-75,000 nT).
"""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path

from pyproj import CRS, Transformer
from pyproj.exceptions import CRSError

from lodeline.config import expand_files
from lodeline.params import Param, ParameterError, closest

from ._ingest_parse import parse_date_text, parse_timezone

__all__ = [
    "PARAMS",
    "READINGS_INPUT",
    "BASE_INPUT",
    "READINGS_FIELDS",
    "BASE_FIELDS",
    "FIELD_UNITS",
    "InputSpec",
    "input_spec",
    "check_stage_params",
]

#: Column-mapping keys of the readings input: key -> (required, what it holds).
READINGS_FIELDS: dict[str, tuple[bool, str]] = {
    "time": (True, "time of the reading"),
    "x": (True, "easting, or longitude when position_crs is geographic"),
    "y": (True, "northing, or latitude when position_crs is geographic"),
    "field": (True, "total field, in field_unit"),
    "sensor": (False, "sensor name"),
    "line": (False, "line name"),
    "depth": (False, "sensor depth below the sea surface, m, positive down"),
    "elevation": (False, "sensor elevation, m, positive up"),
    "altitude": (False, "sensor height above seabed or ground, m"),
    "date": (False, "date YYYY-MM-DD, for time_format = 'seconds_of_day'"),
}

#: Column-mapping keys of the base-station input.
BASE_FIELDS: dict[str, tuple[bool, str]] = {
    "time": (True, "time of the reading"),
    "field": (True, "total field, in field_unit"),
    "date": (False, "date YYYY-MM-DD, for time_format = 'seconds_of_day'"),
}

#: Factor from each accepted field unit to nT.
FIELD_UNITS = {"nT": 1.0, "uT": 1000.0, "pT": 0.001}
UNIT_WORDS = {"nT": "nanotesla", "uT": "microtesla", "pT": "picotesla"}


def _common(columns_default: dict, fields: dict[str, tuple[bool, str]]) -> tuple[Param, ...]:
    keys = ", ".join(f"{k}{'' if required else ' (optional)'}" for k, (required, _) in fields.items())
    return (
        Param("files", None, "Files to read: paths or glob patterns, relative to the survey file.", kind=list, item_kind=str, minimum=1),
        Param(
            "format",
            "auto",
            "File format: 'csv', 'parquet', or 'auto' (from the ending: .csv/.csv.gz/.txt -> csv, .parquet -> parquet).",
            kind=str,
            choices=("auto", "csv", "parquet"),
        ),
        Param("delimiter", ",", "CSV field delimiter, one character (write \"\\t\" for a tab).", kind=str),
        Param("decimal", ".", "Decimal mark of the numbers in CSV text: '.' or ','.", kind=str, choices=(".", ",")),
        Param(
            "columns",
            columns_default,
            f"Table mapping our fields to the file's column names: {keys}.",
            kind=dict,
        ),
        Param(
            "time_format",
            "iso8601",
            "'iso8601' (date and time, with Z or an offset, or naive in timezone) or 'seconds_of_day' (s after local midnight of date).",
            kind=str,
            choices=("iso8601", "seconds_of_day"),
        ),
        Param("date", None, "Survey date YYYY-MM-DD, needed for seconds_of_day unless a date column is mapped.", kind=str, optional=True),
        Param(
            "timezone",
            "UTC",
            "Time zone of times without a zone designator: 'UTC', an IANA name ('Europe/Paris') or an offset ('+02:00').",
            kind=str,
        ),
        Param("field_unit", "nT", "Unit of the total field column: 'nT', 'uT' or 'pT'.", kind=str, choices=tuple(FIELD_UNITS)),
    )


READINGS_INPUT: tuple[Param, ...] = _common({"time": "time", "x": "x", "y": "y", "field": "field"}, READINGS_FIELDS) + (
    Param(
        "position_crs",
        "EPSG:4326",
        "Coordinate reference system of x and y (EPSG code or PROJ string); geographic means x = longitude, y = latitude, degrees.",
        kind=str,
    ),
    Param("tie_lines", ["T*"], "Glob patterns of the line names that are tie lines (case-sensitive).", kind=list, item_kind=str),
    Param("sensor_default", "S1", "Sensor name of every reading when no sensor column is mapped.", kind=str),
)

BASE_INPUT: tuple[Param, ...] = _common({"time": "time", "field": "field"}, BASE_FIELDS)

PARAMS: tuple[Param, ...] = (
    Param(
        "max_rows_rejected_fraction",
        0.5,
        "Fail the run when more than this fraction of a file's data rows is rejected (catches a wrong column mapping), 0-1.",
        kind=float,
        minimum=0.0,
        maximum=1.0,
    ),
    Param(
        "field_min_nT",
        15000.0,
        "Smallest accepted total field, nT (Earth's surface field is about 22,000-67,000 nT; Alken et al. 2021).",
        kind=float,
        minimum=0.0,
    ),
    Param("field_max_nT", 75000.0, "Largest accepted total field, nT.", kind=float, minimum=0.0, exclusive_minimum=True),
    Param(
        "block_size_mb",
        1.0,
        "Size of the blocks read at a time, MB (2**20 bytes); the CSV reader reads up to about 32 blocks ahead, "
        "so working memory is about 50 times this, whatever the survey size.",
        kind=float,
        minimum=0.001,
        maximum=1024.0,
    ),
)


@dataclass
class InputSpec:
    """Everything the readers need about one input, checked.

    Attributes
    ----------
    name : str
        "readings" or "base_station".
    where : str
        Its table name for messages, ``inputs.<name>``.
    files : list of pathlib.Path
        Absolute paths.
    mapping : dict of str to str
        Our field -> file column name.
    tz : tzinfo
        Time zone of naive times.
    date_ns : int or None
        Midnight of the configured date, ns since 1970 (naive local).
    field_scale : float
        Factor from the file's field unit to nT.
    position_crs : pyproj.CRS or None
        CRS of x/y (readings only).
    transformer : pyproj.Transformer or None
        From position_crs to the survey CRS, always_xy.
    """

    name: str
    where: str
    table: dict
    files: list[Path]
    mapping: dict[str, str]
    tz: object
    date_ns: int | None
    field_scale: float
    position_crs: CRS | None = None
    transformer: Transformer | None = None
    tie_lines: list[str] = field(default_factory=list)

    def __getitem__(self, key: str):
        return self.table[key]


def _check_columns(columns: dict, fields: dict[str, tuple[bool, str]], where: str) -> dict[str, str]:
    """Validate a column mapping: known keys, required keys present, names given once."""
    for key, value in columns.items():
        if key not in fields:
            hint = closest(key, fields)
            did = f"; did you mean {hint!r}?" if hint else ""
            raise ParameterError(f"unknown key {where}.columns.{key}{did} (known keys: {', '.join(fields)})")
        if not isinstance(value, str) or not value:
            raise ParameterError(f"{where}.columns.{key} = {value!r} must be the name of a column of the file (a non-empty string)")
    for key, (required, what) in fields.items():
        if required and key not in columns:
            raise ParameterError(
                f"{where}.columns lacks {key!r} ({what}): map it to the file's column, for example {key} = \"{key}\""
            )
    if "depth" in columns and "elevation" in columns:
        raise ParameterError(f"{where}.columns maps both depth and elevation: keep only the one the file measures")
    seen: dict[str, str] = {}
    for key, value in columns.items():
        if value in seen:
            raise ParameterError(f"{where}.columns.{key} and {where}.columns.{seen[value]} both name the column {value!r}: map each to its own column")
        seen[value] = key
    return dict(columns)


def _files(value, name: str, config_dir: Path) -> list[Path]:
    if value is None:
        raise ParameterError(f"inputs.{name}.files is required: give a list of paths or glob patterns")
    items = [value] if isinstance(value, (str, Path)) else list(value)
    if all(isinstance(v, Path) for v in items):
        return [Path(v) for v in items]
    return expand_files([str(v) for v in items], Path(config_dir), f"inputs.{name}")


def input_spec(table: dict, name: str, survey: dict, config_dir: Path = Path(".")) -> InputSpec:
    """Check an already type-validated ``[inputs.<name>]`` table.

    Parameters
    ----------
    table : dict
        From :func:`lodeline.params.validate_table` (files may already be paths).
    name : {"readings", "base_station"}
        Which input.
    survey : dict
        The ``[survey]`` table (crs, crs_wkt).
    config_dir : pathlib.Path
        Folder that relative file patterns are relative to.

    Raises
    ------
    lodeline.params.ParameterError
        Naming the key, the bad value and what is allowed.
    """
    where = f"inputs.{name}"
    fields = READINGS_FIELDS if name == "readings" else BASE_FIELDS
    mapping = _check_columns(dict(table["columns"]), fields, where)
    delimiter = table["delimiter"]
    if len(delimiter) != 1:
        raise ParameterError(f'{where}.delimiter = {delimiter!r} must be one character (for a tab write delimiter = "\\t")')
    if table["decimal"] == delimiter:
        raise ParameterError(f"{where}.decimal and {where}.delimiter are both {delimiter!r}: with a decimal comma use delimiter = \";\"")
    try:
        tz = parse_timezone(table["timezone"])
    except ValueError as err:
        raise ParameterError(f"{where}.{err}") from None
    date_ns = None
    if table["date"] is not None:
        try:
            date_ns = parse_date_text(table["date"])
        except ValueError as err:
            raise ParameterError(f"{where}.{err}") from None
    if table["time_format"] == "seconds_of_day" and date_ns is None and "date" not in mapping:
        raise ParameterError(
            f"{where}: time_format = 'seconds_of_day' needs a date: set {where}.date = \"YYYY-MM-DD\" or map {where}.columns.date"
        )
    spec = InputSpec(
        name=name,
        where=where,
        table=table,
        files=_files(table["files"], name, config_dir),
        mapping=mapping,
        tz=tz,
        date_ns=date_ns,
        field_scale=FIELD_UNITS[table["field_unit"]],
    )
    if name == "readings":
        spec.position_crs = _crs(table["position_crs"], f"{where}.position_crs")
        target = _crs(survey.get("crs_wkt") or survey.get("crs"), "survey.crs")
        spec.transformer = Transformer.from_crs(spec.position_crs, target, always_xy=True)
        spec.tie_lines = list(table["tie_lines"])
    return spec


def _crs(value, key: str) -> CRS:
    if not value:
        raise ParameterError(f"{key} is required: give an EPSG code such as 'EPSG:32631'")
    try:
        return CRS.from_user_input(value)
    except CRSError:
        raise ParameterError(
            f"{key} = {value!r} is not a known coordinate reference system (unknown EPSG code?): "
            "give an EPSG code such as 'EPSG:4326' for longitude/latitude or the projected CRS of the positions"
        ) from None


def check_stage_params(params: dict) -> None:
    """Checks of the ``[ingest]`` table that involve two keys."""
    if params["field_min_nT"] >= params["field_max_nT"]:
        raise ParameterError(
            f"ingest.field_min_nT = {params['field_min_nT']:g} must be below ingest.field_max_nT = {params['field_max_nT']:g}: "
            "lower field_min_nT or raise field_max_nT"
        )
