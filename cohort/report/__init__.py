"""The report: self-contained HTML with run charts, a p-chart, a funnel plot and disclosure control."""

from __future__ import annotations

from cohort.report._check import Violation, check_disclosure
from cohort.report._control import PChart, p_chart
from cohort.report._funnel import binomial_limit, funnel_limits, funnel_position
from cohort.report._runchart import RunChartAnalysis, analyse_run_chart, runs_limits
from cohort.report._html import ReportSummary, write_report  # noqa: E402

__all__ = [
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
