"""The whole demo at small sizes: the report is written and passes its own disclosure check.

A small cohort is where suppression is hardest (many counts under the threshold, tables with
only a total row, hospitals whose denominators are withheld). Checked: `dka-cohort demo` exits 0,
and re-scanning the written report finds no violation (`cohort.report.check_disclosure`; the rule
of a minimum cell count of 10 is common practice in health-statistics publication, e.g. NHS
Digital's and the US CMS cell-size policies [from memory]).
"""

from __future__ import annotations

from pathlib import Path

import pytest

from cohort.cli import main
from cohort.report import check_disclosure


@pytest.mark.parametrize("persons", [400, 1500])
def test_small_demo_writes_a_report_that_passes_disclosure(persons: int, tmp_path: Path) -> None:
    out = tmp_path / f"demo{persons}"
    assert main(["demo", "--persons", str(persons), "--out", str(out), "--quiet"]) == 0
    report = out / "report.html"
    assert report.is_file()
    assert check_disclosure(report, threshold=10) == []
    assert check_disclosure(out / "report-tables", threshold=10) == []
