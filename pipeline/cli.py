"""Command line: ``lodeline run``, ``lodeline status``, ``lodeline stages`` and ``lodeline plan``.

Exit codes: 0 success; 2 a problem with the input or configuration that the
user must correct (one line on standard error, nothing written); 1 an internal
error (one line on standard error, the traceback in the run log); 130
interrupted.
"""

from __future__ import annotations

import argparse
import os
import sys
import traceback
from pathlib import Path

from . import __version__
from .config import ConfigError, load_config
from .model import DataError
from .params import ParameterError, describe
from .store import RunFolderError

__all__ = ["main"]

USER_ERRORS = (ConfigError, ParameterError, DataError, RunFolderError, FileNotFoundError)


def _parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="lodeline",
        description="Process a magnetometer survey from raw readings to a ranked target table.",
    )
    parser.add_argument("--version", action="version", version=f"lodeline {__version__}")
    sub = parser.add_subparsers(dest="command", required=True)

    def common(p):
        p.add_argument("survey", help="the survey TOML file")
        p.add_argument(
            "--set",
            dest="overrides",
            action="append",
            default=[],
            metavar="TABLE.KEY=VALUE",
            help="override one configuration value for this run, e.g. --set spikes.threshold_nT=2",
        )

    p_run = sub.add_parser("run", help="run every stage whose inputs, parameters or code changed")
    common(p_run)
    p_run.add_argument("--redo", action="append", default=[], metavar="STAGE", help="run this stage again even if fresh (its downstream stages follow)")
    p_run.add_argument("--until", metavar="STAGE", help="stop after this stage")
    p_run.add_argument("--scheduler", help="'threads', 'synchronous' or a dask scheduler address (tcp://host:port)")
    p_run.add_argument("--workers", type=int, help="threads for the threaded scheduler (0 = one per core)")
    p_run.add_argument("--quiet", action="store_true", help="no progress bars; only warnings and errors on the terminal")

    p_status = sub.add_parser("status", help="list each stage as fresh or stale, and why")
    common(p_status)

    p_stages = sub.add_parser("stages", help="list the stages and their parameters")
    p_stages.add_argument("stage", nargs="?", help="show only this stage's parameters")
    p_stages.add_argument("--markdown", action="store_true", help="print the configuration reference (docs/configuration.md)")

    from .planning import add_plan_parser

    add_plan_parser(sub)
    return parser


def _cmd_run(args) -> int:
    from .runner import discover_stages, run_survey

    overrides = list(args.overrides)
    if args.scheduler:
        overrides.append(f'run.scheduler="{args.scheduler}"')
    if args.workers is not None:
        overrides.append(f"run.workers={args.workers}")
    stages = discover_stages()
    _check_stage_options(args, [s.name for s in stages])
    config = load_config(args.survey, overrides, [s.name for s in stages])
    report = run_survey(config, redo=tuple(args.redo), until=args.until, quiet=args.quiet, stages=stages)
    if not args.quiet:
        print(f"run folder: {report.folder}")
        print(f"stages run: {', '.join(report.ran) or 'none'}; fresh: {', '.join(report.skipped) or 'none'}")
    return 0


def _check_stage_options(args, names: list[str]) -> None:
    """Refuse an unknown stage in --until or --redo, naming the option."""
    from .params import closest

    given = [("--redo", name) for name in args.redo] + ([("--until", args.until)] if args.until else [])
    for option, name in given:
        if name not in names:
            hint = closest(name, names)
            did = f"; did you mean {hint!r}?" if hint else ""
            raise ConfigError(f"{option} {name}: unknown stage{did} (stages: {', '.join(names)})")


def _cmd_status(args) -> int:
    from .runner import discover_stages, stage_status

    stages = discover_stages()
    config = load_config(args.survey, args.overrides, [s.name for s in stages])
    rows = stage_status(config, stages)
    width = max(len(r["stage"]) for r in rows) if rows else 5
    print(f"run folder: {config.run_folder}")
    for r in rows:
        line = f"{r['stage']:<{width}}  {r['state']:<5}"
        if r["reason"]:
            line += f"  ({r['reason']})"
        print(line)
    return 0


MARKDOWN_INTRO = """# Configuration reference

A survey is one TOML file; paths in it are relative to it. Every key below has a
default (unless marked required) and is validated: an unknown key, a wrong type or
an out-of-range value is refused with the key's name and what is allowed. Any key
can be overridden for one run with `--set table.key=value`. This page is printed by
`lodeline stages --markdown`; a test checks that it matches the code.
"""


def _markdown(stages) -> str:
    from .config import RUN_PARAMS, SURVEY_PARAMS

    out = [MARKDOWN_INTRO]

    def table(title, params, note=""):
        out.extend([f"## `[{title}]`", ""])
        if note:
            out.extend([note, ""])
        out.extend(["| key | default | allowed | meaning |", "| --- | --- | --- | --- |"])
        for r in describe(params):
            if r["default"] is None:
                default = "not set" if r["optional"] else "required"
            else:
                default = f"`{r['default']!r}`"
            out.append(f"| `{r['key']}` | {default} | {r['allowed']} | {r['doc']} |")
        out.append("")

    table("survey", SURVEY_PARAMS)
    table("run", RUN_PARAMS)
    for s in stages:
        for key, params in s.input_params.items():
            table(f"inputs.{key}", params, f"Read by the `{s.name}` stage.")
    for s in stages:
        after = f" Runs after: {', '.join(s.after)}." if s.after else ""
        table(s.name, s.params, f"{s.summary}.{after}".replace("..", "."))
    return "\n".join(out)


def _cmd_stages(args) -> int:
    from .runner import discover_stages

    stages = discover_stages()
    if args.markdown:
        print(_markdown(stages), end="")
        return 0
    if args.stage and args.stage not in {s.name for s in stages}:
        raise ConfigError(f"unknown stage {args.stage!r} (stages: {', '.join(s.name for s in stages)})")
    for s in stages:
        if args.stage and s.name != args.stage:
            continue
        after = f" (after {', '.join(s.after)})" if s.after else ""
        print(f"[{s.name}]{after}: {s.summary}")
        for row in describe(s.params):
            print(f"  {row['key']} = {row['default']!r}  -- {row['doc']} Allowed: {row['allowed']}.")
        for key, params in s.input_params.items():
            print(f"  [inputs.{key}]")
            for row in describe(params):
                print(f"    {row['key']} = {row['default']!r}  -- {row['doc']} Allowed: {row['allowed']}.")
    return 0


def _record_traceback(args) -> Path | None:
    """Append the current traceback to the run log when the run folder is known."""
    try:
        from .runner import discover_stages

        config = load_config(args.survey, [], [s.name for s in discover_stages()])
    except Exception:  # noqa: BLE001 - best effort only
        return None
    folder = config.run_folder
    if not folder.is_dir():
        return None
    path = folder / "run.log"
    with open(path, "a", encoding="utf-8") as fh:
        fh.write(traceback.format_exc())
    return path


def _naming_a_file(args, err: Exception, message: str) -> str:
    """Begin a stage's message with the survey file when it names no file itself.

    A stage refuses a parameter (ParameterError) or a data set (DataError)
    by key or by stage; the key is in the survey file, so the line names it.
    Configuration errors already begin with the survey file or name the
    command-line option.
    """
    survey = getattr(args, "survey", None)
    if survey is None or not isinstance(err, (ParameterError, DataError)) or isinstance(err, ConfigError):
        return message
    if message.startswith(os.sep):
        return message
    return f"{Path(survey).resolve()}: {message}"


def main(argv: list[str] | None = None) -> int:
    """Entry point of the ``lodeline`` command."""
    args = _parser().parse_args(argv)
    from .planning import cmd_plan

    handlers = {"run": _cmd_run, "status": _cmd_status, "stages": _cmd_stages, "plan": cmd_plan}
    try:
        return handlers[args.command](args)
    except USER_ERRORS as err:
        message = str(err).splitlines()[0] if str(err) else type(err).__name__
        print(f"lodeline: error: {_naming_a_file(args, err, message)}", file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        print("lodeline: interrupted; the next run carries on from the last finished stage", file=sys.stderr)
        return 130
    except Exception as err:  # noqa: BLE001 - last line of defence: one line, details in the log
        where = _record_traceback(args) if hasattr(args, "survey") else None
        extra = f"; details in {where}" if where else ""
        print(f"lodeline: internal error: {type(err).__name__}: {err}{extra}", file=sys.stderr)
        return 1


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
