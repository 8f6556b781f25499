"""The ``explain`` and ``report`` commands (wired into :mod:`arflow.cli`)."""

from __future__ import annotations

import argparse
from pathlib import Path
from typing import Any

EXIT_OK = 0


def add_commands(sub: Any, common: Any) -> None:
    """Add ``arflow explain`` and ``arflow report`` to the command parser."""
    exp = sub.add_parser(
        "explain", help="what happened to one series in one vintage: data, model, gates, forecast, accuracy",
        description="Show, on one screen, what happened to one series: its data span and quality findings, the "
                    "model, every gate with statistic, p-value, threshold and verdict, the forecast with intervals, "
                    "backtest skill against naive and how its earlier vintages fared.")
    exp.add_argument("job_file", metavar="JOB.toml", help="the job file")
    exp.add_argument("series", nargs="+", metavar="KEY=VALUE",
                     help="the series: KEY=VALUE for every key column (or the values alone, in key order)")
    exp.add_argument("--as-of", metavar="PERIOD", help="the vintage (default: the series' latest), e.g. 2025-06")
    common(exp)
    exp.set_defaults(handler=_cmd_explain)

    rep = sub.add_parser(
        "report", help="write one self-contained HTML report of a run (needs the 'report' extra)",
        description="Write one HTML file for a run: summary, reasons and warnings, a sortable and filterable "
                    "series table, charts per series, accuracy across vintages, backtest skill and the cautions. "
                    "It opens in any browser without a network.")
    rep.add_argument("job_file", metavar="JOB.toml", help="the job file")
    rep.add_argument("--as-of", metavar="PERIOD", help="the vintage (default: the job's latest run)")
    rep.add_argument("--output", "-o", type=Path, metavar="FILE.html",
                     help="where to write it (default: <job>_<as-of>_report.html beside the job file)")
    rep.add_argument("--sample", type=int, default=12, metavar="N",
                     help="published series to chart besides every quarantined one (default 12)")
    rep.add_argument("--max-quarantined", type=int, default=500, metavar="N",
                     help="at most this many quarantined series get charts (default 500; the table lists all)")
    common(rep)
    rep.set_defaults(handler=_cmd_report)


def _cmd_explain(args: argparse.Namespace, reporter: Any) -> int:
    from .explain import explain_series, format_explanation, parse_key_args
    from .job_file import load_job

    spec = load_job(args.job_file)
    keys = parse_key_args(args.series, tuple(spec.source.keys))
    result = explain_series(spec, keys, args.as_of)
    if reporter.json:
        reporter.emit({"event": "explain", **result})
    else:
        reporter.out.write(format_explanation(result))
    return EXIT_OK


def _cmd_report(args: argparse.Namespace, reporter: Any) -> int:
    from .errors import SettingsError
    from .job_file import load_job
    from .report import ReportOptions, write_report

    if args.sample < 0 or args.max_quarantined < 0:
        raise SettingsError("--sample and --max-quarantined take a count of 0 or more")
    spec = load_job(args.job_file)
    summary = write_report(spec, args.output, args.as_of, ReportOptions(args.sample, args.max_quarantined))
    if reporter.json:
        reporter.emit({"event": "report", "path": str(summary.path.resolve()), "run_id": summary.run_id,
                       "series": summary.series, "charted_series": summary.charted_series, "charts": summary.charts,
                       "notes": list(summary.notes)})
    else:
        reporter.out.write(f"arflow: wrote the report of {summary.run_id} to {summary.path.resolve()}\n"
                           f"  {summary.series:,} series, {summary.charted_series:,} charted ({summary.charts} charts); "
                           f"open it in a browser: file://{summary.path.resolve()}\n"
                           + "".join(f"  note: {n}\n" for n in summary.notes))
    return EXIT_OK


#: where ``arflow demo`` writes the demo's report (in the demo folder)
DEMO_REPORT = "vellmar_report.html"


def demo_report(directory: Path, reporter: Any) -> str:
    """Write the demo run's report beside its database; a summary line (a note naming the extra without plotly)."""
    from .errors import SettingsError
    from .job_file import load_job
    from .report import write_report

    path = directory / DEMO_REPORT
    try:
        summary = write_report(load_job(directory / "demo_job.toml"), path)
    except SettingsError as exc:  # the report extra is not installed
        if reporter.json:
            reporter.emit({"event": "note", "message": f"no report: {exc}"})
        return f"  {'report':<26}not written: {exc}\n"
    if reporter.json:
        reporter.emit({"event": "report", "path": str(summary.path), "run_id": summary.run_id,
                       "series": summary.series, "charted_series": summary.charted_series, "charts": summary.charts})
    return f"  {'report':<26}{summary.path} (open it in a browser: file://{summary.path})\n"
