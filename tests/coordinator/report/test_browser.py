"""The study report opened in headless Chromium: the browser builds its figures and tables.

Needs Debian's ``chromium`` (installed by ``.ci/install-browser``). Without it the test
is skipped locally, but fails when the ``CI`` environment variable is set, so that a
CI machine without a browser cannot pass silently.
"""

from __future__ import annotations

import struct
from html.parser import HTMLParser
from pathlib import Path

import headless_chromium
import pytest
from headless_chromium import require_chromium, run_chromium
from test_study_report import breast_cancer_results

from coordinator.report.study_report import render_report

pytestmark = pytest.mark.browser

WINDOW = (1280, 4000)


class _Counter(HTMLParser):
    def __init__(self) -> None:
        super().__init__()
        self.tags: dict[str, int] = {}
        self.ids: set[str] = set()

    def handle_starttag(self, tag: str, attrs: list[tuple[str, str | None]]) -> None:
        self.tags[tag] = self.tags.get(tag, 0) + 1
        self.ids |= {v for k, v in attrs if k == "id" and v}


@pytest.fixture(scope="module")
def report(tmp_path_factory: pytest.TempPathFactory) -> Path:
    require_chromium()
    return render_report(breast_cancer_results(), tmp_path_factory.mktemp("browser") / "r.html")


def test_chromium_dom_holds_every_figure_and_table(report: Path, tmp_path: Path) -> None:
    """The DOM Chromium builds from the file holds the report's SVG figures and tables."""
    dom = run_chromium(tmp_path / "profile", "--dump-dom", report.as_uri())
    counter = _Counter()
    counter.feed(dom)
    results = breast_cancer_results()
    pooled_metrics = len({m.metric for m in results.meta})
    figures = pooled_metrics + 3  # a forest plot per pooled metric, 2 ROC, 1 calibration
    assert counter.tags.get("figure") == figures
    assert counter.tags.get("svg") == figures
    assert {"fig-roc-all", "fig-calibration-sites", "table-site-metrics"} <= counter.ids
    tables = 8 + len(results.two_by_two)  # 8 section tables + one 2x2 per site and threshold
    assert counter.tags.get("table") == tables
    assert results.notice in dom


def test_chromium_screenshot_is_a_png_of_the_window_size(report: Path, tmp_path: Path) -> None:
    """A full-window screenshot of the report is a non-empty PNG of the requested size."""
    png = tmp_path / "report.png"
    run_chromium(
        tmp_path / "profile",
        f"--screenshot={png}",
        f"--window-size={WINDOW[0]},{WINDOW[1]}",
        "--hide-scrollbars",
        report.as_uri(),
    )
    data = png.read_bytes()
    assert data[:8] == b"\x89PNG\r\n\x1a\n"  # PNG signature (ISO/IEC 15948)
    width, height = struct.unpack(">II", data[16:24])  # IHDR width and height
    assert (width, height) == WINDOW
    assert len(data) > 50_000  # a blank page of this size gave 23 kB (Chromium 156, measured)


def test_missing_browser_fails_under_ci(monkeypatch: pytest.MonkeyPatch, tmp_path: Path) -> None:
    """With CI set, a missing Chromium fails the test run instead of skipping it."""
    monkeypatch.setattr(headless_chromium, "CHROMIUM", tmp_path / "no-chromium")
    monkeypatch.setenv("CI", "true")
    with pytest.raises(pytest.fail.Exception, match="install-browser"):
        require_chromium()


def test_missing_browser_skips_locally(monkeypatch: pytest.MonkeyPatch, tmp_path: Path) -> None:
    """Without CI, a missing Chromium skips the browser tests."""
    monkeypatch.setattr(headless_chromium, "CHROMIUM", tmp_path / "no-chromium")
    monkeypatch.delenv("CI", raising=False)
    with pytest.raises(pytest.skip.Exception, match="install-browser"):
        require_chromium()
