"""A tiny invented survey for the bad-input catalogue (tests/test_bad_input.py).

:func:`make_survey` builds, in memory, a made-up survey in UTM zone 31N
(EPSG:32631, positions written as longitude/latitude): three survey lines
L1-L3 running east-west 4 m apart (alternate directions) and one tie line
T1 running north-south across them, two sensors S1/S2 1 m apart on a bar,
10 Hz at 2 m/s, a field of about 49,950 nT with a small bump, noise and a
slow external variation that a base station records once a second. About
1,900 readings in all, so that a run to the gridding stage takes about a
second. Every value is invented; nothing here comes from a real survey.

Each case of the catalogue changes this survey (its tables, its file text or
bytes, its configuration) before :meth:`Survey.write` puts it in a folder.
"""

from __future__ import annotations

import copy
import gzip
import json
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd
from pyproj import Transformer

CRS = "EPSG:32631"
T0 = pd.Timestamp("2026-05-14T09:00:00Z")
RATE_HZ = 10.0
SPEED_M_S = 2.0
LINE_LENGTH_M = 50.0
LINE_SPACING_M = 4.0
TURN_S = 20.0
SENSORS = {"S1": -0.5, "S2": 0.5}  # across-track offset from the towed point, m
BASE_FIELD_NT = 49950.0
#: Base-station samples before the first and after the last reading, s.
BASE_MARGIN_S = 60.0

READINGS_COLUMNS = ["time", "lon", "lat", "sensor", "line", "depth_m", "altitude_m", "field_nT"]
BASE_COLUMNS = ["date", "seconds_of_day", "field_nT"]

_TO_LONLAT = Transformer.from_crs(CRS, "EPSG:4326", always_xy=True)


def external_nT(t_s: np.ndarray) -> np.ndarray:
    """Invented slow external variation, nT, at seconds after T0 (a few nT over minutes)."""
    return 3.0 * np.sin(2 * np.pi * t_s / 600.0) + 0.8 * np.sin(2 * np.pi * t_s / 97.0)


def _bump_nT(e: np.ndarray, n: np.ndarray) -> np.ndarray:
    """A smooth 6 nT bump 2 m wide at (20 m, 5 m) of the local frame."""
    return 6.0 * np.exp(-((e - 20.0) ** 2 + (n - 5.0) ** 2) / (2 * 2.0**2))


def _track(kind: str, index: int) -> tuple[np.ndarray, np.ndarray, float]:
    """Local (east, north) of the towed point of one line, and its course (deg)."""
    steps = int(round(LINE_LENGTH_M / SPEED_M_S * RATE_HZ)) if kind == "survey" else int(round(14.0 / SPEED_M_S * RATE_HZ))
    s = np.arange(steps) * SPEED_M_S / RATE_HZ
    if kind == "survey":
        north = np.full(steps, index * LINE_SPACING_M)
        east = s if index % 2 == 0 else LINE_LENGTH_M - s
        return east, north, 90.0 if index % 2 == 0 else 270.0
    return np.full(steps, 25.0 + 10.0 * index), -3.0 + s, 0.0


@dataclass
class Survey:
    """An invented survey held in memory, then written to a folder.

    Attributes
    ----------
    folder : pathlib.Path
        Where :meth:`write` puts ``survey.toml``, ``data/`` and the run folder.
    readings : dict of str to pandas.DataFrame
        File name (under ``data/``) -> its rows, all columns as text.
    base : dict of str to pandas.DataFrame
        Base-station files, the same way.
    config : dict
        The survey TOML as nested dicts.
    text_edits : dict of str to callable
        File name -> function of the written text returning new text.
    byte_edits : dict of str to callable
        File name -> function of the written bytes returning new bytes
        (after gzip, for ``.gz`` names).
    delimiters : dict of str to str
        File name -> CSV delimiter (default ",").
    toml_edit : callable, optional
        Function of the survey file's text returning new text.
    expected : dict
        Counts a case works out from the data it changed (see the test).
    """

    folder: Path
    readings: dict[str, pd.DataFrame]
    base: dict[str, pd.DataFrame]
    config: dict
    text_edits: dict = field(default_factory=dict)
    byte_edits: dict = field(default_factory=dict)
    delimiters: dict = field(default_factory=dict)
    toml_edit: object = None
    expected: dict = field(default_factory=dict)

    @property
    def data(self) -> Path:
        return self.folder / "data"

    @property
    def toml(self) -> Path:
        return self.folder / "survey.toml"

    @property
    def run(self) -> Path:
        return self.folder / "run"

    def all_readings(self) -> pd.DataFrame:
        return pd.concat(list(self.readings.values()), ignore_index=True)

    def write(self) -> Path:
        """Write the data files and the survey file; return the survey file."""
        self.data.mkdir(parents=True, exist_ok=True)
        for name, table in {**self.readings, **self.base}.items():
            text = table.to_csv(index=False, sep=self.delimiters.get(name, ","), lineterminator="\n")
            if name in self.text_edits:
                text = self.text_edits[name](text)
            raw = text.encode("utf-8")
            if name.endswith(".gz"):
                raw = gzip.compress(raw, mtime=0)
            if name in self.byte_edits:
                raw = self.byte_edits[name](raw)
            (self.data / name).write_bytes(raw)
        text = to_toml(self.config)
        self.toml.write_text(self.toml_edit(text) if self.toml_edit else text)
        return self.toml

    def data_rows(self) -> int:
        """Data rows of the written readings files (non-blank lines after the header)."""
        rows = 0
        for name in self.readings:
            raw = (self.data / name).read_bytes()
            if name.endswith(".gz"):
                raw = gzip.decompress(raw)
            lines = raw.decode("utf-8").split("\n")
            rows += sum(1 for line in lines[1:] if line.strip())
        return rows


def make_survey(folder: Path, seed: int = 7, start: pd.Timestamp = T0) -> Survey:
    """The good survey: 3 survey lines and a tie line, 2 sensors, 1,640 readings,
    starting at ``start`` (UTC)."""
    rng = np.random.default_rng(seed)
    lines = [("L1", "survey", 0), ("L2", "survey", 1), ("L3", "survey", 2), ("T1", "tie", 0)]
    readings: dict[str, pd.DataFrame] = {}
    t_start = 0.0
    offsets = {"L1": 0.0, "L2": 1.2, "L3": -0.8, "T1": 0.4}  # invented line levels, nT
    for name, kind, index in lines:
        east, north, course = _track(kind, index)
        t = t_start + np.arange(east.size) / RATE_HZ
        t_start = t[-1] + TURN_S
        rows = []
        rad = np.radians(course)
        for sensor, across in SENSORS.items():
            # across positive to starboard: (cos c, -sin c) for a course c clockwise from north
            e = east + across * np.cos(rad)
            n = north - across * np.sin(rad)
            fld = BASE_FIELD_NT + offsets[name] + _bump_nT(e, n) + external_nT(t) + rng.normal(0, 0.05, t.size)
            rows.append(pd.DataFrame({"t": t, "e": east, "n": north, "sensor": sensor, "line": name, "f": fld}))
        frame = pd.concat(rows).sort_values(["t", "sensor"], kind="stable").reset_index(drop=True)
        lon, lat = _TO_LONLAT.transform(500000.0 - 2000.0 + frame["e"].to_numpy(), 6_000_000.0 + frame["n"].to_numpy())
        readings[f"readings_{name}.csv"] = pd.DataFrame(
            {
                "time": [iso(x, start) for x in frame["t"]],
                "lon": [f"{x:.8f}" for x in lon],
                "lat": [f"{x:.8f}" for x in lat],
                "sensor": frame["sensor"],
                "line": frame["line"],
                "depth_m": "9.000",
                "altitude_m": "2.500",
                "field_nT": [f"{x:.3f}" for x in frame["f"]],
            }
        )
    t_end = t_start - TURN_S
    tb = np.arange(-BASE_MARGIN_S, t_end + BASE_MARGIN_S + 1.0, 1.0)
    base = pd.DataFrame(
        {
            "date": [(start + pd.Timedelta(seconds=float(x))).strftime("%Y-%m-%d") for x in tb],
            "seconds_of_day": [f"{seconds_of_day(x, start) % 86400.0:.1f}" for x in tb],
            "field_nT": [f"{BASE_FIELD_NT + external_nT(x) + rng.normal(0, 0.05):.3f}" for x in tb],
        }
    )
    return Survey(folder=Path(folder), readings=readings, base={"base_station.csv": base}, config=base_config(folder))


def times_s(table: pd.DataFrame, start: pd.Timestamp = T0) -> np.ndarray:
    """Seconds after ``start`` of the ISO 8601 times of a readings table."""
    return (pd.to_datetime(table["time"], format="ISO8601", utc=True) - start).dt.total_seconds().to_numpy()


def base_times_s(table: pd.DataFrame, start: pd.Timestamp = T0) -> np.ndarray:
    """Seconds after ``start`` of a base-station table (date and seconds of day, UTC)."""
    day = pd.to_datetime(table["date"], utc=True)
    return ((day - start).dt.total_seconds() + table["seconds_of_day"].astype(float)).to_numpy()


def iso(t_s: float, start: pd.Timestamp = T0) -> str:
    """ISO 8601 UTC text of ``t_s`` seconds after ``start``."""
    return (start + pd.Timedelta(seconds=float(t_s))).strftime("%Y-%m-%dT%H:%M:%S.%f")[:-3] + "Z"


def seconds_of_day(t_s: float, start: pd.Timestamp = T0) -> float:
    """Seconds after midnight (UTC) of the day of ``start``, of ``t_s`` s after ``start``."""
    midnight = start.normalize()
    return (start - midnight).total_seconds() + float(t_s)


def base_config(folder: Path) -> dict:
    """Survey file of the good survey (run folder inside ``folder``)."""
    return {
        "survey": {"name": "bad-input catalogue (invented)", "crs": CRS},
        "run": {"folder": str(Path(folder) / "run"), "scheduler": "synchronous"},
        "inputs": {
            "readings": {
                "files": ["data/readings_*.csv"],
                "position_crs": "EPSG:4326",
                "time_format": "iso8601",
                "tie_lines": ["T*"],
                "columns": {
                    "time": "time", "x": "lon", "y": "lat", "field": "field_nT", "sensor": "sensor",
                    "line": "line", "depth": "depth_m", "altitude": "altitude_m",
                },
            },
            "base_station": {
                "files": ["data/base_station.csv"],
                "time_format": "seconds_of_day",
                "columns": {"date": "date", "time": "seconds_of_day", "field": "field_nT"},
            },
        },
        "positions": {
            "lag_s": 0.0,
            "layback_m": 0.0,
            "sensors": {name: {"across_m": across, "along_m": 0.0, "up_m": 0.0} for name, across in SENSORS.items()},
        },
        "diurnal": {"max_gap_s": 30.0},
        "heading": {"method": "none"},
        "levelling": {"method": "tie_lines_then_median", "median_window_m": 20.0},
        "gridding": {"cell_size_m": 0.5, "blank_distance_m": 2.0, "geotiff": False, "quicklook": False},
    }


def set_key(config: dict, dotted: str, value) -> None:
    """Set ``a.b.c`` in nested dicts (creating tables)."""
    parts = dotted.split(".")
    node = config
    for p in parts[:-1]:
        node = node.setdefault(p, {})
    node[parts[-1]] = value


def del_key(config: dict, dotted: str) -> None:
    parts = dotted.split(".")
    node = config
    for p in parts[:-1]:
        node = node[p]
    del node[parts[-1]]


# --------------------------------------------------------------------------- TOML
def _value(v) -> str:
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, (int, float)):
        return repr(v)
    if isinstance(v, str):
        return json.dumps(v)
    if isinstance(v, list):
        return "[" + ", ".join(_value(x) for x in v) + "]"
    if isinstance(v, dict):
        return "{ " + ", ".join(f"{_key(k)} = {_value(x)}" for k, x in v.items()) + " }"
    raise TypeError(f"cannot write {v!r} as TOML")


def _key(k: str) -> str:
    return k if k.replace("_", "").replace("-", "").isalnum() else json.dumps(k)


def to_toml(config: dict) -> str:
    """Render nested dicts as TOML: tables of scalars, nested tables as [a.b],
    and tables whose values are all tables written inline (``sensors``)."""
    out: list[str] = []

    def table(name: str, body: dict) -> None:
        scalars = {k: v for k, v in body.items() if not (isinstance(v, dict) and not _inline(k, v))}
        subtables = {k: v for k, v in body.items() if k not in scalars}
        if name and (scalars or not subtables):
            out.append(f"[{name}]")
        for k, v in scalars.items():
            out.append(f"{_key(k)} = {_value(v)}")
        if name and (scalars or not subtables):
            out.append("")
        for k, v in subtables.items():
            table(f"{name}.{_key(k)}" if name else _key(k), v)

    table("", copy.deepcopy(config))
    return "\n".join(out) + "\n"


def _inline(key: str, value: dict) -> bool:
    """Tables written inline: per-sensor tables and anything holding only tables at depth 2."""
    return key in ("sensors", "table")
