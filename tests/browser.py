"""Find and start a headless Chromium for the report tests (Debian's chromium and chromium-driver).

Selenium drives the browser through the chromedriver found here, given by path, so its driver
manager never looks anything up or downloads anything. When the browser is missing the tests
skip on a workstation and fail under CI (``CI=true``), where .ci/run installs it.
"""

from __future__ import annotations

import os
import shutil
from pathlib import Path

import pytest

# Debian's packages put them here; an environment variable points elsewhere.
BROWSER_CANDIDATES = ("/usr/bin/chromium", "chromium", "chromium-browser")
DRIVER_CANDIDATES = ("/usr/bin/chromedriver", "chromedriver")
INSTALL_HINT = "install them with: apt-get install -y chromium chromium-driver (and pip install 'selenium>=4.20')"

CHROMIUM_FLAGS = (
    "--headless=new", "--no-sandbox", "--disable-gpu", "--disable-dev-shm-usage",
    "--disable-background-networking", "--disable-component-update", "--disable-sync",
    "--no-first-run", "--hide-scrollbars", "--force-device-scale-factor=1",
)


def in_ci() -> bool:
    return os.environ.get("CI", "").strip().lower() in ("1", "true", "yes")


def unavailable(reason: str):
    """Fail under CI, skip elsewhere: a missing browser must not pass silently where it is installed."""
    message = f"{reason}; {INSTALL_HINT}"
    if in_ci():
        pytest.fail(f"browser test cannot run in CI: {message}", pytrace=False)
    pytest.skip(message)


def _find(env: str, candidates: tuple[str, ...]) -> str | None:
    if os.environ.get(env):
        return os.environ[env] if Path(os.environ[env]).is_file() else None
    for c in candidates:
        hit = c if os.path.isabs(c) and Path(c).is_file() else shutil.which(c)
        if hit:
            return hit
    return None


def browser_paths() -> tuple[str, str]:
    """(chromium, chromedriver) paths, or skip/fail the calling test when either is missing."""
    browser = _find("EVALKIT_CHROMIUM", BROWSER_CANDIDATES)
    driver = _find("EVALKIT_CHROMEDRIVER", DRIVER_CANDIDATES)
    if browser is None:
        unavailable("no Chromium found (looked for /usr/bin/chromium, or set EVALKIT_CHROMIUM)")
    if driver is None:
        unavailable("no chromedriver found (looked for /usr/bin/chromedriver, or set EVALKIT_CHROMEDRIVER)")
    return browser, driver


def launch(profile: Path, width: int = 1280, height: int = 900):
    """A headless Chromium under selenium with a fresh profile folder and browser console logging."""
    try:
        from selenium import webdriver
        from selenium.webdriver.chrome.service import Service
    except ImportError:
        unavailable("selenium is not installed")
    browser, driver = browser_paths()
    os.environ.setdefault("SE_OFFLINE", "true")  # belt and braces: the driver manager stays offline
    options = webdriver.ChromeOptions()
    options.binary_location = browser
    for flag in CHROMIUM_FLAGS:
        options.add_argument(flag)
    options.add_argument(f"--user-data-dir={profile}")
    options.add_argument(f"--window-size={width},{height}")
    options.set_capability("goog:loggingPrefs", {"browser": "ALL"})
    service = Service(executable_path=driver, log_output=str(profile.parent / "chromedriver.log"))
    return webdriver.Chrome(service=service, options=options)


def full_page_png(driver) -> bytes:
    """A screenshot of the whole page, not just the window, through the DevTools protocol."""
    import base64

    metrics = driver.execute_cdp_cmd("Page.getLayoutMetrics", {})
    size = metrics.get("cssContentSize") or metrics["contentSize"]
    clip = {"x": 0, "y": 0, "width": size["width"], "height": size["height"], "scale": 1}
    shot = driver.execute_cdp_cmd("Page.captureScreenshot",
                                  {"format": "png", "captureBeyondViewport": True, "clip": clip})
    return base64.b64decode(shot["data"])


def artifacts_dir() -> Path:
    """$EVALKIT_ARTIFACTS when set, else tests/artifacts/ (ignored by git)."""
    folder = Path(os.environ.get("EVALKIT_ARTIFACTS") or Path(__file__).resolve().parent / "artifacts")
    folder.mkdir(parents=True, exist_ok=True)
    return folder
