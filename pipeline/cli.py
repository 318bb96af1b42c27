"""The ``grainhabit`` command line.

The host provides ``run``, ``check``, ``plugins`` and ``bench``; every
other command (``ingest``, ``report``, ``demo``, ``compare``, ...) is added
by a plugin through ``grainhabit_add_commands``.

Exit codes: 0 all frames ok; 1 the run finished but some frames failed
(or an unexpected internal error); 2 bad command line or workflow, nothing
written; 3 another run holds the output's lock; 130 interrupted.
"""

from __future__ import annotations

import argparse
import json
import logging
import os
import signal
import sys
import traceback

from . import __version__
from .lock import LockHeld
from .logs import setup, to_file_only
from .manager import Host, make_host
from .workflow import WorkflowError, plugin_specs, validate

EXIT_OK, EXIT_FAILED_FRAMES, EXIT_USAGE, EXIT_LOCKED, EXIT_INTERRUPTED = 0, 1, 2, 3, 130


class UsageError(Exception):
    """A bad command line: reported in one line, exit 2."""


class _Parser(argparse.ArgumentParser):
    def error(self, message):  # one line, exit 2, no usage dump
        raise UsageError(f"{self.prog}: {message}")


def _common(p: argparse.ArgumentParser) -> None:
    p.add_argument("--debug", action="store_true", help="show full tracebacks and debug log lines")


def _print_problems(host: Host, debug: bool) -> None:
    for text in host.warnings:
        print(f"grainhabit: warning: {text}", file=sys.stderr)
    for prob in host.problems:
        print(f"grainhabit: warning: {prob.message}", file=sys.stderr)
        if debug and prob.traceback:
            print(prob.traceback, file=sys.stderr)


# -- run / check ------------------------------------------------------------


def _overrides(args) -> dict:
    return {"execution": {"scheduler": getattr(args, "scheduler", None), "workers": getattr(args, "workers", None)}}


def _host_for(workflow: str, host: Host) -> Host:
    """The host with the workflow's own ``plugins:`` loaded (they must load)."""
    specs = plugin_specs(workflow)
    if not specs:
        return host
    extra = make_host(tuple(specs))
    bad = [p for p in extra.problems if p.origin == "workflow"]
    if bad:
        raise WorkflowError(workflow, "plugins", bad[0].message)
    return extra


def cmd_check(args, host: Host) -> int:
    host = _host_for(args.workflow, host)
    plan = validate(args.workflow, host, _overrides(args), check_files=True)
    from .listing import ListingIndex, index_path, listing_key
    from .runner import list_frames, reader_versions

    index = None if plan.config["input"]["archive"] else ListingIndex(
        index_path(plan.config["output"]["results"]), listing_key(reader_versions(host), plan.config["input"]))
    frames, problems = list_frames(plan, host, plan.processing_key(host), index)  # the index is only read
    files = {f.ref.path for f in frames}
    cfg = plan.config
    print(f"workflow {plan.name} ({plan.file}) is valid")
    src = cfg["input"]["archive"] or ", ".join(cfg["input"]["paths"])
    print(f"input: {src}")
    print(f"  {len(files)} files, {len(frames)} frames, {len({f.sample for f in frames})} samples")
    for path, reason in problems:
        print(f"  problem: {path}: {reason}")
    cal = cfg["input"]["pixel_size_nm"]
    print(f"  pixel size where a file has none: {cal if cal is not None else 'not set (such frames fail)'} nm")
    if cfg["input"]["calibration"] == "override":
        print(f"  input.calibration: override: every frame is measured at {cal} nm")
    for line in _file_lines(frames, cfg["input"]):
        print(line)
    print(f"output: {cfg['output']['results']}" + (f", report {cfg['output']['report']}" if cfg["output"]["report"] else ""))
    if plan.specs is not None:
        samples = sorted({f.sample for f in frames})
        print(f"specs: {cfg['specs']}: {len(plan.specs.products)} products")
        for p in plan.specs.products:
            mine = [s for s in samples if plan.specs.product_of(s) is p]
            print(f"  {p.name}: {len(p.criteria)} criteria, at least {p.min_grains} grains; samples found now: "
                  + (", ".join(mine) or "none"))
        lone = [s for s in samples if plan.specs.product_of(s) is None]
        if lone:
            print(f"  matching no product (no verdict): {', '.join(lone)}")
    ex = cfg["execution"]
    print(f"execution: scheduler {ex['scheduler']}, workers {ex['workers']}")
    print("steps:")
    steps = host.steps()
    for s in plan.frame_steps + plan.survey_steps:
        unit = {p.name: p.unit for p in steps[s.name].params}
        params = ", ".join(f"{k}={v!r}" + (f" {unit[k]}" if unit.get(k) else "")
                           for k, v in s.params.items()) or "no parameters"
        print(f"  {s.stage:<10} {s.name} {s.version}: {params}")
    return EXIT_OK


def _file_lines(frames, options: dict) -> list[str]:
    """One line per input file: reader, frame count and the calibration its frames will get."""
    by_path: dict[str, list] = {}
    for f in frames:
        by_path.setdefault(f.ref.path, []).append(f.ref)
    lines = []
    for path, refs in by_path.items():
        texts = list(dict.fromkeys(r.calibration for r in refs))
        if options.get("calibration") == "override":
            cal = f"{options['pixel_size_nm']:g} nm (workflow, input.calibration: override)"
        elif texts != [""]:
            cal = "; ".join(t or "when read" for t in texts)
        elif options.get("pixel_size_nm") is not None:
            cal = f"the file's own when read, else {options['pixel_size_nm']:g} nm (workflow)"
        else:
            cal = "the file's own when read"
        n = len(refs)
        lines.append(f"  file {path}: reader {refs[0].reader or '?'}, {n} frame{'s' if n != 1 else ''}, "
                     f"calibration {cal}")
    return lines


def cmd_run(args, host: Host) -> int:
    from .runner import run

    host = _host_for(args.workflow, host)
    plan = validate(args.workflow, host, _overrides(args), check_files=True)
    out = plan.config["output"]
    log_file = out["log"] or (out["results"].rstrip("/") + ".log")
    os.makedirs(os.path.dirname(os.path.abspath(log_file)), exist_ok=True)
    log = setup(json_lines=args.log_json, log_file=log_file, debug=args.debug)
    try:
        outcome = run(plan, host, fresh=args.fresh)
    except KeyboardInterrupt:
        to_file_only(log, logging.WARNING, "interrupted (Ctrl-C or SIGTERM); staged frames are kept and the next "
                                           "run resumes; the results store holds the last complete run")
        raise
    for source, error in outcome.failures:
        log.error("failed frame: %s: %s", source, error)
    log.info(outcome.line(), extra={"fields": {"summary": True, "exit_code": outcome.exit_code}})
    for line in outcome.verdict_lines:  # one line per sample on stdout, for cron mail
        print(line, flush=True)
    return outcome.exit_code


# -- plugins -----------------------------------------------------------------


def cmd_plugins(args, host: Host) -> int:
    steps = host.steps()
    rows = []
    for name, rec in host.records.items():
        plugin = host.pm.get_plugin(name)
        info = steps.get(name)
        rows.append({
            "name": name, "version": rec.version, "origin": rec.origin, "module": rec.module,
            "location": rec.location, "hooks": host.hooks_of(plugin),
            "stage": info.stage if info else None, "summary": info.summary if info else "",
            "params": [p.as_dict() for p in info.params] if info else [],
        })
    problems = [{"name": p.name, "origin": p.origin, "error": p.message} for p in host.problems]
    if args.json:
        print(json.dumps({"api_version": _api(), "plugins": rows, "problems": problems}, indent=2, default=str))
        return EXIT_OK
    print(f"grainhabit {__version__}, hook API {_api()}")
    for r in rows:
        head = f"{r['name']} {r['version']}".strip()
        print(f"\n{head}  [{r['origin']}] {r['module']}")
        if r["summary"]:
            print(f"  {r['summary']}")
        print(f"  hooks: {', '.join(r['hooks'])}")
        print(f"  from:  {r['location']}")
        for p in r["params"]:
            unit = f" {p['unit']}" if p["unit"] else ""
            print(f"  - {p['name']} ({p['type']}, default {p['default']!r}{unit}): {p['doc']}")
    for p in problems:
        print(f"\nfailed to load: {p['name']} [{p['origin']}]: {p['error']}")
    return EXIT_OK


def _api() -> int:
    from .hookspecs import API_VERSION

    return API_VERSION


# -- bench -------------------------------------------------------------------


def _benchmarks(host: Host) -> dict:
    from .manager import load_benchmarks

    load_benchmarks(host)
    out = {}
    for d in host.pm.hook.grainhabit_benchmarks():
        out.update(d or {})
    return out


def cmd_bench(args, host: Host) -> int:
    benches = _benchmarks(host)
    if not args.name or args.name not in benches:
        names = ", ".join(sorted(benches)) or "none"
        if args.name:
            raise UsageError(f"grainhabit bench: unknown benchmark {args.name!r} (available: {names})")
        print(f"available benchmarks: {names}\nrun one with: grainhabit bench NAME [--help]")
        return EXIT_OK
    return int(benches[args.name](list(args.rest)) or 0)


# -- entry point ---------------------------------------------------------------


def build_parser(host: Host) -> argparse.ArgumentParser:
    parser = _Parser(prog="grainhabit",
                     description="Find, measure and classify faceted crystal grains in micrograph fields, "
                                 "from YAML workflow files.",
                     epilog="Exit codes: 0 ok; 1 some frames failed; 2 bad command line or workflow; "
                            "3 output locked by another run; 130 interrupted.")
    parser.add_argument("--version", action="version", version=f"grainhabit {__version__}")
    _common(parser)
    sub = parser.add_subparsers(dest="command", metavar="COMMAND", parser_class=_Parser)

    p = sub.add_parser("run", help="run a workflow file", description="Run a workflow: process every new "
                       "frame, consolidate the results store, write the report.")
    p.add_argument("workflow", help="workflow YAML file")
    p.add_argument("--scheduler", help="'local', 'serial' or tcp://HOST:PORT of a dask.distributed scheduler "
                   "(overrides execution.scheduler)")
    p.add_argument("--workers", type=int, help="local worker processes (overrides execution.workers)")
    p.add_argument("--fresh", action="store_true", help="ignore staged frame results and process every frame")
    p.add_argument("--log-json", action="store_true", help="log one JSON object per line")
    _common(p)
    p.set_defaults(handler=cmd_run)

    p = sub.add_parser("check", help="validate a workflow and print the resolved plan",
                       description="Validate a workflow file and print its plan (inputs found, steps with "
                                   "their final parameters). Writes nothing.")
    p.add_argument("workflow", help="workflow YAML file")
    p.add_argument("--scheduler", help=argparse.SUPPRESS)
    p.add_argument("--workers", type=int, help=argparse.SUPPRESS)
    _common(p)
    p.set_defaults(handler=cmd_check)

    p = sub.add_parser("plugins", help="list registered plugins, their hooks and parameters",
                       description="List every registered plugin: name, version, hooks, origin, parameters.")
    p.add_argument("--json", action="store_true", help="print JSON")
    _common(p)
    p.set_defaults(handler=cmd_plugins)

    p = sub.add_parser("bench", help="run a benchmark offered by a plugin (grainhabit bench lists them)",
                       description="Run a benchmark offered by a plugin; 'grainhabit bench' lists them.",
                       add_help=True)
    p.add_argument("name", nargs="?", help="benchmark name")
    p.add_argument("rest", nargs=argparse.REMAINDER, help="arguments of the benchmark (see NAME --help)")
    _common(p)
    p.set_defaults(handler=cmd_bench)

    host.pm.hook.grainhabit_add_commands(subparsers=sub)
    for action in sub.choices.values():
        if not any(a.dest == "debug" for a in action._actions):
            _common(action)
    return parser


def _on_interrupt(signum, frame):
    """Ctrl-C or SIGTERM: mute the cluster libraries' own loggers, then stop the run.

    The interruption lands wherever the main thread waits, often inside
    dask.distributed's event-loop bridge, whose cancellation can log a
    traceback of its own (seen with distributed's ``sync``: "cannot access
    free variable 'future'"); the run's own log still records the
    interruption, and the terminal gets one line.
    """
    for name in ("tornado.application", "tornado.general", "distributed", "asyncio"):
        logging.getLogger(name).setLevel(logging.CRITICAL + 1)
    raise KeyboardInterrupt


def main(argv: list[str] | None = None) -> int:
    """Run the command line; return the exit code."""
    argv = list(sys.argv[1:] if argv is None else argv)
    debug = "--debug" in argv
    try:
        signal.signal(signal.SIGTERM, _on_interrupt)
        signal.signal(signal.SIGINT, _on_interrupt)
    except ValueError:  # not the main thread
        pass
    try:
        host = make_host()
        _print_problems(host, debug)
        parser = build_parser(host)
        args = parser.parse_args(argv)
        if not args.command:
            parser.print_help()
            return EXIT_USAGE
        handler = args.handler
        if handler in (cmd_run, cmd_check, cmd_plugins, cmd_bench):
            return handler(args, host)
        args.host = host
        return int(handler(args) or 0)
    except UsageError as exc:
        print(f"{exc}", file=sys.stderr)
        return EXIT_USAGE
    except WorkflowError as exc:
        for err in exc.errors:
            print(f"grainhabit: bad workflow: {err}", file=sys.stderr)
        return EXIT_USAGE
    except LockHeld as exc:
        print(f"grainhabit: locked: {exc}", file=sys.stderr)
        return EXIT_LOCKED
    except KeyboardInterrupt:
        print("grainhabit: interrupted; staged frames are kept and the next run resumes", file=sys.stderr)
        return EXIT_INTERRUPTED
    except Exception as exc:
        if debug:
            traceback.print_exc()
        msg = str(exc).splitlines()[0] if str(exc) else ""
        print(f"grainhabit: error: {exc.__class__.__name__}: {msg}"
              + ("" if debug else " (run with --debug for the traceback)"), file=sys.stderr)
        return EXIT_FAILED_FRAMES
