"""The HTML report in a real browser: all figures draw offline, nothing is fetched.

Run with the other browser tests: ``python -m pytest -m browser tests/browser``.
"""

from __future__ import annotations

from pathlib import Path

import pytest
from playwright.sync_api import sync_playwright

# Fixtures of the report tests: the results and the report's HTML built from them.
from ..test_report import page as report_page  # noqa: F401
from ..test_report import results  # noqa: F401
from .jupyter_server import CHROMIUM

pytestmark = pytest.mark.browser


def test_report_renders_offline_in_a_browser(report_page, tmp_path):  # noqa: F811
    if not Path(CHROMIUM).exists():
        pytest.fail(
            f"{CHROMIUM} is missing: install Debian's chromium (apt-get install -y chromium)"
        )
    path = tmp_path / "offline.html"
    path.write_text(report_page, encoding="utf-8")
    requests: list[str] = []
    with sync_playwright() as p:
        browser = p.chromium.launch(
            executable_path=CHROMIUM,
            headless=True,
            args=["--disable-gpu", "--no-first-run", "--disable-background-networking"],
        )
        try:
            tab = browser.new_page()
            tab.on("request", lambda r: requests.append(r.url))
            tab.goto(Path(path).as_uri())
            tab.wait_for_function(
                "document.querySelectorAll('.plotly-graph-div .main-svg').length >= 6",
                timeout=15000,
            )
            drawn = tab.evaluate("document.querySelectorAll('.plotly-graph-div').length")
        finally:
            browser.close()
    assert drawn == 6
    assert [u for u in requests if not u.startswith(("file:", "data:", "blob:"))] == []
