"""The report's charts, drawn with plotly (optional extra ``report``), in arflow's own plain colours."""

from __future__ import annotations

import math
from typing import Any

from ..errors import SettingsError

#: arflow's palette: plain, readable, distinguishable in grey scale
INK = "#2f3e4e"
HISTORY = "#2f5d7c"
FORECAST = "#c2533a"
BAND = ("rgba(194, 83, 58, 0.30)", "rgba(194, 83, 58, 0.14)", "rgba(194, 83, 58, 0.08)")
BAR = "#5b7f5a"
WARN = "#b8860b"
BOUND = "#8a8a8a"
GRID = "#e4e4e4"

_MISSING = ("the report needs the optional extra 'report' (plotly); install it with "
            "pip install 'arflow-gated[report]' (or pip install '.[report]' in a checkout)")


def plotly() -> Any:
    """The plotly.graph_objects module, or a one-line error naming the extra."""
    try:
        import plotly.graph_objects as go
    except ImportError:
        raise SettingsError(_MISSING) from None
    return go


def plotly_js() -> str:
    """The plotly.js bundle that ships inside the plotly package (inlined: no network)."""
    try:
        from plotly.offline import get_plotlyjs
    except ImportError:
        raise SettingsError(_MISSING) from None
    return get_plotlyjs()


def _layout(go: Any, title: str, x_title: str, y_title: str, height: int = 300, **extra: Any) -> Any:
    settings: dict[str, Any] = dict(
        title={"text": title, "font": {"size": 14, "color": INK}, "x": 0.01},
        height=height, margin={"l": 64, "r": 16, "t": 40, "b": 48},
        paper_bgcolor="white", plot_bgcolor="white", font={"family": "Helvetica, Arial, sans-serif", "color": INK, "size": 12},
        xaxis={"title": {"text": x_title}, "gridcolor": GRID, "zeroline": False, "linecolor": BOUND},
        yaxis={"title": {"text": y_title}, "gridcolor": GRID, "zeroline": False, "linecolor": BOUND},
        legend={"orientation": "h", "y": -0.25, "x": 0}, showlegend=True,
    )
    settings.update(extra)
    return go.Layout(**settings)


def figure_html(fig: Any, div_id: str) -> str:
    """A figure as a div and its script (plotly.js itself is inlined once per page)."""
    return fig.to_html(full_html=False, include_plotlyjs=False, div_id=div_id,
                       config={"displaylogo": False, "responsive": True, "displayModeBar": False})


def bar_chart(labels: list[str], values: list[float], title: str, x_title: str, y_title: str, colour: str = BAR) -> Any:
    """Horizontal bars (one per label), largest at the top."""
    go = plotly()
    fig = go.Figure(layout=_layout(go, title, x_title, y_title, height=max(180, 60 + 26 * len(labels)), showlegend=False))
    fig.add_trace(go.Bar(x=values[::-1], y=labels[::-1], orientation="h", marker={"color": colour},
                         text=[f"{v:,.0f}" for v in values[::-1]], textposition="outside", cliponaxis=False,
                         hovertemplate="%{y}: %{x:,} series<extra></extra>"))
    fig.update_yaxes(automargin=True)
    return fig


def series_chart(history: dict[str, list], forecast: dict[str, Any] | None, title: str, period_title: str,
                 value_title: str) -> Any:
    """History (line) with the forecast and its interval bands, widest band first."""
    go = plotly()
    fig = go.Figure(layout=_layout(go, title, period_title, value_title))
    fig.add_trace(go.Scatter(x=history["period"], y=history["value"], mode="lines", name="history",
                             line={"color": HISTORY, "width": 1.6}))
    if forecast:
        levels = sorted(forecast["bands"], key=lambda lv: -float(lv))
        for i, level in enumerate(levels):
            lo, hi = forecast["bands"][level]
            colour = BAND[min(len(levels) - 1 - i, len(BAND) - 1)]
            fig.add_trace(go.Scatter(x=forecast["period"], y=hi, mode="lines", line={"width": 0}, showlegend=False,
                                     hoverinfo="skip", name=f"upper {level}%"))
            fig.add_trace(go.Scatter(x=forecast["period"], y=lo, mode="lines", line={"width": 0}, fill="tonexty",
                                     fillcolor=colour, name=f"{level}% interval"))
        fig.add_trace(go.Scatter(x=forecast["period"], y=forecast["forecast"], mode="lines+markers", name="forecast",
                                 line={"color": FORECAST, "width": 2}, marker={"size": 4}))
    return fig


def acf_chart(lags: list[int], acf: list[float], n_obs: int | None, title: str, lag_unit: str) -> Any:
    """Residual autocorrelation by lag, with the +/- 1.96 / sqrt(n) bounds of white noise."""
    go = plotly()
    fig = go.Figure(layout=_layout(go, title, f"lag ({lag_unit})", "autocorrelation of residuals"))
    fig.add_trace(go.Bar(x=lags, y=acf, name="autocorrelation", marker={"color": BAR}))
    if n_obs and n_obs > 0 and lags:
        bound = 1.96 / math.sqrt(n_obs)
        for sign in (1, -1):
            fig.add_trace(go.Scatter(x=[min(lags) - 0.5, max(lags) + 0.5], y=[sign * bound] * 2, mode="lines",
                                     line={"color": BOUND, "dash": "dash", "width": 1},
                                     name="95% bound of white noise (1.96/sqrt(n))", showlegend=sign > 0))
    return fig


def accuracy_charts(steps: list[int], error: dict[str, list], hit: dict[str, list], step_unit: str,
                    value_title: str) -> tuple[Any, Any]:
    """Error by step ahead (MAE, RMSE, mean error) and interval hit rate against nominal."""
    go = plotly()
    err = go.Figure(layout=_layout(go, "Error of published forecasts by steps ahead", f"steps ahead ({step_unit})",
                                   f"error ({value_title})"))
    for (name, values), colour, dash in zip(error.items(), (HISTORY, FORECAST, BOUND), ("solid", "solid", "dot")):
        err.add_trace(go.Scatter(x=steps, y=values, mode="lines+markers", name=name, line={"color": colour, "dash": dash}))
    rate = go.Figure(layout=_layout(go, "Interval hit rate by steps ahead, against the nominal level",
                                    f"steps ahead ({step_unit})", "actuals inside the interval (%)"))
    colours = (HISTORY, FORECAST, BAR, WARN)
    for i, (level, values) in enumerate(hit.items()):
        c = colours[i % len(colours)]
        rate.add_trace(go.Scatter(x=steps, y=values, mode="lines+markers", name=f"{level}% interval: observed",
                                  line={"color": c}))
        rate.add_trace(go.Scatter(x=[min(steps), max(steps)], y=[float(level)] * 2, mode="lines",
                                  name=f"{level}% nominal", line={"color": c, "dash": "dash", "width": 1}))
    rate.update_yaxes(range=[0, 105])
    return err, rate


def skill_chart(steps: list[int], q25: list, median: list, q75: list, step_unit: str) -> Any:
    """Backtest RMSE / naive RMSE across series by step: median and quartiles; below 1 beats the last value."""
    go = plotly()
    fig = go.Figure(layout=_layout(go, "Backtest skill against the naive forecast (RMSE ratio across series)",
                                   f"steps ahead ({step_unit})", "model RMSE / naive RMSE"))
    fig.add_trace(go.Scatter(x=steps, y=q75, mode="lines", line={"width": 0}, showlegend=False, hoverinfo="skip",
                             name="upper quartile"))
    fig.add_trace(go.Scatter(x=steps, y=q25, mode="lines", line={"width": 0}, fill="tonexty",
                             fillcolor="rgba(47, 93, 124, 0.18)", name="middle half of series"))
    fig.add_trace(go.Scatter(x=steps, y=median, mode="lines+markers", name="median series", line={"color": HISTORY}))
    if steps:
        fig.add_trace(go.Scatter(x=[min(steps), max(steps)], y=[1.0, 1.0], mode="lines", name="as good as naive",
                                 line={"color": BOUND, "dash": "dash", "width": 1}))
    return fig
