"""Vectorised parsing of raw table columns for the ingest stage.

Every function here takes one column of a batch as a :class:`pyarrow.Array`
(text read from a CSV file, or typed values from a Parquet file) and returns
NumPy arrays plus boolean masks saying which rows could not be parsed, so
that the caller can reject those rows with a reason. No function loops over
rows in Python.

Methods
-------
Numbers
    Text is trimmed, an optional decimal comma is turned into a point
    (:func:`pyarrow.compute.replace_substring`), and a fast cast to float64
    is tried; when it fails the valid rows are selected with a regular
    expression (RE2, :func:`pyarrow.compute.match_substring_regex`) and only
    those are cast. Empty text is "missing", not "bad".
ISO 8601 times
    Rows must match ``YYYY-MM-DD[T ]hh:mm[:ss[.f]][Z|+hh[:mm]]``; rows with
    a zone designator are parsed to UTC directly, naive rows are taken in the
    configured time zone (:meth:`pandas.Series.dt.tz_localize`, with
    daylight-saving gaps and overlaps reported separately).
Seconds of day
    A number of seconds after local midnight, added to a date (from a date
    column or from the configuration); a fall-back of more than 12 hours
    between consecutive rows of a file is read as crossing midnight.
"""

from __future__ import annotations

import datetime as dt
import re
import zoneinfo
from dataclasses import dataclass

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.compute as pc

__all__ = [
    "NS_PER_DAY",
    "parse_numbers",
    "parse_iso_times",
    "parse_dates",
    "parse_timezone",
    "parse_date_text",
    "local_to_utc",
    "MidnightTracker",
    "as_text",
    "missing_text",
]

NS_PER_S = 1_000_000_000
NS_PER_DAY = 86_400 * NS_PER_S
#: A fall-back of seconds of day larger than this (s) means midnight was crossed.
MIDNIGHT_FALLBACK_S = 12 * 3600.0
#: Seconds of day must lie in [0, this) s (two days, for loggers that count on past midnight).
MAX_SECONDS_OF_DAY = 2 * 86_400.0

_NUMBER_RE = r"(?i)^[+-]?(((\d+\.?\d*)|(\.\d+))(e[+-]?\d+)?|inf|infinity|nan)$"
_ISO_RE = r"^\d{4}-\d{2}-\d{2}[T ]\d{2}:\d{2}(:\d{2}(\.\d+)?)?([Zz]|[+-]\d{2}(:?\d{2})?)?$"
_ZONE_RE = r"([Zz]|[+-]\d{2}(:?\d{2})?)$"
_DATE_RE = r"^\d{4}-\d{2}-\d{2}$"
_OFFSET_RE = re.compile(r"^([+-])(\d{2}):?(\d{2})$")


def as_text(arr: pa.Array) -> pa.Array:
    """Return ``arr`` as trimmed UTF-8 text (typed values are cast to text)."""
    if pa.types.is_dictionary(arr.type):
        arr = arr.dictionary_decode()
    if not (pa.types.is_string(arr.type) or pa.types.is_large_string(arr.type)):
        arr = pc.cast(arr, pa.string())
    return pc.utf8_trim_whitespace(arr)


def missing_text(text: pa.Array) -> np.ndarray:
    """Rows that are null or empty text."""
    empty = pc.fill_null(pc.equal(text, ""), True)
    return np.asarray(empty.to_numpy(zero_copy_only=False), dtype=bool)


def parse_numbers(arr: pa.Array, decimal: str = ".") -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Parse a column of numbers.

    Parameters
    ----------
    arr : pyarrow.Array
        Text or numeric column.
    decimal : {".", ","}
        Decimal mark of the text.

    Returns
    -------
    values : numpy.ndarray of float64
        Parsed values; NaN where missing or bad ("nan" text gives NaN too).
    missing : numpy.ndarray of bool
        Empty text or null.
    bad : numpy.ndarray of bool
        Text that is not a number.
    """
    n = len(arr)
    if pa.types.is_integer(arr.type) or pa.types.is_floating(arr.type) or pa.types.is_decimal(arr.type):
        missing = np.asarray(arr.is_null().to_numpy(zero_copy_only=False), dtype=bool)
        values = np.asarray(pc.cast(arr, pa.float64()).to_numpy(zero_copy_only=False), dtype=np.float64)
        values = np.where(missing, np.nan, values)
        return values, missing, np.zeros(n, dtype=bool)
    text = as_text(arr)
    if decimal == ",":
        text = pc.replace_substring(text, ",", ".")
    missing = missing_text(text)
    text = pc.if_else(pa.array(missing), pa.scalar(None, pa.string()), text)
    try:
        parsed = pc.cast(text, pa.float64())
        bad = np.zeros(n, dtype=bool)
    except pa.ArrowInvalid:
        ok = pc.fill_null(pc.match_substring_regex(text, _NUMBER_RE), False)
        parsed = pc.cast(pc.if_else(ok, text, pa.scalar(None, pa.string())), pa.float64())
        bad = ~np.asarray(ok.to_numpy(zero_copy_only=False), dtype=bool) & ~missing
    values = np.asarray(parsed.to_numpy(zero_copy_only=False), dtype=np.float64)
    values = np.where(missing | bad, np.nan, values)
    return values, missing, bad


def parse_timezone(text: str):
    """Return a tzinfo for an IANA name ("Europe/Paris"), "UTC" or a fixed offset ("+02:00").

    Raises
    ------
    ValueError
        With a message naming the value and the accepted forms.
    """
    m = _OFFSET_RE.match(text.strip())
    if m:
        sign = -1 if m.group(1) == "-" else 1
        hours, minutes = int(m.group(2)), int(m.group(3))
        if hours > 14 or minutes > 59:
            raise ValueError(f"timezone = {text!r} is not a valid offset: give +hh:mm between -14:00 and +14:00")
        return dt.timezone(sign * dt.timedelta(hours=hours, minutes=minutes))
    if text.strip().upper() in ("UTC", "Z"):
        return dt.timezone.utc
    try:
        return zoneinfo.ZoneInfo(text.strip())
    except (zoneinfo.ZoneInfoNotFoundError, ValueError):
        raise ValueError(
            f"timezone = {text!r} is not known: give 'UTC', an IANA name such as 'Europe/Paris' or an offset such as '+02:00'"
        ) from None


def parse_date_text(text: str) -> int:
    """Return the UTC-naive nanoseconds of midnight of a ``YYYY-MM-DD`` date.

    Raises
    ------
    ValueError
        When the text is not a real calendar date in that form.
    """
    try:
        if not re.fullmatch(r"\d{4}-\d{2}-\d{2}", text.strip()):
            raise ValueError
        day = dt.date.fromisoformat(text.strip())
    except ValueError:
        raise ValueError(f"date = {text!r} is not a date: give it as YYYY-MM-DD, for example '2024-05-01'") from None
    return int((day - dt.date(1970, 1, 1)).days) * NS_PER_DAY


def _to_ns(series: pd.Series) -> np.ndarray:
    """int64 nanoseconds since 1970 (UTC for zone-aware values) of a datetime Series; NaT gives int64 min."""
    if not len(series):
        return np.zeros(0, dtype=np.int64)
    return np.asarray(pd.DatetimeIndex(series).as_unit("ns").asi8, dtype=np.int64).copy()


def local_to_utc(naive_ns: np.ndarray, tz) -> tuple[np.ndarray, np.ndarray]:
    """Convert naive local times to UTC.

    Parameters
    ----------
    naive_ns : numpy.ndarray of int64
        Local wall-clock times as nanoseconds since 1970-01-01 (no zone).
    tz : tzinfo
        From :func:`parse_timezone`.

    Returns
    -------
    utc_ns : numpy.ndarray of int64
        UTC nanoseconds (undefined where ``ambiguous``).
    ambiguous : numpy.ndarray of bool
        Local times that do not exist or occur twice (daylight-saving change).
    """
    naive_ns = np.asarray(naive_ns, dtype=np.int64)
    if tz is dt.timezone.utc:
        return naive_ns.copy(), np.zeros(naive_ns.size, dtype=bool)
    if isinstance(tz, dt.timezone):
        offset = int(tz.utcoffset(None).total_seconds()) * NS_PER_S
        return naive_ns - offset, np.zeros(naive_ns.size, dtype=bool)
    index = pd.DatetimeIndex(naive_ns.view("M8[ns]"))
    local = index.tz_localize(tz, ambiguous="NaT", nonexistent="NaT")
    bad = np.asarray(local.isna())
    utc = local.tz_convert("UTC").as_unit("ns").asi8.copy()
    utc[bad] = 0
    return utc, bad


def _text_series(text: pa.Array) -> pd.Series:
    return pd.Series(text.to_pandas(), dtype="str") if len(text) else pd.Series([], dtype="str")


def parse_iso_times(arr: pa.Array, tz) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Parse ISO 8601 date-times to UTC nanoseconds.

    Parameters
    ----------
    arr : pyarrow.Array
        Text, or a Parquet timestamp column.
    tz : tzinfo
        Time zone of times written without a zone designator.

    Returns
    -------
    ns : numpy.ndarray of int64
        UTC nanoseconds since 1970-01-01 (0 where bad).
    bad : numpy.ndarray of bool
        Missing, or not an ISO 8601 date and time.
    ambiguous : numpy.ndarray of bool
        Naive local times that fall in a daylight-saving gap or overlap.
    """
    n = len(arr)
    if pa.types.is_timestamp(arr.type):
        bad = np.asarray(arr.is_null().to_numpy(zero_copy_only=False), dtype=bool)
        if arr.type.tz is not None:
            ns = pc.cast(pc.cast(arr, pa.timestamp("ns", tz="UTC")), pa.int64())
            ns = np.asarray(pc.fill_null(ns, 0).to_numpy(zero_copy_only=False), dtype=np.int64)
            return ns, bad, np.zeros(n, dtype=bool)
        ns = pc.cast(pc.cast(arr, pa.timestamp("ns")), pa.int64())
        ns = np.asarray(pc.fill_null(ns, 0).to_numpy(zero_copy_only=False), dtype=np.int64)
        utc, amb = local_to_utc(ns, tz)
        return utc, bad, amb & ~bad
    if not (pa.types.is_string(arr.type) or pa.types.is_large_string(arr.type) or pa.types.is_dictionary(arr.type)):
        return np.zeros(n, dtype=np.int64), np.ones(n, dtype=bool), np.zeros(n, dtype=bool)
    text = as_text(arr)
    ok = np.asarray(pc.fill_null(pc.match_substring_regex(text, _ISO_RE), False).to_numpy(zero_copy_only=False), bool)
    aware = ok & np.asarray(
        pc.fill_null(pc.match_substring_regex(text, _ZONE_RE), False).to_numpy(zero_copy_only=False), bool
    )
    naive = ok & ~aware
    ns = np.zeros(n, dtype=np.int64)
    bad = ~ok
    ambiguous = np.zeros(n, dtype=bool)
    series = _text_series(text)
    if aware.any():
        idx = np.flatnonzero(aware)
        parsed = pd.to_datetime(series.iloc[idx], format="ISO8601", errors="coerce", utc=True)
        nat = np.asarray(parsed.isna())
        ns[idx] = np.where(nat, 0, _to_ns(parsed))
        bad[idx[nat]] = True
    if naive.any():
        idx = np.flatnonzero(naive)
        parsed = pd.to_datetime(series.iloc[idx], format="ISO8601", errors="coerce")
        nat = np.asarray(parsed.isna())
        local = np.where(nat, 0, _to_ns(parsed))
        utc, amb = local_to_utc(local, tz)
        ns[idx] = np.where(nat | amb, 0, utc)
        bad[idx[nat]] = True
        ambiguous[idx[amb & ~nat]] = True
    return ns, bad, ambiguous


def parse_dates(arr: pa.Array) -> tuple[np.ndarray, np.ndarray]:
    """Parse a ``YYYY-MM-DD`` date column to naive nanoseconds of local midnight.

    Returns
    -------
    ns : numpy.ndarray of int64
        Midnight of each date (0 where bad).
    bad : numpy.ndarray of bool
        Missing or not a calendar date.
    """
    n = len(arr)
    if pa.types.is_date(arr.type) or pa.types.is_timestamp(arr.type):
        bad = np.asarray(arr.is_null().to_numpy(zero_copy_only=False), dtype=bool)
        days = pc.cast(pc.cast(arr, pa.date32()), pa.int32())
        days = np.asarray(pc.fill_null(days, 0).to_numpy(zero_copy_only=False), dtype=np.int64)
        return days * NS_PER_DAY, bad
    text = as_text(arr)
    ok = np.asarray(pc.fill_null(pc.match_substring_regex(text, _DATE_RE), False).to_numpy(zero_copy_only=False), bool)
    ns = np.zeros(n, dtype=np.int64)
    if ok.any():
        idx = np.flatnonzero(ok)
        parsed = pd.to_datetime(_text_series(text).iloc[idx], format="%Y-%m-%d", errors="coerce")
        nat = np.asarray(parsed.isna())
        ns[idx] = np.where(nat, 0, _to_ns(parsed))
        ok[idx[nat]] = False
    return ns, ~ok


@dataclass
class MidnightTracker:
    """Count midnight crossings in the seconds of day of one file.

    Attributes
    ----------
    previous_s : float or None
        Seconds of day of the last valid row seen, s.
    days : int
        Days added so far.
    crossings : list of (int, float, float)
        (data row, previous seconds, seconds) of each crossing.
    """

    previous_s: float | None = None
    days: int = 0

    def __post_init__(self) -> None:
        self.crossings: list[tuple[int, float, float]] = []

    def day_offsets(self, seconds: np.ndarray, valid: np.ndarray, rows: np.ndarray) -> np.ndarray:
        """Return the whole days to add to each row of a batch (rows in file order).

        Parameters
        ----------
        seconds : numpy.ndarray of float
            Seconds of day, s.
        valid : numpy.ndarray of bool
            Rows whose seconds are usable.
        rows : numpy.ndarray of int
            Data row numbers (for the log).
        """
        offsets = np.full(seconds.size, self.days, dtype=np.int64)
        idx = np.flatnonzero(valid)
        if idx.size == 0:
            return offsets
        s = seconds[idx]
        previous = np.concatenate([[s[0] if self.previous_s is None else self.previous_s], s[:-1]])
        cross = (s - previous) < -MIDNIGHT_FALLBACK_S
        days = self.days + np.cumsum(cross)
        offsets[idx] = days
        for k in np.flatnonzero(cross):
            self.crossings.append((int(rows[idx[k]]), float(previous[k]), float(s[k])))
        self.previous_s = float(s[-1])
        self.days = int(days[-1])
        return offsets
