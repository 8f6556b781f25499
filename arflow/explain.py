"""``arflow explain``: what happened to one series in one vintage, on one screen.

:func:`explain_series` reads the job's DuckDB target (read-only) and returns
one JSON-friendly dict: the data span and quality findings, the model, every
gate with its statistic, p-value, threshold and verdict, the forecast with its
intervals, backtest skill against naive, and how the series' earlier vintages
fared. :func:`format_explanation` prints it for a terminal.
"""

from __future__ import annotations

import datetime as dt
import math
from pathlib import Path
from typing import Any

import duckdb
import numpy as np

from .errors import PublishError, SettingsError, SourceError
from .vocabulary import BY_NAME, canonical

#: what a series is explained from
TABLES = ("runs", "models", "gates", "forecasts", "backtests", "accuracy", "published_forecasts")


def parse_key_args(values: list[str], keys: tuple[str, ...]) -> dict[str, str]:
    """``KEY=VALUE`` pairs, or plain values in the job's key order, as {key: text}."""
    out: dict[str, str] = {}
    plain = [v for v in values if "=" not in v]
    named = [v for v in values if "=" in v]
    if plain and named:
        raise SettingsError("give the series either as KEY=VALUE pairs or as plain values in key order, not both")
    if plain:
        if len(plain) != len(keys):
            raise SettingsError(f"give one value per key column ({', '.join(keys)}), e.g. "
                                + " ".join(f"{k}=..." for k in keys))
        return dict(zip(keys, plain))
    for item in named:
        k, _, v = item.partition("=")
        match = [key for key in keys if key.lower() == k.strip().lower()]
        if not match:
            raise SettingsError(f"{k.strip()!r} is not a key column of this job (keys: {', '.join(keys)})")
        out[match[0]] = v
    missing = [k for k in keys if k not in out]
    if missing:
        raise SettingsError(f"missing key value(s) for {', '.join(missing)}; give every key, e.g. "
                            + " ".join(f"{k}=..." for k in keys))
    return out


def _q(name: str) -> str:
    return '"' + name.replace('"', '""') + '"'


def refuse_postgres(spec: Any, command: str) -> None:
    """One-line refusal for a job that publishes to PostgreSQL (these commands read a DuckDB target)."""
    address = getattr(spec.publish, "postgres", None)
    if address is not None:
        raise SettingsError(
            f"arflow {command} reads a DuckDB target; job {spec.name} publishes to PostgreSQL "
            f"({address.describe()}, schema {spec.publish.schema}): query its views latest_series_status and "
            "published_forecasts and its gates table there, or publish the job to a DuckDB database as well")


def open_read_only(database: Path | None, schema: str, command: str) -> duckdb.DuckDBPyConnection:
    """The job's DuckDB target opened read-only for ``arflow <command>``, holding arflow's results in ``schema``.

    A one-line error when there is no target, it cannot be opened, or the job has not written it yet.
    """
    if database is None:
        raise SettingsError(f"arflow {command} reads the job's DuckDB target; this job has no [publish] database")
    if not Path(database).exists():
        raise SourceError(f"target database {database} does not exist yet; run the job first (arflow run)")
    from .warehouse.duckdb_source import open_duckdb

    try:
        con = open_duckdb(str(database), read_only=True)
    except duckdb.Error as exc:
        raise PublishError(f"cannot open target database {database} read-only ({str(exc).splitlines()[0]}); "
                           "retry when the run holding it finishes") from None
    try:
        have = _tables(con, schema)
        if "models" not in have or "runs" not in have:
            raise SourceError(f"schema {schema} in {database} holds no arflow results; run the job first")
    except BaseException:
        con.close()
        raise
    return con


def _tables(con: duckdb.DuckDBPyConnection, schema: str) -> set[str]:
    return {r[0] for r in con.execute(
        "SELECT table_name FROM information_schema.tables WHERE lower(table_schema) = lower(?)", [schema]).fetchall()}


def _rows(con: duckdb.DuckDBPyConnection, sql: str, params: list[Any]) -> list[dict[str, Any]]:
    cur = con.execute(sql, params)
    cols = [d[0] for d in cur.description]
    return [dict(zip(cols, r)) for r in cur.fetchall()]


def _clean(value: Any) -> Any:
    """JSON-friendly: dates as ISO text, non-finite floats as None, tuples as lists."""
    if isinstance(value, float):
        return value if math.isfinite(value) else None
    if isinstance(value, (dt.date, dt.datetime)):
        return value.isoformat()
    if isinstance(value, dict):
        return {k: _clean(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [_clean(v) for v in value]
    if isinstance(value, np.generic):
        return _clean(value.item())
    return value


def ar_roots(lags: list[int], coefficients: list[float]) -> list[dict[str, float]]:
    """Inverse characteristic roots (companion-matrix eigenvalues) of ``y_t = sum b_l y_(t-l)``: modulus, angle."""
    if not lags:
        return []
    p = max(lags)
    poly = np.zeros(p + 1)
    poly[0] = 1.0
    for lag, b in zip(lags, coefficients):
        poly[lag] -= b
    # eigenvalues of the companion matrix = roots of z^p - b1 z^(p-1) - ... - bp
    inverse = np.roots(poly)
    out = [{"modulus": float(abs(z)), "angle": float(np.angle(z))} for z in inverse]
    return sorted(out, key=lambda r: -r["modulus"])


def explain_series(spec: Any, key_values: dict[str, str], as_of: str | None = None) -> dict[str, Any]:
    """What happened to one series of ``spec`` in one vintage (default: its latest), as a dict."""
    schema = spec.publish.schema
    s = _q(schema)
    keys = tuple(spec.source.keys)
    refuse_postgres(spec, "explain")
    con = open_read_only(spec.publish.database, schema, "explain")
    try:
        have = _tables(con, schema)
        where = " AND ".join(f"CAST(m.{_q(k)} AS VARCHAR) = ?" for k in keys)
        kv = [key_values[k] for k in keys]
        runs = _rows(con, f"SELECT r.* FROM {s}.runs AS r JOIN {s}.models AS m ON m.run_id = r.run_id "
                          f"WHERE r.job = ? AND {where} ORDER BY r.as_of", [spec.name, *kv])
        if not runs:
            sample = con.execute(
                f"SELECT {', '.join(_q(k) for k in keys)} FROM {s}.models WHERE run_id IN "
                f"(SELECT run_id FROM {s}.runs WHERE job = ?) GROUP BY ALL ORDER BY ALL LIMIT 3", [spec.name]).fetchall()
            example = "; ".join(" ".join(f"{k}={v}" for k, v in zip(keys, row)) for row in sample) or "none"
            label = " ".join(f"{k}={key_values[k]}" for k in keys)
            raise SettingsError(f"job {spec.name} has no series {label} in {spec.publish.database} "
                                f"(examples: {example}); check the key values")
        run = runs[-1]
        if as_of is not None:
            text = as_of.strip()
            match = [r for r in runs if _iso(r["as_of"]) == text or _iso(r["as_of"]).startswith(text)]
            if len(match) != 1:
                listing = ", ".join(_iso(r["as_of"]) for r in runs[-6:])
                raise SettingsError(f"--as-of {text[:40]!r} matches {len(match)} vintage(s) of this series "
                                    f"(its vintages: {listing}); give one of them")
            run = match[0]
        run_id = run["run_id"]
        mwhere = where.replace("m.", "t.")
        model = _rows(con, f"SELECT * FROM {s}.models AS t WHERE run_id = ? AND {mwhere}", [run_id, *kv])[0]
        gates = _rows(con, f"SELECT gate, statistic, p_value, threshold, passed FROM {s}.gates AS t "
                           f"WHERE run_id = ? AND {mwhere} ORDER BY gate", [run_id, *kv])
        forecasts = _rows(con, f"SELECT * EXCLUDE (run_id, {', '.join(_q(k) for k in keys)}) FROM {s}.forecasts AS t "
                               f"WHERE run_id = ? AND {mwhere} ORDER BY step", [run_id, *kv]) if "forecasts" in have else []
        published_now: list[dict[str, Any]] = []
        views = {r[0] for r in con.execute(
            "SELECT table_name FROM information_schema.tables WHERE lower(table_schema) = lower(?) AND table_type = 'VIEW'",
            [schema]).fetchall()}
        if "published_forecasts" in views:
            published_now = _rows(con, f"SELECT run_id, as_of, stale, period, step FROM {s}.published_forecasts AS t "
                                       f"WHERE job = ? AND {mwhere} ORDER BY step", [spec.name, *kv])
        backtests = [_current_names(b) for b in _rows(
            con, f"SELECT * EXCLUDE (run_id, {', '.join(_q(k) for k in keys)}) FROM {s}.backtests AS t "
                 f"WHERE run_id = ? AND {mwhere}", [run_id, *kv])] if "backtests" in have else []
        accuracy = _earlier_vintages(con, s, spec.name, keys, kv, run["as_of"]) if "accuracy" in have else []
    finally:
        con.close()
    return _clean(_assemble(spec, keys, key_values, run, model, gates, forecasts, published_now, backtests, accuracy))


def _current_names(row: dict[str, Any]) -> dict[str, Any]:
    """A ``backtests`` row with this release's column names (a schema not yet upgraded by a run has the old ones)."""
    out = {}
    for k, v in row.items():
        k = "step" if k == "horizon" else ("hit_rate_" + k[len("coverage_"):] if k.startswith("coverage_") else k)
        out[k] = v
    return out


def _earlier_vintages(con: duckdb.DuckDBPyConnection, s: str, job: str, keys: tuple[str, ...], kv: list[str],
                      as_of: Any) -> list[dict[str, Any]]:
    cols = [r[0] for r in con.execute(f"SELECT * FROM {s}.accuracy LIMIT 0").description]
    covered = [c for c in cols if c.startswith("covered_")]
    hits = "".join(f", avg(CAST({_q(c)} AS DOUBLE)) AS {_q('hit_rate_' + c[len('covered_'):])}" for c in covered)
    vintage = "forecast_run_id" if "forecast_run_id" in cols else "run_id"  # the name before this release
    where = " AND ".join(f"CAST(a.{_q(k)} AS VARCHAR) = ?" for k in keys)
    return _rows(con, f"""
        SELECT r.as_of AS forecast_as_of, a.{vintage} AS forecast_run_id, count(*) AS scored, min(a.step) AS first_step,
               max(a.step) AS last_step, avg(a.error) AS mean_error, avg(abs(a.error)) AS mae,
               sqrt(avg(a.error * a.error)) AS rmse{hits}
        FROM {s}.accuracy AS a JOIN {s}.runs AS r ON r.run_id = a.{vintage}
        WHERE a.job = ? AND {where} AND r.as_of < ?
        GROUP BY ALL ORDER BY forecast_as_of""", [job, *kv, as_of])


def _iso(value: Any) -> str:
    return value.isoformat() if isinstance(value, (dt.date, dt.datetime)) else str(value)


def _assemble(spec: Any, keys: tuple[str, ...], key_values: dict[str, str], run: dict, model: dict, gates: list[dict],
              forecasts: list[dict], published_now: list[dict], backtests: list[dict],
              accuracy: list[dict]) -> dict[str, Any]:
    lags = list(model.get("lags") or [])
    coefs = list(model.get("coefficients") or [])
    ses = list(model.get("std_errors") or [])
    ts = list(model.get("t_stats") or [])
    reasons = [n for r in (model.get("reasons") or []) for n in canonical(r)]
    gate_rows = []
    for g in gates:
        name = canonical(g["gate"])[0]
        info = BY_NAME.get(name)
        failed = g["passed"] is False
        held = failed and (name in reasons or "check_not_computed" in reasons and g["statistic"] is None)
        gate_rows.append({
            "gate": name, "statistic": g["statistic"], "p_value": g["p_value"], "threshold": g["threshold"],
            "passed": g["passed"],
            "verdict": "passed" if g["passed"] else ("failed: quarantined" if held else "failed: warning only"),
            "tests": info.tests if info else None,
        })
    # the failed gates first, then the others in the vocabulary's order
    order = {c: i for i, c in enumerate(BY_NAME)}
    gate_rows.sort(key=lambda r: (bool(r["passed"]), order.get(r["gate"], 999)))
    by_model: dict[str, dict[int, dict]] = {}
    for b in backtests:
        by_model.setdefault(b["model"], {})[int(b["step"])] = b
    skill = []
    for step, ar in sorted(by_model.get("ar", {}).items()):
        naive = by_model.get("naive", {}).get(step)
        ratio = ar["rmse"] / naive["rmse"] if naive and ar.get("rmse") is not None and naive.get("rmse") else None
        row = {"step": step, "rmse": ar.get("rmse"), "naive_rmse": naive.get("rmse") if naive else None,
               "rmse_ratio": ratio, "mase": ar.get("mase"), "origins": ar.get("origins")}
        row.update({k: v for k, v in ar.items() if k.startswith("hit_rate_")})
        skill.append(row)
    shown = {r["run_id"] for r in published_now}
    return {
        "job": spec.name,
        "series": {k: key_values[k] for k in keys},
        "run_id": run["run_id"],
        "as_of": run["as_of"],
        "run_status": run.get("status"),
        "decision": model["decision"],
        "reasons": reasons,
        "reason_text": {r: BY_NAME[r].tests for r in reasons if r in BY_NAME},
        "data": {
            "first_period": model.get("first_period"), "last_period": model.get("last_period"),
            "observations_fitted": model.get("n_obs"),
            "quality_flags": [n for f in (model.get("quality_flags") or []) for n in canonical(f)],
            "outlier_periods": model.get("outlier_periods") or [], "outlier_effects": model.get("outlier_effects") or [],
        },
        "model": {
            "transform": model.get("transform"), "intercept": model.get("intercept"),
            "intercept_std_error": model.get("intercept_std_error"),
            "terms": [{"lag": lag, "coefficient": c, "std_error": se, "t_stat": t}
                      for lag, c, se, t in zip(lags, coefs, ses, ts)],
            "sigma": model.get("sigma"), "r_squared": model.get("r_squared"),
            "max_root_modulus": model.get("max_root_modulus"), "stationary": model.get("stationary"),
            "roots": ar_roots(lags, coefs),
            "mean_reverting_level": model.get("mean_reverting_level"),
            "adf_statistic": model.get("adf_statistic"), "adf_p_value": model.get("adf_p_value"),
            "kpss_statistic": model.get("kpss_statistic"), "kpss_p_value": model.get("kpss_p_value"),
        },
        "gates": gate_rows,
        "forecast": forecasts,
        "published_now": {
            "rows": len(published_now), "run_ids": sorted(shown),
            "stale": bool(published_now and published_now[0]["stale"]),
        },
        "backtest": skill,
        "earlier_vintages": accuracy,
    }


def _num(v: Any, digits: int = 4) -> str:
    if v is None:
        return "-"
    if isinstance(v, bool):
        return "yes" if v else "no"
    if isinstance(v, (int, np.integer)):
        return f"{v:,}"
    if isinstance(v, float):
        if v != 0 and (abs(v) >= 1e6 or abs(v) < 1e-3):
            return f"{v:.3e}"
        return f"{v:,.{digits}g}" if abs(v) < 1 else f"{v:,.{max(digits - 1, 2)}f}".rstrip("0").rstrip(".")
    return str(v)


def format_explanation(e: dict[str, Any]) -> str:
    """The explanation for a terminal: one screen (about 40 lines for a monthly series)."""
    series = " ".join(f"{k}={v}" for k, v in e["series"].items())
    lines = [f"{e['job']} {series}  as of {e['as_of']}  (run {e['run_id']}, run status {e['run_status']})",
             f"decision   {e['decision'].upper()}" + (f": {', '.join(e['reasons'])}" if e["reasons"] else "")]
    d = e["data"]
    flags = ", ".join(d["quality_flags"]) or "none"
    lines.append(f"data       {d['first_period']} to {d['last_period']}, {d['observations_fitted'] or 0} observations "
                 f"fitted; quality findings: {flags}")
    if d["outlier_periods"]:
        outl = ", ".join(f"{p} ({_num(x)})" for p, x in zip(d["outlier_periods"], d["outlier_effects"]))
        lines.append(f"           outliers treated: {outl}")
    m = e["model"]
    if m["terms"] or m["sigma"] is not None:
        terms = "  ".join(f"lag {t['lag']}: {_num(t['coefficient'])} (se {_num(t['std_error'])})" for t in m["terms"])
        lines.append(f"model      AR on {m['transform'] or '-'}: intercept {_num(m['intercept'])} "
                     f"(se {_num(m['intercept_std_error'])}); sigma {_num(m['sigma'])}; R^2 {_num(m['r_squared'])}")
        lines.append(f"           {terms or 'no lags (the mean)'}")
        roots = ", ".join(_num(r["modulus"], 3) for r in m["roots"][:6]) or "-"
        level = _num(m["mean_reverting_level"]) if m["mean_reverting_level"] is not None else "none (not mean-reverting)"
        lines.append(f"           root moduli {roots} (largest {_num(m['max_root_modulus'], 3)}); "
                     f"mean-reverting level {level}")
        lines.append(f"           ADF {_num(m['adf_statistic'])} (p {_num(m['adf_p_value'])}), "
                     f"KPSS {_num(m['kpss_statistic'])} (p {_num(m['kpss_p_value'])})")
    else:
        lines.append("model      not fitted")
    lines.append(f"gates      {'gate':<27}{'statistic':>11}{'p-value':>10}{'threshold':>11}  verdict")
    for g in e["gates"]:
        lines.append(f"           {g['gate']:<27}{_num(g['statistic']):>11}{_num(g['p_value']):>10}"
                     f"{_num(g['threshold']):>11}  {g['verdict']}")
    if e["forecast"]:
        levels = sorted({k[len('lower_'):] for k in e["forecast"][0] if k.startswith("lower_")})
        head = "".join(f"{'  ' + lv + '% interval':>24}" for lv in levels)
        lines.append(f"forecast   {'period':<12}{'step':>5}{'forecast':>12}{head}")
        for f in e["forecast"]:
            ints = "".join(f"{_num(f.get('lower_' + lv)):>11} to {_num(f.get('upper_' + lv)):<9}" for lv in levels)
            lines.append(f"           {str(f['period']):<12}{f['step']:>5}{_num(f['forecast']):>12}  {ints}")
    else:
        pub = e["published_now"]
        if pub["rows"]:
            lines.append(f"forecast   none from this run; published_forecasts shows {pub['rows']} row(s) from "
                         f"{', '.join(pub['run_ids'])}{' (stale: kept from an earlier vintage)' if pub['stale'] else ''}")
        else:
            lines.append("forecast   none published for this series")
    if e["backtest"]:
        parts = [f"step {b['step']}: {_num(b['rmse_ratio'], 3)}" for b in e["backtest"][:4]]
        lines.append(f"backtest   RMSE / naive RMSE  {'; '.join(parts)}"
                     f"{' ...' if len(e['backtest']) > 4 else ''}  (below 1: better than the last value)")
    else:
        lines.append("backtest   none (backtest off, or the series was not fitted)")
    if e["earlier_vintages"]:
        lines.append(f"accuracy   {'vintage':<12}{'scored':>7}{'mean error':>12}{'MAE':>10}  hit rates")
        for a in e["earlier_vintages"][-5:]:
            hits = ", ".join(f"{k[len('hit_rate_'):]}%: {_num(v, 3)}" for k, v in a.items() if k.startswith("hit_rate_"))
            lines.append(f"           {str(a['forecast_as_of']):<12}{a['scored']:>7}{_num(a['mean_error']):>12}"
                         f"{_num(a['mae']):>10}  {hits}")
    else:
        lines.append("accuracy   no earlier vintage of this series has been scored against actuals yet")
    return "\n".join(lines) + "\n"
