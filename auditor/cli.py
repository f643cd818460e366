"""Command line: argument parsing and exit codes only.

Exit codes: 0 ran and no finding reached --fail-on; 1 ran and findings reached
it (for ``check``: a rule failed); 2 could not run (one line on stderr,
``panel-audit: error: ...``; with --debug a traceback before it, same code);
130 interrupted by SIGINT (Ctrl-C), 143 by SIGTERM, 129 by SIGHUP (128 + the
signal's number, the shell's convention). An interrupted run removes its
temporary files and leaves no output of its own behind.
"""

from __future__ import annotations

import argparse
import os
import signal
import sys
from collections.abc import Callable, Sequence
from pathlib import Path
from typing import Any, NoReturn

PROG = "panel-audit"


class _Parser(argparse.ArgumentParser):
    """An argument parser whose errors are the project's one-line errors (exit 2)."""

    def error(self, message: str) -> NoReturn:
        sys.stderr.write(f"{PROG}: error: {message}; see '{self.prog} --help'\n")
        raise SystemExit(2)


def _common(p: argparse.ArgumentParser, keys: bool = True) -> None:
    if keys:
        p.add_argument("--unit", required=True, metavar="COL[,COL...]", help="unit key; several columns form one key")
        p.add_argument("--time", required=True, metavar="COL", help="period key")
    p.add_argument("--json", action="store_true", help="print the JSON document on stdout and nothing else")
    p.add_argument(
        "--fail-on",
        choices=("error", "warning", "never"),
        default="error",
        help="which findings make the exit code 1 (default: error)",
    )
    p.add_argument("--rules", metavar="FILE", help="thresholds and checks to use instead of the shipped defaults")
    p.add_argument("--debug", action="store_true", help="show a traceback on errors")


def _view_flags(p: argparse.ArgumentParser, details: bool = True, show: bool = True) -> None:
    if show:
        p.add_argument("--show", choices=("error", "warning", "note"), default="note",
                       help="the least severe findings the text lists (default: note, all); --json keeps all")
    if details:
        p.add_argument("--details", metavar="DIR",
                       help="write one CSV per finding code with every offending row or unit into DIR")
        p.add_argument("--force", action="store_true", help="replace existing files in --details DIR")
    p.add_argument("--progress", action="store_true",
                   help="show progress on stderr even when it is not a terminal or --json is piped")


def _engine_flags(p: argparse.ArgumentParser) -> None:
    p.add_argument("--engine", choices=("auto", "memory", "streaming", "dask"), default="auto",
                   help="which engine computes the statistics: auto (memory or streaming by the input's size), "
                        "memory, streaming (larger-than-memory Parquet) or dask (Parquet on a dask cluster)")
    p.add_argument("--scheduler", metavar="ADDRESS", default=None,
                   help="with --engine dask: a running dask scheduler (tcp://host:port); without it a local "
                        "cluster of worker processes is started for the run and closed after it")
    g = p.add_mutually_exclusive_group()
    g.add_argument("--streaming", dest="streaming", action="store_const", const=True, default=None,
                   help="shorthand for --engine streaming")
    g.add_argument("--in-memory", dest="streaming", action="store_const", const=False,
                   help="shorthand for --engine memory")


def _engine(args: argparse.Namespace) -> dict[str, Any]:
    """The engine options of a command, checked (``engine``, ``scheduler``)."""
    from auditor.stats.engines import resolve_engine

    name = resolve_engine(args.engine, args.streaming, args.scheduler)
    return {"engine": name, "scheduler": args.scheduler}


def _csv_list(text: str | None) -> list[str]:
    return [t.strip() for t in (text or "").split(",") if t.strip()]


def build_parser() -> argparse.ArgumentParser:
    """The argument parser for every subcommand."""
    parser = _Parser(
        prog=PROG,
        description="Audit a panel (units observed over periods) before estimating a panel model.",
    )
    from auditor.version import __version__

    parser.add_argument("--version", action="version", version=f"{PROG} {__version__}")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND", parser_class=_Parser)

    p = sub.add_parser("profile", help="keys, structure and within/between variation of a panel")
    p.add_argument("data", nargs="+", metavar="DATA", help="a data file, several files, a folder or a glob")
    _common(p)
    _engine_flags(p)
    _view_flags(p)

    p = sub.add_parser("instruments", help="model readiness: roles, instrument strength, diagnostic estimators")
    p.add_argument("data", nargs="+", metavar="DATA")
    _common(p)
    p.add_argument("--outcome", required=True, metavar="COL", help="the dependent variable")
    p.add_argument("--regressors", required=True, metavar="A,B,...", help="candidate regressors")
    p.add_argument("--correlated", metavar="A,C", default=None,
                   help="regressors suspected of correlation with the unit effect (may be empty)")
    p.add_argument("--period-effects", action="store_true", help="add a dummy for each period but the first")
    p.add_argument("--treat-as-invariant", metavar="COL", action="append", default=[],
                   help="use a nearly-time-invariant column's most common value within each unit")
    _engine_flags(p)
    _view_flags(p, details=False)

    p = sub.add_parser("compare", help="a new wave against the panel so far")
    p.add_argument("base", metavar="BASE")
    p.add_argument("new", metavar="NEW")
    _common(p)
    p.add_argument("--merged", action="store_true", help="also profile base and new together")
    _engine_flags(p)
    _view_flags(p)

    p = sub.add_parser("check", help="check a panel against a contract (rules file)")
    p.add_argument("data", nargs="+", metavar="DATA")
    p.add_argument("--rules", required=True, metavar="FILE", help="the panel contract")
    p.add_argument("--unit", metavar="COL[,COL...]", help="unit key (default: the contract's)")
    p.add_argument("--time", metavar="COL", help="period key (default: the contract's)")
    p.add_argument("--against", metavar="BASE",
                   help="the panel so far (a file, folder or glob): also judge the rules that span waves across the boundary")
    p.add_argument("--json", action="store_true")
    p.add_argument("--debug", action="store_true")
    _view_flags(p, show=False)

    p = sub.add_parser("rules", help="draft a contract from a clean panel, or export its row rules")
    rsub = p.add_subparsers(dest="rules_command", metavar="ACTION", parser_class=_Parser)
    d = rsub.add_parser("draft", help="write a starting contract learned from a clean panel")
    d.add_argument("data", nargs="+", metavar="DATA")
    d.add_argument("--unit", required=True)
    d.add_argument("--time", required=True)
    d.add_argument("--out", metavar="FILE", help="write here instead of stdout")
    d.add_argument("--force", action="store_true", help="replace an existing --out file")
    d.add_argument("--rules", metavar="FILE", help="thresholds to use while drafting")
    d.add_argument("--debug", action="store_true")
    e = rsub.add_parser("export", help="the row-level rules as a great-expectations expectation suite")
    e.add_argument("file", metavar="FILE")
    e.add_argument("--out", required=True, metavar="SUITE.json")
    e.add_argument("--force", action="store_true", help="replace an existing --out file")
    e.add_argument("--debug", action="store_true")

    p = sub.add_parser("report", help="a self-contained HTML report with figures")
    p.add_argument("data", nargs="+", metavar="DATA")
    _common(p)
    p.add_argument("--outcome", metavar="COL")
    p.add_argument("--regressors", metavar="A,B,...")
    p.add_argument("--correlated", metavar="A,C", default=None)
    p.add_argument("--period-effects", action="store_true", help="model readiness with a dummy for each period but the first")
    p.add_argument("--treat-as-invariant", metavar="COL", action="append", default=[],
                   help="model readiness: use a nearly-time-invariant column's most common value within each unit")
    p.add_argument("--against", metavar="BASE",
                   help="DATA is a new wave: report on BASE + DATA appended, with the wave compared against BASE")
    p.add_argument("--out", required=True, metavar="FILE.html")
    p.add_argument("--png-dir", metavar="DIR", help="also write each figure as PNG here")
    p.add_argument("--force", action="store_true", help="replace an existing --out file")
    _engine_flags(p)

    p = sub.add_parser("explain", help="what a finding code means, what its count counts and what to do")
    p.add_argument("code", nargs="?", metavar="CODE", help="a finding code (none: list every code)")
    p.add_argument("--json", action="store_true", help="the explanations as JSON")
    p.add_argument("--debug", action="store_true")
    p = sub.add_parser("schema", help="print the JSON Schema of a command's --json document")
    p.add_argument("name", metavar="COMMAND", help="profile, instruments, compare or check")
    p.add_argument("--debug", action="store_true", help="show a traceback on errors")

    p = sub.add_parser("demo", help="write the invented orchard panel and its report, print the profile")
    p.add_argument("--out", metavar="DIR", help="folder for the demo files (default: ./panel-audit-demo)")
    p.add_argument("--force", action="store_true", help="replace demo files already in --out")
    p.add_argument("--debug", action="store_true")
    return parser


def _install_signal_handlers() -> None:
    from auditor.io.outputs import on_signal

    for name in ("SIGINT", "SIGTERM", "SIGHUP"):
        number = getattr(signal, name, None)
        if number is not None and signal.getsignal(number) is not signal.SIG_IGN:
            signal.signal(number, on_signal)


def _say(text: str) -> None:
    """Write ``text`` to standard output and flush it; a full disk or an I/O error
    becomes ``stdout-unwritable`` (so a run whose report cannot be read fails, and
    keeps no file), a closed pipe is ignored (the reader stopped early)."""
    try:
        sys.stdout.write(text)
        sys.stdout.flush()
    except BrokenPipeError:
        _silence_stdout()
    except OSError as exc:
        from auditor.errors import fail

        _silence_stdout()
        raise fail("stdout-unwritable", reason=exc.strerror or str(exc)) from None


def _silence_stdout() -> None:
    # later writes and the flush at exit go nowhere instead of failing again
    try:
        devnull = os.open(os.devnull, os.O_WRONLY)
        os.dup2(devnull, sys.stdout.fileno())
        os.close(devnull)
    except (OSError, ValueError, AttributeError):  # pragma: no cover - stdout without a descriptor
        pass


def _data(args: argparse.Namespace) -> Any:
    return args.data[0] if len(args.data) == 1 else list(args.data)


def _settings(args: argparse.Namespace) -> Any:
    from auditor.checks.config import load_settings

    return load_settings(getattr(args, "rules", None))


def _emit(args: argparse.Namespace, result: Any, render: Callable[..., str]) -> int:
    from auditor.checks.findings import exit_code

    _print_result(args, result, render)
    return exit_code(result.findings, args.fail_on)


def _print_result(args: argparse.Namespace, result: Any, render: Callable[..., str]) -> None:
    if getattr(args, "json", False):
        from auditor.render.json import dumps

        _say(dumps(result.to_dict()))
    else:
        from auditor.render.text import terminal_width, use_colour

        extra = {"show": args.show} if getattr(args, "show", None) else {}
        _say(render(result, width=terminal_width(), colour=use_colour(sys.stdout), **extra))


def _cmd_profile(args: argparse.Namespace) -> int:
    from auditor.commands.profile import profile
    from auditor.render.text import render

    result = profile(_data(args), unit=args.unit, time=args.time, settings=_settings(args), **_engine(args))
    if args.details:
        from auditor.render.details import profile_tables

        _write_details(args, profile_tables(result), list(args.data))
    return _emit(args, result, render)


def _write_details(args: argparse.Namespace, tables: dict[str, Any], *data: Any) -> None:
    """Write ``--details`` files (never over an input; all of them or none) and say where on stderr."""
    from auditor import progress
    from auditor.render.details import write_details

    with progress.step("writing --details files"), _outputs(args, *data) as outs:
        paths = write_details(tables, args.details, outs)
        outs.publish()
    if paths:
        sys.stderr.write(f"{PROG}: details: {len(paths)} file{'s' if len(paths) != 1 else ''} in {args.details} "
                         f"({', '.join(p.name for p in paths)})\n")
    else:
        sys.stderr.write(f"{PROG}: details: no finding has rows behind it; nothing written\n")


def _cmd_instruments(args: argparse.Namespace) -> int:
    from auditor.commands.instruments import instruments
    from auditor.render.text_instruments import render

    correlated = None if args.correlated is None else _csv_list(args.correlated)
    result = instruments(
        _data(args),
        unit=args.unit,
        time=args.time,
        outcome=args.outcome,
        regressors=_csv_list(args.regressors),
        correlated=correlated,
        period_effects=args.period_effects,
        treat_as_invariant=list(args.treat_as_invariant),
        settings=_settings(args),
        **_engine(args),
    )
    return _emit(args, result, render)


def _cmd_compare(args: argparse.Namespace) -> int:
    from auditor.commands.compare import compare
    from auditor.render.text_compare import render

    result = compare(args.base, args.new, unit=args.unit, time=args.time, merged=args.merged, settings=_settings(args),
                     **_engine(args))
    if args.details:
        from auditor.render.details import compare_tables

        _write_details(args, compare_tables(result), args.base, args.new)
    return _emit(args, result, render)


def _cmd_check(args: argparse.Namespace) -> int:
    from auditor.commands.check import check
    from auditor.render.text_check import render

    result = check(_data(args), rules=args.rules, unit=args.unit, time=args.time, against=args.against,
                   keep_all=bool(args.details))
    if args.details:
        from auditor.render.details import check_tables

        _write_details(args, check_tables(result), list(args.data), *([args.against] if args.against else []))
        result = result.shown()
    _print_result(args, result, render)
    return 0 if result.passed else 1


def _outputs(args: argparse.Namespace, *data: Any, files: Sequence[Any] = ()) -> Any:
    """The run's OutputSet: ``--force`` from ``args``; every input file of the run
    (data expanded as the loader expands it, the ``--rules`` file, ``files``) protected."""
    from auditor.io.outputs import OutputSet, input_files

    rules = getattr(args, "rules", None)
    inputs = input_files(*data, files=[*files, rules])
    return OutputSet(force=bool(getattr(args, "force", False)), inputs=inputs)


def _cmd_rules(args: argparse.Namespace) -> int:
    if args.rules_command == "draft":
        from auditor.commands.draft import draft

        if not args.out:
            _say(draft(_data(args), unit=args.unit, time=args.time, settings=_settings(args)))
            return 0
        with _outputs(args, list(args.data)) as outs:
            outs.claim(args.out, "--out")
            outs.stage(args.out, draft(_data(args), unit=args.unit, time=args.time, settings=_settings(args)))
            outs.publish()
            _say(f"{args.out}\n")
        return 0
    if args.rules_command == "export":
        import json

        from auditor.contracts.rules import export_suite

        with _outputs(args, files=[args.file]) as outs:
            outs.claim(args.out, "--out")
            suite = export_suite(args.file)
            outs.stage(args.out, json.dumps(suite, indent=2, sort_keys=True) + "\n")
            outs.publish()
            _say(f"{args.out}\n")
        return 0
    from auditor.errors import fail

    raise fail("bad-argument", detail="'rules' needs an action: draft or export")


def _cmd_report(args: argparse.Namespace) -> int:
    from auditor.checks.findings import exit_code
    from auditor.commands.report import write_report

    findings: list[Any] = []
    with _outputs(args, list(args.data), args.against) as outs:
        path = write_report(
            _data(args),
            unit=args.unit,
            time=args.time,
            out=args.out,
            outcome=args.outcome,
            regressors=_csv_list(args.regressors) or None,
            correlated=None if args.correlated is None else _csv_list(args.correlated),
            against=args.against,
            png_dir=args.png_dir,
            settings=_settings(args),
            force=args.force,
            period_effects=args.period_effects,
            treat_as_invariant=list(args.treat_as_invariant),
            outputs=outs,
            collect_findings=findings,
            **_engine(args),
        )
        if args.json:
            from auditor.render.json import dumps
            from auditor.version import tool_info

            _say(dumps({"tool": tool_info(), "report": str(path)}))
        else:
            _say(f"{path}\n")
    return exit_code(findings, args.fail_on)


def _cmd_demo(args: argparse.Namespace) -> int:
    from auditor.commands.demo import next_commands, run_demo
    from auditor.render.text import render, terminal_width, use_colour

    run = run_demo(Path(args.out) if args.out else None, force=args.force)
    lines = [render(run.profile, width=terminal_width(), colour=use_colour(sys.stdout)), "\nfiles written:\n"]
    pad = max((len(name) for name in run.paths), default=0)
    lines += [f"  {name:<{pad}}  {path}\n" for name, path in run.paths.items()]
    lines.append("\nto try next:\n")
    lines += [f"  {cmd}\n" for cmd in next_commands(run)]
    _say("".join(lines))
    return 0


def _cmd_explain(args: argparse.Namespace) -> int:
    from auditor.render.text_explain import render

    if args.json:
        from auditor.checks.explain import as_document
        from auditor.render.json import dumps

        _say(dumps(as_document(args.code)))
        return 0
    from auditor.render.text import terminal_width

    _say(render(args.code or None, width=terminal_width()))
    return 0


def _cmd_schema(args: argparse.Namespace) -> int:
    import json

    from auditor.commands.schema import schema

    _say(json.dumps(schema(args.name), indent=2, ensure_ascii=False) + "\n")
    return 0


COMMANDS: dict[str, Callable[[argparse.Namespace], int]] = {
    "profile": _cmd_profile,
    "instruments": _cmd_instruments,
    "compare": _cmd_compare,
    "check": _cmd_check,
    "rules": _cmd_rules,
    "report": _cmd_report,
    "demo": _cmd_demo,
    "explain": _cmd_explain,
    "schema": _cmd_schema,
}


def main(argv: Sequence[str] | None = None) -> int:
    """Run the command line; return the exit code.

    Run as the command itself (``argv`` None), the process ends as soon as its output
    is flushed: handing a few million rows back to the allocator and unloading every
    module, one by one, would add a fifth of a second to a profile for nothing.
    """
    if argv is None:
        _install_signal_handlers()
    code = _run(argv)
    if argv is None:
        _end_process(code)
    return code


def _end_process(code: int) -> None:
    """Flush stdout and stderr and end the process with ``code``, skipping interpreter
    teardown; a no-op when great-expectations was loaded (it has exit handlers)."""
    if "great_expectations" in sys.modules:
        return
    for stream in (sys.stdout, sys.stderr):
        try:
            stream.flush()
        except (BrokenPipeError, OSError, ValueError):
            pass
    os._exit(code)


def _run(argv: Sequence[str] | None) -> int:
    debug = False
    import warnings

    try:
        parser = build_parser()
        args = parser.parse_args(argv)
        if not args.command:
            from auditor.errors import fail

            raise fail("no-command", commands=", ".join(COMMANDS))
        debug = bool(getattr(args, "debug", False))
        from auditor import progress

        # on a terminal; with --json only when stdout is a terminal too (a pipe reads the document);
        # --progress turns it on anyway
        piped_json = getattr(args, "json", False) and not sys.stdout.isatty()
        progress.enable(bool(getattr(args, "progress", False)) or (bool(sys.stderr.isatty()) and not piped_json))
        with warnings.catch_warnings():
            if not debug:  # a library's warning is not the user's business on the terminal
                warnings.simplefilter("ignore")
            return COMMANDS[args.command](args)
    except KeyboardInterrupt:
        sys.stderr.write(f"{PROG}: interrupted\n")
        return 128 + int(signal.SIGINT)
    except BrokenPipeError:
        _silence_stdout()
        return 0
    except Exception as exc:  # the one place where any failure becomes exit 2
        from auditor.errors import AuditError, fail

        if debug:
            import traceback

            traceback.print_exc()
        if not isinstance(exc, AuditError):
            if isinstance(exc, MemoryError):
                exc = fail("out-of-memory")
            elif isinstance(exc, RecursionError):
                exc = fail("internal-problem", kind="RecursionError", detail="the input nests too deeply")
            else:
                exc = fail("internal-problem", kind=type(exc).__name__, detail=_one_line(str(exc))[:300])
        sys.stderr.write(f"{PROG}: error: {_one_line(exc.message)}\n")
        return 2
    except BaseException as stop:  # SIGTERM, SIGHUP (auditor.io.outputs.on_signal)
        from auditor.io.outputs import Interrupted

        if not isinstance(stop, Interrupted):
            raise
        sys.stderr.write(f"{PROG}: interrupted ({signal.Signals(stop.signum).name})\n")
        return 128 + stop.signum


def _one_line(text: str) -> str:
    from auditor.render.text import safe

    return safe(text)


if __name__ == "__main__":  # pragma: no cover
    raise SystemExit(main())
