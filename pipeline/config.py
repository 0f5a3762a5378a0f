"""Survey configuration: one TOML file describing inputs, CRS, run options and
one parameter table per stage.

Layout of the file::

    [survey]            name and coordinate reference system (EPSG code)
    [run]               run folder, dask scheduler, chunk size
    [inputs.<name>]     file inputs (readings, base_station...), validated by
                        the stage that reads them
    [<stage>]           one table per stage, validated by that stage

Every key is validated; unknown tables and keys are refused with the closest
known name. ``--set stage.key=value`` overrides are applied before validation.
"""

from __future__ import annotations

import copy
import glob
import tomllib
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from .params import Param, ParameterError, closest, validate_table

__all__ = ["ConfigError", "SurveyConfig", "load_config", "apply_overrides", "parse_override"]


class ConfigError(ParameterError):
    """A configuration file that cannot be used (one-line message)."""


SURVEY_PARAMS = (
    Param("name", "unnamed survey", "Survey name, shown in logs and reports.", kind=str),
    Param(
        "crs",
        None,
        "Projected coordinate reference system of the survey, metres (for example 'EPSG:32631').",
        kind=str,
    ),
)

RUN_PARAMS = (
    Param("folder", "run", "Run folder, relative to the survey file.", kind=str),
    Param(
        "scheduler",
        "threads",
        "'threads' (default), 'synchronous', or the address of a dask distributed scheduler (tcp://host:port).",
        kind=str,
    ),
    Param("workers", 0, "Number of threads for the threaded scheduler; 0 means one per core.", kind=int, minimum=0, maximum=1024),
    Param(
        "chunk_readings",
        1_000_000,
        "Target number of readings per dask chunk (whole line segments are kept together).",
        kind=int,
        minimum=1000,
        maximum=100_000_000,
    ),
)


@dataclass
class SurveyConfig:
    """A parsed (not yet stage-validated) survey configuration."""

    path: Path
    raw: dict
    survey: dict
    run: dict
    inputs: dict = field(default_factory=dict)

    @property
    def folder(self) -> Path:
        return self.path.parent

    @property
    def run_folder(self) -> Path:
        return (self.folder / self.run["folder"]).resolve()

    def stage_table(self, name: str) -> dict:
        return self.raw.get(name, {}) or {}


def parse_override(text: str) -> tuple[list[str], Any]:
    """Parse ``stage.key=value`` (value in TOML syntax; bare words are strings)."""
    if "=" not in text:
        raise ConfigError(f"--set {text!r}: expected stage.key=value, for example spikes.threshold_nT=3")
    key, _, value = text.partition("=")
    parts = [p.strip() for p in key.strip().split(".")]
    if len(parts) < 2 or not all(parts):
        raise ConfigError(f"--set {text!r}: the key must name a table and a key, for example gridding.cell_size_m")
    try:
        parsed = tomllib.loads(f"v = {value.strip()}")["v"]
    except tomllib.TOMLDecodeError:
        parsed = value.strip()
    return parts, parsed


def apply_overrides(raw: dict, overrides: list[str]) -> dict:
    """Return a copy of ``raw`` with each ``stage.key=value`` override applied."""
    out = copy.deepcopy(raw)
    for text in overrides or []:
        parts, value = parse_override(text)
        node = out
        for p in parts[:-1]:
            node = node.setdefault(p, {})
            if not isinstance(node, dict):
                raise ConfigError(f"--set {text!r}: {p!r} is not a table")
        node[parts[-1]] = value
    return out


def _check_crs(crs: str | None, path: Path) -> str:
    from pyproj import CRS
    from pyproj.exceptions import CRSError

    if not crs:
        raise ConfigError(f"{path}: [survey] crs is required: give a projected CRS such as 'EPSG:32631'")
    try:
        obj = CRS.from_user_input(crs)
    except CRSError:
        raise ConfigError(
            f"{path}: [survey] crs = {crs!r} is not a known coordinate reference system: give an EPSG code such as 'EPSG:32631'"
        ) from None
    if not obj.is_projected:
        raise ConfigError(
            f"{path}: [survey] crs = {crs!r} is geographic: give a projected CRS in metres (for example the UTM zone of the survey)"
        )
    unit = obj.axis_info[0].unit_name if obj.axis_info else ""
    if unit not in ("metre", "meter"):
        raise ConfigError(f"{path}: [survey] crs = {crs!r} has axis unit {unit!r}: give a projected CRS in metres")
    return obj.to_wkt()


def load_config(path: str | Path, overrides: list[str] | None = None, stage_names=()) -> SurveyConfig:
    """Read and validate the survey-level tables of a configuration file.

    Parameters
    ----------
    path : str or Path
        The survey TOML file.
    overrides : list of str
        ``table.key=value`` strings from the command line.
    stage_names : iterable of str
        Names of the known stages; any other top-level table is refused.

    Raises
    ------
    ConfigError
        A missing or unreadable file, a TOML syntax error (with its line), an
        unknown table or key, or an invalid survey-level value.
    """
    path = Path(path).resolve()
    if not path.is_file():
        raise ConfigError(f"{path}: survey file not found: check the path")
    try:
        raw = tomllib.loads(path.read_text(encoding="utf-8"))
    except tomllib.TOMLDecodeError as err:
        raise ConfigError(f"{path}: not valid TOML ({err}): correct the file") from None
    except UnicodeDecodeError:
        raise ConfigError(f"{path}: not a UTF-8 text file: save the survey file as UTF-8") from None
    raw = apply_overrides(raw, overrides or [])
    known = {"survey", "run", "inputs", *stage_names}
    for key, value in raw.items():
        if key not in known and not isinstance(value, dict):
            raise ConfigError(
                f"{path}: unknown top-level key {key!r} (a value outside any table): move it into its table, "
                "for example under [survey] or [run], or remove it"
            )
        if key not in known:
            hint = closest(key, known)
            extra = f"; did you mean [{hint}]?" if hint else ""
            raise ConfigError(f"{path}: unknown table [{key}]{extra} (known: {', '.join(sorted(known))})")
        if not isinstance(value, dict):
            raise ConfigError(f"{path}: {key} must be a table ([{key}]), not a single value")
    try:
        survey = validate_table(SURVEY_PARAMS, raw.get("survey"), "survey")
        run = validate_table(RUN_PARAMS, raw.get("run"), "run")
    except ParameterError as err:
        raise ConfigError(f"{path}: {err}") from None
    survey["crs_wkt"] = _check_crs(survey["crs"], path)
    inputs = raw.get("inputs", {}) or {}
    for name, table in inputs.items():
        if not isinstance(table, dict):
            raise ConfigError(f"{path}: inputs.{name} must be a table ([inputs.{name}])")
    return SurveyConfig(path=path, raw=raw, survey=survey, run=run, inputs=inputs)


def expand_files(patterns, base: Path, where: str) -> list[Path]:
    """Expand file patterns (globs, relative to ``base``) into sorted paths.

    Raises
    ------
    ConfigError
        When a pattern matches no file (naming the pattern).
    """
    if isinstance(patterns, str):
        patterns = [patterns]
    files: list[Path] = []
    for pattern in patterns:
        full = str(base / pattern) if not Path(pattern).is_absolute() else pattern
        matched = sorted(glob.glob(full))
        if not matched:
            raise ConfigError(f"{where}: no file matches {pattern!r} (looked in {base}): check the path")
        for m in matched:
            p = Path(m).resolve()
            if p not in files:
                files.append(p)
    return files
