"""The HTML report in headless Chromium: it loads cleanly, every figure shows, it fits a laptop
screen and prints.

Needs the Debian packages chromium and chromium-driver and the selenium package (.ci/run
installs them). Without them the tests skip locally; with CI set they fail instead.
Set DRAWLEDGER_UPDATE_SCREENSHOT=1 to refresh docs/report-screenshot.png from the demo report.
"""

from __future__ import annotations

import base64
import os
import re
import shutil
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import pytest

SCREENSHOT = Path(__file__).resolve().parent.parent / "docs" / "report-screenshot.png"
FLAGS = (
    "--headless",
    "--no-sandbox",
    "--disable-gpu",
    "--disable-quic",
    "--no-first-run",
    "--disable-background-networking",
    "--disable-component-update",
    "--disable-sync",
    "--disable-dev-shm-usage",
)


def _missing(reason: str) -> None:
    if os.environ.get("CI"):
        pytest.fail(f"browser test cannot run in CI: {reason}")
    pytest.skip(reason)


@pytest.fixture(scope="module")
def browser(tmp_path_factory: pytest.TempPathFactory) -> Iterator[Any]:
    """Headless Chromium through chromedriver, with a fresh empty profile and no network use."""
    try:
        from selenium import webdriver
        from selenium.webdriver.chrome.service import Service
    except ImportError:
        _missing("selenium is not installed (pip install selenium)")
    binary = shutil.which("chromium") or shutil.which("chromium-browser")
    driver_path = shutil.which("chromedriver")
    if binary is None or driver_path is None:
        _missing("needs the Debian packages chromium and chromium-driver")
    options = webdriver.ChromeOptions()
    for flag in (*FLAGS, f"--user-data-dir={tmp_path_factory.mktemp('chromium-profile')}"):
        options.add_argument(flag)
    options.binary_location = binary
    options.set_capability("goog:loggingPrefs", {"browser": "ALL"})
    driver = webdriver.Chrome(options=options, service=Service(driver_path))
    try:
        yield driver
    finally:
        driver.quit()


def _open(browser: Any, path: Path, width: int, height: int) -> None:
    browser.set_window_size(width, height)
    browser.get(path.resolve().as_uri())
    browser.get_log("browser")  # drop what an earlier page logged


@pytest.fixture(scope="module")
def loaded(browser: Any, demo_run: Any) -> tuple[Any, list[dict[str, Any]]]:
    """The demo report open in the browser, with what its console logged while loading."""
    browser.set_window_size(1280, 900)
    browser.get("about:blank")
    browser.get_log("browser")
    browser.get(Path(demo_run.report).resolve().as_uri())
    return browser, browser.get_log("browser")


def test_report_loads_without_console_errors(loaded: tuple[Any, list[dict[str, Any]]]) -> None:
    """The page finishes loading, logs nothing at error level and loads no resource from the
    network (a violated Content-Security-Policy would log an error too)."""
    browser, log = loaded
    assert "complete" == browser.execute_script("return document.readyState")
    assert [] == [e for e in log if e["level"] == "SEVERE"]
    remote = browser.execute_script(
        "return performance.getEntriesByType('resource').map(e => e.name)"
        ".filter(n => !n.startsWith('data:'))"
    )
    assert [] == remote


def test_every_figure_has_a_nonzero_size(loaded: tuple[Any, list[dict[str, Any]]]) -> None:
    """Each figure decoded (natural size > 0) and is laid out with a width and height > 0."""
    browser, _ = loaded
    sizes = browser.execute_script(
        "return Array.from(document.images).map(i => [i.alt, i.complete, i.naturalWidth,"
        " i.naturalHeight, i.getBoundingClientRect().width, i.getBoundingClientRect().height])"
    )
    assert len(sizes) >= 5
    for alt, complete, nw, nh, w, h in sizes:
        assert complete, alt
        assert nw > 0 and nh > 0, alt
        assert w > 0 and h > 0, alt


def test_report_fits_a_laptop_screen(browser: Any, demo_run: Any) -> None:
    """At 1366 x 768 nothing overflows sideways: no horizontal scrolling."""
    _open(browser, Path(demo_run.report), 1366, 768)
    overflow = browser.execute_script(
        "return document.documentElement.scrollWidth - document.documentElement.clientWidth"
    )
    assert 0 >= overflow


def test_report_prints(browser: Any, demo_run: Any) -> None:
    """Printing to PDF (A4, the print stylesheet) gives a multi-page document."""
    from selenium.webdriver.common.print_page_options import PrintOptions

    _open(browser, Path(demo_run.report), 1280, 900)
    options = PrintOptions()
    options.page_width, options.page_height = 21.0, 29.7
    pdf = base64.b64decode(browser.print_page(options))
    assert pdf.startswith(b"%PDF")
    pages = max(int(n) for n in re.findall(rb"/Count (\d+)", pdf))
    assert pages >= 2
    assert [] == [e for e in browser.get_log("browser") if e["level"] == "SEVERE"]


@pytest.mark.parametrize("width", [1280, 800])
def test_screenshot(browser: Any, demo_run: Any, tmp_path: Path, width: int) -> None:
    """A full-page screenshot at laptop width and at 800 px; at both, no figure reaches past
    the page's width and nothing scrolls sideways. docs/report-screenshot.png (1280 px) is
    refreshed on demand."""
    _open(browser, Path(demo_run.report), width, 900)
    height = browser.execute_script("return document.documentElement.scrollHeight")
    browser.set_window_size(width, height + 120)
    page = browser.execute_script("return document.documentElement.clientWidth")
    rights = browser.execute_script(
        "return Array.from(document.images).map(i => [i.alt, i.getBoundingClientRect().right])"
    )
    assert [] == [alt for alt, right in rights if right > page + 0.5]
    overflow = browser.execute_script(
        "return document.documentElement.scrollWidth - document.documentElement.clientWidth"
    )
    assert 0 >= overflow
    update = os.environ.get("DRAWLEDGER_UPDATE_SCREENSHOT") and width == 1280
    target = SCREENSHOT if update else tmp_path / f"shot-{width}.png"
    assert browser.save_screenshot(str(target))
    assert target.stat().st_size > 10_000
