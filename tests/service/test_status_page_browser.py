"""The status page in a real headless Chromium, checked by what a person sees.

Skipped, with the reason, where Chromium, chromedriver or selenium is missing (the tests
install nothing; ``make test-browser`` installs Debian's chromium and chromium-driver and runs
them). The story is an operator's morning on a token-protected service: sign in, watch jobs
of the (invented) Quillfield Deep Survey appear and advance, open a report, abort one from its
button; and a forged cross-site form is refused. It saves the screenshot the docs show
(docs/images/status-page.png).

References: rfc6265bis (section 4.1.2.7) for SameSite=Strict; the OWASP CSRF Prevention Cheat
Sheet (from memory) for refusing a cross-origin form without the session's token.
"""

from __future__ import annotations

import http.server
import threading
from pathlib import Path

import pyarrow.parquet as pq
import pytest
from browser_driver import browser, missing, save_screenshot, visible_text, wait_for
from catalogue_factory import make_catalogue
from service_harness import Service, corrupt_parquet, job_toml

pytestmark = [pytest.mark.browser,
              pytest.mark.skipif(missing() is not None, reason=str(missing()))]

TOKEN = "quillfield-" + "w" * 24
DOCS_SCREENSHOT = Path(__file__).resolve().parents[2] / "docs" / "images" / "status-page.png"


def screenshot_path(tmp_path: Path) -> Path:
    """The docs' copy only when asked (``make test-browser`` sets ANNOTATOR_UPDATE_SCREENSHOTS),
    so that an ordinary test run never changes a tracked file."""
    import os

    return DOCS_SCREENSHOT if os.environ.get("ANNOTATOR_UPDATE_SCREENSHOTS") else \
        tmp_path / "status-page.png"


@pytest.fixture(scope="module")
def survey(tmp_path_factory):
    root = tmp_path_factory.mktemp("quillfield")
    pq.write_table(make_catalogue(3_000, seed=41), root / "qds-night-0412-violet.parquet",
                   row_group_size=1_000)
    pq.write_table(make_catalogue(900_000, seed=42), root / "qds-deep-field-cyan.parquet")
    pq.write_table(make_catalogue(3_000, seed=43), root / "qds-night-0413-amber.parquet")
    corrupt_parquet(root / "qds-night-0412-violet.parquet", root / "qds-night-0411-crimson.parquet")
    return root


@pytest.fixture(scope="module")
def service(survey, tmp_path_factory):
    s = Service(tmp_path_factory.mktemp("status") / "root", [survey], token=TOKEN).start()
    yield s
    s.kill()


def submit(service: Service, body: str, name: str) -> str:
    r = service.submit(body, name=name)
    assert r.status_code == 201, r.text
    return r.json()["id"]


def _row_phase(driver, ident: str) -> str | None:
    from selenium.webdriver.common.by import By

    rows = driver.find_elements(By.ID, f"row-{ident}")
    return rows[0].get_attribute("data-phase") if rows else None


def _rows_done(driver, ident: str) -> int:
    from selenium.webdriver.common.by import By

    cell = driver.find_element(By.CSS_SELECTOR, f"#row-{ident} .rows")
    return int(cell.get_attribute("data-rows-done"))


class _Forger(http.server.BaseHTTPRequestHandler):
    """Another origin's page with a form that posts to the service by itself."""

    target = ""

    def do_GET(self):  # noqa: N802 - the http.server API
        body = (f'<!doctype html><title>free telescope time</title>'
                f'<form id="f" method="post" action="{self.target}">'
                f'<input type="hidden" name="confirmed" value="yes"></form>'
                f'<script>document.getElementById("f").submit()</script>').encode()
        self.send_response(200)
        self.send_header("Content-Type", "text/html")
        self.send_header("Content-Length", str(len(body)))
        self.end_headers()
        self.wfile.write(body)

    def log_message(self, *args):
        pass


def test_an_operators_morning_in_a_real_browser(service, survey, tmp_path):
    from selenium.webdriver.common.by import By

    url = service.url
    with browser(width=1600, height=820) as driver:
        # -- sign-in is required on a token-protected service
        driver.get(url + "/")
        wait_for(lambda: driver.current_url.endswith("/signin"), "the sign-in page")
        assert "Sign in" in visible_text(driver)
        assert not driver.find_elements(By.ID, "jobs")
        driver.find_element(By.ID, "token").send_keys("not-the-token-of-this-service")
        driver.find_element(By.CSS_SELECTOR, "form[action='/signin'] button").click()
        wait_for(lambda: "not this service's token" in visible_text(driver), "the refusal")
        driver.find_element(By.ID, "token").send_keys(TOKEN)
        driver.find_element(By.CSS_SELECTOR, "form[action='/signin'] button").click()
        wait_for(lambda: "No jobs yet" in visible_text(driver), "the empty jobs page")
        cookie = driver.get_cookie("annotator_session")
        assert cookie["httpOnly"] is True and cookie["sameSite"] == "Strict"

        # -- a submitted job appears in the table by itself (the page refreshes) and completes
        first = submit(service, job_toml(survey / "qds-night-0412-violet.parquet"),
                       "night-0412 violet")
        wait_for(lambda: _row_phase(driver, first) == "COMPLETED", f"{first} COMPLETED",
                 timeout_s=90)
        assert "night-0412 violet" in visible_text(driver)

        broken = submit(service, job_toml(survey / "qds-night-0411-crimson.parquet"),
                        "night-0411 crimson")
        deep = submit(service, job_toml(survey / "qds-deep-field-cyan.parquet"),
                      "deep field cyan")
        later = submit(service, job_toml(survey / "qds-night-0413-amber.parquet"),
                       "night-0413 amber")
        spare = submit(service, job_toml(survey / "qds-night-0413-amber.parquet"),
                       "night-0413 amber, again")
        wait_for(lambda: _row_phase(driver, broken) == "ERROR", f"{broken} ERROR", 90)

        # -- its progress advances, seen in the table
        wait_for(lambda: _row_phase(driver, deep) == "EXECUTING" and _rows_done(driver, deep),
                 f"{deep} to be executing with rows done", 90)
        seen = _rows_done(driver, deep)
        wait_for(lambda: _rows_done(driver, deep) > seen and
                 _row_phase(driver, deep) == "EXECUTING" and
                 "ETA" in driver.find_element(By.ID, f"row-{deep}").text,
                 f"{deep}'s progress to advance, with an ETA", 60)

        # -- abort works from the button (after the confirmation dialog)
        driver.find_element(By.CSS_SELECTOR, f"#row-{later} button.abort").click()
        alert = wait_for(lambda: _alert(driver), "the confirmation dialog", 10)
        assert later in alert.text
        alert.accept()
        wait_for(lambda: _row_phase(driver, later) == "ABORTED", f"{later} ABORTED", 30)
        assert service.job(later)["phase"] == "ABORTED"

        # -- the screenshot the docs show: all phases but one, with invented survey data
        wait_for(lambda: driver.find_elements(By.CSS_SELECTOR, f"#row-{first} a.report"),
                 f"{first}'s report link", 120)
        driver.execute_script("window.scrollTo(0, 0)")
        save_screenshot(driver, screenshot_path(tmp_path))

        # -- the report link opens the report
        driver.find_element(By.CSS_SELECTOR, f"#row-{first} a.report").click()
        wait_for(lambda: "Annotation report" in driver.title + visible_text(driver),
                 "the report page", 30)
        assert driver.current_url.endswith(f"/jobs/{first}/report")
        driver.back()

        # -- a forged cross-site POST is refused (the browser sends the session cookie to a
        #    same-site page of another origin; neither the Origin nor a CSRF token passes)
        _Forger.target = f"{url}/ui/jobs/{spare}/abort"
        forger = http.server.ThreadingHTTPServer(("127.0.0.1", 0), _Forger)
        thread = threading.Thread(target=forger.serve_forever, daemon=True)
        thread.start()
        try:
            driver.get(f"http://127.0.0.1:{forger.server_address[1]}/")
            wait_for(lambda: driver.current_url.startswith(url), "the forged post to land", 30)
            wait_for(lambda: "posted from another site" in visible_text(driver) and
                     "refused" in visible_text(driver), "the refusal (403)", 30)
        finally:
            forger.shutdown()
            forger.server_close()
        # not aborted (it may have run meanwhile: the deep field can finish first)
        spared = service.job(spare)
        assert spared["phase"] != "ABORTED"
        assert not any(e["phase"] == "ABORTED" for e in spared["history"])


def _alert(driver):
    from selenium.common.exceptions import NoAlertPresentException

    try:
        alert = driver.switch_to.alert
        _ = alert.text
        return alert
    except NoAlertPresentException:
        return None
