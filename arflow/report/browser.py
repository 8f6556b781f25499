"""Open a report in the system's headless Chromium (Debian's ``chromium`` + ``chromium-driver``), offline.

Used by the report's browser tests and by ``python tools/report_screenshot.py``.
Nothing is downloaded: the driver is given by path (so Selenium Manager is
never asked for one), and the page is loaded from a ``file://`` URL with the
browser's network switched off (DevTools ``Network.emulateNetworkConditions``
offline, every host name resolving to nothing).
"""

from __future__ import annotations

import contextlib
import os
import shutil
import tempfile
from collections.abc import Iterator
from pathlib import Path
from typing import Any

from ..errors import SettingsError

#: the browser and its driver as Debian installs them
CHROMIUM = ("/usr/bin/chromium", "/usr/lib/chromium/chromium")
CHROMEDRIVER = ("/usr/bin/chromedriver", "/usr/lib/chromium/chromedriver")

#: flags for a root, headless, quiet, offline browser
FLAGS = (
    "--headless", "--no-sandbox", "--disable-gpu", "--disable-dev-shm-usage", "--disable-background-networking",
    "--disable-component-update", "--disable-sync", "--no-first-run", "--disable-default-apps",
    "--disable-extensions", "--host-resolver-rules=MAP * ~NOTFOUND", "--window-size=1280,900",
)


def _first(paths: tuple[str, ...], name: str) -> str | None:
    for p in paths:
        if Path(p).is_file():
            return p
    return shutil.which(name)


def browser_paths() -> tuple[str, str] | None:
    """(chromium, chromedriver) when both are installed, else None."""
    chrome = _first(CHROMIUM, "chromium")
    driver = _first(CHROMEDRIVER, "chromedriver")
    return (chrome, driver) if chrome and driver else None


@contextlib.contextmanager
def offline_browser(width: int = 1280, height: int = 900) -> Iterator[Any]:
    """A selenium Chrome driver on the system's Chromium, networking off, a fresh profile; quit on exit."""
    paths = browser_paths()
    if paths is None:
        raise SettingsError("no Chromium found: install Debian's packages (apt-get install chromium chromium-driver)")
    try:
        from selenium import webdriver
        from selenium.webdriver.chrome.service import Service
    except ImportError:
        raise SettingsError("the browser check needs selenium: pip install 'arflow-gated[test]'") from None
    os.environ.setdefault("SE_OFFLINE", "true")  # belt and braces: Selenium Manager may never download
    profile = tempfile.mkdtemp(prefix="arflow-chromium-")
    options = webdriver.ChromeOptions()
    options.binary_location = paths[0]
    for flag in FLAGS:
        options.add_argument(flag)
    options.add_argument(f"--window-size={width},{height}")
    options.add_argument(f"--user-data-dir={profile}")
    options.set_capability("goog:loggingPrefs", {"browser": "ALL"})
    driver = webdriver.Chrome(service=Service(executable_path=paths[1]), options=options)
    try:
        driver.execute_cdp_cmd("Network.enable", {})
        driver.execute_cdp_cmd("Network.emulateNetworkConditions", {
            "offline": True, "latency": 0, "downloadThroughput": 0, "uploadThroughput": 0})
        yield driver
    finally:
        driver.quit()
        shutil.rmtree(profile, ignore_errors=True)


def load(driver: Any, report: Path, timeout: float = 60.0) -> None:
    """Load ``report`` from its file:// URL and wait until every chart has drawn its SVG."""
    from selenium.webdriver.support.ui import WebDriverWait

    driver.get(Path(report).resolve().as_uri())
    WebDriverWait(driver, timeout).until(lambda d: d.execute_script(
        "var g=document.querySelectorAll('.plotly-graph-div');"
        "for(var i=0;i<g.length;i++){if(!g[i].querySelector('svg.main-svg'))return false;}return true;"))


def chart_census(driver: Any) -> list[dict[str, Any]]:
    """Per chart in the rendered page: its id, drawn traces (bars, lines) and axis titles."""
    return driver.execute_script("""
        return Array.prototype.map.call(document.querySelectorAll('.plotly-graph-div'), function(g){
          return {id: g.id,
                  svgs: g.querySelectorAll('svg.main-svg').length,
                  bars: g.querySelectorAll('.barlayer .point path').length,
                  lines: g.querySelectorAll('.scatterlayer .trace path.js-line').length,
                  fills: g.querySelectorAll('.scatterlayer .trace path.js-fill').length,
                  title: (g.querySelector('.gtitle')||{}).textContent || '',
                  xtitle: (g.querySelector('.xtitle')||{}).textContent || '',
                  ytitle: (g.querySelector('.ytitle')||{}).textContent || ''};
        });""")


def screenshot(report: Path, png: Path, width: int = 1280, height: int = 2000) -> Path:
    """A PNG of the top of the report (run summary, reasons, settings, the start of the series table)."""
    with offline_browser(width, height) as driver:
        load(driver, report)
        png.parent.mkdir(parents=True, exist_ok=True)
        driver.save_screenshot(str(png))
    return png
