"""The one table of arflow's checks and status words.

Every check has ONE name, used as its row in the ``gates`` table, as its
reason code in ``models.reasons`` / ``series_status.reasons`` / ``runs.reason_counts``
and, for the data checks, as its value in ``models.quality_flags``. The README's
"Checks and status words" table is generated from :data:`CHECKS` and
:data:`STATUS_WORDS` (``python -m arflow.vocabulary``) and a test holds the two
together, and holds the code to this table.

Names a previous release wrote are in :data:`RENAMED` (old name -> new names):
readers of older rows (``arflow explain``, ``arflow report``) translate them
with :func:`canonical`.
"""

from __future__ import annotations

from dataclasses import dataclass

#: kinds of check, in the order the README lists them
KINDS = ("data", "model", "forecast", "backtest", "meta")


@dataclass(frozen=True)
class Check:
    """One check: its name and what a user needs to know about it."""

    name: str
    kind: str
    #: what it tests, in words
    tests: str
    #: the ``gates.statistic`` it records ("" when it writes no gate row)
    statistic: str
    #: the ``gates.threshold`` it is held to, and the setting that sets it
    threshold: str
    #: what a user can do about a series that fails it
    action: str
    #: where the name appears: "gate" (a ``gates`` row), "reason" (a reason code), "flag" (a quality flag)
    appears_as: tuple[str, ...]
    #: "always", "enforce" (only with its setting = "enforce"; "warn" records it), "never" (a warning)
    quarantines: str = "always"
    #: a test with a p-value in ``gates.p_value``
    has_p_value: bool = False


CHECKS: tuple[Check, ...] = (
    Check("no_data", "data", "the series has no finite value at or before the as-of", "1 (found)", "0",
          "check the source query and the as-of", ("gate", "reason", "flag")),
    Check("duplicate_periods", "data", "a (series, period) appears in more than one row",
          "1 (found)", "0 (gates.allow_duplicates = false)",
          "de-duplicate in the source, or set gates.allow_duplicates = true when repeats carry equal values",
          ("gate", "reason", "flag")),
    Check("conflicting_duplicates", "data", "with allow_duplicates, repeated periods whose values differ",
          "1 (found)", "0", "fix the source: no rule can know which value is right", ("gate", "reason", "flag")),
    Check("data_gaps", "data", "a period missing inside the series' span", "1 (found)", "0 (gates.allow_gaps = false)",
          "fill or interpolate the gap in a query, or set gates.allow_gaps = true (the fit uses the run after the last gap)",
          ("gate", "reason", "flag")),
    Check("non_finite_values", "data", "a NULL, NaN or infinite value", "1 (found)", "0 (gates.allow_gaps = false)",
          "fix or filter the values in a query", ("gate", "reason", "flag")),
    Check("constant_series", "data", "every value equal (range at most 1e-12 of the largest absolute value)",
          "1 (found)", "0", "nothing to forecast: check the meter or the source", ("gate", "reason", "flag")),
    Check("ends_before_as_of", "data", "the series' last row lies more than the allowed periods before the as-of",
          "periods between the last row and the as-of", "gates.max_periods_behind (default 0)",
          "check whether the series stopped reporting; raise gates.max_periods_behind to allow late data",
          ("gate", "reason", "flag")),
    Check("off_calendar_periods", "data", "a period label that is not on the frequency's calendar (a mid-month date)",
          "1 (found)", "0", "put the dates on the calendar in a query, e.g. date_trunc('month', d)",
          ("gate", "reason", "flag")),
    Check("too_short", "data", "fewer observations than the model needs", "observations in the fitted run",
          "gates.min_observations (default 24)", "wait for more data or lower gates.min_observations",
          ("gate", "reason", "flag")),
    Check("fit_failed", "model", "the model could not be fitted or its forecast is not finite", "", "",
          "look at the values (overflow, near-constant); report it if they are ordinary", ("reason",)),
    Check("order_not_supported", "model", "a fixed model.order longer than the series can carry", "", "",
          "use order = \"auto\" or a lower order", ("reason",)),
    Check("order_candidates", "model", "the order was chosen among fewer candidates than model.max_order",
          "the largest order tried", "model.max_order", "nothing needed: a short series carries fewer lags",
          ("gate",), quarantines="never"),
    Check("unit_root", "model", "ADF does not reject a unit root (with model.unit_root = \"quarantine\")",
          "ADF statistic", "model.unit_root_alpha (p-value)",
          "use model.unit_root = \"difference\" (the default) to model differences", ("gate", "reason"), has_p_value=True),
    Check("not_stationary", "model", "the fitted model's largest companion root is on or outside the unit circle",
          "largest root modulus", "1 (gates.require_stationary)",
          "model differences (model.unit_root = \"difference\"), or set gates.require_stationary = false",
          ("gate", "reason")),
    Check("residual_autocorrelation", "model", "autocorrelation left in the residuals (gates.residual_test)",
          "Ljung-Box Q, Breusch-Godfrey LM or the smallest Holm-adjusted lag p-value", "gates.alpha (p-value)",
          "look at the residual autocorrelations; raise model.max_order or set a seasonal_lag", ("gate", "reason"),
          has_p_value=True),
    Check("residual_arch", "model", "ARCH effects (changing variance) in the residuals (gates.arch_test)",
          "Engle's LM statistic", "gates.alpha (p-value)",
          "intervals assume constant variance: transform the series (e.g. logs) in a query", ("gate", "reason"),
          has_p_value=True),
    Check("outliers", "model", "additive outliers (Chen & Liu) that model.outliers holds back or cannot treat",
          "largest robust outlier statistic |lambda|", "its critical value c(n)",
          "check the flagged periods; model.outliers = \"treat\" refits with them treated", ("gate", "reason")),
    Check("degenerate_interval", "forecast", "a prediction interval that is not finite or has zero width",
          "narrowest interval half-width / scale of the series", "1e-9",
          "an exact fit (a ramp) has no noise to forecast: check the source", ("gate", "reason")),
    Check("forecast_below_lower_bound", "forecast", "a point forecast below gates.lower_bound",
          "smallest point forecast", "gates.lower_bound", "check the series' recent values and the bound",
          ("gate", "reason")),
    Check("forecast_above_upper_bound", "forecast", "a point forecast above gates.upper_bound",
          "largest point forecast", "gates.upper_bound", "check the series' recent values and the bound",
          ("gate", "reason")),
    Check("worse_than_naive", "backtest", "backtest RMSE above the naive (last value) forecast's RMSE",
          "model RMSE / naive RMSE", "1 + backtest.naive_tolerance",
          "treat the forecast with caution; backtest.naive_gate = \"enforce\" holds such series back",
          ("gate", "reason"), quarantines="enforce"),
    Check("interval_undercoverage", "backtest", "backtest intervals hold the actual significantly less often than stated",
          "observed hit rate (worst level)", "backtest.coverage_alpha (one-sided binomial p-value)",
          "intervals are too narrow for this series; backtest.coverage_gate = \"enforce\" holds such series back",
          ("gate", "reason"), quarantines="enforce", has_p_value=True),
    Check("check_not_computed", "meta", "a gate whose statistic or p-value is not finite (fails closed)",
          "the failing gate's row has passed = false and a NULL statistic", "",
          "look at the values (zero residuals, overflow)", ("reason",)),
)

BY_NAME: dict[str, Check] = {c.name: c for c in CHECKS}

#: names an earlier release wrote -> the names that replace them
RENAMED: dict[str, tuple[str, ...]] = {
    "internal_gaps": ("data_gaps",),
    "stale_series": ("ends_before_as_of",),
    "min_observations": ("too_short",),
    "beats_naive": ("worse_than_naive",),
    "forecast_out_of_bounds": ("forecast_below_lower_bound", "forecast_above_upper_bound"),
    "forecast_lower_bound": ("forecast_below_lower_bound",),
    "forecast_upper_bound": ("forecast_above_upper_bound",),
    "forecast_interval": ("degenerate_interval",),
    "stationarity": ("not_stationary",),
    "outlier": ("outliers",),
    "interval_calibration": ("interval_undercoverage",),
}

#: status words: (where, word, meaning)
STATUS_WORDS: tuple[tuple[str, str, str], ...] = (
    ("decision", "published", "every check passed; the forecast is in `forecasts` and `published_forecasts`"),
    ("decision", "quarantined", "at least one check failed; the reasons say which, the forecast is not published"),
    ("runs.status", "ok", "the run published; the quarantined share is at or under gates.max_quarantine_share"),
    ("runs.status", "alarm", "over gates.max_quarantine_share, published anyway (publish.hold_on_alarm = false); exit 4"),
    ("runs.status", "held", "over gates.max_quarantine_share: records written, the published view left as it was; exit 4"),
    ("published_forecasts.stale", "stale",
     "an older forecast kept visible because the series' latest vintage quarantined it (publish.on_failure = "
     "\"keep-previous\"); the only meaning of \"stale\""),
    ("models.transform", "level", "modelled on the values themselves"),
    ("models.transform", "difference", "modelled on first differences (a unit root); forecasts are integrated back"),
    ("backtests.model", "ar", "the series' own AR specification, refitted at each origin"),
    ("backtests.model", "naive", "the last value, repeated"),
    ("backtests.model", "seasonal_naive", "the value one season earlier"),
    ("warning", "warning",
     "a check that failed but did not quarantine (order_candidates; worse_than_naive and "
     "interval_undercoverage in \"warn\" mode); counted in the run summary and the finish event"),
)


def check(name: str) -> Check:
    """The check called ``name`` (an old name is translated)."""
    return BY_NAME[canonical(name)[0]]


def canonical(name: str) -> tuple[str, ...]:
    """The current name(s) for ``name``: itself when current, else its replacements."""
    if name in BY_NAME:
        return (name,)
    return RENAMED.get(name, (name,))


def names(appears_as: str) -> tuple[str, ...]:
    """Every name that can appear as a ``"gate"``, ``"reason"`` or ``"flag"``."""
    return tuple(c.name for c in CHECKS if appears_as in c.appears_as)


#: checks that can fail without quarantining (a warning in the run summary)
WARNING_CHECKS = tuple(c.name for c in CHECKS if c.quarantines != "always")


def readme_table() -> str:
    """The README's table of checks (Markdown)."""
    out = [
        "| name | kind | appears as | what it tests | statistic | threshold | quarantines | what you can do |",
        "| --- | --- | --- | --- | --- | --- | --- | --- |",
    ]
    mode = {"always": "yes", "enforce": "when enforced", "never": "never (warning)"}
    for c in CHECKS:
        stat = c.statistic + (" (and a p-value)" if c.has_p_value else "")
        out.append(f"| `{c.name}` | {c.kind} | {', '.join(c.appears_as)} | {c.tests} | {stat or '-'} | "
                   f"{c.threshold or '-'} | {mode[c.quarantines]} | {c.action} |")
    out += ["", "| where | word | meaning |", "| --- | --- | --- |"]
    out += [f"| `{w}` | `{word}` | {m} |" for w, word, m in STATUS_WORDS]
    out += ["", "| earlier name | now |", "| --- | --- |"]
    out += [f"| `{o}` | {', '.join(f'`{n}`' for n in new)} |" for o, new in RENAMED.items()]
    return "\n".join(out)


if __name__ == "__main__":  # pragma: no cover - prints the README table
    print(readme_table())
