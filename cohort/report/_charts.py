"""Plotly figures of the report, in a look of our own, drawn only from disclosure-controlled tables.

Colours: the Okabe-Ito palette, distinguishable with the common colour-vision deficiencies (Okabe
M, Ito K. Color Universal Design (CUD): how to make figures and presentations that are friendly
to colorblind people. 2008, https://jfly.uni-koeln.de/color/). Lines also differ by dash so a
chart reads in black-and-white print. Every figure has a title and axis titles with units.
"""

from __future__ import annotations

import math
from collections.abc import Sequence

import plotly.graph_objects as go
import plotly.io as pio

from cohort.report._control import PChart
from cohort.report._runchart import RunChartAnalysis

__all__ = ["OKABE_ITO", "FONT_STACK", "figure_html", "km_figure", "run_chart_figure", "p_chart_figure",
           "funnel_figure", "bar_figure", "forest_figure", "cif_figure", "error_bar_figure",
           "calibration_figure"]

#: Okabe and Ito (2008): black, orange, sky blue, bluish green, yellow, blue, vermillion, reddish purple.
OKABE_ITO: tuple[str, ...] = ("#000000", "#E69F00", "#56B4E9", "#009E73", "#F0E442", "#0072B2", "#D55E00", "#CC79A7")
#: Series colours in the order used (yellow last: weak on white).
SERIES = ("#0072B2", "#D55E00", "#009E73", "#CC79A7", "#E69F00", "#56B4E9", "#000000", "#F0E442")
DASHES = ("solid", "dash", "dot", "dashdot", "longdash", "longdashdot")
#: System font stack: no web font is fetched.
FONT_STACK = 'system-ui, -apple-system, "Segoe UI", Roboto, "Helvetica Neue", Arial, "Noto Sans", sans-serif'

_TEMPLATE = go.layout.Template(
    layout=go.Layout(
        font={"family": FONT_STACK, "size": 13, "color": "#1d2430"},
        paper_bgcolor="#ffffff",
        plot_bgcolor="#ffffff",
        colorway=list(SERIES),
        margin={"l": 76, "r": 28, "t": 92, "b": 64},
        xaxis={"showline": True, "linecolor": "#59606b", "ticks": "outside", "gridcolor": "#eceef1", "zeroline": False,
               "automargin": True, "title": {"standoff": 14}},
        yaxis={"showline": True, "linecolor": "#59606b", "ticks": "outside", "gridcolor": "#eceef1", "zeroline": False,
               "automargin": True},
        legend={"orientation": "h", "yanchor": "bottom", "y": 1.02, "xanchor": "left", "x": 0},
        hovermode="closest",
        title={"x": 0.012, "xanchor": "left", "y": 0.975, "yanchor": "top", "font": {"size": 15}},
    )
)

_CONFIG = {"displaylogo": False, "responsive": True, "modeBarButtonsToRemove": ["sendDataToCloud"]}


def _layout(figure: go.Figure, *, title: str, x_title: str, y_title: str, height: int = 420) -> go.Figure:
    figure.update_layout(template=_TEMPLATE, title={"text": title}, height=height,
                         xaxis_title=x_title, yaxis_title=y_title)
    return figure


def figure_html(figure: go.Figure, *, chart_id: str) -> str:
    """A figure as an HTML fragment; plotly.js itself is embedded once by the page, not here."""
    return pio.to_html(figure, include_plotlyjs=False, full_html=False, config=_CONFIG, div_id=chart_id,
                       include_mathjax=False, default_height=f"{figure.layout.height or 420}px")


def bar_figure(labels: Sequence[str], values: Sequence[float | None], *, title: str, x_title: str,
               y_title: str) -> go.Figure:
    """A plain bar chart (withheld values are left out, their labels kept)."""
    figure = go.Figure(go.Bar(x=list(labels), y=[None if v is None else v for v in values],
                              marker_color=SERIES[0], hovertemplate="%{x}: %{y}<extra></extra>"))
    return _layout(figure, title=title, x_title=x_title, y_title=y_title, height=360)


def km_figure(curves: dict[str, tuple[list[float], list[float]]], *, title: str, x_title: str,
              y_title: str) -> go.Figure:
    """Step curves, one per group: ``{label: (times, estimates)}``, already cut for disclosure."""
    figure = go.Figure()
    for index, (label, (times, values)) in enumerate(curves.items()):
        figure.add_trace(go.Scatter(
            x=times, y=values, mode="lines", line_shape="hv", name=label,
            line={"color": SERIES[index % len(SERIES)], "dash": DASHES[index % len(DASHES)], "width": 2},
            hovertemplate=f"{label}<br>%{{x:.1f}} h: %{{y:.3f}}<extra></extra>",
        ))
    figure.update_yaxes(range=[0, 1.02])
    return _layout(figure, title=title, x_title=x_title, y_title=y_title)


def run_chart_figure(periods: Sequence[str], values: Sequence[float | None], analysis: RunChartAnalysis, *,
                     title: str, y_title: str, x_title: str = "Period of onset") -> go.Figure:
    """Run chart: the series, its median line, and the points each rule marked."""
    figure = go.Figure()
    figure.add_trace(go.Scatter(x=list(periods), y=list(values), mode="lines+markers", name="value",
                                line={"color": SERIES[0], "width": 1.5}, marker={"size": 6},
                                connectgaps=False, hovertemplate="%{x}: %{y:.2f}<extra></extra>"))
    if not math.isnan(analysis.median):
        figure.add_trace(go.Scatter(x=[periods[0], periods[-1]], y=[analysis.median] * 2, mode="lines",
                                    name=f"median {analysis.median:.2f}",
                                    line={"color": "#59606b", "dash": "dash", "width": 1.5}, hoverinfo="skip"))
    marks = (("shift", "square-open", SERIES[1], 13), ("trend", "triangle-up-open", SERIES[2], 13),
             ("astronomical", "star", SERIES[3], 14))
    for rule, symbol, colour, size in marks:
        points = analysis.points(rule)
        if points:
            figure.add_trace(go.Scatter(
                x=[periods[i] for i in points], y=[values[i] for i in points], mode="markers", name=rule,
                marker={"symbol": symbol, "size": size, "color": colour, "line": {"width": 2, "color": colour}},
                hovertemplate=f"{rule}: %{{x}}<extra></extra>",
            ))
    return _layout(figure, title=title, x_title=x_title, y_title=y_title)


def p_chart_figure(periods: Sequence[str], chart: PChart, *, title: str, y_title: str,
                   x_title: str = "Period of onset") -> go.Figure:
    """p-chart: shares, centre line and stepped 3-sigma limits; points outside marked."""
    figure = go.Figure()
    x = list(periods)
    figure.add_trace(go.Scatter(x=x, y=list(chart.upper), mode="lines", line_shape="hvh", name="upper limit (3 sigma)",
                                line={"color": "#59606b", "dash": "dot", "width": 1.2}, hoverinfo="skip"))
    figure.add_trace(go.Scatter(x=x, y=list(chart.lower), mode="lines", line_shape="hvh", name="lower limit (3 sigma)",
                                line={"color": "#59606b", "dash": "dot", "width": 1.2}, hoverinfo="skip"))
    figure.add_trace(go.Scatter(x=[x[0], x[-1]], y=[chart.centre] * 2, mode="lines", name=f"p-bar {chart.centre:.3f}",
                                line={"color": "#59606b", "dash": "dash"}, hoverinfo="skip"))
    figure.add_trace(go.Scatter(x=x, y=list(chart.share), mode="lines+markers", name="share",
                                line={"color": SERIES[0], "width": 1.5}, hovertemplate="%{x}: %{y:.3f}<extra></extra>"))
    if chart.outside:
        figure.add_trace(go.Scatter(x=[x[i] for i in chart.outside], y=[chart.share[i] for i in chart.outside],
                                    mode="markers", name="outside the limits",
                                    marker={"symbol": "diamond-open", "size": 14, "color": SERIES[1], "line": {"width": 2}}))
    figure.update_yaxes(range=[0, 1.02])
    return _layout(figure, title=title, x_title=x_title, y_title=y_title)


def funnel_figure(units: Sequence[str], denominators: Sequence[int], shares: Sequence[float], limits, target: float, *,
                  title: str, y_title: str, x_title: str = "Episodes judged (denominator)") -> go.Figure:
    """Funnel plot: each unit's share by its denominator, target line, 95% and 99.8% limits."""
    figure = go.Figure()
    n = limits["denominator"].to_list()
    for level, dash in (("95", "dash"), ("99_8", "dot")):
        name = "95%" if level == "95" else "99.8%"
        for side in ("lower", "upper"):
            figure.add_trace(go.Scatter(x=n, y=limits[f"{side}_{level}"].to_list(), mode="lines",
                                        name=f"{name} limits", legendgroup=level, showlegend=side == "lower",
                                        line={"color": "#59606b", "dash": dash, "width": 1.2}, hoverinfo="skip"))
    if n:
        figure.add_trace(go.Scatter(x=[n[0], n[-1]], y=[target, target], mode="lines", name=f"target {target:.3f}",
                                    line={"color": "#1d2430", "width": 1.2}, hoverinfo="skip"))
    figure.add_trace(go.Scatter(x=list(denominators), y=list(shares), mode="markers+text", text=list(units),
                                textposition="middle right", name="hospital", textfont={"size": 11},
                                marker={"size": 10, "color": SERIES[0], "symbol": "circle"},
                                hovertemplate="%{text}: %{y:.3f} of %{x}<extra></extra>"))
    figure.update_yaxes(range=[0, 1.02])
    figure.update_xaxes(rangemode="tozero")
    return _layout(figure, title=title, x_title=x_title, y_title=y_title)


def _rgba(colour: str, alpha: float) -> str:
    colour = colour.lstrip("#")
    red, green, blue = (int(colour[i:i + 2], 16) for i in (0, 2, 4))
    return f"rgba({red},{green},{blue},{alpha})"


def forest_figure(labels: Sequence[str], estimates: Sequence[float], lower: Sequence[float], upper: Sequence[float],
                  *, title: str, x_title: str, side_text: Sequence[str] | None = None,
                  side_title: str = "") -> go.Figure:
    """Forest plot: one row per term, the estimate with its 95% CI on a log axis, a line at 1.

    ``side_text`` (one per term, e.g. the proportional-hazards test p) is written beside each row,
    right of the plot. Terms are listed top to bottom in the order given.
    """
    figure = go.Figure()
    y = list(labels)
    figure.add_trace(go.Scatter(
        x=list(estimates), y=y, mode="markers", name="estimate (95% CI)",
        marker={"symbol": "square", "size": 9, "color": SERIES[0]},
        error_x={"type": "data", "symmetric": False, "color": SERIES[0], "thickness": 1.6, "width": 5,
                 "array": [u - e for u, e in zip(upper, estimates, strict=True)],
                 "arrayminus": [e - lo for e, lo in zip(estimates, lower, strict=True)]},
        customdata=list(zip(lower, upper, strict=True)),
        hovertemplate="%{y}<br>%{x:.3f} (95% CI %{customdata[0]:.3f} to %{customdata[1]:.3f})<extra></extra>",
    ))
    figure.add_shape(type="line", xref="x", yref="paper", x0=1, x1=1, y0=0, y1=1,
                     line={"color": "#59606b", "dash": "dash", "width": 1.2})
    right = 28
    if side_text is not None:
        right = 150
        for label, text in zip(y, side_text, strict=True):
            figure.add_annotation(x=1.0, xref="paper", xanchor="left", xshift=12, y=label, yref="y", text=text,
                                  showarrow=False, font={"size": 12, "color": "#1d2430"})
        if side_title:
            figure.add_annotation(x=1.0, xref="paper", xanchor="left", xshift=12, y=1.0, yref="paper",
                                  yanchor="bottom", text=f"<b>{side_title}</b>", showarrow=False, font={"size": 12})
    values = [v for v in (*lower, *upper) if v is not None and v > 0]
    low, high = (min(values), max(values)) if values else (0.5, 2.0)
    low, high = min(low, 0.9), max(high, 1.1)
    ticks = [t for t in _LOG_TICKS if low / 1.3 <= t <= high * 1.3]
    figure.update_xaxes(type="log", range=[math.log10(low) - 0.05, math.log10(high) + 0.05],
                        tickvals=ticks, ticktext=[f"{t:g}" for t in ticks], minor={"showgrid": False})
    figure.update_yaxes(autorange="reversed", type="category", showgrid=True)
    _layout(figure, title=title, x_title=x_title, y_title="Term (level vs reference)",
            height=130 + 34 * max(len(y), 1))
    figure.update_layout(margin={"r": right, "t": 64}, showlegend=False)
    return figure


#: Tick values of a ratio axis on a log scale (1 in the middle, symmetric steps either side).
_LOG_TICKS = (0.01, 0.02, 0.05, 0.1, 0.2, 0.25, 0.33, 0.5, 0.67, 0.8, 1.0, 1.25, 1.5, 2.0, 3.0, 4.0, 5.0, 10.0, 20.0,
              50.0, 100.0)


def cif_figure(curves: dict[str, tuple[list[float], list[float], list[float], list[float]]], *, title: str,
               x_title: str, y_title: str) -> go.Figure:
    """Cumulative incidence step curves with 95% bands: ``{label: (times, estimate, lower, upper)}``."""
    figure = go.Figure()
    for index, (label, (times, values, lower, upper)) in enumerate(curves.items()):
        colour = SERIES[index % len(SERIES)]
        figure.add_trace(go.Scatter(x=times, y=upper, mode="lines", line_shape="hv", line={"width": 0},
                                    legendgroup=label, showlegend=False, hoverinfo="skip", name=f"{label} upper"))
        figure.add_trace(go.Scatter(x=times, y=lower, mode="lines", line_shape="hv", line={"width": 0},
                                    fill="tonexty", fillcolor=_rgba(colour, 0.16), legendgroup=label,
                                    showlegend=False, hoverinfo="skip", name=f"{label} lower"))
        figure.add_trace(go.Scatter(
            x=times, y=values, mode="lines", line_shape="hv", name=label, legendgroup=label,
            line={"color": colour, "dash": DASHES[index % len(DASHES)], "width": 2},
            hovertemplate=f"{label}<br>%{{x:.1f}}: %{{y:.3f}}<extra></extra>",
        ))
    figure.update_yaxes(range=[0, 1.02])
    figure.update_xaxes(rangemode="tozero")
    return _layout(figure, title=title, x_title=x_title, y_title=y_title)


def error_bar_figure(series: dict[str, tuple[list, list[float], list[float], list[float]]], *, title: str,
                     x_title: str, y_title: str, lines: bool = False) -> go.Figure:
    """Estimates with asymmetric 95% error bars, one series per label: ``{label: (x, est, lower, upper)}``.

    ``lines=False``: bars (one series); ``lines=True``: points joined by lines, a legend naming each series.
    """
    figure = go.Figure()
    for index, (label, (x, values, lower, upper)) in enumerate(series.items()):
        colour = SERIES[index % len(SERIES)]
        if not lines:
            figure.add_trace(go.Bar(
                x=list(x), y=list(values), name=label, marker_color=_rgba(colour, 0.55),
                marker_line={"color": colour, "width": 1.2}, width=0.5,
                error_y={"type": "data", "symmetric": False, "color": "#1d2430", "thickness": 1.5, "width": 8,
                         "array": [u - v for u, v in zip(upper, values, strict=True)],
                         "arrayminus": [v - lo for v, lo in zip(values, lower, strict=True)]},
                hovertemplate=f"{label}<br>%{{x}}: %{{y:.2f}}<extra></extra>",
            ))
            continue
        figure.add_trace(go.Scatter(
            x=list(x), y=list(values), mode="lines+markers" if lines else "markers", name=label,
            line={"color": colour, "dash": DASHES[index % len(DASHES)], "width": 1.5},
            marker={"size": 9, "color": colour, "symbol": ("circle", "square", "diamond", "triangle-up")[index % 4]},
            error_y={"type": "data", "symmetric": False, "color": colour, "thickness": 1.5, "width": 6,
                     "array": [u - v for u, v in zip(upper, values, strict=True)],
                     "arrayminus": [v - lo for v, lo in zip(values, lower, strict=True)]},
            hovertemplate=f"{label}<br>%{{x}}: %{{y:.2f}}<extra></extra>",
        ))
    figure.update_yaxes(rangemode="tozero")
    figure.update_xaxes(type="category")
    figure.update_layout(showlegend=lines)
    return _layout(figure, title=title, x_title=x_title, y_title=y_title)


def calibration_figure(predicted: Sequence[float], observed: Sequence[float], lower: Sequence[float],
                       upper: Sequence[float], *, title: str) -> go.Figure:
    """Calibration plot: observed share against mean predicted risk per bin, 95% CIs, the diagonal."""
    figure = go.Figure()
    figure.add_trace(go.Scatter(x=[0, 1], y=[0, 1], mode="lines", name="perfect calibration",
                                line={"color": "#59606b", "dash": "dash", "width": 1.2}, hoverinfo="skip"))
    figure.add_trace(go.Scatter(
        x=list(predicted), y=list(observed), mode="markers", name="bin (observed, 95% CI)",
        marker={"size": 9, "color": SERIES[0], "symbol": "circle"},
        error_y={"type": "data", "symmetric": False, "color": SERIES[0], "thickness": 1.5, "width": 5,
                 "array": [u - o for u, o in zip(upper, observed, strict=True)],
                 "arrayminus": [o - lo for o, lo in zip(observed, lower, strict=True)]},
        hovertemplate="predicted %{x:.3f}, observed %{y:.3f}<extra></extra>",
    ))
    figure.update_xaxes(range=[0, 1], constrain="domain")
    figure.update_yaxes(range=[0, 1.02])
    return _layout(figure, title=title, x_title="Mean predicted risk in the bin (proportion)",
                   y_title="Observed share with the event (proportion)", height=460)
