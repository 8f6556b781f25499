"""Gather one run's results from the DuckDB target and write the report page."""

from __future__ import annotations

import datetime as dt
import html
import math
import re
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import duckdb
import polars as pl

from ..errors import SettingsError, SourceError
from ..vocabulary import BY_NAME, WARNING_CHECKS, canonical
from . import charts
from .cautions import CAUTIONS

_UNIT = {"day": "days", "week": "weeks", "month": "months", "quarter": "quarters", "year": "years", "step": "steps"}


@dataclass(frozen=True)
class ReportOptions:
    """What goes into the report."""

    #: published series shown with their charts (besides every quarantined one), spread evenly over the key order
    sample_published: int = 12
    #: at most this many quarantined series get charts (the table lists them all)
    max_quarantined: int = 500


@dataclass(frozen=True)
class ReportSummary:
    """Where the report went and what it holds."""

    path: Path
    run_id: str
    series: int
    charted_series: int
    charts: int
    notes: tuple[str, ...] = field(default_factory=tuple)


def _q(name: str) -> str:
    return '"' + name.replace('"', '""') + '"'


def _iso(value: Any) -> str:
    return value.isoformat() if isinstance(value, (dt.date, dt.datetime)) else str(value)


def _finite(v: Any) -> Any:
    return v if not (isinstance(v, float) and not math.isfinite(v)) else None


def _open(spec: Any) -> duckdb.DuckDBPyConnection:
    from ..explain import open_read_only, refuse_postgres

    refuse_postgres(spec, "report")
    return open_read_only(spec.publish.database, spec.publish.schema, "report")


def _pick_run(con: duckdb.DuckDBPyConnection, s: str, job: str, as_of: str | None) -> dict[str, Any]:
    cur = con.execute(f"SELECT * FROM {s}.runs WHERE job = ? ORDER BY as_of", [job])
    cols = [d[0] for d in cur.description]
    runs = [dict(zip(cols, r)) for r in cur.fetchall()]
    if not runs:
        raise SourceError(f"job {job} has no runs in its target yet; run it first (arflow run)")
    if as_of is None:
        return runs[-1]
    text = as_of.strip()
    match = [r for r in runs if _iso(r["as_of"]) == text or _iso(r["as_of"]).startswith(text)]
    if len(match) != 1:
        listing = ", ".join(_iso(r["as_of"]) for r in runs[-6:])
        raise SettingsError(f"--as-of {text[:40]!r} matches {len(match)} vintage(s) of job {job} "
                            f"(latest: {listing}); give one of them")
    return match[0]


def _frame(con: duckdb.DuckDBPyConnection, sql: str, params: list[Any]) -> pl.DataFrame:
    out = pl.from_arrow(con.sql(sql, params=params).to_arrow_table())
    assert isinstance(out, pl.DataFrame)
    return out


def _label(keys: tuple[str, ...], row: tuple[Any, ...]) -> str:
    return " ".join(f"{k}={_iso(v)}" for k, v in zip(keys, row)) if len(keys) > 1 else _iso(row[0])


def _gather(spec: Any, as_of: str | None, options: ReportOptions) -> dict[str, Any]:
    s = _q(spec.publish.schema)
    keys = tuple(spec.source.keys)
    kcols = ", ".join(_q(k) for k in keys)
    con = _open(spec)
    try:
        run = _pick_run(con, s, spec.name, as_of)
        rid = run["run_id"]
        models = _frame(con, 
            f"SELECT {kcols}, decision, reasons, quality_flags, transform, n_obs, sigma, first_period, last_period "
            f"FROM {s}.models WHERE run_id = ? ORDER BY {kcols}", [rid])
        failed = _frame(con, 
            f"SELECT {kcols}, gate, statistic, p_value, threshold FROM {s}.gates WHERE run_id = ? AND NOT passed "
            f"ORDER BY {kcols}, gate", [rid])
        quarantined = models.filter(pl.col("decision") != "published")
        published = models.filter(pl.col("decision") == "published")
        n_pub = published.height
        take = min(options.sample_published, n_pub)
        picks = sorted({round(i * (n_pub - 1) / max(take - 1, 1)) for i in range(take)}) if take else []
        chosen = pl.concat([quarantined.head(options.max_quarantined), published[picks]]) if picks else \
            quarantined.head(options.max_quarantined)
        chosen_keys = chosen.select(keys)
        con.register("arflow_chosen", chosen_keys.to_arrow())
        on = " AND ".join(f"t.{_q(k)} IS NOT DISTINCT FROM c.{_q(k)}" for k in keys)
        forecasts = _frame(con, f"SELECT t.* FROM {s}.forecasts AS t SEMI JOIN arflow_chosen AS c ON {on} "
                                f"WHERE t.run_id = ? ORDER BY ALL", [rid])
        acf = _frame(con, f"SELECT t.* FROM {s}.residual_acf AS t SEMI JOIN arflow_chosen AS c ON {on} "
                          f"WHERE t.run_id = ? ORDER BY ALL", [rid])
        con.unregister("arflow_chosen")
        bt_cols = {r[0] for r in con.execute(
            "SELECT column_name FROM information_schema.columns WHERE lower(table_schema) = lower(?) "
            "AND table_name = 'backtests'", [spec.publish.schema]).fetchall()}
        skill = pl.DataFrame()
        if bt_cols:
            step = "step" if "step" in bt_cols else "horizon"  # a schema not yet upgraded by a run of this release
            on_b = " AND ".join(f"a.{_q(k)} = n.{_q(k)}" for k in keys)
            skill = _frame(con, f"""
                SELECT a.{step} AS step, quantile_cont(a.rmse / n.rmse, 0.25) AS q25,
                       median(a.rmse / n.rmse) AS median, quantile_cont(a.rmse / n.rmse, 0.75) AS q75,
                       count(*) AS series
                FROM {s}.backtests AS a JOIN {s}.backtests AS n
                  ON n.run_id = a.run_id AND {on_b} AND n.{step} = a.{step} AND n.model = 'naive'
                WHERE a.run_id = ? AND a.model = 'ar' AND n.rmse > 0 AND isfinite(a.rmse / n.rmse)
                GROUP BY a.{step} ORDER BY a.{step}""", [rid])
        acc_cols = [r[0] for r in con.execute(
            "SELECT column_name FROM information_schema.columns WHERE lower(table_schema) = lower(?) "
            "AND table_name = 'accuracy' ORDER BY ordinal_position", [spec.publish.schema]).fetchall()]
        accuracy = pl.DataFrame()
        if acc_cols:
            vintage = "forecast_run_id" if "forecast_run_id" in acc_cols else "run_id"
            hits = "".join(f", 100 * avg(CAST({_q(c)} AS DOUBLE)) AS {_q(c[len('covered_'):])}"
                           for c in acc_cols if c.startswith("covered_"))
            accuracy = _frame(con, f"""
                SELECT a.step, count(*) AS scored, count(DISTINCT a.{vintage}) AS vintages, avg(abs(a.error)) AS mae,
                       sqrt(avg(a.error * a.error)) AS rmse, avg(a.error) AS mean_error{hits}
                FROM {s}.accuracy AS a JOIN {s}.runs AS r ON r.run_id = a.{vintage}
                WHERE a.job = ? AND r.as_of < ? GROUP BY a.step ORDER BY a.step""", [spec.name, run["as_of"]])
    finally:
        con.close()
    history, notes = _history(spec, chosen_keys, run["as_of"])
    return {"run": run, "keys": keys, "models": models, "failed": failed, "chosen": chosen, "forecasts": forecasts,
            "acf": acf, "skill": skill, "accuracy": accuracy, "history": history, "notes": notes,
            "quarantined_total": quarantined.height}


def _history(spec: Any, chosen: pl.DataFrame, as_of: Any) -> tuple[pl.DataFrame, list[str]]:
    """The chosen series' values from the job's source (DuckDB sources; others get no history line)."""
    if spec.source.engine != "duckdb" or chosen.height == 0:
        return pl.DataFrame(), ["history lines need a DuckDB source; this job's series are shown without them"]
    from ..warehouse.duckdb_source import DuckDBSource

    try:
        with DuckDBSource(spec.source, spec.settings.frequency) as source:
            return source.history([tuple(r) for r in chosen.iter_rows()], as_of), []
    except SourceError as exc:
        return pl.DataFrame(), [f"history lines left out: the source could not be read ({exc})"]


# -------------------------------------------------------------------------------------------- page

_CSS = """
body{font-family:Helvetica,Arial,sans-serif;color:#2f3e4e;margin:0;background:#f7f7f5}
main{max-width:1180px;margin:0 auto;padding:16px 24px 48px}
h1{font-size:22px;margin:8px 0 4px}h2{font-size:18px;margin:28px 0 8px;border-bottom:1px solid #d8d8d8;padding-bottom:4px}
h3{font-size:15px;margin:18px 0 4px}
.cards{display:flex;flex-wrap:wrap;gap:10px;margin:12px 0}
.card{background:white;border:1px solid #dedede;border-radius:4px;padding:8px 14px;min-width:120px}
.card b{display:block;font-size:20px}.card span{font-size:12px;color:#5d6b78}
table{border-collapse:collapse;background:white;font-size:13px}
th,td{border:1px solid #e0e0e0;padding:3px 8px;text-align:left;vertical-align:top}
th{background:#eef1f3;cursor:pointer;user-select:none}th.sorted-asc::after{content:" \\25B2"}th.sorted-desc::after{content:" \\25BC"}
td.num{text-align:right}.quarantined{color:#a23b26;font-weight:bold}.published{color:#3d6b3c}
.grid{display:grid;grid-template-columns:1fr 1fr;gap:10px}.box{background:white;border:1px solid #dedede;padding:4px}
.series{background:white;border:1px solid #dedede;border-radius:4px;padding:8px 12px;margin:14px 0}
.gates li{margin:2px 0}.note{color:#5d6b78;font-size:13px}code{background:#eef1f3;padding:0 3px}
#filters{margin:8px 0;display:flex;gap:10px;align-items:center;font-size:13px}
#filters input{padding:4px 6px;width:280px}
.settings td:first-child{color:#5d6b78}
.scroll{max-height:440px;overflow:auto;display:inline-block;border:1px solid #dedede}
thead th{position:sticky;top:0}
"""

_TABLE_JS = """
(function(){
  var table=document.getElementById('series-table');var body=table.tBodies[0];
  var text=document.getElementById('series-filter');var decision=document.getElementById('decision-filter');
  var count=document.getElementById('series-count');
  function apply(){
    var t=text.value.trim().toLowerCase();var d=decision.value;var shown=0;
    for(var i=0;i<body.rows.length;i++){var r=body.rows[i];
      var ok=(!t||r.textContent.toLowerCase().indexOf(t)>=0)&&(!d||r.getAttribute('data-decision')===d);
      r.style.display=ok?'':'none';if(ok)shown++;}
    count.textContent=shown+' of '+body.rows.length+' series shown';
  }
  text.addEventListener('input',apply);decision.addEventListener('change',apply);
  var heads=table.tHead.rows[0].cells;
  for(var c=0;c<heads.length;c++){(function(col){heads[col].addEventListener('click',function(){
    var asc=!heads[col].classList.contains('sorted-asc');
    for(var k=0;k<heads.length;k++){heads[k].classList.remove('sorted-asc','sorted-desc');}
    heads[col].classList.add(asc?'sorted-asc':'sorted-desc');
    var rows=Array.prototype.slice.call(body.rows);var num=heads[col].getAttribute('data-type')==='num';
    rows.sort(function(a,b){var x=a.cells[col].getAttribute('data-v')||a.cells[col].textContent;
      var y=b.cells[col].getAttribute('data-v')||b.cells[col].textContent;
      var r=num?(parseFloat(x)||0)-(parseFloat(y)||0):x.localeCompare(y);return asc?r:-r;});
    rows.forEach(function(r){body.appendChild(r);});});})(c);}
  apply();
})();
"""


def _md(text: str) -> str:
    """The README's inline Markdown (``code`` and **bold**) as HTML."""
    out = html.escape(text, quote=False)
    out = re.sub(r"`([^`]+)`", r"<code>\1</code>", out)
    return re.sub(r"\*\*([^*]+)\*\*", r"<b>\1</b>", out)


def _fmt(v: Any) -> str:
    if v is None or (isinstance(v, float) and not math.isfinite(v)):
        return "-"
    if isinstance(v, float):
        return f"{v:.3e}" if v != 0 and (abs(v) >= 1e6 or abs(v) < 1e-3) else f"{v:,.4g}"
    if isinstance(v, int):
        return f"{v:,}"
    return html.escape(_iso(v))


def gate_in_words(gate: str, statistic: Any, p_value: Any, threshold: Any) -> str:
    """One failed gate as a sentence: what it tests, its numbers and the threshold it missed."""
    name = canonical(gate)[0]
    info = BY_NAME.get(name)
    what = info.tests if info else gate
    if statistic is None:
        return f"{name}: could not be computed, so it fails closed ({what})"
    parts = [f"{name}: {what}; {info.statistic if info and info.statistic else 'statistic'} = {_fmt(statistic)}"]
    if p_value is not None:
        parts.append(f"p-value {_fmt(p_value)} below the level {_fmt(threshold)}")
    elif threshold is not None:
        parts.append(f"threshold {_fmt(threshold)}")
    text = ", ".join(parts)
    if info and info.quarantines != "always":
        text += " (a warning unless enforced)"
    return text + (f". What to do: {info.action}." if info else ".")


def write_report(spec: Any, output: Path | None, as_of: str | None = None,
                 options: ReportOptions = ReportOptions()) -> ReportSummary:
    """Write the HTML report of one run of ``spec`` (default: its latest vintage) to ``output``.

    ``output`` None: ``<job>_<as_of>_report.html`` beside the job file.
    """
    charts.plotly()  # a one-line error naming the extra before any work
    d = _gather(spec, as_of, options)
    run, keys, models = d["run"], d["keys"], d["models"]
    freq = spec.settings.frequency
    unit = _UNIT.get(freq, "periods")
    value_title = spec.source.value
    period_title = spec.source.period if spec.source.period == freq else f"{spec.source.period} ({freq})"
    figures: list[str] = []

    def add(fig: Any) -> str:
        div = f"chart-{len(figures) + 1}"
        figures.append(div)
        return f'<div class="box">{charts.figure_html(fig, div)}</div>'

    reason_counts: dict[str, int] = {}
    for row in models.get_column("reasons").to_list():
        for r in row or []:
            for name in canonical(r):
                reason_counts[name] = reason_counts.get(name, 0) + 1
    reasons_sorted = sorted(reason_counts.items(), key=lambda kv: (-kv[1], kv[0]))
    # warnings: failed rows of warning checks that did not hold their series back
    held = {(tuple(r[: len(keys)]), n) for r in models.select(*keys, "reasons").iter_rows()
            for n in (r[len(keys)] or [])}
    warn_counts: dict[str, int] = {}
    for r in d["failed"].iter_rows(named=True):
        name = canonical(r["gate"])[0]
        if name in WARNING_CHECKS and (tuple(r[k] for k in keys), name) not in held:
            warn_counts[name] = warn_counts.get(name, 0) + 1
    warns_sorted = sorted(warn_counts.items(), key=lambda kv: (-kv[1], kv[0]))

    body: list[str] = []
    title = f"arflow run report: {spec.name} as of {_iso(run['as_of'])}"
    body.append(f"<h1>{html.escape(title)}</h1>")
    body.append(f'<p class="note">run id <code>{html.escape(run["run_id"])}</code>, attempt {run["attempt"]}, '
                f'status <b>{html.escape(str(run["status"]))}</b>, finished {_fmt(run["finished_at"])} UTC; '
                f'arflow {html.escape(str(run["arflow_version"]))}</p>')
    total, pub, quar = int(run["series_total"]), int(run["series_published"]), int(run["series_quarantined"])
    cards = [("series read", f"{total:,}"), ("published", f"{pub:,}"), ("quarantined", f"{quar:,}"),
             ("quarantined share", f"{100 * (run['quarantine_share'] or 0):.1f}%"),
             ("warnings (not held back)", f"{sum(warn_counts.values()):,}"),
             ("time taken", f"{run['duration_seconds'] or 0:.1f} s")]
    body.append('<h2>Run summary</h2><div class="cards">' + "".join(
        f'<div class="card"><b>{v}</b><span>{html.escape(k)}</span></div>' for k, v in cards) + "</div>")
    body.append('<p class="note">A series can have several reasons, so the reason counts can add up to more than '
                'the quarantined series. Warnings are checks that failed without holding the series back '
                '(see the README table of checks).</p>')
    row_html = []
    if reasons_sorted:
        row_html.append(add(charts.bar_chart([n for n, _ in reasons_sorted], [c for _, c in reasons_sorted],
                                             "Reasons for quarantine", "number of series", "reason")))
    else:
        row_html.append('<div class="box"><p class="note">No series was quarantined.</p></div>')
    if warns_sorted:
        row_html.append(add(charts.bar_chart([n for n, _ in warns_sorted], [c for _, c in warns_sorted],
                                             "Warnings: failed checks that did not hold series back", "number of series",
                                             "check", colour=charts.WARN)))
    else:
        row_html.append('<div class="box"><p class="note">No warning check fired.</p></div>')
    body.append('<div class="grid">' + "".join(row_html) + "</div>")
    settings = [("job", spec.name), ("source", run.get("source")), ("frequency", run.get("frequency")),
                ("forecast horizon (periods)", run.get("horizon")),
                ("nominal interval levels", ", ".join(f"{100 * c:g}%" for c in (run.get("coverage") or []))),
                ("on failure", run.get("on_failure")), ("gate level alpha", spec.settings.gates.alpha),
                ("residual test", spec.settings.gates.residual_test),
                ("minimum observations", spec.settings.gates.min_observations),
                ("naive gate", spec.settings.backtest.naive_gate if spec.settings.backtest.enabled else "off"),
                ("interval calibration gate", spec.settings.backtest.coverage_gate if spec.settings.backtest.enabled else "off"),
                ("alarm above quarantined share", spec.settings.gates.max_quarantine_share),
                ("job file sha256", run.get("config_sha256"))]
    body.append('<h3>Settings</h3><table class="settings">' + "".join(
        f"<tr><td>{html.escape(k)}</td><td>{_fmt(v)}</td></tr>" for k, v in settings) + "</table>")

    # the series table
    fails: dict[tuple, list[str]] = {}
    for r in d["failed"].iter_rows(named=True):
        fails.setdefault(tuple(r[k] for k in keys), []).append(canonical(r["gate"])[0])
    body.append('<h2>Series</h2><div id="filters"><label>filter <input id="series-filter" type="search" '
                'placeholder="key, reason or warning"></label><label>decision <select id="decision-filter">'
                '<option value="">all</option><option value="published">published</option>'
                '<option value="quarantined">quarantined</option></select></label><span id="series-count"></span></div>')
    head = "".join(f"<th>{html.escape(k)}</th>" for k in keys) + (
        '<th>decision</th><th>reasons</th><th>warnings</th><th data-type="num">observations</th>'
        "<th>transform</th><th>last period</th>")
    rows = []
    for r in models.iter_rows(named=True):
        key = tuple(r[k] for k in keys)
        reasons = [n for x in (r["reasons"] or []) for n in canonical(x)]
        warns = [g for g in fails.get(key, []) if g in WARNING_CHECKS and g not in reasons]
        cells = "".join(f"<td>{_fmt(r[k])}</td>" for k in keys)
        rows.append(f'<tr data-decision="{r["decision"]}">{cells}<td class="{r["decision"]}">{r["decision"]}</td>'
                    f"<td>{html.escape(', '.join(reasons))}</td><td>{html.escape(', '.join(warns))}</td>"
                    f'<td class="num" data-v="{r["n_obs"] or 0}">{_fmt(r["n_obs"])}</td>'
                    f"<td>{_fmt(r['transform'])}</td><td>{_fmt(r['last_period'])}</td></tr>")
    body.append(f'<div class="scroll"><table id="series-table"><thead><tr>{head}</tr></thead><tbody>{"".join(rows)}</tbody></table></div>')

    # per series
    chosen = d["chosen"]
    body.append(f"<h2>Series in detail</h2><p class=\"note\">Every quarantined series "
                f"({min(d['quarantined_total'], options.max_quarantined):,} of {d['quarantined_total']:,} shown; "
                f"setting max_quarantined = {options.max_quarantined}) and a sample of "
                f"{chosen.height - min(d['quarantined_total'], options.max_quarantined):,} published series spread over "
                f"the key order (setting sample_published = {options.sample_published}). Bands are the prediction "
                "intervals; dashed lines on the autocorrelation charts are the 95% bounds of white noise.</p>")
    for note in d["notes"]:
        body.append(f'<p class="note">{html.escape(note)}</p>')
    hist = d["history"]
    fc = d["forecasts"]
    acf = d["acf"]
    levels = sorted({c[len("lower_"):] for c in fc.columns if c.startswith("lower_")}, key=lambda x: float(x.replace("_", ".")))
    failed_by_key: dict[tuple, list[dict]] = {}
    for r in d["failed"].iter_rows(named=True):
        failed_by_key.setdefault(tuple(r[k] for k in keys), []).append(r)

    def rows_of(frame: pl.DataFrame, key: tuple) -> pl.DataFrame:
        if frame.height == 0:
            return frame
        cond = pl.lit(True)
        for k, v in zip(keys, key):
            cond = cond & (pl.col(k).is_null() if v is None else pl.col(k) == v)
        return frame.filter(cond)

    for r in chosen.iter_rows(named=True):
        key = tuple(r[k] for k in keys)
        label = _label(keys, key)
        h = rows_of(hist, key)
        f = rows_of(fc, key)
        history = {"period": [_iso(p) for p in h.get_column("period").to_list()] if h.height else [],
                   "value": h.get_column("value").to_list() if h.height else []}
        forecast = None
        if f.height:
            forecast = {"period": [_iso(p) for p in f.get_column("period").to_list()],
                        "forecast": f.get_column("forecast").to_list(),
                        "bands": {lv.replace("_", "."): (f.get_column(f"lower_{lv}").to_list(),
                                                         f.get_column(f"upper_{lv}").to_list())
                                  for lv in levels if f.get_column(f"lower_{lv}").null_count() < f.height}}
        a = rows_of(acf, key)
        reasons = [n for x in (r["reasons"] or []) for n in canonical(x)]
        body.append(f'<div class="series" id="series-{len(figures)}"><h3>{html.escape(label)}: '
                    f'<span class="{r["decision"]}">{r["decision"]}</span>'
                    f'{(" (" + html.escape(", ".join(reasons)) + ")") if reasons else ""}</h3>')
        words = [gate_in_words(g["gate"], _finite(g["statistic"]), _finite(g["p_value"]), _finite(g["threshold"]))
                 for g in failed_by_key.get(key, [])]
        extra = [f"{n}: {BY_NAME[n].tests}" for n in reasons if n in BY_NAME and "gate" not in BY_NAME[n].appears_as]
        if words or extra:
            body.append('<ul class="gates">' + "".join(f"<li>{html.escape(w)}</li>" for w in words + extra) + "</ul>")
        else:
            body.append('<p class="note">Every gate passed.</p>')
        title_f = "History and forecast" if forecast else "History (no forecast published in this run)"
        pair = [add(charts.series_chart(history, forecast, title_f, period_title, value_title))]
        if a.height:
            pair.append(add(charts.acf_chart(a.get_column("lag").to_list(), a.get_column("autocorrelation").to_list(),
                                             r["n_obs"], "Residual autocorrelation by lag", unit)))
        else:
            pair.append('<div class="box"><p class="note">No residuals: the series was not fitted.</p></div>')
        body.append('<div class="grid">' + "".join(pair) + "</div></div>")

    # accuracy and skill
    body.append("<h2>Accuracy across vintages and backtest skill</h2>")
    accd = d["accuracy"]
    if accd.height:
        steps = accd.get_column("step").to_list()
        hit_cols = [c for c in accd.columns if c not in ("step", "scored", "vintages", "mae", "rmse", "mean_error")]
        err, rate = charts.accuracy_charts(
            steps, {"MAE": accd.get_column("mae").to_list(), "RMSE": accd.get_column("rmse").to_list(),
                    "mean error (bias)": accd.get_column("mean_error").to_list()},
            {c.replace("_", "."): accd.get_column(c).to_list() for c in hit_cols}, unit, value_title)
        body.append(f'<p class="note">{int(accd.get_column("scored").sum()):,} published forecasts of vintages before '
                    f'this one, scored against their actuals (table <code>accuracy</code>).</p>')
        body.append('<div class="grid">' + add(err) + add(rate) + "</div>")
    else:
        body.append('<p class="note">No earlier vintage of this job has been scored against actuals yet: run the job '
                    "again when new periods arrive (or backfill with --as-of) to fill the accuracy table.</p>")
    sk = d["skill"]
    if sk.height:
        body.append('<div class="grid">' + add(charts.skill_chart(sk.get_column("step").to_list(), sk.get_column("q25").to_list(),
                                                                 sk.get_column("median").to_list(), sk.get_column("q75").to_list(),
                                                                 unit)) + "</div>")
    else:
        body.append('<p class="note">No backtest in this run (backtest.enabled = false).</p>')

    body.append("<h2>What the intervals and gates guarantee, and what they do not</h2><ul>"
                + "".join(f"<li>{_md(c)}</li>" for c in CAUTIONS) + "</ul>")
    page = (f'<!DOCTYPE html><html lang="en"><head><meta charset="utf-8"><title>{html.escape(title)}</title>'
            f"<style>{_CSS}</style><script>{charts.plotly_js()}</script></head><body><main>"
            + "".join(body) + f"</main><script>{_TABLE_JS}</script></body></html>")
    output = default_report_path(spec, run["as_of"]) if output is None else Path(output)
    output.parent.mkdir(parents=True, exist_ok=True)
    tmp = output.with_name(output.name + ".tmp")
    tmp.write_text(page, encoding="utf-8")
    tmp.replace(output)
    return ReportSummary(output, str(run["run_id"]), models.height, chosen.height, len(figures), tuple(d["notes"]))


def default_report_path(spec: Any, as_of: Any) -> Path:
    """``<job file folder>/<job>_<as_of>_report.html``."""
    folder = Path(spec.path).parent if getattr(spec, "path", None) else Path(".")
    safe = re.sub(r"[^A-Za-z0-9_.-]+", "-", f"{spec.name}_{_iso(as_of)}")
    return folder / f"{safe}_report.html"


__all__ = ["ReportOptions", "ReportSummary", "write_report", "gate_in_words", "default_report_path"]
