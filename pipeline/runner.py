"""The staged runner: finds the stages, decides which are fresh, runs the rest.

Each stage's cache key is a hash of its validated parameter table, its file
inputs (their bytes), its code, the survey table and the keys of its upstream
stages. A stage whose key has a complete output in the run folder is fresh and
skipped; changing one parameter therefore reruns that stage and everything
downstream of it and nothing upstream. Outputs are written atomically (see
:mod:`lodeline.store`), and every stage's reading counts are checked: readings
in = readings out + readings rejected.
"""

from __future__ import annotations

import contextlib
import errno
import importlib
import inspect
import logging
import os
import pkgutil
import shutil
import sys
import time
from dataclasses import dataclass, field
from pathlib import Path

import dask
import numpy as np
import pandas as pd

from . import __version__
from .config import ConfigError, SurveyConfig, expand_files
from .model import FLAGS, READING_DIM, Stage, StageContext, StageResult, segment_chunks, validate_grid, validate_readings
from .params import ParameterError, validate_table
from .progress import make_progress, dask_progress
from .store import RunFolderError, RunStore, hash_file, hash_json

__all__ = ["discover_stages", "plan_run", "stage_status", "run_survey", "StagePlan", "load_stage_data"]

log = logging.getLogger("lodeline")


# ---------------------------------------------------------------------------
# Stage discovery
# ---------------------------------------------------------------------------
def discover_stages() -> list[Stage]:
    """Import every public module of ``lodeline.steps`` and return its stages in run order.

    Order: a stage comes after all stages named in its ``after``; ties are
    broken by ``order`` and then by name.
    """
    import lodeline.steps as pkg

    found: dict[str, Stage] = {}
    for info in sorted(pkgutil.iter_modules(pkg.__path__), key=lambda i: i.name):
        if info.name.startswith("_"):
            continue
        module = importlib.import_module(f"lodeline.steps.{info.name}")
        stage = getattr(module, "STAGE", None)
        if stage is None:
            continue
        if not isinstance(stage, Stage):
            raise TypeError(f"lodeline.steps.{info.name}.STAGE is not a lodeline.model.Stage")
        if stage.name in found:
            raise ValueError(f"two stage modules declare the stage name {stage.name!r}")
        found[stage.name] = stage
    for stage in found.values():
        for up in stage.after:
            if up not in found:
                raise ValueError(f"stage {stage.name!r} runs after unknown stage {up!r}")
    depth: dict[str, int] = {}

    def _depth(name: str, seen=()) -> int:
        if name in seen:
            raise ValueError(f"stage dependencies form a cycle through {name!r}")
        if name not in depth:
            ups = found[name].after
            depth[name] = 0 if not ups else 1 + max(_depth(u, seen + (name,)) for u in ups)
        return depth[name]

    return sorted(found.values(), key=lambda s: (_depth(s.name), s.order, s.name))


def code_files(stage: Stage) -> list[Path]:
    """Source files a stage's output depends on: its module and the private
    step modules it uses (found by name in the source, transitively), plus the
    shared data model and parameter modules."""
    module = inspect.getmodule(stage.run)
    if module is None or not getattr(module, "__file__", None):
        return []
    steps_dir = Path(module.__file__).parent
    helpers = {p.stem: p for p in steps_dir.glob("_*.py") if p.name != "__init__.py"}
    seen: list[Path] = []
    todo = [Path(module.__file__)]
    while todo:
        path = todo.pop()
        if path in seen:
            continue
        seen.append(path)
        text = path.read_text()
        todo.extend(p for name, p in helpers.items() if name in text and p not in seen)
    return sorted(seen) + [Path(__file__).parent / "model.py", Path(__file__).parent / "params.py"]


def _code_hash(stage: Stage) -> str:
    """Hash of :func:`code_files` and the version: editing one stage's code
    reruns that stage and its downstream stages, not the others."""
    files = code_files(stage)
    if not files:
        return hash_json([__version__, stage.name])
    return hash_json([__version__, [(p.name, p.read_text()) for p in files]])


# ---------------------------------------------------------------------------
# Planning
# ---------------------------------------------------------------------------
@dataclass
class StagePlan:
    """Everything that determines one stage's output, and its cache key."""

    stage: Stage
    params: dict
    inputs: dict
    files: dict
    code_hash: str
    upstream: dict
    key: str = ""
    components: dict = field(default_factory=dict)


def plan_run(config: SurveyConfig, stages: list[Stage], file_hash_cache: dict | None = None) -> list[StagePlan]:
    """Validate every stage table and compute each stage's cache key.

    Raises
    ------
    ConfigError
        On any invalid table or key (naming the file and the key), or a file
        pattern that matches nothing.
    """
    plans: dict[str, StagePlan] = {}
    for stage in stages:
        try:
            params = validate_table(stage.params, config.stage_table(stage.name), stage.name)
        except ParameterError as err:
            raise ConfigError(f"{config.path}: {err}") from None
        inputs, files = {}, {}
        for key in stage.file_inputs:
            table = config.inputs.get(key)
            if table is None:
                continue
            schema = stage.input_params.get(key, ())
            try:
                valid = validate_table(schema, table, f"inputs.{key}")
            except ParameterError as err:
                raise ConfigError(f"{config.path}: {err}") from None
            paths = expand_files(valid.get("files", []), config.folder, f"{config.path}: inputs.{key}.files")
            valid["files"] = paths
            inputs[key] = valid
            for p in paths:
                files[str(p)] = hash_file(p, file_hash_cache)
        upstream = {u: plans[u].key for u in stage.after}
        plan = StagePlan(stage, params, inputs, files, _code_hash(stage), upstream)
        plan.components = {
            "params": params,
            "inputs": {k: {kk: vv for kk, vv in v.items() if kk != "files"} for k, v in inputs.items()},
            "files": files,
            "code": plan.code_hash,
            "upstream": upstream,
            "survey": {"crs": config.survey["crs"]},
            "chunk_readings": config.run["chunk_readings"],
        }
        plan.key = hash_json({"stage": stage.name, **plan.components})
        plans[stage.name] = plan
    unknown_inputs = set(config.inputs) - {k for s in stages for k in s.file_inputs}
    if unknown_inputs:
        name = sorted(unknown_inputs)[0]
        raise ConfigError(f"{config.path}: unknown input [inputs.{name}]: no stage reads it")
    return list(plans.values())


def _why_stale(plan: StagePlan, entry: dict | None, store: RunStore, stale_upstream: list[str]) -> str | None:
    """Reason a stage must run, or None when it is fresh."""
    if store.has_output(plan.stage.name, plan.key):
        return None
    if entry is None:
        return "never run"
    old = entry.get("components", {})
    changed = [k for k, v in plan.params.items() if old.get("params", {}).get(k) != v]
    if changed:
        k = changed[0]
        return f"parameter {plan.stage.name}.{k} changed: {old.get('params', {}).get(k)!r} -> {plan.params[k]!r}"
    if old.get("inputs") != plan.components["inputs"]:
        return "input description changed"
    if old.get("files") != plan.files:
        diff = sorted(set(plan.files.items()) ^ set(old.get("files", {}).items()))
        return f"input file changed: {Path(diff[0][0]).name}" if diff else "input files changed"
    if stale_upstream:
        return f"upstream stage {stale_upstream[0]} changed"
    if old.get("code") != plan.code_hash:
        return "stage code changed"
    if entry.get("key") == plan.key:
        return "output missing"
    return "survey or run settings changed"


def stage_status(config: SurveyConfig, stages: list[Stage] | None = None) -> list[dict]:
    """Each stage's state (``fresh`` or ``stale``) and the reason."""
    stages = stages or discover_stages()
    plans = plan_run(config, stages)
    store = RunStore(config.run_folder)
    manifest = store.read_manifest()
    rows, stale = [], set()
    for plan in plans:
        ups = [u for u in plan.stage.after if u in stale]
        reason = _why_stale(plan, manifest["stages"].get(plan.stage.name), store, ups)
        if reason is not None:
            stale.add(plan.stage.name)
        rows.append({"stage": plan.stage.name, "state": "stale" if reason else "fresh", "reason": reason or "", "key": plan.key[:16]})
    return rows


# ---------------------------------------------------------------------------
# Data loading and writing
# ---------------------------------------------------------------------------
def load_stage_data(folder: Path, chunk_readings: int) -> dict:
    """Open a stage output folder: every ``*.zarr`` store as a lazy Dataset and
    every ``*.csv`` table as a pandas DataFrame, by file name without suffix.

    Readings are rechunked so that chunk boundaries fall on segment
    boundaries (the convention of :mod:`lodeline.model`).
    """
    out = {p.stem: RunStore.open_dataset(p) for p in sorted(folder.glob("*.zarr"))}
    for path in sorted(folder.glob("*.csv")):
        # Small tables (targets, picks, crossovers...) come back as DataFrames.
        out.setdefault(path.stem, pd.read_csv(path))
    if "readings" in out and "segments" in out:
        seg = out["segments"].load()
        out["segments"] = seg
        lengths = (seg["stop"] - seg["start"]).values
        if out["readings"].sizes[READING_DIM] > 0:
            out["readings"] = out["readings"].chunk({READING_DIM: segment_chunks(lengths, chunk_readings)})
    return out


def _write_outputs(result: StageResult, tmp: Path, progress_enabled: bool) -> None:
    for name, ds in result.datasets.items():
        with dask_progress(progress_enabled, f"writing {name}"):
            RunStore.write_dataset(ds, tmp / f"{name}.zarr")
    for name, table in result.tables.items():
        table.to_csv(tmp / f"{name}.csv", index=False)
    for name, path in result.files.items():
        path = Path(path)
        shutil.move(str(path), tmp / path.name)


# ---------------------------------------------------------------------------
# Scheduler
# ---------------------------------------------------------------------------
@contextlib.contextmanager
def compute_on(scheduler: str, workers: int):
    """Run dask computations on threads, synchronously, or on a distributed scheduler."""
    if scheduler in ("threads", "synchronous"):
        settings = {"scheduler": scheduler}
        if scheduler == "threads" and workers:
            settings["num_workers"] = workers
        with dask.config.set(**settings):
            yield None
        return
    if not scheduler.startswith(("tcp://", "tls://", "inproc://", "ucx://")):
        raise ConfigError(
            f"run.scheduler = {scheduler!r}: expected 'threads', 'synchronous' or a scheduler address such as tcp://127.0.0.1:8786"
        )
    from distributed import Client

    try:
        client = Client(scheduler, timeout="10s", set_as_default=False)
    except (OSError, TimeoutError) as err:
        raise ConfigError(f"run.scheduler = {scheduler!r}: cannot reach the dask scheduler ({err}): start it or use 'threads'") from None
    try:
        with dask.config.set(scheduler=client):
            yield client
    finally:
        client.close()


# ---------------------------------------------------------------------------
# Running
# ---------------------------------------------------------------------------
class _ConsoleHandler(logging.StreamHandler):
    """Log lines on standard error that do not break a progress bar."""

    def __init__(self):
        super().__init__(sys.stderr)

    def emit(self, record):
        try:
            from tqdm import tqdm

            tqdm.write(self.format(record), file=sys.stderr)
        except Exception:  # noqa: BLE001 - logging must never raise
            self.handleError(record)


class _RunLogHandler(logging.FileHandler):
    """The run log; a line that cannot be written (disk full) is dropped
    instead of printing a logging traceback on the terminal: the run stops
    with its own one-line error when the stage outputs cannot be written."""

    def handleError(self, record):
        if isinstance(sys.exc_info()[1], OSError):
            return
        super().handleError(record)


#: errno values that mean the run folder cannot be written (disk full, quota, read-only, permissions).
_WRITE_ERRNOS = {errno.ENOSPC, errno.EDQUOT, errno.EROFS, errno.EACCES, errno.EPERM}


def _run_folder_error(err: OSError, folder: Path) -> RunFolderError | None:
    """A one-line :class:`RunFolderError` for an OSError met while writing
    the run folder, or None when the error is about something else (an
    input file outside the run folder, for example)."""
    if isinstance(err, RunFolderError) or err.errno not in _WRITE_ERRNOS:
        return None
    name = getattr(err, "filename", None)
    if name is not None and err.errno not in (errno.ENOSPC, errno.EDQUOT):
        try:
            Path(name).resolve().relative_to(Path(folder).resolve())
        except (ValueError, OSError):
            return None
    what = "free space on its disk" if err.errno in (errno.ENOSPC, errno.EDQUOT) else "fix its permissions"
    return RunFolderError(
        f"{folder}: cannot write to the run folder ({err.strerror or os.strerror(err.errno)}): {what} or choose another "
        "[run] folder, then run again (finished stages are kept)"
    )


def _setup_logging(store: RunStore, quiet: bool) -> list[logging.Handler]:
    log.setLevel(logging.DEBUG)
    file_handler = _RunLogHandler(store.log_path, encoding="utf-8")
    file_handler.setLevel(logging.DEBUG)
    file_handler.setFormatter(logging.Formatter("%(asctime)s %(levelname)s %(message)s", "%Y-%m-%dT%H:%M:%S"))
    console = _ConsoleHandler()
    console.setLevel(logging.WARNING if quiet else logging.INFO)
    console.setFormatter(logging.Formatter("%(message)s"))
    for h in (file_handler, console):
        log.addHandler(h)
    log.propagate = False
    return [file_handler, console]


def _descendants(stages: list[Stage], roots: set[str]) -> set[str]:
    out = set(roots)
    for s in stages:
        if any(u in out for u in s.after):
            out.add(s.name)
    return out


def _ancestors(stages: list[Stage], target: str) -> set[str]:
    by_name = {s.name: s for s in stages}
    out, todo = set(), [target]
    while todo:
        name = todo.pop()
        if name not in out:
            out.add(name)
            todo.extend(by_name[name].after)
    return out


@dataclass
class RunReport:
    """What a run did: the stages run and skipped, and the manifest."""

    ran: list[str]
    skipped: list[str]
    manifest: dict
    folder: Path


def run_survey(
    config: SurveyConfig,
    *,
    redo: tuple[str, ...] = (),
    until: str | None = None,
    quiet: bool = False,
    stages: list[Stage] | None = None,
) -> RunReport:
    """Run every stale stage of a survey, in order.

    Parameters
    ----------
    config : SurveyConfig
        Parsed configuration (with command-line overrides applied).
    redo : tuple of str
        Stages to run again even if fresh (their downstream stages follow).
    until : str, optional
        Stop after this stage (only it and its upstream stages are run).
    quiet : bool
        No progress bars and only warnings on the terminal.
    """
    stages = stages or discover_stages()
    names = [s.name for s in stages]
    for name in list(redo) + ([until] if until else []):
        if name not in names:
            from .params import closest

            hint = closest(name, names)
            raise ConfigError(f"unknown stage {name!r}" + (f"; did you mean {hint!r}?" if hint else "") + f" (stages: {', '.join(names)})")
    plans = plan_run(config, stages)
    store = RunStore(config.run_folder)
    store.lock()
    handlers = _setup_logging(store, quiet)
    progress_enabled = not quiet and sys.stderr.isatty()
    try:
        for p in store.clean_temporary():
            log.info("removed leftover %s from an interrupted run", p.name)
        manifest = store.read_manifest()
        manifest.update(
            {
                "lodeline_version": __version__,
                "config": str(config.path),
                "config_hash": hash_json(config.raw),
                "survey": {k: v for k, v in config.survey.items() if k != "crs_wkt"},
                "stage_order": names,
            }
        )
        # Keep the stages in run order whatever order earlier runs recorded them in.
        manifest["stages"] = {n: manifest["stages"][n] for n in names if n in manifest["stages"]}
        wanted = _ancestors(stages, until) if until else set(names)
        forced = _descendants(stages, set(redo))
        log.info("lodeline %s: survey %r, run folder %s", __version__, config.survey["name"], store.folder)
        ran, skipped, stale = [], [], set()
        with compute_on(config.run["scheduler"], config.run["workers"]):
            for plan in plans:
                name = plan.stage.name
                if name not in wanted:
                    continue
                ups = [u for u in plan.stage.after if u in stale]
                reason = _why_stale(plan, manifest["stages"].get(name), store, ups)
                if reason is None and name in forced:
                    reason = "asked to run again (--redo)"
                if reason is None:
                    out = store.output_dir(name, plan.key)
                    store.link(name, out)
                    if manifest["stages"].get(name, {}).get("key") != plan.key:
                        # Output complete but not yet recorded (a run stopped between the two): repair.
                        manifest["stages"][name] = store.read_record(name, plan.key)
                        store.write_manifest(manifest)
                    log.info("[%s] fresh, skipped", name)
                    skipped.append(name)
                    continue
                stale.add(name)
                log.info("[%s] running: %s", name, reason)
                record = _run_stage(plan, store, config, progress_enabled, replace=name in forced,
                                    plans=plans, manifest=manifest)
                manifest["stages"][name] = record
                store.write_manifest(manifest)
                ran.append(name)
        if not until:
            keep = {store.output_dir(p.stage.name, p.key) for p in plans}
            for p in store.prune(keep):
                log.info("removed old output %s", p.name)
        log.info("done: %d stage(s) run, %d fresh", len(ran), len(skipped))
        return RunReport(ran, skipped, manifest, store.folder)
    except OSError as err:
        clear = _run_folder_error(err, store.folder)
        if clear is None:
            raise
        log.debug("run stopped: %s", clear)  # run log only: the command line prints the one line
        raise clear from None
    finally:
        for h in handlers:
            log.removeHandler(h)
            h.close()
        store.unlock()


def _run_stage(plan: StagePlan, store: RunStore, config: SurveyConfig, progress_enabled: bool, replace: bool,
               plans: list[StagePlan] = (), manifest: dict | None = None) -> dict:
    stage = plan.stage
    name = stage.name
    by_name = {p.stage.name: p for p in plans}
    ancestors = _ancestors([p.stage for p in plans], name) if name in by_name else {name}
    lineage = {
        "lodeline_version": __version__,
        "config_hash": hash_json(config.raw),
        "stages": {p.stage.name: p.key for p in plans if p.stage.name in ancestors} or {name: plan.key},
    }
    records = {n: (manifest or {}).get("stages", {}).get(n, {}) for n in ancestors if n != name}
    data = {}
    for up in stage.after:
        data[up] = load_stage_data(store.output_dir(up, plan.upstream[up]), config.run["chunk_readings"])
    tmp = store.begin(name, plan.key)
    scratch = tmp / ".scratch"
    try:
        scratch.mkdir()
    except BaseException:
        shutil.rmtree(tmp, ignore_errors=True)
        raise
    context = StageContext(
        survey=config.survey,
        inputs=plan.inputs,
        scratch=scratch,
        log=log.getChild(name),
        progress=make_progress(progress_enabled),
        chunk_readings=config.run["chunk_readings"],
        config_dir=config.folder,
        lineage=lineage,
        records=records,
    )
    started = time.time()
    cpu0 = time.process_time()
    try:
        result = stage.run(data, plan.params, context)
        if not isinstance(result, StageResult):
            raise TypeError(f"stage {name!r} returned {type(result).__name__}, expected StageResult")
        for key, ds in result.datasets.items():
            if key == "readings":
                validate_readings(ds, result.datasets.get("segments"), where=f"stage {name}")
            elif key.startswith("grid"):
                validate_grid(ds, where=f"stage {name}")
        _write_outputs(result, tmp, progress_enabled)
        ledger = _ledger(name, data, result, tmp)
    except BaseException:
        shutil.rmtree(tmp, ignore_errors=True)
        raise
    shutil.rmtree(scratch, ignore_errors=True)
    wall = time.time() - started
    record = {
        "stage": name,
        "key": plan.key,
        "components": plan.components,
        "started": time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime(started)),
        "wall_s": round(wall, 3),
        "cpu_s": round(time.process_time() - cpu0, 3),
        "ledger": ledger,
        "summary": result.summary,
        "outputs": sorted(p.name for p in tmp.iterdir() if not p.name.startswith(".")),
    }
    if replace and store.output_dir(name, plan.key).exists():
        old = store.store / f".tmp-old-{name}-{os.getpid()}"
        os.rename(store.output_dir(name, plan.key), old)
        shutil.rmtree(old, ignore_errors=True)
    store.commit(tmp, name, plan.key, record)
    _log_stage(name, record)
    return record


def _ledger(name: str, data: dict, result: StageResult, tmp: Path) -> dict:
    """Reading counts of a stage; checks that readings in = out + rejected.

    Flag counts, newly set flags and the range and RMS of each correction
    added are reduced from the written store in one pass.
    """
    if "readings" not in result.datasets:
        return {}
    ups = [d["readings"] for d in data.values() if "readings" in d]
    if result.readings_in is not None:
        readings_in = int(result.readings_in)
    else:
        readings_in = int(ups[0].sizes[READING_DIM]) if ups else 0
    written = RunStore.open_dataset(tmp / "readings.zarr")
    readings_out = int(written.sizes[READING_DIM])
    rejected = {k: int(v) for k, v in result.rejected.items() if int(v)}
    if readings_in != readings_out + sum(rejected.values()):
        raise RuntimeError(
            f"stage {name}: reading counts do not add up: {readings_in} in, {readings_out} out, "
            f"{sum(rejected.values())} rejected"
        )
    ledger = {"readings_in": readings_in, "readings_out": readings_out, "rejected": rejected,
              "flagged": {"any": 0}, "new_flags": {}, "removed": {}}
    if not readings_out:
        return ledger
    lazy = _ledger_reductions(written, ups[0] if ups and readings_out == readings_in else None,
                              set(ups[0].data_vars) if ups else set())
    (values,) = dask.compute(lazy)
    ledger["flagged"] = {n: int(v) for n, v in values["flagged"].items() if int(v)}
    ledger["flagged"]["any"] = int(values["any"])
    ledger["new_flags"] = {n: int(v) for n, v in values["new_flags"].items() if int(v)}
    ledger["removed"] = {
        var: {"min_nT": float(lo), "max_nT": float(hi), "rms_nT": float(np.sqrt(ms)), "readings": int(n)}
        for var, (lo, hi, ms, n) in values["removed"].items()
    }
    return ledger


def _ledger_reductions(written, upstream, before: set) -> dict:
    """Lazy reductions of the ledger: readings per flag, readings with any flag,
    readings newly flagged by this stage (bit not set upstream; only when the
    stage kept every reading), and min, max, mean square and count of each
    correction (``role = "correction"``) the stage added, nT."""
    import dask.array as da

    flags = written["flags"].data
    names = list(FLAGS)

    def per_flag(bits):
        return {n: ((bits >> np.uint32(FLAGS[n][0])) & np.uint32(1)).sum() for n in names}

    lazy = {"flagged": per_flag(flags), "any": (flags != 0).sum(), "new_flags": {}, "removed": {}}
    if upstream is not None:
        lazy["new_flags"] = per_flag(flags & ~upstream["flags"].data.rechunk(flags.chunks))
    for var_name, var in written.data_vars.items():
        if var_name in before or var.attrs.get("role") != "correction":
            continue
        x = var.data
        lazy["removed"][var_name] = (da.nanmin(x), da.nanmax(x), da.nanmean(x * x), da.isfinite(x).sum())
    return lazy


def _log_stage(name: str, record: dict) -> None:
    ledger = record.get("ledger") or {}
    if ledger:
        flagged = ", ".join(f"{k} {v}" for k, v in ledger["flagged"].items() if k != "any") or "none"
        rejected = ", ".join(f"{k} {v}" for k, v in ledger["rejected"].items()) or "none"
        log.info(
            "[%s] readings in %d, out %d; rejected: %s; flagged: %s",
            name, ledger["readings_in"], ledger["readings_out"], rejected, flagged,
        )
        new = ", ".join(f"{k} {v}" for k, v in ledger.get("new_flags", {}).items()) or "none"
        log.info("[%s] newly flagged by this stage: %s", name, new)
        for var, r in ledger.get("removed", {}).items():
            log.info(
                "[%s] removed %s: range %.3f to %.3f nT, RMS %.3f nT over %d readings",
                name, var, r["min_nT"], r["max_nT"], r["rms_nT"], r["readings"],
            )
    for key, value in (record.get("summary") or {}).items():
        if isinstance(value, (int, float, str)):
            # Every figure goes to the run log; the terminal shows the lines above.
            log.debug("[%s] %s: %s", name, key, value)
    log.info("[%s] done in %.1f s (cpu %.1f s)", name, record["wall_s"], record["cpu_s"])
