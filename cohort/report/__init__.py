"""The report: self-contained HTML with run charts, a p-chart, a funnel plot and disclosure control.

Besides :func:`write_report`, the disclosure-controlled table builders the report uses
(:func:`attrition_table`, :func:`share_table`, :func:`median_table`, :func:`model_table`,
:func:`rate_table`, :func:`calibration_table`, :func:`suppress_table`, :func:`km_truncate`) and its
figure builders (:mod:`cohort.report.charts`) are public, so a notebook or a script can show the
same views with the same small-count suppression.
"""

from __future__ import annotations

from cohort.report._check import Violation, check_disclosure
from cohort.report._control import PChart, p_chart
from cohort.report import _charts as charts
from cohort.report._funnel import binomial_limit, curve_denominators, funnel_limits, funnel_position
from cohort.report._runchart import RunChartAnalysis, analyse_run_chart, runs_limits
from cohort.report._html import ReportSummary, write_report  # noqa: E402
from cohort.report._tables import (
    attrition_table,
    calibration_table,
    km_truncate,
    median_table,
    model_table,
    rate_table,
    share_table,
    suppress_table,
)

__all__ = [
    "attrition_table",
    "calibration_table",
    "charts",
    "curve_denominators",
    "km_truncate",
    "median_table",
    "model_table",
    "rate_table",
    "share_table",
    "suppress_table",
    "PChart",
    "ReportSummary",
    "RunChartAnalysis",
    "Violation",
    "analyse_run_chart",
    "binomial_limit",
    "check_disclosure",
    "funnel_limits",
    "funnel_position",
    "p_chart",
    "runs_limits",
    "write_report",
]
