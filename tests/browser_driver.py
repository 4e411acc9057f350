"""A headless Chromium for the tests that check what a person sees (status page, report).

Debian's ``chromium`` and ``chromium-driver`` packages, driven by selenium through the
chromedriver found on the PATH (selenium is never allowed to download anything: the driver
path is given and SE_OFFLINE is set). The tests install nothing: where something is missing
they are skipped with :func:`missing` as the stated reason; ``make test-browser`` installs the
packages and runs them.

Every wait is on a condition with a bounded timeout (:func:`wait_for`); nothing sleeps a fixed
time and then asserts.
"""

from __future__ import annotations

import os
import shutil
import tempfile
import time
from contextlib import contextmanager
from pathlib import Path

CHROMIUM_NAMES = ("chromium", "chromium-browser")
DRIVER_NAMES = ("chromedriver",)
FLAGS = ("--headless", "--no-sandbox", "--disable-gpu", "--disable-background-networking",
         "--disable-component-update", "--disable-sync", "--no-first-run",
         "--disable-dev-shm-usage", "--disable-extensions", "--password-store=basic")
DEFAULT_TIMEOUT_S = 30.0


def _which(names) -> str | None:
    for name in names:
        found = shutil.which(name)
        if found:
            return found
    return None


def missing() -> str | None:
    """Why the browser tests cannot run here (None when they can)."""
    try:
        import selenium  # noqa: F401
    except ImportError:
        return "selenium is not installed (pip install 'annotator[browser]'; make test-browser)"
    if _which(CHROMIUM_NAMES) is None:
        return "no chromium on this machine (apt-get install chromium chromium-driver; " \
               "make test-browser)"
    if _which(DRIVER_NAMES) is None:
        return "no chromedriver on this machine (apt-get install chromium-driver; " \
               "make test-browser)"
    return None


@contextmanager
def browser(width: int = 1440, height: int = 900):
    """A fresh headless Chromium (own profile folder, removed afterwards)."""
    from selenium import webdriver
    from selenium.webdriver.chrome.service import Service as DriverService

    os.environ["SE_OFFLINE"] = "true"  # selenium's own manager must not reach the network
    profile = tempfile.mkdtemp(prefix="annotator-chromium-")
    options = webdriver.ChromeOptions()
    options.binary_location = _which(CHROMIUM_NAMES)
    for flag in FLAGS:
        options.add_argument(flag)
    options.add_argument(f"--user-data-dir={profile}")
    options.add_argument(f"--window-size={width},{height}")
    driver = webdriver.Chrome(options=options,
                              service=DriverService(executable_path=_which(DRIVER_NAMES)))
    driver.set_page_load_timeout(DEFAULT_TIMEOUT_S)
    try:
        yield driver
    finally:
        driver.quit()
        shutil.rmtree(profile, ignore_errors=True)


def wait_for(predicate, what: str, timeout_s: float = DEFAULT_TIMEOUT_S, poll_s: float = 0.1):
    """Poll ``predicate`` until it returns something truthy (returned); AssertionError naming
    ``what`` after ``timeout_s``. Exceptions from the page changing under it are retried."""
    from selenium.common.exceptions import (NoSuchElementException,
                                            StaleElementReferenceException)

    deadline = time.monotonic() + timeout_s
    last = None
    while True:
        try:
            value = predicate()
            if value:
                return value
        except (NoSuchElementException, StaleElementReferenceException) as exc:
            last = exc
        if time.monotonic() > deadline:
            raise AssertionError(f"timed out after {timeout_s:g} s waiting for {what}"
                                 + (f" (last: {type(last).__name__})" if last else ""))
        time.sleep(poll_s)


def visible_text(driver) -> str:
    """What a person reads on the page (the body's rendered text)."""
    from selenium.webdriver.common.by import By

    return driver.find_element(By.TAG_NAME, "body").text


def save_screenshot(driver, path: Path) -> Path:
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    assert driver.save_screenshot(str(path)), f"could not save {path}"
    return path


__all__ = ["missing", "browser", "wait_for", "visible_text", "save_screenshot"]
