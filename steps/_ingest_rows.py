"""Row checks of the ingest stage: parse one batch, give each row a reject
reason or keep it, and test whole files for configuration mistakes.

Methods
-------
Row checks
    Each column of a batch is parsed with the vectorised functions of
    ``_ingest_parse``; every row gets the first reason of
    :data:`~._ingest_ledger.REASONS` whose test it fails, or is kept. An
    empty or "nan" total field is kept as NaN (a dropout for later quality
    control), never rejected.
File sample
    The first :data:`SAMPLE_SIZE` parsed values of each file are tested once
    for mistakes that would reject or corrupt the whole file: a field median
    that cannot be Earth's total field in nT (wrong ``field_unit``),
    geographic positions mostly outside +-180 deg / +-90 deg (projected
    coordinates given, or x and y swapped), a median position outside the
    survey CRS's area of use that fits it with x and y exchanged (swapped),
    and positions declared projected that fit longitude/latitude and lie
    outside the position CRS's area of use (:attr:`pyproj.CRS.area_of_use`,
    projected with :meth:`pyproj.Transformer.transform_bounds` and widened
    by a tenth of its span; degrees given as metres).
Reject fraction
    At the end of each file the fraction of rejected rows is compared with
    ``max_rows_rejected_fraction`` and the run fails with the commonest
    reason, its first row and a hint.
"""

from __future__ import annotations

import logging
import re
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pyarrow as pa
from pyproj import Transformer

from lodeline.model import DataError

from ._ingest_config import FIELD_UNITS, UNIT_WORDS, InputSpec
from ._ingest_ledger import REASONS, FileLedger
from ._ingest_parse import (
    MAX_SECONDS_OF_DAY,
    NS_PER_DAY,
    NS_PER_S,
    MidnightTracker,
    as_text,
    local_to_utc,
    parse_dates,
    parse_iso_times,
    missing_text,
    parse_numbers,
)
from ._ingest_read import Batch

__all__ = ["SAMPLE_SIZE", "Limits", "Parsed", "FileSample", "parse_readings", "parse_base", "check_rejected_fraction"]

#: Parsed values per file used for the whole-file checks.
SAMPLE_SIZE = 2000
_REASON_CODES = list(REASONS)
_REASON_FIELDS = {
    "malformed_row": ("text",),
    "bad_time": ("time", "date"),
    "ambiguous_local_time": ("time", "date"),
    "bad_position": ("x", "y"),
    "position_out_of_range": ("x", "y"),
    "bad_field": ("field",),
    "field_out_of_range": ("field",),
    "bad_elevation": ("elevation", "depth"),
    "bad_altitude": ("altitude",),
    "missing_line": ("line",),
    "missing_sensor": ("sensor",),
}


@dataclass(frozen=True)
class Limits:
    """Accepted total-field range, nT."""

    field_min_nT: float
    field_max_nT: float


@dataclass
class Parsed:
    """One parsed batch.

    Attributes
    ----------
    reason : numpy.ndarray of int8
        Index into REASONS of each row's reject reason, -1 for kept rows.
    values : dict of str to numpy.ndarray
        Parsed columns for all rows (time ns UTC, easting, northing,
        elevation, altitude m, total_field nT); only kept rows are meaningful.
    line, sensor : pyarrow.Array or None
        Trimmed line and sensor names (None when taken from the file / default).
    """

    reason: np.ndarray
    values: dict[str, np.ndarray]
    line: pa.Array | None = None
    sensor: pa.Array | None = None

    @property
    def kept(self) -> np.ndarray:
        return self.reason < 0

    def reason_names(self) -> np.ndarray:
        rejected = self.reason[self.reason >= 0]
        return np.asarray(_REASON_CODES, dtype=object)[rejected]


def _assign(n: int, checks: list[tuple[str, np.ndarray]]) -> np.ndarray:
    """First failing check of each row (index into REASONS), -1 when none fails."""
    reason = np.full(n, -1, dtype=np.int8)
    for name, mask in sorted(checks, key=lambda check: _REASON_CODES.index(check[0])):
        reason[(reason < 0) & mask] = _REASON_CODES.index(name)
    return reason


def _parse_time(batch: Batch, spec: InputSpec, tracker: MidnightTracker) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """UTC nanoseconds, bad mask and ambiguous-local-time mask of a batch."""
    col = batch.columns["time"]
    if spec["time_format"] == "iso8601":
        return parse_iso_times(col, spec.tz)
    seconds, missing, bad_text = parse_numbers(col, spec["decimal"])
    bad = missing | bad_text | ~((seconds >= 0) & (seconds < MAX_SECONDS_OF_DAY))
    if "date" in batch.columns:
        date_ns, bad_date = parse_dates(batch.columns["date"])
        bad |= bad_date
        days = np.zeros(batch.size, dtype=np.int64)
    else:
        date_ns = np.full(batch.size, spec.date_ns, dtype=np.int64)
        days = tracker.day_offsets(seconds, ~bad, batch.rows)
    local = date_ns + days * NS_PER_DAY + np.round(np.where(bad, 0.0, seconds) * NS_PER_S).astype(np.int64)
    utc, ambiguous = local_to_utc(local, spec.tz)
    return utc, bad, ambiguous & ~bad


def _parse_field(batch: Batch, spec: InputSpec, limits: Limits, sample: FileSample) -> tuple[np.ndarray, list]:
    raw, _missing_field, bad = parse_numbers(batch.columns["field"], spec["decimal"])
    sample.add_field(raw)
    field_nT = raw * spec.field_scale
    with np.errstate(invalid="ignore"):
        outside = ~np.isnan(field_nT) & ~((field_nT >= limits.field_min_nT) & (field_nT <= limits.field_max_nT))
    return field_nT, [("bad_field", bad), ("field_out_of_range", outside)]


def parse_readings(batch: Batch, spec: InputSpec, limits: Limits, tracker: MidnightTracker, sample: FileSample) -> Parsed:
    """Parse and check one batch of the readings input.

    Parameters
    ----------
    batch : Batch
        Raw columns and row numbers.
    spec : InputSpec
        The checked readings input.
    limits : Limits
        Accepted field range.
    tracker : MidnightTracker
        Midnight crossings of this file (seconds of day only).
    sample : FileSample
        Whole-file checks of this file (raises :class:`DataError`).
    """
    n = batch.size
    cols = batch.columns
    time_ns, bad_time, ambiguous = _parse_time(batch, spec, tracker)
    x, x_missing, x_bad = parse_numbers(cols["x"], spec["decimal"])
    y, y_missing, y_bad = parse_numbers(cols["y"], spec["decimal"])
    bad_pos = x_missing | x_bad | y_missing | y_bad | np.isnan(x) | np.isnan(y)
    sample.add_positions(x[~bad_pos], y[~bad_pos])
    with np.errstate(invalid="ignore"):
        if spec.position_crs.is_geographic:
            outside = ~bad_pos & ~((np.abs(x) <= 180.0) & (np.abs(y) <= 90.0))
        else:
            outside = ~bad_pos & ~(np.isfinite(x) & np.isfinite(y))
    usable = ~bad_pos & ~outside
    easting, northing = spec.transformer.transform(np.where(usable, x, 0.0), np.where(usable, y, 0.0))
    easting = np.asarray(easting, dtype=np.float64)
    northing = np.asarray(northing, dtype=np.float64)
    outside |= usable & ~(np.isfinite(easting) & np.isfinite(northing))
    field_nT, field_checks = _parse_field(batch, spec, limits, sample)
    checks = [("bad_time", bad_time), ("ambiguous_local_time", ambiguous), ("bad_position", bad_pos), ("position_out_of_range", outside)]
    checks += field_checks
    elevation = np.zeros(n, dtype=np.float64)
    for key, sign in (("elevation", 1.0), ("depth", -1.0)):
        if key in cols:
            values, missing, bad = parse_numbers(cols[key], spec["decimal"])
            elevation = sign * values
            checks.append(("bad_elevation", missing | bad | ~np.isfinite(values)))
    altitude = np.full(n, np.nan, dtype=np.float64)
    if "altitude" in cols:
        altitude, _missing_alt, bad = parse_numbers(cols["altitude"], spec["decimal"])
        checks.append(("bad_altitude", bad | np.isinf(altitude)))
    names = {}
    for key in ("line", "sensor"):
        if key in cols:
            names[key] = as_text(cols[key])
            checks.append((f"missing_{key}", missing_text(names[key])))
    values = {
        "time": time_ns,
        "easting": easting,
        "northing": northing,
        "elevation": elevation,
        "altitude": altitude,
        "total_field": field_nT,
    }
    return Parsed(_assign(n, checks), values, names.get("line"), names.get("sensor"))


def parse_base(batch: Batch, spec: InputSpec, limits: Limits, tracker: MidnightTracker, sample: FileSample) -> Parsed:
    """Parse and check one batch of the base-station input (time and field)."""
    time_ns, bad_time, ambiguous = _parse_time(batch, spec, tracker)
    field_nT, field_checks = _parse_field(batch, spec, limits, sample)
    checks = [("bad_time", bad_time), ("ambiguous_local_time", ambiguous)] + field_checks
    return Parsed(_assign(batch.size, checks), {"time": time_ns, "total_field": field_nT})


class FileSample:
    """Whole-file checks on the first parsed values of one file.

    Parameters
    ----------
    path : pathlib.Path
        The file (for messages).
    spec : InputSpec
        Its input.
    limits : Limits
        Accepted field range.
    log : logging.Logger
        For warnings that do not stop the run.
    survey_crs : pyproj.CRS, optional
        Survey CRS, whose area of use is compared with geographic positions.
    """

    def __init__(self, path: Path, spec: InputSpec, limits: Limits, log: logging.Logger, survey_crs=None):
        self.path, self.spec, self.limits, self.log, self.survey_crs = path, spec, limits, log, survey_crs
        self.fields: list[np.ndarray] = []
        self.xs: list[np.ndarray] = []
        self.ys: list[np.ndarray] = []
        self.field_done = False
        self.position_done = spec.position_crs is None

    def _count(self, parts: list[np.ndarray]) -> int:
        return int(sum(p.size for p in parts))

    def add_field(self, raw: np.ndarray) -> None:
        """Add parsed field values (file units); test them once enough are in."""
        if self.field_done:
            return
        finite = raw[np.isfinite(raw)]
        self.fields.append(finite[: SAMPLE_SIZE - self._count(self.fields)])
        if self._count(self.fields) >= SAMPLE_SIZE:
            self._check_field()

    def add_positions(self, x: np.ndarray, y: np.ndarray) -> None:
        """Add parsed x/y pairs; test them once enough are in."""
        if self.position_done:
            return
        room = SAMPLE_SIZE - self._count(self.xs)
        self.xs.append(x[:room])
        self.ys.append(y[:room])
        if self._count(self.xs) >= SAMPLE_SIZE:
            self._check_positions()

    def finish(self) -> None:
        """Run the tests that have not run yet (end of the file)."""
        if not self.field_done:
            self._check_field()
        if not self.position_done:
            self._check_positions()

    def _check_field(self) -> None:
        self.field_done = True
        values = np.concatenate(self.fields) if self.fields else np.zeros(0)
        self.fields = []
        if values.size == 0:
            return
        unit = self.spec["field_unit"]
        median = float(np.median(np.abs(values)))
        low, high = self.limits.field_min_nT, self.limits.field_max_nT
        if low <= median * FIELD_UNITS[unit] <= high:
            return
        fits = [u for u, scale in FIELD_UNITS.items() if u != unit and low <= median * scale <= high]
        where = self.spec.where
        if fits:
            hint = f'looks like {UNIT_WORDS[fits[0]]}: set {where}.field_unit = "{fits[0]}"'
        else:
            hint = f"check that {where}.columns.field names the total field column"
        raise DataError(
            f"{self.path}: column {self.spec.mapping['field']!r} ({where}.columns.field) has a median of {median:.6g} {unit}, "
            f"which cannot be Earth's total field ({low:g}-{high:g} nT): {hint}"
        )

    def _check_positions(self) -> None:
        self.position_done = True
        x = np.concatenate(self.xs) if self.xs else np.zeros(0)
        y = np.concatenate(self.ys) if self.ys else np.zeros(0)
        self.xs, self.ys = [], []
        if x.size == 0:
            return
        where, xcol, ycol = self.spec.where, self.spec.mapping["x"], self.spec.mapping["y"]
        with np.errstate(invalid="ignore"):
            swapped = np.mean((np.abs(x) <= 90.0) & (np.abs(y) > 90.0) & (np.abs(y) <= 180.0))
            outside = np.mean((np.abs(x) > 180.0) | (np.abs(y) > 90.0))
            lonlat = np.mean((np.abs(x) <= 180.0) & (np.abs(y) <= 90.0))
        if self.spec.position_crs.is_geographic:
            if swapped > 0.5:
                raise DataError(
                    f"{self.path}: latitudes from column {ycol!r} ({where}.columns.y) reach {np.nanmax(np.abs(y)):.6g} deg, beyond +-90, "
                    f"while column {xcol!r} fits latitudes: x and y look swapped: set {where}.columns.x = \"{ycol}\" "
                    f"and {where}.columns.y = \"{xcol}\""
                )
            if outside > 0.5:
                raise DataError(
                    f"{self.path}: {outside:.0%} of positions lie outside longitude +-180 / latitude +-90 "
                    f"(median x {np.median(x):.6g}, y {np.median(y):.6g}): looks like projected coordinates: "
                    f"set {where}.position_crs to their CRS, for example \"EPSG:32631\""
                )
            self._check_area(float(np.median(x)), float(np.median(y)))
        elif lonlat > 0.5:
            mx, my = float(np.median(x)), float(np.median(y))
            bounds = _projected_area(self.spec.position_crs)
            if bounds is not None and not _inside(mx, my, bounds):
                raise DataError(
                    f"{self.path}: positions fit longitude/latitude (median x {mx:.6g}, y {my:.6g}) and lie outside the "
                    f"area of use of {where}.position_crs = {self.spec['position_crs']!r} "
                    f"(x {bounds[0]:.0f} to {bounds[2]:.0f}, y {bounds[1]:.0f} to {bounds[3]:.0f}): they look like degrees: "
                    f"set {where}.position_crs = \"EPSG:4326\""
                )
            self.log.warning(
                "%s: most positions fit longitude/latitude (median x %.6g, y %.6g) but position_crs is projected: "
                "if they are degrees, set %s.position_crs = \"EPSG:4326\"",
                self.path, mx, my, where,
            )

    def _check_area(self, lon: float, lat: float) -> None:
        area = getattr(self.survey_crs, "area_of_use", None) if self.survey_crs is not None else None
        if area is None:
            return
        margin = 3.0

        def inside(a: float, b: float) -> bool:
            return area.west - margin <= a <= area.east + margin and area.south - margin <= b <= area.north + margin

        if not inside(lon, lat) and inside(lat, lon):
            where, xcol, ycol = self.spec.where, self.spec.mapping["x"], self.spec.mapping["y"]
            raise DataError(
                f"{self.path}: the median position (longitude {lon:.6g}, latitude {lat:.6g}) is outside the area of use of "
                f"the survey CRS ({area.west:g}..{area.east:g} E, {area.south:g}..{area.north:g} N) and inside it with x and y "
                f"exchanged: x and y look swapped: set {where}.columns.x = \"{ycol}\" and {where}.columns.y = \"{xcol}\""
            )
        if not inside(lon, lat):
            self.log.warning(
                "%s: the median position (longitude %.6g, latitude %.6g) is outside the area of use of the survey CRS "
                "(%g..%g E, %g..%g N): check survey.crs, position_crs and that x is longitude and y latitude",
                self.path, lon, lat, area.west, area.east, area.south, area.north,
            )


def _projected_area(crs) -> tuple[float, float, float, float] | None:
    """Bounds (xmin, ymin, xmax, ymax) of a projected CRS's area of use in its own
    units, widened by a tenth of their span on each side; None when unknown."""
    area = getattr(crs, "area_of_use", None)
    if area is None:
        return None
    try:
        to_crs = Transformer.from_crs("EPSG:4326", crs, always_xy=True)
        xmin, ymin, xmax, ymax = to_crs.transform_bounds(area.west, area.south, area.east, area.north, densify_pts=21)
    except Exception:  # noqa: BLE001 - an area that cannot be projected gives no test
        return None
    if not all(np.isfinite([xmin, ymin, xmax, ymax])) or xmax <= xmin or ymax <= ymin:
        return None
    dx, dy = 0.1 * (xmax - xmin), 0.1 * (ymax - ymin)
    return xmin - dx, ymin - dy, xmax + dx, ymax + dy


def _inside(x: float, y: float, bounds: tuple[float, float, float, float]) -> bool:
    return bounds[0] <= x <= bounds[2] and bounds[1] <= y <= bounds[3]


_NUMERIC = re.compile(r"^\s*[+-]?\d+([.,]\d*)?\s*$")
_ISO_START = re.compile(r"^\s*\d{4}-\d{2}-\d{2}")


def _hint(reason: str, raw: dict, spec: InputSpec) -> str:
    """What the user should check for the commonest reject reason of a file."""
    where = spec.where
    text = {k: "" if v is None else str(v) for k, v in raw.items()}
    comma = spec["decimal"] == "." and any("," in text.get(k, "") for k in ("x", "y", "field", "time"))
    if reason == "malformed_row":
        return f"check {where}.delimiter and the quoting of the file"
    if reason == "bad_time":
        if spec["time_format"] == "iso8601" and _NUMERIC.match(text.get("time", "")):
            return f'the times are numbers: set {where}.time_format = "seconds_of_day" (and {where}.date)'
        if spec["time_format"] == "seconds_of_day" and _ISO_START.match(text.get("time", "")):
            return f'the times are dates and times: set {where}.time_format = "iso8601"'
        if comma:
            return f'the numbers use a decimal comma: set {where}.decimal = ","'
        return f"check {where}.columns.time and {where}.time_format"
    if reason == "ambiguous_local_time":
        return f"give times in UTC or with an offset, or set {where}.timezone to a fixed offset such as \"+01:00\""
    if reason in ("bad_position", "bad_field") and comma:
        return f'the numbers use a decimal comma: set {where}.decimal = ","'
    hints = {
        "bad_position": f"check {where}.columns.x and {where}.columns.y",
        "position_out_of_range": f"check {where}.position_crs",
        "bad_field": f"check {where}.columns.field",
        "field_out_of_range": f"check {where}.field_unit and ingest.field_min_nT / ingest.field_max_nT",
        "bad_elevation": f"check {where}.columns.elevation or {where}.columns.depth",
        "bad_altitude": f"check {where}.columns.altitude",
        "missing_line": f"check {where}.columns.line",
        "missing_sensor": f"check {where}.columns.sensor",
    }
    return hints[reason]


def check_rejected_fraction(ledger: FileLedger, max_fraction: float, spec: InputSpec) -> None:
    """Fail when more than ``max_fraction`` of a file's rows were rejected.

    Raises
    ------
    DataError
        Naming the file, the counts, the commonest reason with its first row
        and raw values, and what to check.
    """
    read, rejected = ledger.rows_read, ledger.rows_rejected
    if read == 0 or rejected / read <= max_fraction:
        return
    reason = max(ledger.by_reason, key=lambda r: ledger.by_reason[r])
    row, raw = ledger.examples[reason]
    shown = ", ".join(f"{k} = {raw.get(k)!r}" for k in _REASON_FIELDS[reason] if k in raw)
    raise DataError(
        f"{ledger.file}: {rejected} of {read} data rows rejected ({rejected / read:.0%}), more than "
        f"ingest.max_rows_rejected_fraction = {max_fraction:g}; commonest reason {reason} ({REASONS[reason]}), "
        f"first at row {row} ({shown}): {_hint(reason, raw, spec)}"
    )
