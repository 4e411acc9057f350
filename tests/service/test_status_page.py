"""The status page without a browser: what the HTML holds, sign-in, sessions and CSRF, in
this process (the browser tests, test_status_page_browser.py, check what a person sees).

Outside references named beside the checks: RFC 6265 (2011, sections 4.1.2.5-4.1.2.6) for the
HttpOnly attribute and the SameSite attribute of draft-ietf-httpbis-rfc6265bis (section
4.1.2.7, "Strict"); the OWASP CSRF Prevention Cheat Sheet (synchronizer token pattern; from
memory) for the per-session token every state-changing form carries; W3C Content Security
Policy Level 3 for the policy header.
"""

from __future__ import annotations

import re
from html.parser import HTMLParser
from pathlib import Path

import pyarrow.parquet as pq
import pytest
from catalogue_factory import make_catalogue

from annotator.service.app import ServiceConfig, create_app
from annotator.service.security import SESSION_COOKIE

TOKEN = "page-token-" + "p" * 24


class _Tags(HTMLParser):
    def __init__(self):
        super().__init__()
        self.tags: list[tuple[str, dict]] = []

    def handle_starttag(self, tag, attrs):
        self.tags.append((tag, dict(attrs)))


def tags(html: str) -> list[tuple[str, dict]]:
    p = _Tags()
    p.feed(html)
    return p.tags


@pytest.fixture(scope="module")
def data(tmp_path_factory):
    root = tmp_path_factory.mktemp("page-data")
    pq.write_table(make_catalogue(1_000, seed=3), root / "quillfield.parquet")
    return root


def _client(data, root, token):
    from fastapi.testclient import TestClient

    config = ServiceConfig(root=root, data_roots=[data], token=token, reports=False)
    return TestClient(create_app(config), base_url="http://127.0.0.1:8642",
                      raise_server_exceptions=False)


@pytest.fixture(scope="module")
def page(data, tmp_path_factory):
    """A token-protected service in this process, with one queued job."""
    with _client(data, tmp_path_factory.mktemp("page-root") / "root", TOKEN) as c:
        c.pool_ref = c.app.state.pool
        c.pool_ref.stop()  # nothing runs: the job stays QUEUED, the page is what is tested
        r = c.post("/jobs", params={"name": "quillfield-night-0412"},
                   json={"input": {"paths": [str(data / "quillfield.parquet")]}},
                   headers={"Authorization": f"Bearer {TOKEN}"})
        assert r.status_code == 201, r.text
        c.job_id = r.json()["id"]
        yield c


def sign_in(c) -> str:
    r = c.post("/signin", data={"token": TOKEN}, follow_redirects=False)
    assert r.status_code == 303 and r.headers["location"] == "/"
    cookie = r.headers["set-cookie"]
    # RFC 6265 4.1.2.5-6 and rfc6265bis 4.1.2.7: not readable by scripts, never cross-site
    assert "HttpOnly" in cookie and "SameSite=strict" in cookie.replace("Strict", "strict")
    return c.cookies[SESSION_COOKIE]


def test_a_token_protected_page_asks_to_sign_in_and_refuses_a_wrong_token(page):
    page.cookies.clear()
    r = page.get("/", follow_redirects=False)
    assert r.status_code == 303 and r.headers["location"] == "/signin"
    r = page.get(f"/ui/jobs/{page.job_id}", follow_redirects=False)
    assert r.status_code == 303
    r = page.get("/signin")
    assert r.status_code == 200 and 'type="password"' in r.text
    r = page.post("/signin", data={"token": "not-the-token-at-all-xx"})
    assert r.status_code == 401 and "not this service" in r.text
    assert SESSION_COOKIE not in page.cookies
    # the JSON API does not take the cookie for changes: it keeps its bearer token
    sign_in(page)
    assert page.get("/jobs").status_code == 200                        # reading: the session
    r = page.post(f"/jobs/{page.job_id}/abort")
    assert r.status_code == 401


def test_the_page_lists_jobs_readable_without_javascript_and_self_contained(page):
    sign_in(page)
    r = page.get("/")
    assert r.status_code == 200 and r.headers["content-type"].startswith("text/html")
    html = r.text
    row = re.search(rf'<tr id="row-{page.job_id}"[^>]*data-phase="QUEUED"', html)
    assert row, html[:2000]
    assert "quillfield-night-0412" in html and "quillfield.parquet" in html
    assert "<progress" in html and "0 / 1\u202f000 rows" in html
    # self-contained: every asset from this service, no inline style or script (W3C CSP 3)
    policy = r.headers["content-security-policy"]
    assert "default-src 'none'" in policy and "script-src 'self'" in policy
    for tag, attrs in tags(html):
        for key in ("src", "href", "action"):
            value = attrs.get(key)
            if value is not None:
                assert value.startswith("/"), (tag, key, value)
        assert "style" not in attrs, (tag, attrs)
    for asset in ("/static/status.css", "/static/status.js"):
        a = page.get(asset)
        assert a.status_code == 200 and "http://" not in a.text and "https://" not in a.text
    # phases by word and by shape: every phase badge has its own drawing
    shapes = re.findall(r'<span class="phase phase-(\w+)"[^>]*><svg[^>]*>(.*?)</svg>', html,
                        re.S)
    by_phase = {p: s for p, s in shapes}
    assert len(by_phase) == 7 and len(set(by_phase.values())) == 7, by_phase


def test_filters_by_phase(page):
    sign_in(page)
    assert f"row-{page.job_id}" in page.get("/?phase=QUEUED").text
    assert f"row-{page.job_id}" not in page.get("/?phase=COMPLETED").text
    r = page.get("/?phase=SLEEPING")
    assert r.status_code == 400 and "phase" in r.json()["error"]


def test_the_job_page_has_its_summary_history_and_buttons(page):
    sign_in(page)
    r = page.get(f"/ui/jobs/{page.job_id}")
    assert r.status_code == 200
    assert "quillfield.parquet" in r.text and "History" in r.text and "submitted" in r.text
    assert f'action="/ui/jobs/{page.job_id}/abort"' in r.text
    assert page.get("/ui/jobs/job-999999").status_code == 404


def _csrf(html: str) -> str:
    return re.search(r'name="csrf" value="([0-9a-f]+)"', html).group(1)


def test_state_changing_forms_need_the_sessions_csrf_token_and_a_confirmation(page):
    sign_in(page)
    csrf = _csrf(page.get("/").text)
    url = f"/ui/jobs/{page.job_id}/abort"
    # no token, a wrong token, a token of another session: refused (synchronizer token)
    for form in ({"confirmed": "yes"}, {"confirmed": "yes", "csrf": "0" * 64}):
        r = page.post(url, data=form, follow_redirects=False)
        assert r.status_code == 403 and "CSRF" in r.json()["error"], r.text
    # from another site (a browser names it in Origin): refused even with the token
    r = page.post(url, data={"csrf": csrf, "confirmed": "yes"},
                  headers={"Origin": "http://elsewhere.example"}, follow_redirects=False)
    assert r.status_code == 403 and "another site" in r.json()["error"]
    # without JavaScript: a confirmation page first
    r = page.post(url, data={"csrf": csrf}, follow_redirects=False)
    assert r.status_code == 200 and "Yes, abort it" in r.text
    assert page.get(f"/jobs/{page.job_id}").json()["phase"] == "QUEUED"
    r = page.post(url, data={"csrf": csrf, "confirmed": "yes", "back": "/"},
                  follow_redirects=False)
    assert r.status_code == 303
    assert page.get(f"/jobs/{page.job_id}").json()["phase"] == "ABORTED"
    # a signed-out session's token no longer works
    r = page.post("/ui/signout", data={"csrf": csrf}, follow_redirects=False)
    assert r.status_code == 303
    page.cookies.clear()


def test_a_loopback_service_without_token_still_guards_its_forms(data, tmp_path):
    with _client(data, tmp_path / "root", None) as c:
        c.app.state.pool.stop()
        r = c.get("/")
        assert r.status_code == 200 and SESSION_COOKIE in c.cookies
        r = c.post("/jobs", json={"input": {"paths": [str(data / "quillfield.parquet")]}})
        ident = r.json()["id"]
        url = f"/ui/jobs/{ident}/delete"
        c.post(f"/jobs/{ident}/abort")
        assert c.post(url, data={"confirmed": "yes"}).status_code == 403
        csrf = _csrf(c.get("/").text)
        r = c.post(url, data={"csrf": csrf, "confirmed": "yes"}, follow_redirects=False)
        assert r.status_code == 303 and c.get(f"/jobs/{ident}").status_code == 404
        assert not Path(tmp_path / "root" / "jobs" / ident).exists()
