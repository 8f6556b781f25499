"""Frame adapter: long polars/Arrow frames <-> the core's arrays.

In: key columns, a period column (Date, Datetime, ISO date text, or integer
steps) and a numeric value column become series codes, integer period
ordinals on the declared frequency and float values. Out: the core's arrays
become polars DataFrames keyed by the user's own key columns.

Period labels: monthly, quarterly and yearly periods are labelled by their
first day, or by their last day when every input date is a period end (so
forecasts join to actuals labelled the same way). Weekly periods keep the
weekday the input uses.
"""

from __future__ import annotations

import datetime as _dt
from dataclasses import dataclass
from typing import Any

import numpy as np
import polars as pl
import pyarrow as pa

from .core import gates as core_gates
from .core.panel import CONFLICTING_DUPLICATES, DUPLICATE_PERIODS, OFF_CALENDAR, QUALITY_FLAG_NAMES
from .core.pipeline import CoreResult
from .errors import SchemaError, SettingsError, SourceError
from .settings import coverage_label

_EPOCH = _dt.date(1970, 1, 1)


@dataclass(frozen=True)
class PeriodCodec:
    """Maps period labels to integer ordinals on a frequency and back."""

    frequency: str
    anchor: str = "start"  # "start" | "end" (month/quarter/year)
    weekday_offset: int = 0  # week: days since epoch modulo 7 of the labels
    dtype: Any = pl.Date

    def encode(self, s: pl.Series) -> np.ndarray:
        f = self.frequency
        if f == "step":
            return s.cast(pl.Int64).to_numpy()
        if f == "day":
            return s.cast(pl.Int32).cast(pl.Int64).to_numpy()
        if f == "week":
            days = s.cast(pl.Int32).cast(pl.Int64).to_numpy()
            return (days - self.weekday_offset) // 7
        # months since 1970-01 straight from the day numbers (numpy calendar arithmetic)
        days = s.cast(pl.Int32).to_numpy()
        months = days.astype("datetime64[D]").astype("datetime64[M]").astype(np.int64) + 1970 * 12
        if f == "month":
            return months
        if f == "quarter":
            return months // 3
        return months // 12  # year

    def decode(self, ordinals: np.ndarray) -> pl.Series:
        o = np.asarray(ordinals, dtype=np.int64)
        f = self.frequency
        if f == "step":
            return pl.Series("period", o).cast(self.dtype)
        if f in ("day", "week"):
            days = o if f == "day" else o * 7 + self.weekday_offset
            return pl.Series("period", days.astype(np.int32)).cast(pl.Date)
        if f == "month":
            year, month = o // 12, o % 12 + 1
        elif f == "quarter":
            year, month = o // 4, (o % 4) * 3 + 1
        else:
            year, month = o, np.ones_like(o)
        df = pl.DataFrame({"y": year.astype(np.int32), "m": month.astype(np.int8)})
        start = df.select(pl.date(pl.col("y"), pl.col("m"), 1).alias("period")).to_series()
        if self.anchor == "end":
            step = {"month": "1mo", "quarter": "3mo", "year": "1y"}[f]
            start = start.dt.offset_by(step).dt.offset_by("-1d")
        return start


@dataclass(frozen=True)
class PanelInputs:
    """Flat arrays for :func:`arflow.core.panel.build_panel` plus what is needed to key results."""

    keys: pl.DataFrame  # G rows, one per series, in code order
    codes: np.ndarray
    ordinals: np.ndarray
    values: np.ndarray
    codec: PeriodCodec
    #: (G,) data-quality bits the panel cannot see (duplicates resolved here, off-calendar labels)
    flags: np.ndarray | None = None


def is_spark_frame(frame: Any) -> bool:
    """True for a Spark DataFrame (duck-typed: pyspark is not imported)."""
    return type(frame).__module__.startswith("pyspark.") and hasattr(frame, "sparkSession") and hasattr(frame, "groupBy")


def as_polars(frame: Any) -> pl.DataFrame:
    if isinstance(frame, pl.DataFrame):
        return frame
    if isinstance(frame, pl.LazyFrame):
        return frame.collect()
    if isinstance(frame, (pa.Table, pa.RecordBatch)):
        return pl.from_arrow(frame)
    raise SchemaError(f"expected a polars DataFrame or pyarrow Table, got {type(frame).__name__}")


def _require(df: pl.DataFrame, col: str, role: str) -> None:
    if col not in df.columns:
        raise SchemaError(
            f"source has no {role} column {col!r}; available columns: {', '.join(df.columns) or '(none)'}"
        )


def _period_series(df: pl.DataFrame, period: str, frequency: str) -> pl.Series:
    s = df.get_column(period)
    dt = s.dtype
    if frequency == "step":
        if not dt.is_integer():
            raise SchemaError(
                f"period column {period!r} must hold integers for frequency 'step', found {dt}; "
                "cast it or choose a calendar frequency"
            )
        return s
    if dt == pl.Date:
        return s
    if isinstance(dt, pl.Datetime):
        return s.dt.date()
    if dt == pl.String:
        parsed = s.str.to_date(strict=False)
        bad = parsed.is_null() & s.is_not_null()
        if bad.any():
            example = s.filter(bad)[0]
            raise SchemaError(
                f"period column {period!r} has a value that is not an ISO date ({example!r}); "
                "use YYYY-MM-DD text or a DATE column"
            )
        return parsed
    raise SchemaError(
        f"period column {period!r} must be a DATE, TIMESTAMP or ISO date text for frequency "
        f"{frequency!r}, found {dt}; cast it, or use frequency 'step' for integer periods"
    )


def _codec_for(s: pl.Series, frequency: str) -> PeriodCodec:
    if frequency == "step":
        return PeriodCodec("step", dtype=s.dtype)
    if frequency == "day":
        return PeriodCodec("day")
    if frequency == "week":
        # the weekday most rows use labels the weeks (ties: the earliest weekday number, so
        # the choice never depends on row order); rows on another weekday are off the calendar
        rem = s.cast(pl.Int32).cast(pl.Int64) % 7
        counts = np.bincount(rem.drop_nulls().to_numpy(), minlength=7)
        return PeriodCodec("week", weekday_offset=int(np.argmax(counts)) if counts.sum() else 0)
    s = s.unique()  # a few hundred distinct periods at most: check the labels on those
    is_end = s.dt.month_end() == s if frequency == "month" else None
    if frequency == "quarter":
        is_end = (s.dt.month_end() == s) & (s.dt.month() % 3 == 0)
    if frequency == "year":
        is_end = (s.dt.month() == 12) & (s.dt.day() == 31)
    anchor = "end" if len(s) and bool(is_end.all()) else "start"
    return PeriodCodec(frequency, anchor=anchor)


#: Integer ('step') periods and as-of values must lie within +-2**53: exact in
#: float64 (JSON, Spark, Arrow casts) and far from int64 wrap-around when the
#: forecast steps (at most 1,000) are added.
STEP_PERIOD_LIMIT = 2**53


def check_step_range(lo: int, hi: int, what: str) -> None:
    """Raise a one-line error when integer periods fall outside +-:data:`STEP_PERIOD_LIMIT`."""
    if lo < -STEP_PERIOD_LIMIT or hi > STEP_PERIOD_LIMIT:
        bad = lo if lo < -STEP_PERIOD_LIMIT else hi
        cls = SettingsError if what.startswith("as-of") else SchemaError
        raise cls(
            f"{what} {bad} is out of range for integer periods (at most +-2**53 = {STEP_PERIOD_LIMIT}); "
            "renumber the periods (e.g. subtract a base period)"
        )


def encode_as_of(as_of: Any, codec: PeriodCodec) -> int | None:
    """The as-of period (a date, ISO text, or an int for 'step') as an ordinal."""
    if as_of is None:
        return None
    if codec.frequency == "step":
        try:
            value = int(as_of)
        except (TypeError, ValueError, OverflowError):
            raise SchemaError(f"as-of {as_of!r} must be an integer period for frequency 'step'") from None
        check_step_range(value, value, "as-of period")
        return value
    if isinstance(as_of, _dt.datetime):
        as_of = as_of.date()
    if isinstance(as_of, str):
        try:
            as_of = _dt.date.fromisoformat(as_of.strip())
        except ValueError:
            raise SchemaError(f"as-of {as_of!r} is not an ISO date; use YYYY-MM-DD") from None
    if not isinstance(as_of, _dt.date):
        raise SchemaError(f"as-of {as_of!r} must be a date (YYYY-MM-DD)")
    s = pl.Series([as_of])
    if codec.frequency == "week":
        # any day of the week counts as that week
        days = (as_of - _EPOCH).days
        return int((days - codec.weekday_offset) // 7)
    return int(codec.encode(s)[0])


def to_panel_inputs(frame: Any, keys: list[str], period: str, value: str, frequency: str) -> PanelInputs:
    """Validate a long frame and flatten it for the core; schema problems raise one clear error."""
    df = as_polars(frame)
    if not keys:
        raise SchemaError("no key columns given; name at least one column that identifies a series")
    for k in keys:
        _require(df, k, "key")
    _require(df, period, "period")
    _require(df, value, "value")
    if df.height == 0:
        raise SourceError("the source returned no rows; check the table, query or as-of period")
    vdt = df.schema[value]
    if not (vdt.is_numeric() or vdt == pl.Null):
        raise SchemaError(f"value column {value!r} must be numeric, found {vdt}; cast it in the source query")
    for k in keys:
        nulls = df.get_column(k).null_count()
        if nulls:
            raise SourceError(f"key column {k!r} has {nulls} NULL value(s); filter or fill them in the source")
    ps = _period_series(df, period, frequency)
    if ps.null_count():
        raise SourceError(f"period column {period!r} has {ps.null_count()} NULL value(s); filter them in the source")
    codec = _codec_for(ps, frequency)
    ordinals = codec.encode(ps)
    if frequency == "step" and len(ordinals):
        check_step_range(int(ordinals.min()), int(ordinals.max()), f"period column {period!r} holds")
    values = df.get_column(value).cast(pl.Float64).fill_null(float("nan")).to_numpy()
    codes, uniq = _series_codes(df.select(keys))
    flags = np.zeros(len(uniq), dtype=np.int64)
    off = _off_calendar(ps, codec)
    if off is not None:
        flags[np.unique(codes[off])] |= OFF_CALENDAR
    codes, ordinals, values = _resolve_duplicates(codes, ordinals, values, flags)
    return PanelInputs(uniq, codes, ordinals, values, codec, flags)


def _off_calendar(ps: pl.Series, codec: PeriodCodec) -> np.ndarray | None:
    """Rows whose period label is not the label of its period on the frequency's calendar.

    A mid-month date under "month" (labels are first or last days), a
    Wednesday among Monday weeks: such rows would be binned silently and their
    forecasts would never meet their actuals. None when every row is on it.
    """
    if codec.frequency in ("step", "day"):
        return None
    uniq = ps.unique().drop_nulls()
    label = codec.decode(codec.encode(uniq))
    bad = uniq.filter(label.cast(pl.Date) != uniq.cast(pl.Date))
    if bad.len() == 0:
        return None
    return ps.is_in(bad.implode()).to_numpy()


def _resolve_duplicates(
    codes: np.ndarray, ordinals: np.ndarray, values: np.ndarray, flags: np.ndarray
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """One row per (series, period), by a rule that does not depend on row order.

    Repeated rows with equal values are one observation (flag
    ``duplicate_periods``). When the values differ no rule can know which is
    right: the series is flagged ``conflicting_duplicates`` too (quarantined
    even with ``gates.allow_duplicates``), and its diagnostics use the
    smallest value (missing values last). Rows are left as they are when no
    period repeats (the common case costs one pass).
    """
    if len(codes) < 2:
        return codes, ordinals, values
    dc, do = np.diff(codes), np.diff(ordinals)
    if np.all((dc > 0) | ((dc == 0) & (do > 0))):
        return codes, ordinals, values  # ordered without repeats
    lo = int(ordinals.min())
    span = int(ordinals.max()) - lo + 1
    if int(codes.max()) < (1 << 62) // span:
        # one integer key per (series, period); a stable sort is about linear on the nearly
        # ordered rows a grouped read gives, unlike a four-key lexsort
        order = np.argsort(codes * span + (ordinals - lo), kind="stable")
        c, o = codes[order], ordinals[order]
        if not ((c[1:] == c[:-1]) & (o[1:] == o[:-1])).any():
            return c, o, values[order]
    # NaN sorts last; the bit pattern breaks ties between equal values (-0.0 and 0.0)
    order = np.lexsort((values.view(np.int64), values, ordinals, codes))
    c, o, v = codes[order], ordinals[order], values[order]
    same = (c[1:] == c[:-1]) & (o[1:] == o[:-1])
    if not same.any():
        return c, o, v
    flags[np.unique(c[1:][same])] |= DUPLICATE_PERIODS
    both_nan = np.isnan(v[1:]) & np.isnan(v[:-1])
    differ = same & ~((v[1:] == v[:-1]) | both_nan)
    if differ.any():
        flags[np.unique(c[1:][differ])] |= CONFLICTING_DUPLICATES
    keep = np.r_[True, ~same]  # the first row of each (series, period)
    return c[keep], o[keep], v[keep]


def _series_codes(key_df: pl.DataFrame) -> tuple[np.ndarray, pl.DataFrame]:
    """Series code per row (0..G-1) and the G distinct keys in code order.

    Fast path: when each series' rows are contiguous (the job reads them
    ordered by keys) the code is a running count of key changes.
    """
    changed = key_df.select(
        pl.any_horizontal([pl.col(c).ne_missing(pl.col(c).shift(1)) for c in key_df.columns]).alias("chg")
    ).to_series().to_numpy()
    changed[0] = True
    firsts = np.flatnonzero(changed)
    uniq = key_df[firsts]
    if not uniq.is_duplicated().any():
        return np.cumsum(changed, dtype=np.int64) - 1, uniq
    # rows of a series are spread out: dense rank of the keys (sorts)
    if key_df.width == 1:
        codes_s = key_df.to_series().rank("dense")
    else:
        codes_s = key_df.select(pl.struct(key_df.columns).rank("dense")).to_series()
    codes = codes_s.cast(pl.Int64).to_numpy() - 1
    G = int(codes.max()) + 1
    first_row = np.full(G, len(codes), dtype=np.int64)
    np.minimum.at(first_row, codes, np.arange(len(codes)))
    return codes, key_df[first_row]


# ------------------------------------------------------------------------------------- out


def _arrow(values: np.ndarray, pa_type: pa.DataType) -> pa.Array:
    """A 1-D numpy array as an Arrow array, through polars: pyarrow's own numpy conversion
    imports pandas on first use (one to several seconds in every worker process)."""
    return pl.Series(np.ascontiguousarray(values)).to_arrow().cast(pa_type)


def _list_column(name: str, mask: np.ndarray, values: np.ndarray, pa_type: pa.DataType) -> pl.Series:
    """(G, K) mask + (G, K) values -> a list column of the masked values per row."""
    counts = mask.sum(axis=1)
    offsets = np.zeros(len(counts) + 1, dtype=np.int32)
    np.cumsum(counts, out=offsets[1:])
    flat = values[mask]
    arr = pa.ListArray.from_arrays(_arrow(offsets, pa.int32()), _arrow(flat, pa_type))
    return pl.Series(name, arr)


def _nullable(a: np.ndarray) -> pl.Series:
    s = pl.Series(a)
    return s.fill_nan(None) if s.dtype.is_float() else s


def result_frames(inp: PanelInputs, res: CoreResult, settings) -> dict[str, pl.DataFrame]:
    """Key the core's arrays back to the user's columns: one frame per result table."""
    out = {
        "models": models_frame(inp.keys, res, inp.codec).with_columns(
            *_status_columns(res.outcome, settings, res.panel.n_series)),
        "gates": gates_frame(inp.keys, res),
        "residual_acf": residual_acf_frame(inp.keys, res),
        "forecasts": forecasts_frame(inp.keys, res, inp.codec),
    }
    if res.backtest is not None:
        out["backtests"] = backtest_frame(inp.keys, res)
    return out


def models_frame(keys: pl.DataFrame, res: CoreResult, codec: PeriodCodec) -> pl.DataFrame:
    """One row per series: the fitted model, its tests, quality flags and the decision with its reasons."""
    fit, out, G = res.fit, res.outcome, res.panel.n_series
    lagmat = np.broadcast_to(fit.lags, (G, len(fit.lags)))
    flag_bits = np.array(list(QUALITY_FLAG_NAMES), dtype=np.int64)
    flag_mask = (res.panel.flags[:, None] & flag_bits[None, :]) != 0
    flag_names = np.array(list(QUALITY_FLAG_NAMES.values()), dtype=object)
    reason_names = np.array(core_gates.REASONS, dtype=object)
    models = keys.with_columns(
        pl.Series("transform", np.where(res.differenced, "difference", "level")),
        _list_column("lags", fit.lag_mask, lagmat, pa.int32()),
        _nullable(fit.intercept).alias("intercept"),
        _nullable(fit.intercept_se).alias("intercept_std_error"),
        _list_column("coefficients", fit.lag_mask, fit.coef, pa.float64()),
        _list_column("std_errors", fit.lag_mask, fit.std_err, pa.float64()),
        _list_column("t_stats", fit.lag_mask, fit.t_stat, pa.float64()),
        _nullable(fit.sigma).alias("sigma"),
        pl.Series("n_obs", fit.n_obs.astype(np.int64)),
        _nullable(fit.r_squared).alias("r_squared"),
        _nullable(fit.aic).alias("aic"),
        _nullable(fit.bic).alias("bic"),
        _nullable(fit.hqic).alias("hqic"),
        _nullable(fit.max_root_modulus).alias("max_root_modulus"),
        pl.Series("stationary", fit.stationary),
        _nullable(fit.mean_level).alias("mean_reverting_level"),
        _nullable(res.adf.statistic).alias("adf_statistic"),
        _nullable(res.adf.pvalue).alias("adf_p_value"),
        _nullable(res.kpss.statistic).alias("kpss_statistic"),
        _nullable(res.kpss.pvalue).alias("kpss_p_value"),
        codec.decode(res.panel.first_period).alias("first_period"),
        codec.decode(res.panel.last_period).alias("last_period"),
        _list_column("quality_flags", flag_mask, np.broadcast_to(flag_names, flag_mask.shape), pa.string()),
        pl.Series("decision", np.where(out.published, "published", "quarantined")),
        _list_column("reasons", out.reasons, np.broadcast_to(reason_names, out.reasons.shape), pa.string()),
    )
    models = models.with_columns(*_outlier_columns(res, codec))
    # the level of a differenced model is a random walk with drift: no mean-reverting level
    return models.with_columns(
        pl.when(pl.col("transform") == "difference").then(None).otherwise(pl.col("mean_reverting_level"))
        .alias("mean_reverting_level")
    )


def gates_frame(keys: pl.DataFrame, res: CoreResult) -> pl.DataFrame:
    """Long: one row per series and applicable gate."""
    parts = []
    for name, row in res.outcome.gates.items():
        idx = np.flatnonzero(row.applies)
        if not len(idx):
            continue
        parts.append(
            keys[idx].with_columns(
                pl.lit(name).alias("gate"),
                _nullable(row.statistic[idx]).alias("statistic"),
                _nullable(row.pvalue[idx]).alias("p_value"),
                _nullable(row.threshold[idx]).alias("threshold"),
                pl.Series("passed", row.passed[idx]),
            )
        )
    gate_schema = {"gate": pl.String, "statistic": pl.Float64, "p_value": pl.Float64, "threshold": pl.Float64, "passed": pl.Boolean}
    return pl.concat(parts) if parts else keys.clear().with_columns(
        *[pl.Series(c, [], dtype=t) for c, t in gate_schema.items()]
    )


def residual_acf_frame(keys: pl.DataFrame, res: CoreResult) -> pl.DataFrame:
    """Residual autocorrelations of the fitted series, one row per series and lag."""
    fitted = np.flatnonzero(res.fit.fitted)
    Kacf = res.acf.acf.shape[1]
    rep = np.repeat(fitted, Kacf)
    return keys[rep].with_columns(
        pl.Series("lag", np.tile(np.arange(1, Kacf + 1, dtype=np.int32), len(fitted))),
        _nullable(res.acf.acf[fitted].ravel()).alias("autocorrelation"),
        _nullable(res.acf.t_stat[fitted].ravel()).alias("t_stat"),
        _nullable(res.acf.pvalue[fitted].ravel()).alias("p_value"),
    ).filter(pl.col("autocorrelation").is_not_null())


def forecasts_frame(keys: pl.DataFrame, res: CoreResult, codec: PeriodCodec) -> pl.DataFrame:
    """Forecasts of the published series only: one row per series and step, with interval bounds per level."""
    pub = np.flatnonzero(res.outcome.published)
    H = res.forecasts.mean.shape[1]
    rep = np.repeat(pub, H)
    steps = np.tile(np.arange(1, H + 1, dtype=np.int64), len(pub))
    cols = [
        codec.decode(res.panel.last_period[rep] + steps).alias("period"),
        pl.Series("step", steps.astype(np.int32)),
        pl.Series("forecast", res.forecasts.mean[pub].ravel()),
    ]
    for ci, level in enumerate(res.forecasts.coverage):
        lab = coverage_label(level)
        cols.append(pl.Series(f"lower_{lab}", res.forecasts.lower[ci][pub].ravel()))
        cols.append(pl.Series(f"upper_{lab}", res.forecasts.upper[ci][pub].ravel()))
    return keys[rep].with_columns(*cols)


#: one failed gate of a series: what ``series_status.failed_gates`` holds
FAILED_GATE = pl.Struct({"gate": pl.String, "statistic": pl.Float64, "p_value": pl.Float64, "threshold": pl.Float64})
_FAILED_GATE_ARROW = pa.struct([("gate", pa.string()), ("statistic", pa.float64()), ("p_value", pa.float64()),
                                ("threshold", pa.float64())])


def _status_columns(out: Any, settings: Any, G: int) -> list[pl.Series]:
    """Per series: every failed gate row (``failed_gates``) and the warning checks that fired (``warnings``).

    A warning is a failed row of a check that did not hold the series back:
    ``order_candidates`` always, ``worse_than_naive`` / ``interval_undercoverage``
    with their backtest setting ``"warn"``.
    """
    bt = getattr(settings, "backtest", None)
    warn = {"order_candidates"}
    if bt is not None and getattr(bt, "naive_gate", "off") == "warn":
        warn.add("worse_than_naive")
    if bt is not None and getattr(bt, "coverage_gate", "off") == "warn":
        warn.add("interval_undercoverage")
    gate_names, idx, code, stat, pval, thr = [], [], [], [], [], []
    for gate, row in out.gates.items():
        where = np.flatnonzero(row.applies & ~row.passed)
        if not len(where):
            continue
        idx.append(where)
        code.append(np.full(len(where), len(gate_names), dtype=np.int32))
        gate_names.append(gate)
        stat.append(row.statistic[where])
        pval.append(row.pvalue[where])
        thr.append(row.threshold[where])
    if not idx:
        empty = np.zeros(G + 1, dtype=np.int32)
        return [pl.Series("failed_gates", pa.ListArray.from_arrays(
                    _arrow(empty, pa.int32()), pa.array([], type=_FAILED_GATE_ARROW))),
                pl.Series("warnings", pa.ListArray.from_arrays(_arrow(empty, pa.int32()), pa.array([], pa.string())))]
    # one row per failed gate; a stable sort by series keeps the gates' own order within a series
    rows = np.concatenate(idx)
    order = np.argsort(rows, kind="stable")
    rows, code = rows[order], np.concatenate(code)[order]
    # polars, not pyarrow.compute (whose import costs a worker over half a second)
    names = pl.Series("gate", gate_names, dtype=pl.String)[code]
    struct = pl.DataFrame([
        names, _finite(np.concatenate(stat)[order]).alias("statistic"),
        _finite(np.concatenate(pval)[order]).alias("p_value"), _finite(np.concatenate(thr)[order]).alias("threshold"),
    ]).to_struct("failed").to_arrow()
    failed = pa.ListArray.from_arrays(_arrow(_offsets(rows, G), pa.int32()), struct)
    is_warn = np.isin(code, [i for i, g in enumerate(gate_names) if g in warn])
    warned = pa.ListArray.from_arrays(_arrow(_offsets(rows[is_warn], G), pa.int32()), names.filter(is_warn).to_arrow())
    return [pl.Series("failed_gates", failed, dtype=pl.List(FAILED_GATE)),
            pl.Series("warnings", warned, dtype=pl.List(pl.String))]


def _offsets(rows: np.ndarray, G: int) -> np.ndarray:
    """List offsets (G + 1) for sorted row indices in 0..G-1."""
    offsets = np.zeros(G + 1, dtype=np.int32)
    np.cumsum(np.bincount(rows, minlength=G), out=offsets[1:])
    return offsets


def _finite(values: np.ndarray) -> pl.Series:
    """Floats with every non-finite value null."""
    v = np.where(np.isfinite(values), values, np.nan)
    return pl.Series(np.ascontiguousarray(v, dtype=np.float64)).fill_nan(None)


def _outlier_columns(res: CoreResult, codec) -> list[pl.Series]:
    """``outlier_periods`` (periods of the detected additive outliers) and ``outlier_effects``
    (their estimated size, in the units of the modelled series), empty lists when none."""
    G = res.panel.n_series
    o = res.outliers
    if o is None:
        eff = np.full((G, 0), np.nan)
    else:
        eff = o.effect
    W = eff.shape[1]
    mask = np.isfinite(eff)
    col = np.broadcast_to(np.arange(W), eff.shape)
    ordinals = res.panel.last_period[:, None] - (W - 1 - col)
    counts = mask.sum(axis=1)
    offsets = np.zeros(G + 1, dtype=np.int32)
    np.cumsum(counts, out=offsets[1:])
    flat = codec.decode(ordinals[mask]).to_arrow()
    periods = pl.Series("outlier_periods", pa.ListArray.from_arrays(_arrow(offsets, pa.int32()), flat))
    return [periods, _list_column("outlier_effects", mask, np.nan_to_num(eff), pa.float64())]


def backtest_frame(keys: pl.DataFrame, res: CoreResult) -> pl.DataFrame:
    """Long backtest accuracy: one row per series, method and step (series with scored origins)."""
    bt = res.backtest
    scored = np.flatnonzero(bt.n_origins > 0)
    H = bt.horizon
    parts = []
    for method, acc in (("ar", bt.model), ("naive", bt.naive), ("seasonal_naive", bt.seasonal_naive)):
        rows = scored[np.isfinite(acc.rmse[scored]).any(axis=1)] if len(scored) else scored
        if not len(rows):
            continue
        rep = np.repeat(rows, H)
        cols = [
            pl.lit(method).alias("model"),
            pl.Series("step", np.tile(np.arange(1, H + 1, dtype=np.int32), len(rows))),
            _nullable(acc.rmse[rows].ravel()).alias("rmse"),
            _nullable(acc.mae[rows].ravel()).alias("mae"),
            _nullable(acc.mase[rows].ravel()).alias("mase"),
        ]
        for ci, level in enumerate(bt.coverage):
            lab = coverage_label(level)
            vals = bt.coverage_rate[ci][rows].ravel() if method == "ar" else np.full(len(rep), np.nan)
            cols.append(_nullable(vals).alias(f"hit_rate_{lab}"))
        cols.append(pl.Series("origins", acc.count[rows].ravel().astype(np.int32)))
        parts.append(keys[rep].with_columns(*cols))
    if not parts:
        return keys.clear().with_columns(pl.lit("ar").alias("model"))
    return pl.concat(parts, how="diagonal_relaxed")
