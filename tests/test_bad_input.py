"""The bad-input catalogue: every way a survey's files or configuration can be
wrong that we know of, one case a row, run through the command line.

Each case builds the tiny invented survey of ``tests/_bad_input_cases.py``
(3 survey lines and a tie line, 2 sensors, 1,640 readings) in tmp_path,
spoils one thing, and runs ``lodeline run --quiet`` in process. It ends one
of two ways, and the test says which:

refused
    exit code 2; exactly one line on standard error, ``lodeline: error:``,
    naming the file (and the row or key) and saying what to do; nothing on
    standard output; no traceback anywhere (terminal or run log); and no
    stage output written or changed. A case refused before any stage runs
    leaves no run folder or an empty store; a case refused by stage X
    leaves no output of X or of any stage after it (the stages before X
    ran on the same input and are kept, as the runner's cache intends); a
    case run after a good run ("prepare") leaves the manifest and the
    store listing exactly as they were.
usable
    exit code 0, with the bad part rejected (ingest's ledger and
    ``rejected_rows.csv``, by reason) or flagged (the stage ledger's flag
    counts), counted exactly where the case knows how many it injected;
    ingest's readings in equal the data rows of the files (nothing dropped
    silently) and every stage's counts add up.

``until`` stops each run at the first stage that shows the outcome (the
stages after it do not look at the spoiled part again), which keeps the
whole catalogue to about a minute on two cores. The catalogue is written out
in ``docs/bad_input.md``.
"""

from __future__ import annotations

import json
import re
import sys
from dataclasses import dataclass, field
from pathlib import Path
from typing import Callable

import numpy as np
import pandas as pd
import pytest
import xarray as xr

sys.path.insert(0, str(Path(__file__).parent))

from _bad_input_cases import (  # noqa: E402
    T0,
    Survey,
    base_times_s,
    del_key,
    make_survey,
    set_key,
    times_s,
)

from lodeline.cli import main  # noqa: E402
from lodeline.runner import discover_stages  # noqa: E402

STAGES = [s.name for s in discover_stages()]
NUMBER_COLUMNS = ["lon", "lat", "depth_m", "altitude_m", "field_nT"]
#: Words with which a message tells the user what to do (or what is allowed).
TODO = re.compile(r"\b(set|give|check|remove|add|map|correct|rename|copy|save|use|name|narrow|raise|lower|move|did you mean|expected)\b")

try:
    import lodeline.steps.ranking  # noqa: F401

    RANKING = True
except ImportError:
    RANKING = False


def _nothing(s: Survey) -> None:
    pass


@dataclass(frozen=True)
class Case:
    """One row of the catalogue.

    Attributes
    ----------
    id : str
        pytest id.
    what : str
        What is wrong, in words.
    build : callable
        Spoils the survey (in memory, before it is written); may put counts
        it knows into ``survey.expected``.
    expect : {"refused", "usable"}
    until : str or None
        Stage the run stops after (``--until``); why is in ``why``.
    args : tuple of str
        Further command-line arguments.
    names, todo : tuple of str
        Refused: texts the error line must hold (the file, row or key; what to do).
    refused_at : str, optional
        Refused: the stage that refuses (None: before any stage runs).
    prepare : tuple of str, optional
        Refused: arguments of a good run made first; nothing of it may change.
    after_prepare : callable, optional
        Spoils the survey after the good run (then it is written again).
    rejected : dict
        Usable: ingest's rejected readings by reason (None: some, count unknown).
    base_rejected : dict
        Usable: rejected base-station rows by reason.
    flagged : tuple of (stage, flag, count)
        Usable: readings carrying the flag in that stage's ledger.
    check : callable, optional
        Further assertions, ``check(survey, manifest)``.
    """

    id: str
    what: str
    build: Callable[[Survey], None] = _nothing
    expect: str = "refused"
    until: str | None = "ingest"
    why: str = "ingest reads every file and checks every row"
    args: tuple = ()
    names: tuple = ()
    todo: tuple = ()
    refused_at: str | None = None
    prepare: tuple | None = None
    after_prepare: Callable[[Survey], None] | None = None
    rejected: dict = field(default_factory=dict)
    base_rejected: dict = field(default_factory=dict)
    flagged: tuple = ()
    check: Callable | None = None
    survey_arg: Callable[[Survey], str] | None = None
    marks: tuple = ()


# --------------------------------------------------------------------------- helpers of the builds
def _readings(s: Survey, name: str = "L1") -> pd.DataFrame:
    return s.readings[f"readings_{name}.csv"]


def _set(s: Survey, line: str, rows: list[int], column: str, values: list[str]) -> None:
    _readings(s, line).loc[rows, column] = values


def _only(s: Survey, *lines: str) -> None:
    for key in list(s.readings):
        if key not in {f"readings_{n}.csv" for n in lines}:
            del s.readings[key]


def _all(s: Survey, fn) -> None:
    for table in s.readings.values():
        fn(table)


def _rename_gz(s: Survey, line: str) -> str:
    name = f"readings_{line}.csv"
    s.readings[name + ".gz"] = s.readings.pop(name)
    s.config["inputs"]["readings"]["files"] = ["data/readings_*.csv*"]
    return name + ".gz"


def _gzip_cut_late(s: Survey) -> None:
    # Eight copies of the survey in one file, read in 10 kB blocks: the header and the
    # first blocks decompress, the stream ends in the middle (the run must still stop).
    # Whether the reader's read-ahead meets the cut while the header is read or
    # after some rows depends on timing; the message names the row in the second case.
    s.readings = {"readings_all.csv.gz": pd.concat([s.all_readings()] * 8, ignore_index=True)}
    set_key(s.config, "inputs.readings.files", ["data/readings_*.csv.gz"])
    set_key(s.config, "ingest.block_size_mb", 0.01)
    s.byte_edits["readings_all.csv.gz"] = lambda b: b[: len(b) * 8 // 10]


def _cut_last_row(text: str) -> str:
    lines = text.rstrip("\n").split("\n")
    lines[-1] = lines[-1][:30]  # the time and part of the longitude: a copy interrupted mid-row
    return "\n".join(lines)


def _decimal_comma(s: Survey, declared: bool) -> None:
    for name, table in s.readings.items():
        for col in NUMBER_COLUMNS:
            table[col] = table[col].str.replace(".", ",", regex=False)
        s.delimiters[name] = ";"
    set_key(s.config, "inputs.readings.delimiter", ";")
    if declared:
        set_key(s.config, "inputs.readings.decimal", ",")


def _microtesla(s: Survey, declared: bool) -> None:
    _all(s, lambda t: t.__setitem__("field_nT", [f"{float(v) / 1000:.6f}" for v in t["field_nT"]]))
    if declared:
        set_key(s.config, "inputs.readings.field_unit", "uT")


def _swap_lonlat(s: Survey) -> None:
    _all(s, lambda t: t.__setitem__(["lon", "lat"], t[["lat", "lon"]].to_numpy()))


def _projected_in_lonlat(s: Survey) -> None:
    from pyproj import Transformer

    to_utm = Transformer.from_crs("EPSG:4326", "EPSG:32631", always_xy=True)
    for table in s.readings.values():
        e, n = to_utm.transform(table["lon"].astype(float).to_numpy(), table["lat"].astype(float).to_numpy())
        table["lon"] = [f"{v:.3f}" for v in e]
        table["lat"] = [f"{v:.3f}" for v in n]


def _local_times(s: Survey, zone: str, start: pd.Timestamp = T0) -> None:
    for table in s.readings.values():
        t = pd.to_datetime(table["time"], format="ISO8601", utc=True).dt.tz_convert(zone)
        table["time"] = t.dt.strftime("%Y-%m-%d %H:%M:%S.%f").str[:-3]


def _seconds_of_day(s: Survey, one_file: bool) -> None:
    """Readings and base station in seconds of day on one configured date (no date columns)."""
    if one_file:
        s.readings = {"readings_all.csv": s.all_readings()}
    for table in s.readings.values():
        t = pd.to_datetime(table["time"], format="ISO8601", utc=True)
        table["time"] = [f"{(x - x.normalize()).total_seconds():.3f}" for x in t]
    set_key(s.config, "inputs.readings.time_format", "seconds_of_day")
    set_key(s.config, "inputs.readings.date", "2026-05-14")
    s.base["base_station.csv"] = s.base["base_station.csv"].drop(columns=["date"])
    set_key(s.config, "inputs.base_station.date", "2026-05-14")
    del_key(s.config, "inputs.base_station.columns.date")


MIDNIGHT = pd.Timestamp("2026-05-14T23:58:00Z")


def _midnight_survey(folder: Path, one_file: bool) -> Survey:
    s = make_survey(folder, start=MIDNIGHT)
    _seconds_of_day(s, one_file)
    return s


def _summary(manifest: dict, stage: str = "ingest") -> dict:
    return manifest["stages"][stage]["summary"]


def _ingest_field_median(s: Survey) -> float:
    ds = xr.open_zarr(s.run / "ingest" / "readings.zarr")
    return float(np.nanmedian(ds["total_field"].values))


# --------------------------------------------------------------------------- builds that need counts
def _mixed_time_formats(s: Survey) -> None:
    table = _readings(s, "L1")
    t = pd.to_datetime(table["time"], format="ISO8601", utc=True)
    day_first = [5, 15, 25, 35]
    table.loc[day_first, "time"] = [x.strftime("%d/%m/%Y %H:%M:%S") for x in t[day_first]]
    offsets = [45, 55, 65]  # valid ISO 8601 with an offset: the same instants, kept
    table.loc[offsets, "time"] = [x.tz_convert("+02:00").isoformat(timespec="milliseconds") for x in t[offsets]]
    table.loc[[75], "time"] = [f"{(t[75] - t[75].normalize()).total_seconds():.1f}"]


def _dst_ambiguous(s: Survey) -> None:
    # The survey starts at 01:59 local time (CEST) on the night the clocks go back:
    # every local time from 02:00 to 03:00 happens twice and cannot be placed.
    start = pd.Timestamp("2026-10-24T23:59:00Z")
    fresh = make_survey(s.folder, start=start)
    s.readings, s.base = fresh.readings, fresh.base
    ambiguous = sum(int(np.count_nonzero(times_s(t, start) >= 60.0)) for t in s.readings.values())
    s.expected["rejected"] = {"ambiguous_local_time": ambiguous}
    _local_times(s, "Europe/Paris")
    set_key(s.config, "inputs.readings.timezone", "Europe/Paris")
    set_key(s.config, "ingest.max_rows_rejected_fraction", 1.0)


def _duplicate_times(s: Survey) -> None:
    table = _readings(s, "L1")  # rows alternate S1, S2 at each time: even rows are S1
    for row in (20, 60, 100):
        table.loc[row, "time"] = table.loc[row - 2, "time"]


def _backwards_times(s: Survey) -> None:
    table = _readings(s, "L2")  # odd rows are S2
    for a, b in ((31, 33), (71, 73)):
        table.loc[[a, b], "time"] = table.loc[[b, a], "time"].to_numpy()


def _base_ends_early(s: Survey) -> None:
    base = s.base["base_station.csv"]
    keep = base_times_s(base) <= 60.0  # the base station stops 60 s into the survey (during line L2)
    s.base["base_station.csv"] = base[keep].reset_index(drop=True)
    after = sum(int(np.count_nonzero(times_s(t) > 60.0)) for t in s.readings.values())
    s.expected["flagged"] = (("diurnal", "base_station_gap", after),)


def _single_reading(s: Survey) -> None:
    _only(s, "L1")
    s.readings["readings_L1.csv"] = _readings(s, "L1").iloc[:1]
    del s.config["positions"]["sensors"]["S2"]
    set_key(s.config, "levelling.method", "along_line_median")


def _tie_line_off_the_survey(s: Survey) -> None:
    table = _readings(s, "T1")
    table["lon"] = [f"{float(v) + 0.001:.8f}" for v in table["lon"]]  # about 65 m east, past the line ends


def _stuck_sensors(s: Survey) -> None:
    _all(s, lambda t: t.__setitem__("field_nT", "49950.000"))


def _base_bad_rows(s: Survey) -> None:
    base = s.base["base_station.csv"]
    base.loc[[10, 11, 12, 13], "field_nT"] = "---"
    base.loc[[20, 21], "seconds_of_day"] = "x"


def _random_bytes(raw: bytes) -> bytes:
    return np.random.default_rng(3).integers(0, 256, 4000, dtype=np.uint8).tobytes()


# --------------------------------------------------------------------------- the catalogue
def _r(s, dotted, value):
    set_key(s.config, dotted, value)


CASES = [
    # ----------------------------------------------------------------- readings files
    Case("readings-empty-file", "a readings file of 0 bytes",
         lambda s: s.text_edits.__setitem__("readings_L2.csv", lambda t: ""),
         names=("readings_L2.csv",), todo=("remove it from inputs.readings.files",)),
    Case("readings-header-only", "a readings file with a header and no rows",
         lambda s: s.text_edits.__setitem__("readings_L2.csv", lambda t: t.split("\n", 1)[0] + "\n"),
         names=("readings_L2.csv", "no data rows"), todo=("remove it from inputs.readings.files",)),
    Case("readings-gzip-cut", "a gzip readings file cut at 60 % of its bytes (an interrupted copy)",
         lambda s: s.byte_edits.__setitem__(_rename_gz(s, "L1"), lambda b: b[: len(b) * 6 // 10]),
         names=("readings_L1.csv.gz", "truncated"), todo=("copy the file again",)),
    Case("readings-gzip-cut-mid-stream", "a larger gzip file (13,120 rows) cut at 80 %: the cut is met after rows were read",
         _gzip_cut_late, names=("readings_all.csv.gz", "truncated or damaged"),
         todo=("copy the file again",)),
    Case("readings-csv-cut-mid-row", "a CSV readings file cut in the middle of its last row",
         lambda s: s.text_edits.__setitem__("readings_L2.csv", _cut_last_row),
         expect="usable", rejected={"malformed_row": 1}),
    Case("readings-wrong-delimiter", "a readings file separated by ';' with delimiter ','",
         lambda s: s.delimiters.__setitem__("readings_L1.csv", ";"),
         names=("readings_L1.csv", "single column"), todo=('delimiter = ";"',)),
    Case("readings-decimal-comma", "numbers with a decimal comma (and ';' delimiter) without decimal = ','",
         lambda s: _decimal_comma(s, declared=False),
         names=("readings_L1.csv", "first at row 1"), todo=('decimal = ","',)),
    Case("readings-decimal-comma-declared", "the same files with decimal = ',' and delimiter = ';' set",
         lambda s: _decimal_comma(s, declared=True), expect="usable",
         check=lambda s, m: abs(_ingest_field_median(s) - 49950.0) < 10.0),
    Case("readings-missing-column", "one readings file lacks the mapped field column",
         lambda s: s.readings.__setitem__("readings_L3.csv", _readings(s, "L3").drop(columns=["field_nT"])),
         names=("readings_L3.csv", "inputs.readings.columns.field"), todo=("set inputs.readings.columns.field",)),
    Case("readings-misspelt-column", "the files' header spells the field column 'feild_nT'",
         lambda s: s.readings.update({k: t.rename(columns={"field_nT": "feild_nT"}) for k, t in s.readings.items()}),
         names=("readings_L1.csv", "no column 'field_nT'"), todo=("closest header name: 'feild_nT'",)),
    Case("readings-misspelt-mapping-key", "the column mapping has the key 'feild' instead of 'field'",
         lambda s: s.config["inputs"]["readings"]["columns"].__setitem__(
             "feild", s.config["inputs"]["readings"]["columns"].pop("field")),
         names=("survey.toml", "inputs.readings.columns.feild"), todo=("did you mean 'field'",)),
    Case("readings-non-numeric", "text in number columns: 3 field values, a longitude, a latitude",
         lambda s: (_set(s, "L1", [10, 20, 30], "field_nT", ["n/a", "49 950.1", "abc"]),
                    _set(s, "L1", [40], "lon", ["east"]), _set(s, "L1", [50], "lat", ["54.1N"])),
         expect="usable", rejected={"bad_field": 3, "bad_position": 2}),
    Case("readings-nan-field", "4 field values NaN / empty / nan / NAN",
         lambda s: _set(s, "L2", [10, 20, 30, 40], "field_nT", ["NaN", "", "nan", "NAN"]),
         expect="usable", until="spikes", why="kept as NaN by ingest; the spikes stage flags dropouts",
         flagged=(("spikes", "dropout", 4),)),
    Case("readings-infinite-values", "infinite field (3), longitude (1) and depth (1) values",
         lambda s: (_set(s, "L2", [10, 20, 30], "field_nT", ["inf", "-inf", "Infinity"]),
                    _set(s, "L2", [40], "lon", ["inf"]), _set(s, "L2", [50], "depth_m", ["-inf"])),
         expect="usable", rejected={"field_out_of_range": 3, "position_out_of_range": 1, "bad_elevation": 1}),
    Case("readings-field-in-microtesla", "the total field written in microtesla with field_unit 'nT'",
         lambda s: _microtesla(s, declared=False),
         names=("readings_L1.csv", "inputs.readings.columns.field"), todo=('set inputs.readings.field_unit = "uT"',)),
    Case("readings-field-in-microtesla-declared", "the same files with field_unit = 'uT'",
         lambda s: _microtesla(s, declared=True), expect="usable",
         check=lambda s, m: abs(_ingest_field_median(s) - 49950.0) < 10.0),
    Case("readings-lonlat-swapped", "longitude and latitude columns exchanged",
         _swap_lonlat, names=("readings_L1.csv", "look swapped"),
         todo=('set inputs.readings.columns.x = "lat"',)),
    Case("readings-lonlat-out-of-range", "3 longitudes beyond +-180 deg and 2 latitudes beyond +-90 deg",
         lambda s: (_set(s, "L1", [5, 6, 7], "lon", ["200.0", "-181.5", "360"]),
                    _set(s, "L1", [8, 9], "lat", ["95", "-90.5"])),
         expect="usable", rejected={"position_out_of_range": 5}),
    Case("readings-projected-as-geographic", "UTM eastings/northings in the lon/lat columns, position_crs EPSG:4326",
         _projected_in_lonlat, names=("readings_L1.csv", "looks like projected coordinates"),
         todo=("set inputs.readings.position_crs",)),
    Case("readings-geographic-as-projected", "longitude/latitude given with position_crs = 'EPSG:32631'",
         lambda s: _r(s, "inputs.readings.position_crs", "EPSG:32631"),
         names=("readings_L1.csv", "area of use"), todo=('set inputs.readings.position_crs = "EPSG:4326"',)),
    Case("readings-unknown-epsg", "position_crs = 'EPSG:999999'",
         lambda s: _r(s, "inputs.readings.position_crs", "EPSG:999999"),
         names=("survey.toml", "inputs.readings.position_crs"), todo=("give an EPSG code",)),
    Case("readings-local-time-zone", "naive local times (Europe/Paris, UTC+2) with timezone = 'Europe/Paris'",
         lambda s: (_local_times(s, "Europe/Paris"), _r(s, "inputs.readings.timezone", "Europe/Paris")),
         expect="usable", check=lambda s, m: _summary(m)["time_start"] == "2026-05-14T09:00:00+00:00"),
    Case("readings-local-time-no-zone", "the same naive local times with no timezone (taken as UTC: 2 h late)",
         lambda s: _local_times(s, "Europe/Paris"), until="diurnal", refused_at="diurnal",
         why="ingest cannot know the clock; diurnal finds no base-station time in common",
         names=("base_station.csv", "does not overlap"), todo=("check the date and time zone",)),
    Case("readings-dst-ambiguous", "naive local times in the hour repeated when the clocks go back",
         _dst_ambiguous, expect="usable"),
    Case("readings-mixed-time-formats", "4 day-first dates and 1 seconds-of-day among ISO 8601 times; 3 with +02:00",
         _mixed_time_formats, expect="usable", rejected={"bad_time": 5},
         check=lambda s, m: "time_backwards" not in m["stages"]["ingest"]["ledger"]["flagged"]),
    Case("readings-seconds-given-as-iso", "seconds of day in the time column with time_format 'iso8601'",
         lambda s: _all(s, lambda t: t.__setitem__("time", [f"{32400 + 0.1 * i:.1f}" for i in range(len(t))])),
         names=("readings_L1.csv", "bad_time", "first at row 1"), todo=('time_format = "seconds_of_day"',)),
    Case("readings-duplicate-timestamps", "3 readings with the time of the previous reading of their sensor",
         _duplicate_times, expect="usable", flagged=(("ingest", "time_duplicate", 3),)),
    Case("readings-backwards-timestamps", "2 pairs of readings with their times exchanged",
         _backwards_times, expect="usable", flagged=(("ingest", "time_backwards", 2),)),
    Case("readings-outside-base-period", "the base station stops 60 s into the survey",
         _base_ends_early, expect="usable", until="diurnal", why="the diurnal stage flags readings it cannot correct"),
    Case("survey-crossing-midnight", "seconds of day on one date, one readings file and the base station across midnight",
         _nothing, expect="usable", until="diurnal", why="times are placed by ingest and matched by diurnal",
         check=lambda s, m: (_summary(m)["midnight_crossings"] == 1
                             and _summary(m)["time_start"] == "2026-05-14T23:58:00+00:00"
                             and _summary(m)["time_end"].startswith("2026-05-15T00:00:")
                             and "base_station_gap" not in m["stages"]["diurnal"]["ledger"]["flagged"]
                             and "time_backwards" not in m["stages"]["ingest"]["ledger"]["flagged"])),
    Case("readings-files-after-midnight", "seconds of day on one date, a readings file wholly after midnight",
         _nothing, names=("readings_T1.csv", "cross midnight between files"),
         todo=("map a date column",)),
    Case("readings-single-line", "the survey is one line (no tie line)",
         lambda s: _only(s, "L1"), until="levelling", refused_at="levelling",
         why="only levelling needs more than one line",
         names=("survey.toml", "levelling"), todo=('method = "along_line_median"',)),
    Case("readings-single-reading", "the survey is one reading",
         _single_reading, until="gridding", refused_at="gridding",
         why="every stage before gridding handles one reading; the grid cannot be made",
         names=("survey.toml", "gridding"), todo=("raise gridding.blank_distance_m",)),
    Case("lines-without-crossover", "the tie line runs 40 m east of the survey lines' ends",
         _tie_line_off_the_survey, until="levelling", refused_at="levelling", why="crossovers are found by levelling",
         names=("survey.toml", "no usable crossover"), todo=("check that the tie lines cross",)),
    Case("every-reading-flagged", "every sensor stuck at one value (all readings flagged dropout)",
         _stuck_sensors, until="levelling", refused_at="levelling",
         why="spikes flags them all; levelling is the first stage that needs accepted readings",
         names=("survey.toml", "levelling.exclude_flags", "dropout 1640"), todo=("see the earlier stages' flags",)),
    Case("readings-pattern-matches-nothing", "files = ['data/lines_*.csv'] matches no file",
         lambda s: _r(s, "inputs.readings.files", ["data/lines_*.csv"]),
         names=("survey.toml", "lines_*.csv"), todo=("check the path",)),
    Case("readings-not-text", "a readings file of random bytes",
         lambda s: s.byte_edits.__setitem__("readings_L1.csv", _random_bytes),
         names=("readings_L1.csv", "not UTF-8 text"), todo=("save the file as UTF-8",)),
    Case("readings-no-header", "a readings file without its header row",
         lambda s: s.text_edits.__setitem__("readings_L1.csv", lambda t: t.split("\n", 1)[1]),
         names=("readings_L1.csv", "looks like data"), todo=("add a header row",)),
    Case("readings-empty-line-name", "2 readings with an empty line name",
         lambda s: _set(s, "L1", [3, 4], "line", ["", " "]), expect="usable", rejected={"missing_line": 2}),
    Case("readings-one-column-mapped-twice", "columns.line and columns.sensor both name 'sensor'",
         lambda s: _r(s, "inputs.readings.columns.line", "sensor"),
         names=("survey.toml", "both name the column 'sensor'"), todo=("map each to its own column",)),
    # ----------------------------------------------------------------- base-station files
    Case("base-missing-column", "after a good run the base-station file loses its field column",
         prepare=("--until", "ingest"),
         after_prepare=lambda s: s.base.__setitem__("base_station.csv", s.base["base_station.csv"].drop(columns=["field_nT"])),
         names=("base_station.csv", "inputs.base_station.columns.field"), todo=("set inputs.base_station.columns.field",)),
    Case("base-empty-file", "a base-station file of 0 bytes",
         lambda s: s.text_edits.__setitem__("base_station.csv", lambda t: ""),
         names=("base_station.csv", "empty"), todo=("remove it from inputs.base_station.files",)),
    Case("base-no-overlap", "the base station recorded the day before the survey",
         lambda s: s.base["base_station.csv"].__setitem__("date", "2026-05-13"), until="diurnal",
         refused_at="diurnal", why="ingest reads the base station as it is; diurnal matches it to the readings",
         names=("base_station.csv", "does not overlap"), todo=("diurnal.time_offset_s",)),
    Case("base-bad-rows", "4 base-station field values '---' and 2 times 'x'", _base_bad_rows,
         expect="usable", base_rejected={"bad_field": 4, "bad_time": 2},
         check=lambda s, m: _summary(m)["base_station_readings_rejected"] == 6),
    Case("base-field-in-microtesla", "the base-station field in microtesla with field_unit 'nT'",
         lambda s: s.base["base_station.csv"].__setitem__(
             "field_nT", [f"{float(v) / 1000:.6f}" for v in s.base["base_station.csv"]["field_nT"]]),
         names=("base_station.csv",), todo=('set inputs.base_station.field_unit = "uT"',)),
    Case("base-seconds-without-date", "base station in seconds of day with no date column mapped and no date",
         lambda s: del_key(s.config, "inputs.base_station.columns.date"),
         names=("survey.toml", "inputs.base_station"), todo=("set inputs.base_station.date",)),
    # ----------------------------------------------------------------- survey configuration
    Case("config-unknown-table", "a table [spikez]", lambda s: _r(s, "spikez.threshold_nT", 2.0),
         names=("survey.toml", "[spikez]"), todo=("did you mean [spikes]",)),
    Case("config-unknown-top-level-key", "crs = ... outside any table", lambda s: _r(s, "crs", "EPSG:32631"),
         names=("survey.toml", "'crs'"), todo=("move it into its table",)),
    Case("config-unknown-key-in-stage", "spikes.treshold_nT", lambda s: _r(s, "spikes.treshold_nT", 2.0),
         names=("survey.toml", "spikes.treshold_nT"), todo=("did you mean 'threshold_nT'",)),
    Case("config-unknown-key-in-input", "inputs.readings.position_src",
         lambda s: _r(s, "inputs.readings.position_src", "EPSG:4326"),
         names=("survey.toml", "inputs.readings.position_src"), todo=("did you mean 'position_crs'",)),
    Case("config-wrong-type", "diurnal.max_gap_s = '30 s' (text)", lambda s: _r(s, "diurnal.max_gap_s", "30 s"),
         names=("survey.toml", "diurnal.max_gap_s"), todo=("expected a number",)),
    Case("config-negative-cell-size", "gridding.cell_size_m = -0.5", lambda s: _r(s, "gridding.cell_size_m", -0.5),
         names=("survey.toml", "gridding.cell_size_m"), todo=("expected a number, > 0",)),
    Case("config-window-larger-than-survey", "levelling.median_window_m = 5000 on 50 m lines",
         lambda s: _r(s, "levelling.median_window_m", 5000.0), expect="usable", until="levelling",
         why="the window is used by levelling only", flagged=(("levelling", "edge", 1640),)),
    Case("config-field-limits-crossed", "ingest.field_min_nT above ingest.field_max_nT",
         lambda s: (_r(s, "ingest.field_min_nT", 60000.0), _r(s, "ingest.field_max_nT", 50000.0)),
         names=("survey.toml", "ingest.field_min_nT"), todo=("lower field_min_nT or raise field_max_nT",)),
    Case("config-survey-unknown-epsg", "[survey] crs = 'EPSG:999999'", lambda s: _r(s, "survey.crs", "EPSG:999999"),
         names=("survey.toml", "[survey] crs"), todo=("give an EPSG code",)),
    Case("config-survey-geographic-crs", "[survey] crs = 'EPSG:4326' (degrees)", lambda s: _r(s, "survey.crs", "EPSG:4326"),
         names=("survey.toml", "[survey] crs"), todo=("give a projected CRS",)),
    Case("config-toml-syntax", "an unclosed table header",
         lambda s: setattr(s, "toml_edit", lambda t: t + "[spikes\nthreshold_nT = 2\n"),
         names=("survey.toml", "line"), todo=("correct the file",)),
    Case("config-survey-file-missing", "the survey file named on the command line does not exist",
         survey_arg=lambda s: str(s.folder / "survy.toml"), names=("survy.toml",), todo=("check the path",)),
    Case("seeds-file-missing", "[inputs.seeds] names a seed-item file that does not exist",
         lambda s: _r(s, "inputs.seeds.files", ["data/seeds.csv"]), names=("seeds.csv",), todo=("check the path",),
         marks=() if RANKING else (pytest.mark.xfail(strict=False, reason="ranking stage not yet in"),)),
    # ----------------------------------------------------------------- command line
    Case("cli-unknown-stage-until", "--until leveling", until=None, args=("--until", "leveling"),
         prepare=("--until", "ingest"), names=("--until leveling",), todo=("did you mean 'levelling'",)),
    Case("cli-unknown-stage-redo", "--redo spike", args=("--redo", "spike"),
         names=("--redo spike",), todo=("did you mean 'spikes'",)),
    Case("cli-set-without-value", "--set spikes.threshold_nT (no '=')", args=("--set", "spikes.threshold_nT"),
         prepare=("--until", "ingest"), names=("--set 'spikes.threshold_nT'",), todo=("expected stage.key=value",)),
    Case("cli-set-unknown-key", "--set gridding.cel_size_m=0.5", args=("--set", "gridding.cel_size_m=0.5"),
         names=("survey.toml", "gridding.cel_size_m"), todo=("did you mean 'cell_size_m'",)),
    Case("cli-set-out-of-range", "--set spikes.window_samples=2", args=("--set", "spikes.window_samples=2"),
         prepare=("--until", "ingest"), names=("survey.toml", "spikes.window_samples"), todo=("expected an integer, >= 5",)),
]

#: Cases whose survey is built differently from the start.
SPECIAL_SURVEYS = {
    "survey-crossing-midnight": lambda folder: _midnight_survey(folder, one_file=True),
    "readings-files-after-midnight": lambda folder: _midnight_survey(folder, one_file=False),
}


# --------------------------------------------------------------------------- running and checking
def _snapshot(run: Path) -> dict | None:
    """The manifest's text, the store listing and the stage links of a run folder."""
    if not run.exists():
        return None
    manifest = run / "manifest.json"
    store = run / "store"
    return {
        "manifest": manifest.read_text() if manifest.exists() else None,
        "store": sorted(p.name for p in store.iterdir()) if store.exists() else [],
        "links": {p.name: str(p.readlink()) for p in run.iterdir() if p.is_symlink()},
    }


def _run(argv: list[str], capsys) -> tuple[int, str, str]:
    code = main(argv)
    out, err = capsys.readouterr()
    return code, out, err


def _upstream(stage: str) -> set[str]:
    by_name = {s.name: s for s in discover_stages()}
    out, todo = set(), list(by_name[stage].after)
    while todo:
        name = todo.pop()
        if name not in out:
            out.add(name)
            todo.extend(by_name[name].after)
    return out


def _assert_refused(case: Case, s: Survey, code: int, out: str, err: str, before: dict | None) -> None:
    lines = [line for line in err.splitlines() if line.strip()]
    assert code == 2, f"exit {code}, expected 2 (refused): {err}"
    assert out == "", out
    errors = [line for line in lines if line.startswith("lodeline:")]
    assert len(errors) == 1 and lines[-1] == errors[0], f"expected one error line, last:\n{err}"
    # Before it, only the warnings of stages that ran to completion before the refusing one.
    ran_before = _upstream(case.refused_at) if case.refused_at else set()
    for other in lines[:-1]:
        assert other.split(":", 1)[0] in ran_before, f"unexpected line before the error: {other}"
    line = errors[0]
    assert line.startswith("lodeline: error: "), line
    for text in case.names + case.todo:
        assert text in line, f"{text!r} not in: {line}"
    message = line[len("lodeline: error: "):]
    assert ": " in message and TODO.search(message), f"the message does not say what to do: {line}"
    after = _snapshot(s.run)
    if case.prepare is not None:
        assert after == before, "a refused run changed the run folder"
        return
    committed = [] if after is None else [p for p in after["store"] if not p.startswith(".")]
    leftovers = [] if after is None else [p for p in after["store"] if p.startswith(".tmp")]
    assert not leftovers, leftovers
    if case.refused_at is None:
        assert not committed, committed
        assert after is None or after["manifest"] is None
        return
    manifest = json.loads(after["manifest"]) if after and after["manifest"] else {"stages": {}}
    allowed = _upstream(case.refused_at)
    assert set(manifest["stages"]) <= allowed, sorted(manifest["stages"])
    assert all(p.rsplit("-", 1)[0] in allowed for p in committed), committed
    assert case.refused_at not in after["links"]


def _assert_usable(case: Case, s: Survey, code: int, out: str, err: str) -> None:
    assert code == 0, f"exit {code}, expected 0 (usable): {err}"
    assert "lodeline: error" not in err
    manifest = json.loads((s.run / "manifest.json").read_text())
    stages = manifest["stages"]
    assert case.until in stages
    ingest = stages["ingest"]["ledger"]
    # Nothing dropped silently: every data row of the files is counted in or rejected.
    assert ingest["readings_in"] == s.data_rows()
    assert ingest["readings_in"] == ingest["readings_out"] + sum(ingest["rejected"].values())
    expected_rejected = {**case.rejected, **s.expected.get("rejected", {})}
    assert set(ingest["rejected"]) == set(expected_rejected), ingest["rejected"]
    for reason, count in expected_rejected.items():
        assert ingest["rejected"][reason] == count if count is not None else ingest["rejected"][reason] > 0, reason
    rejects = pd.read_csv(s.run / "ingest" / "rejected_rows.csv", dtype=str, keep_default_na=False)
    by_input = {name: rejects[rejects["input"] == name]["reason"].value_counts().to_dict() for name in ("readings", "base_station")}
    assert by_input["readings"] == ingest["rejected"]
    assert by_input["base_station"] == case.base_rejected
    previous = None
    for name in STAGES:
        if name not in stages or not stages[name]["ledger"]:
            continue
        ledger = stages[name]["ledger"]
        assert ledger["readings_in"] == ledger["readings_out"] + sum(ledger["rejected"].values()), name
        if previous is not None:
            assert ledger["readings_in"] == previous, f"{name}: readings lost between stages"
        previous = ledger["readings_out"]
    flagged = tuple(case.flagged) + tuple(s.expected.get("flagged", ()))
    for stage, flag, count in flagged:
        got = stages[stage]["ledger"]["flagged"].get(flag, 0)
        assert got == count if count is not None else got > 0, (stage, flag, got, count)
    assert expected_rejected or case.base_rejected or flagged or case.check, "a usable case must assert something"
    if case.check is not None:
        assert case.check(s, manifest), "the case's own check failed"


@pytest.mark.parametrize("case", [pytest.param(c, id=c.id, marks=c.marks) for c in CASES])
def test_bad_input(case: Case, tmp_path, capsys):
    folder = tmp_path / "survey"
    s = SPECIAL_SURVEYS[case.id](folder) if case.id in SPECIAL_SURVEYS else make_survey(folder)
    case.build(s)
    toml = s.write()
    if case.prepare is not None:
        code, _, err = _run(["run", str(toml), "--quiet", *case.prepare], capsys)
        assert code == 0, err
        if case.after_prepare is not None:
            case.after_prepare(s)
            s.write()
    before = _snapshot(s.run)
    survey = case.survey_arg(s) if case.survey_arg else str(toml)
    argv = ["run", survey, "--quiet", *case.args] + (["--until", case.until] if case.until else [])
    code, out, err = _run(argv, capsys)
    log = (s.run / "run.log").read_text() if (s.run / "run.log").exists() else ""
    for text in (out, err, log):
        assert "Traceback" not in text, text[-3000:]
    if case.expect == "refused":
        _assert_refused(case, s, code, out, err, before)
    else:
        assert case.expect == "usable"
        _assert_usable(case, s, code, out, err)


def test_catalogue_is_large_unique_and_documented():
    """At least 40 cases, each id once, each refused stage the one the run stops at,
    and every case a row of docs/bad_input.md."""
    ids = [c.id for c in CASES]
    assert len(ids) >= 40 and len(set(ids)) == len(ids)
    assert all(c.until is None or c.until in STAGES for c in CASES)
    assert all(c.refused_at is None or c.refused_at == c.until for c in CASES)
    doc = (Path(__file__).resolve().parents[1] / "docs" / "bad_input.md").read_text()
    rows = set(re.findall(r"^\| `([a-z0-9-]+)` \|", doc, flags=re.M))
    assert rows == set(ids), sorted(rows ^ set(ids))
