"""The demo report in a real headless Chromium: opens from a file path, draws every chart, asks for nothing.

Needs Debian's chromium at /usr/bin/chromium and the playwright Python package (never its own
browser download); skips with a message when either is missing. Issue 6 ("What must be shown").
"""

from __future__ import annotations

import shutil
from pathlib import Path

import pytest

CHROMIUM = Path("/usr/bin/chromium")
LAUNCH_ARGS = [
    "--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
    "--disable-background-networking", "--disable-component-update", "--disable-sync",
]

playwright_sync = pytest.importorskip(
    "playwright.sync_api", reason="the playwright package is not installed (pip install playwright; no browser download needed)"
)
pytestmark = pytest.mark.skipif(
    not CHROMIUM.is_file() and shutil.which("chromium") is None,
    reason="Debian chromium is not installed at /usr/bin/chromium (apt-get install -y chromium chromium-driver)",
)


@pytest.fixture(scope="module")
def demo_report(tmp_path_factory) -> Path:
    """Synthetic extract -> episodes -> features -> statistics -> report, small enough for a quick test."""
    from cohort.analyse import run_analyses
    from cohort.episodes import find_episodes
    from cohort.features import build_features, load_feature_inputs, write_features
    from cohort.report import write_report
    from cohort.source import open_extract
    from synthetic import generate_extract

    root = tmp_path_factory.mktemp("browser")
    generate_extract(persons=2000, seed=20261201, out=root / "synth", force=True)
    extract = open_extract(root / "synth" / "extract")
    episodes = find_episodes(extract, ["consensus-2024", "jbds-2023", "ada-2009", "ispad-2022"],
                             out=root / "results" / "episodes")
    tables = build_features(episodes.episodes, load_feature_inputs(extract, episodes.episodes))
    write_features(tables, root / "results" / "features")
    run_analyses(root / "results" / "features", root / "results" / "stats", definition="consensus-2024")
    summary = write_report(root / "results", root / "report" / "report.html")
    assert summary.charts >= 5
    return summary.out_file


#: Charts the statistics stage's tables must give (data-chart names of the figures).
STATS_CHARTS = ("cif_resolution", "forest_resolution_cox", "cif_recurrence", "rates_by_diabetes_type",
                "forest_recurrence_andersen_gill", "prediction_calibration")


def _open(path: Path, profile: Path) -> tuple[list[str], list[str]]:
    """Open ``path`` in Chromium; return the URLs requested and the console errors/page errors."""
    requests: list[str] = []
    problems: list[str] = []
    with playwright_sync.sync_playwright() as driver:
        context = driver.chromium.launch_persistent_context(
            user_data_dir=str(profile), executable_path=str(CHROMIUM), headless=True, args=LAUNCH_ARGS,
        )
        try:
            page = context.new_page()
            page.on("request", lambda request: requests.append(request.url))
            page.on("console", lambda message: problems.append(message.text) if message.type == "error" else None)
            page.on("pageerror", lambda error: problems.append(str(error)))
            page.goto(path.resolve().as_uri(), wait_until="load")
            page.wait_for_timeout(500)
        finally:
            context.close()
    return requests, problems


def test_the_checks_see_a_page_that_asks_for_the_network(tmp_path: Path):
    # negative control: the same listeners do catch an external request and a script error
    page = tmp_path / "leaky.html"
    page.write_text('<html><body><img src="http://example.invalid/x.png"><script>undefinedFunction()</script></body></html>')
    requests, problems = _open(page, tmp_path / "profile")
    assert any(url.startswith("http://example.invalid") for url in requests)
    assert any("undefinedFunction" in problem for problem in problems)


def test_report_opens_offline_and_draws_every_chart(demo_report: Path, artefact_dir: Path, tmp_path: Path):
    requests: list[str] = []
    problems: list[str] = []
    with playwright_sync.sync_playwright() as driver:
        context = driver.chromium.launch_persistent_context(
            user_data_dir=str(tmp_path / "profile"), executable_path=str(CHROMIUM), headless=True,
            args=LAUNCH_ARGS, viewport={"width": 1280, "height": 900},
        )
        try:
            page = context.new_page()
            page.on("request", lambda request: requests.append(request.url))
            page.on("console", lambda message: problems.append(f"console {message.type}: {message.text}")
                    if message.type in ("error", "warning") else None)
            page.on("pageerror", lambda error: problems.append(f"page error: {error}"))
            page.goto(demo_report.resolve().as_uri(), wait_until="load")
            page.wait_for_function(
                "() => [...document.querySelectorAll('.js-plotly-plot')].length > 0 &&"
                " [...document.querySelectorAll('.js-plotly-plot')].every(d => d.querySelector('svg.main-svg'))",
                timeout=30_000,
            )
            figures = page.locator("figure.chart").count()
            names = page.evaluate("() => [...document.querySelectorAll('figure.chart')].map(f => f.dataset.chart)")
            forest_axis = page.evaluate(
                "() => { const d = document.querySelector('figure[data-chart=forest_resolution_cox] .js-plotly-plot');"
                " return d ? d._fullLayout.xaxis.type : null; }")
            drawn = page.evaluate(
                "() => [...document.querySelectorAll('figure.chart')].map(f => "
                "f.querySelectorAll('.js-plotly-plot svg.main-svg g.trace path').length)"
            )
            titles = page.evaluate("() => [...document.querySelectorAll('.js-plotly-plot .gtitle')].map(t => t.textContent)")
            page.screenshot(path=str(artefact_dir / "report_top.png"))
            page.screenshot(path=str(artefact_dir / "report_full.png"), full_page=True)
            page.emulate_media(media="print")
            page.screenshot(path=str(artefact_dir / "report_print.png"))
        finally:
            context.close()
    assert problems == []
    assert [url for url in requests if not url.startswith("file://")] == []
    assert figures >= 5
    assert len(drawn) == figures and all(count > 0 for count in drawn), drawn
    assert len(titles) == figures and all(title.strip() for title in titles)
    missing = [name for name in STATS_CHARTS if name not in names]
    assert missing == [], f"charts from the statistics stage not drawn: {missing}; drawn: {names}"
    assert forest_axis == "log"
