"""Command line: ``arflow run | validate | demo | vintages | retract | explain | report``.

Exit codes: 0 success; 1 unexpected internal error; 2 job-file or usage
error; 3 source, data or target error (including a locked target); 4 the
share of quarantined series is over ``gates.max_quarantine_share`` (results
were still written; with ``publish.hold_on_alarm`` the published view was
left as it was). A closed standard output (a pipe to ``head``) does not stop
a run: output stops, the run completes (or rolls back) and exits with its own
code.
"""

from __future__ import annotations

import argparse
import datetime as dt
import errno
import io
import json
import os
import signal
import sys
import traceback
from pathlib import Path
from typing import Any, TextIO

from .errors import ArflowError, clean_message
from .runtime import install_signal_handlers, signals_held, stop_signal

EXIT_OK = 0
EXIT_INTERNAL = 1
EXIT_USAGE = 2
EXIT_DATA = 3
EXIT_ALARM = 4
EXIT_INTERRUPTED = 130

EPILOG = """exit codes:
  0  success
  1  unexpected internal error (a bug: please report it)
  2  job-file or usage error
  3  source, data or target error (also: target in use by another run)
  4  quarantined share over gates.max_quarantine_share (results still written;
     the published view is held as it was unless publish.hold_on_alarm = false)
a closed stdout (e.g. piped to head) does not stop a run: it completes or rolls
back and exits with its own code.
"""


class _Parser(argparse.ArgumentParser):
    """argparse with a one-line usage error (exit 2)."""

    def error(self, message: str) -> None:  # type: ignore[override]
        self.exit(EXIT_USAGE, f"arflow: error: {clean_message(message)}; see '{self.prog} --help'\n")


def build_parser() -> argparse.ArgumentParser:
    """The argument parser (exposed for the docs and tests)."""
    parser = _Parser(
        prog="arflow",
        description="Fit AR(p) models to many series, gate every forecast, publish only vetted ones.",
        epilog=EPILOG,
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    parser.add_argument("--version", action="version", version=f"arflow {_version()}")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND", parser_class=_Parser)
    sub.required = True

    def common(p: argparse.ArgumentParser) -> None:
        p.add_argument("--log-format", choices=("text", "json"), default="text",
                       help="text (summary for people) or json (one JSON object per event on stdout, for schedulers)")

    run = sub.add_parser("run", help="run a job: read, fit, gate, publish", epilog=EPILOG,
                         formatter_class=argparse.RawDescriptionHelpFormatter)
    run.add_argument("job_file", metavar="JOB.toml", help="the job file")
    run.add_argument("--as-of", metavar="PERIOD",
                     help="run as of an earlier period (re-runs, backfills), e.g. 2024-06-01 or 2024-06; "
                          "default: the latest period in the source")
    run.add_argument("--dry-run", action="store_true", help="compute and report, write nothing")
    run.add_argument("--allow-beyond-data", action="store_true",
                     help="allow an --as-of after the latest period in the source (a vintage with no new data)")
    run.add_argument("--allow-jump", action="store_true",
                     help="allow a vintage more than publish.max_periods_ahead periods after the job's latest one")
    common(run)
    run.set_defaults(handler=_cmd_run)
    _add_vintage_commands(sub, common)
    from .cli_explain import add_commands

    add_commands(sub, common)  # explain, report
    conv = sub.add_parser("lakehouse-convert", help="convert a job's lakehouse from the old Parquet-marker layout to Delta tables")
    conv.add_argument("job_file", metavar="JOB.toml", help="the job file (its [publish] lakehouse and schema)")
    common(conv)
    conv.set_defaults(handler=_cmd_lakehouse_convert)

    val = sub.add_parser("validate", help="check what run checks before fitting (job file, columns, types, NULLs, calendar, as-of guards)")
    val.add_argument("job_file", metavar="JOB.toml", help="the job file")
    common(val)
    val.set_defaults(handler=_cmd_validate)

    demo = sub.add_parser("demo", help="build the sample warehouse and run its job")
    demo.add_argument("--dir", type=Path, default=Path("."), help="folder for the sample database and job file (default: current folder)")
    demo.add_argument("--postgres", metavar="URL", default=None,
                      help="load the sample into this PostgreSQL database and run the job there "
                           "(a password-free URL; the password comes from PGPASSWORD or ~/.pgpass)")
    common(demo)
    demo.set_defaults(handler=_cmd_demo)
    return parser


def _version() -> str:
    from .version import arflow_version

    return arflow_version()


# -- output -----------------------------------------------------------------

def _json_default(value: Any) -> Any:
    if isinstance(value, (dt.date, dt.datetime)):
        return value.isoformat()
    if isinstance(value, Path):
        return str(value)
    return str(value)


class _Reporter:
    """Prints events: JSON lines, or a progress line on a terminal."""

    def __init__(self, fmt: str, out: TextIO, err: TextIO) -> None:
        self.json = fmt == "json"
        self.out, self.err = out, err
        self.progress = not self.json and err.isatty()
        self._dirty = False

    def __call__(self, event: dict[str, Any]) -> None:
        if self.json:
            self.emit(event)
            return
        if not self.progress:
            return
        if event["event"] == "start":
            self._line(f"arflow: {event['series']:,} series in {event['chunks']:,} chunk(s)")
        elif event["event"] == "chunk":
            pct = 100.0 * event["series_done"] / max(event["series_total"], 1)
            self._line(f"arflow: chunk {event['chunk']}/{event['chunks']}  {event['series_done']:,}/{event['series_total']:,} series  {pct:5.1f}%")
        elif event["event"] == "publish":
            self._line("arflow: publishing (one transaction)...")
        elif event["event"] == "finish":
            self.clear()

    def emit(self, event: dict[str, Any]) -> None:
        stamped = {"event": event["event"], "time": dt.datetime.now(dt.timezone.utc).isoformat(timespec="milliseconds"),
                   **{k: v for k, v in event.items() if k != "event"}}
        self.out.write(json.dumps(stamped, default=_json_default) + "\n")
        self.out.flush()

    def _line(self, text: str) -> None:
        self.err.write("\r\033[K" + text)
        self.err.flush()
        self._dirty = True

    def clear(self) -> None:
        if self._dirty:
            self.err.write("\r\033[K")
            self.err.flush()
            self._dirty = False


def _fmt_period(value: Any) -> str:
    return value.isoformat() if isinstance(value, (dt.date, dt.datetime)) else str(value)


def _summary(outcome: Any) -> str:
    def row(label: str, value: str, note: str = "") -> str:
        return f"  {label:<26}{value:>9}" + (f"   {note}" if note else "")

    head = f"arflow {'dry run' if outcome.dry_run else 'run'} {outcome.job} as of {_fmt_period(outcome.as_of)}"
    if not outcome.dry_run:
        head += f"  (run id {outcome.run_id}, attempt {outcome.attempt})"
    lines = [
        head,
        row("series read", f"{outcome.series_total:,}",
            f"({outcome.rows_read:,} rows, {outcome.chunks} chunk{'s' if outcome.chunks != 1 else ''})"),
        row("would publish" if outcome.dry_run else ("passed (held back)" if getattr(outcome, "held", False) else "published"),
            f"{outcome.series_published:,}"),
        row("would quarantine" if outcome.dry_run else "quarantined", f"{outcome.series_quarantined:,}",
            f"({100 * outcome.quarantine_share:.1f}% of series; alarm above {100 * outcome.max_quarantine_share:g}%)"),
    ]
    reasons = sorted(outcome.reason_counts.items(), key=lambda kv: (-kv[1], kv[0]))
    if reasons:
        lines.append(f"  {'reasons':<26}{'series':>9}   (a series can have several reasons)")
    for reason, count in reasons:
        lines.append(row("  " + reason, f"{count:,}"))
    warnings = sorted(getattr(outcome, "warning_counts", {}).items(), key=lambda kv: (-kv[1], kv[0]))
    if warnings:
        lines.append(f"  {'warnings (not held back)':<26}{'series':>9}   (failed checks in warn mode; see arflow explain)")
    for name, count in warnings:
        lines.append(row("  " + name, f"{count:,}"))
    lines.append(row("time taken", f"{outcome.seconds:.1f} s"))
    if outcome.dry_run:
        lines.append(f"  {'results':<26}not written (dry run); would go to {outcome.target}")
    else:
        lines.append(f"  {'results':<26}{outcome.target}")
    lines.extend(f"  note: {n}" for n in outcome.notes)
    return "\n".join(lines) + "\n"


# -- commands ---------------------------------------------------------------

def _finish(outcome: Any, reporter: _Reporter) -> int:
    reporter.clear()
    if not reporter.json:
        reporter.out.write(_summary(outcome))
    if outcome.alarm:
        reporter.err.write(
            f"arflow: alarm: {100 * outcome.quarantine_share:.1f}% of series were quarantined, over "
            f"gates.max_quarantine_share = {outcome.max_quarantine_share:g}; "
            f"{'nothing was written (dry run)' if outcome.dry_run else 'results were written'}"
            f"{'; published_forecasts was left as it was (publish.hold_on_alarm)' if getattr(outcome, 'held', False) else ''}\n"
        )
        return EXIT_ALARM
    return EXIT_OK


def _cmd_run(args: argparse.Namespace, reporter: _Reporter) -> int:
    from .job import run_job
    from .job_file import load_job

    spec = load_job(args.job_file)
    outcome = run_job(spec, as_of=args.as_of, dry_run=args.dry_run, on_event=reporter,
                      allow_beyond_data=args.allow_beyond_data, allow_jump=args.allow_jump)
    return _finish(outcome, reporter)


def _cmd_validate(args: argparse.Namespace, reporter: _Reporter) -> int:
    from .job import validate_job
    from .job_file import load_job

    spec = load_job(args.job_file)
    report = validate_job(spec)
    if reporter.json:
        reporter.emit({"event": "valid", "job": report.job, "source": report.source, "columns": dict(report.columns),
                       "rows": report.rows, "series": report.series, "first_period": report.first_period,
                       "latest_period": report.latest_period, "target": report.target, "target_status": report.target_status,
                       "notes": list(report.notes)})
    else:
        cols = ", ".join(f"{n} {t}" for n, t in report.columns)
        reporter.out.write(
            f"arflow: job {report.job} is valid\n"
            f"  source   {report.source}: {report.rows:,} rows, {report.series:,} series, "
            f"{_fmt_period(report.first_period)} to {_fmt_period(report.latest_period)}\n"
            f"  columns  {cols}\n"
            f"  target   {report.target}: {report.target_status}\n"
            + "".join(f"  note     {n}\n" for n in report.notes)
        )
    return EXIT_OK


def _cmd_demo(args: argparse.Namespace, reporter: _Reporter) -> int:
    from .demo import run_demo, run_postgres_demo

    directory = args.dir.expanduser().resolve()
    if args.postgres is not None:
        from .sample.postgres import DEMO_PG_JOB_FILE

        job_file = directory / DEMO_PG_JOB_FILE
        outcome = run_postgres_demo(directory, args.postgres, on_event=reporter)
    else:
        job_file = directory / "demo_job.toml"
        outcome = run_demo(directory, on_event=reporter)
    code = _finish(outcome, reporter)
    from .cli_explain import demo_report

    report_line = demo_report(directory, reporter, job_file)
    if not reporter.json:
        reporter.out.write(
            report_line +
            f"  {'job file':<26}{job_file}\n"
            f"  {'try next':<26}arflow run {job_file} --as-of 2024-12 --dry-run\n"
        )
    return code


# -- entry point ------------------------------------------------------------

_INTERRUPTED = "interrupted; nothing was published by this run"


def _interrupted_by_signal() -> bool:
    """A stop signal arrived before the publish committed (whatever error it surfaced as)."""
    return stop_signal() is not None and not signals_held()


def main(argv: list[str] | None = None, *, out: TextIO | None = None, err: TextIO | None = None) -> int:
    """Run the command line; returns the exit code."""
    out = _PipeSafe(out or sys.stdout)
    err = _PipeSafe(err or sys.stderr)
    parser = build_parser()
    try:
        args = parser.parse_args(argv)
    except SystemExit as exc:  # usage error or --help/--version
        return int(exc.code or 0) if not isinstance(exc.code, str) else EXIT_USAGE
    reporter = _Reporter(args.log_format, out, err)
    # SIGTERM and Ctrl-C roll back cleanly (exit 130); once the publish commits they wait for the run's own status
    restore = install_signal_handlers()
    try:
        code = args.handler(args, reporter)
        if stop_signal() is not None:
            reporter.err.write(f"arflow: note: {_signal_name(stop_signal())} arrived after the run committed; "
                               f"exiting with the run's status {code}\n")
        return code
    except ArflowError as exc:
        if _interrupted_by_signal():
            return _fail(reporter, EXIT_INTERRUPTED, "Interrupted", _INTERRUPTED)
        return _fail(reporter, exc.exit_code, type(exc).__name__, clean_message(str(exc)))
    except KeyboardInterrupt:
        return _fail(reporter, EXIT_INTERRUPTED, "Interrupted", _INTERRUPTED)
    except Exception as exc:  # noqa: BLE001 - last line of defence
        if _interrupted_by_signal():  # e.g. DuckDB's RuntimeError('Query interrupted')
            return _fail(reporter, EXIT_INTERRUPTED, "Interrupted", _INTERRUPTED)
        full = _disk_full(exc)
        if full:
            return _fail(reporter, EXIT_DATA, "DiskFull", full)
        if os.environ.get("ARFLOW_DEBUG"):
            traceback.print_exc(file=err)
        message = f"internal error ({type(exc).__name__}: {clean_message(str(exc))}); nothing was published by this run; please report it (ARFLOW_DEBUG=1 shows the traceback)"
        return _fail(reporter, EXIT_INTERNAL, type(exc).__name__, message)
    finally:
        # as the program itself (no argv given) the status is decided now: a late stop signal must not
        # turn it into death by signal (-15) while the interpreter shuts down, so it is ignored
        restore(ignore=argv is None)


def _signal_name(signum: int | None) -> str:
    try:
        return signal.Signals(signum).name if signum is not None else "a signal"
    except ValueError:
        return f"signal {signum}"


class _PipeSafe:
    """A text stream that survives its reader going away (``arflow ... | head``).

    On a broken pipe it stops writing (the rest of the output is dropped, the
    run goes on to commit or roll back) and points the process's own file
    descriptor at the null device, so nothing fails when Python flushes at exit.
    """

    def __init__(self, stream: TextIO) -> None:
        self._stream = stream
        self.closed_by_reader = False

    def write(self, text: str) -> int:
        self._guarded(self._stream.write, text)
        return len(text)

    def flush(self) -> None:
        self._guarded(self._stream.flush)

    def _guarded(self, call: Any, *args: Any) -> None:
        """Run a write or flush unless the reader is gone; a broken pipe marks it gone."""
        if self.closed_by_reader:
            return
        try:
            call(*args)
        except (BrokenPipeError, ValueError):
            self._gone()
        except OSError as exc:
            if exc.errno not in (errno.EPIPE, errno.EINVAL):
                raise
            self._gone()

    def isatty(self) -> bool:
        try:
            return bool(self._stream.isatty())
        except (ValueError, OSError):
            return False

    def _gone(self) -> None:
        self.closed_by_reader = True
        try:
            fd = self._stream.fileno()
        except (AttributeError, ValueError, OSError, io.UnsupportedOperation):
            return
        try:
            null = os.open(os.devnull, os.O_WRONLY)
            os.dup2(null, fd)
            os.close(null)
        except OSError:
            pass

    def __getattr__(self, name: str) -> Any:
        return getattr(self._stream, name)


# -- vintages -----------------------------------------------------------------

def _add_vintage_commands(sub: Any, common: Any) -> None:
    lst = sub.add_parser("vintages", help="list a job's vintages: as-of, attempts, status, counts, when published")
    lst.add_argument("job_file", metavar="JOB.toml", help="the job file")
    common(lst)
    lst.set_defaults(handler=_cmd_vintages)
    ret = sub.add_parser(
        "retract", help="remove one vintage from every table of the job's target (atomic, audited)",
        description="Remove one vintage of a job from every table of its target in one transaction, and record "
                    "who removed it in the table vintage_removals. The previous vintage becomes current again.",
    )
    ret.add_argument("job_file", metavar="JOB.toml", help="the job file")
    ret.add_argument("--as-of", metavar="PERIOD", required=True, help="the vintage to remove, as listed by 'arflow vintages'")
    ret.add_argument("--dry-run", action="store_true", help="show what would be removed, change nothing")
    ret.add_argument("--yes", action="store_true", help="confirm without a prompt (needed when not on a terminal)")
    common(ret)
    ret.set_defaults(handler=_cmd_retract)


def _cmd_lakehouse_convert(args: argparse.Namespace, reporter: _Reporter) -> int:
    from .errors import SettingsError
    from .job_file import load_job
    from .warehouse.parquet_legacy import LEGACY_SUFFIX, convert

    spec = load_job(args.job_file)
    pub = spec.publish
    if pub.lakehouse is None:
        raise SettingsError(f"job file {args.job_file} has no [publish] lakehouse; nothing to convert")
    counts = convert(pub.lakehouse, pub.schema)
    root = Path(pub.lakehouse) / pub.schema
    if reporter.json:
        reporter.emit({"event": "lakehouse-convert", "lakehouse": str(root), "rows": counts,
                       "old_layout": str(root) + LEGACY_SUFFIX})
        return EXIT_OK
    lines = [f"arflow: converted lakehouse {root} to Delta tables"]
    lines += [f"  {table:<28}{n:>10,} rows" for table, n in counts.items()]
    lines.append(f"  the old layout is kept in {root}{LEGACY_SUFFIX} (delete it once you have checked the tables)")
    reporter.out.write("\n".join(lines) + "\n")
    return EXIT_OK


def _cmd_vintages(args: argparse.Namespace, reporter: _Reporter) -> int:
    from .job_file import load_job
    from .warehouse.vintages import list_vintages

    spec = load_job(args.job_file)
    found = list_vintages(spec)
    if reporter.json:
        for v in found:
            reporter.emit({"event": "vintage", "job": spec.name, "as_of": v.as_of, "run_id": v.run_id,
                           "attempts": v.attempts, "status": v.status, "series_total": v.series_total,
                           "series_published": v.series_published, "series_quarantined": v.series_quarantined,
                           "visible": v.visible, "published_at": v.published_at, "current": v.current})
        return EXIT_OK
    if not found:
        reporter.out.write(f"arflow: job {spec.name} has no vintages in its target yet\n")
        return EXIT_OK
    head = f"{'as of':<20}{'attempts':>9}  {'status':<7}{'series':>9}{'published':>10}{'quarantined':>12}{'in view':>9}  published at (UTC)"
    lines = [f"vintages of job {spec.name} (* = current in published_forecasts)", head]
    for v in found:
        when = v.published_at.isoformat(sep=" ", timespec="seconds") if v.published_at else "-- (held; view unchanged)"
        shown = "--" if v.visible < 0 else f"{v.visible:,}"
        lines.append(f"{_fmt_period(v.as_of) + (' *' if v.current else ''):<20}{v.attempts:>9}  {v.status:<7}"
                     f"{v.series_total:>9,}{v.series_published:>10,}{v.series_quarantined:>12,}{shown:>9}  {when}")
    reporter.out.write("\n".join(lines) + "\n")
    return EXIT_OK


def _cmd_retract(args: argparse.Namespace, reporter: _Reporter) -> int:
    from .job_file import load_job
    from .warehouse.vintages import remove_vintage

    spec = load_job(args.job_file)
    plan = remove_vintage(spec, args.as_of, dry_run=True)
    if not args.dry_run and not args.yes:
        if not sys.stdin.isatty():
            reporter.err.write(
                f"arflow: error: retract removes vintage {_fmt_period(plan.as_of)} of job {spec.name} "
                f"({plan.total_rows:,} rows); add --yes to confirm (or --dry-run to look first)\n"
            )
            return EXIT_USAGE
        reporter.err.write(f"remove vintage {_fmt_period(plan.as_of)} of job {spec.name} ({plan.total_rows:,} rows)? "
                           "type the as-of to confirm: ")
        reporter.err.flush()
        if sys.stdin.readline().strip() not in (args.as_of.strip(), _fmt_period(plan.as_of)):
            reporter.err.write("arflow: not confirmed; nothing was removed\n")
            return EXIT_USAGE
    report = plan if args.dry_run else remove_vintage(spec, args.as_of)
    if reporter.json:
        reporter.emit({"event": "retract", "job": report.job, "as_of": report.as_of, "run_id": report.run_id,
                       "dry_run": report.dry_run, "rows": report.rows, "lakehouse_rows": report.lakehouse_rows,
                       "removed_by": report.removed_by})
        return EXIT_OK
    verb = "would remove" if report.dry_run else "removed"
    lines = [f"arflow: {verb} vintage {_fmt_period(report.as_of)} of job {report.job} (run id {report.run_id})"]
    lines += [f"  {table:<28}{n:>10,} rows" for table, n in report.rows.items()]
    if report.lakehouse_rows:
        lines.append(f"  {'lakehouse rows':<28}{report.lakehouse_rows:>10,}")
    lines.append("  nothing was changed (dry run)" if report.dry_run
                 else f"  recorded in vintage_removals (by {report.removed_by})")
    reporter.out.write("\n".join(lines) + "\n")
    return EXIT_OK


def _disk_full(exc: BaseException) -> str | None:
    """The one-line message for a full disk (temporary folder or target), else None.

    Writers report it in their own ways (OSError ENOSPC, polars and DuckDB
    errors carrying the system's text), so the text is matched too.
    """
    import errno
    import tempfile

    text = str(exc)
    if not (
        (isinstance(exc, OSError) and exc.errno in (errno.ENOSPC, errno.EDQUOT))
        or "No space left on device" in text
        or "Disk quota exceeded" in text
    ):
        return None
    return (
        f"a disk is full (No space left on device) while writing the run's temporary files under "
        f"{tempfile.gettempdir()}; free space there or point TMPDIR to a larger folder; nothing was published by this run"
    )


def _fail(reporter: _Reporter, code: int, kind: str, message: str) -> int:
    reporter.clear()
    message = clean_message(message)
    if reporter.json:
        reporter.emit({"event": "error", "exit_code": code, "error": kind, "message": message})
    reporter.err.write(f"arflow: error: {message}\n")
    reporter.err.flush()
    return code


#: the text summary ``arflow run`` prints, for a job outcome (the typed run call's ``RunSummary.text``)
summary_text = _summary


if __name__ == "__main__":
    sys.exit(main())
