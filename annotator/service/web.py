"""The status page: what an operator opens in the morning.

* ``GET /`` - the jobs (newest first) with phase, progress, rate, times, input and error;
  ``?phase=P`` filters. Readable without JavaScript; with it, the page refreshes itself.
* ``GET /ui/jobs/{id}`` - one job: its summary, its manifest, the tail of its log, its history
  and a link to its report.
* ``POST /ui/jobs/{id}/abort`` and ``/delete`` - the page's buttons. Each form carries a CSRF
  token; without ``confirmed=yes`` (which the page's script adds after a confirmation dialog)
  the answer is a confirmation page, so the buttons work without JavaScript too.
* ``GET /signin`` / ``POST /signin`` / ``POST /signout`` - on a service with a token, the
  page is reached by signing in with that token once: the answer sets an ``HttpOnly;
  SameSite=Strict`` session cookie. The JSON API keeps its bearer token.
* ``GET /static/...`` - the page's own style sheet and script (no external assets).

Templates live in ``templates/``, styles and script in ``static/`` (package data).
"""

from __future__ import annotations

import json
import time
from pathlib import Path
from urllib.parse import parse_qs

from fastapi import HTTPException, Request
from fastapi.concurrency import run_in_threadpool
from fastapi.responses import FileResponse, HTMLResponse, RedirectResponse, Response

from .. import __version__
from .ledger import ACTIVE, DELETABLE, PHASES
from .security import SESSION_COOKIE, SESSION_LIFETIME_S, token_matches

HERE = Path(__file__).parent
TEMPLATES = HERE / "templates"
STATIC = HERE / "static"
STATIC_TYPES = {".css": "text/css; charset=utf-8", ".js": "text/javascript; charset=utf-8",
                ".svg": "image/svg+xml"}
PAGE_LIMIT = 500
LOG_TAIL_LINES = 40
LOG_TAIL_BYTES = 64 * 1024
#: what the page's own answers allow the browser to load: nothing from elsewhere
PAGE_POLICY = ("default-src 'none'; style-src 'self'; script-src 'self'; img-src 'self' data:; "
               "connect-src 'self'; form-action 'self'; frame-ancestors 'none'; base-uri 'none'")
#: phase -> (shape drawn beside the word, CSS class); colours are in static/status.css
PHASE_SHAPES = {
    "PENDING": "dots", "QUEUED": "ring", "EXECUTING": "triangle", "COMPLETED": "square",
    "ERROR": "cross", "ABORTED": "bar", "ARCHIVED": "box",
}


def _environment():
    import jinja2

    env = jinja2.Environment(loader=jinja2.FileSystemLoader(str(TEMPLATES)),
                             autoescape=jinja2.select_autoescape(("html",)),
                             undefined=jinja2.StrictUndefined)
    env.filters["duration"] = format_duration
    env.filters["rate"] = format_rate
    env.filters["count"] = lambda n: "–" if n is None else f"{int(n):,}".replace(",", "\u202f")
    env.filters["bytes"] = format_bytes
    env.filters["short_time"] = short_time
    return env


def format_duration(seconds) -> str:
    if seconds is None:
        return "–"
    s = max(float(seconds), 0.0)
    if s < 10:
        return f"{s:.1f} s"
    if s < 60:
        return f"{s:.0f} s"
    if s < 3600:
        return f"{int(s // 60)} min {int(s % 60):02d} s"
    return f"{int(s // 3600)} h {int(s % 3600 // 60):02d} min"


def format_rate(rate) -> str:
    if not rate:
        return "–"
    if rate >= 1e6:
        return f"{rate / 1e6:.2f} M rows/s"
    if rate >= 1e3:
        return f"{rate / 1e3:.1f} k rows/s"
    return f"{rate:.0f} rows/s"


def format_bytes(n) -> str:
    if n is None:
        return "–"
    for unit, size in (("GB", 1e9), ("MB", 1e6), ("kB", 1e3)):
        if n >= size:
            return f"{n / size:.1f} {unit}"
    return f"{int(n)} B"


def short_time(iso: str | None) -> str:
    """``2026-12-02T01:52:49.655Z`` -> ``12-02 01:52:49`` (UTC; the full time is in the
    cell's title)."""
    if not iso:
        return "–"
    return iso.replace("T", " ")[5:19]


def _inputs_of(job: dict) -> list[str]:
    paths = job.get("input", {}).get("paths", [])
    return [paths] if isinstance(paths, str) else [str(p) for p in paths]


def _row(record) -> dict:
    """What the jobs table shows of one job."""
    api = record.to_api()
    inputs = _inputs_of(record.job)
    total = record.rows_total
    api.update(
        shape=PHASE_SHAPES.get(record.phase, "ring"),
        inputs=inputs,
        input_label=(Path(inputs[0]).name + (f" +{len(inputs) - 1}" if len(inputs) > 1 else "")
                     if inputs else "–"),
        fraction=(min(record.rows_done / total, 1.0) if total else
                  (1.0 if record.phase == "COMPLETED" else None)),
        can_abort=record.phase in ACTIVE,
        can_delete=record.phase in DELETABLE,
        note=record.error or api.get("waiting") or (record.report_error and
                                                   f"report not built: {record.report_error}"),
    )
    return api


def _log_tail(folder: str | None) -> list[str]:
    if not folder:
        return []
    path = Path(folder) / "worker.log"
    try:
        with open(path, "rb") as fh:
            fh.seek(0, 2)
            size = fh.tell()
            fh.seek(max(size - LOG_TAIL_BYTES, 0))
            text = fh.read().decode("utf-8", errors="replace")
    except OSError:
        return []
    return text.splitlines()[-LOG_TAIL_LINES:]


def _manifest_summary(manifest: dict | None) -> list[tuple[str, str]]:
    if not manifest:
        return []
    cosmo = manifest.get("cosmology", {}).get("parameters", {})
    items = [
        ("rows read", manifest.get("rows_read")),
        ("rows written", manifest.get("rows_written")),
        ("rows rejected", manifest.get("rows_rejected")),
        ("rows flagged", manifest.get("rows_flagged")),
        ("output parts", len(manifest.get("parts", []))),
        ("columns added", ", ".join(c.get("name", "?") if isinstance(c, dict) else str(c)
                                    for c in manifest.get("columns_added", [])) or None),
        ("annotators", ", ".join(a.get("name", "?") for a in manifest.get("annotators", []))
         or None),
        ("cosmology", cosmo.get("name") or json.dumps(cosmo)[:120] if cosmo else None),
        ("engine", manifest.get("engine") if isinstance(manifest.get("engine"), str)
         else json.dumps(manifest.get("engine"))[:120] if manifest.get("engine") else None),
        ("elapsed", format_duration(manifest.get("elapsed_s"))),
        ("rate", format_rate(manifest.get("rows_per_second"))),
    ]
    return [(k, f"{v:,}" if isinstance(v, int) else str(v)) for k, v in items
            if v is not None]


def _is_https(request: Request) -> bool:
    return request.url.scheme == "https" or \
        request.headers.get("x-forwarded-proto", "").lower() == "https"


def _same_origin(request: Request) -> bool:
    """A form post's Origin (when the browser sends one) must be this service's own."""
    origin = request.headers.get("origin")
    if origin is None:  # not sent by every browser on a same-origin post; the token decides
        return True
    host = request.headers.get("host", "")
    return origin in (f"http://{host}", f"https://{host}")


async def _form(request: Request, limit: int = 16 * 1024) -> dict[str, str]:
    from .app import read_body

    ctype = request.headers.get("content-type", "").split(";")[0].strip().lower()
    if ctype != "application/x-www-form-urlencoded":
        raise HTTPException(415, "send the form as application/x-www-form-urlencoded")
    body = await read_body(request, limit, 30.0)
    try:
        fields = parse_qs(body.decode("utf-8"), keep_blank_values=True, strict_parsing=False,
                          max_num_fields=20)
    except (UnicodeDecodeError, ValueError) as exc:
        raise HTTPException(400, f"form: cannot read it ({exc})") from None
    return {k: v[0] for k, v in fields.items()}


def install(app, *, ledger, pool, config, sessions) -> None:
    """Add the status page's routes to ``app``."""
    from .metrics import CONTENT_TYPE, render
    from .workers import manifest_of

    env = _environment()
    open_service = config.token is None

    def session_of(request: Request) -> str | None:
        sid = request.cookies.get(SESSION_COOKIE)
        return sid if sessions.signed_in(sid) else None

    def page(request: Request, template: str, status: int = 200, **context) -> HTMLResponse:
        sid = session_of(request)
        new_sid = None
        if sid is None and open_service:  # loopback without a token: a session for CSRF only
            sid = new_sid = sessions.create()
        html = env.get_template(template).render(
            version=__version__, csrf=sessions.csrf(sid) if sid else "",
            signed_in=bool(sid) and not open_service, open_service=open_service,
            phases=PHASES, shapes=PHASE_SHAPES, now=time.strftime("%Y-%m-%d %H:%M:%S UTC",
                                                                   time.gmtime()),
            **context)
        response = HTMLResponse(html, status_code=status)
        response.headers["content-security-policy"] = PAGE_POLICY
        response.headers["x-content-type-options"] = "nosniff"
        response.headers["referrer-policy"] = "same-origin"
        response.headers["cache-control"] = "no-store"
        if new_sid:
            set_cookie(request, response, new_sid)
        return response

    def set_cookie(request: Request, response: Response, sid: str) -> None:
        response.set_cookie(SESSION_COOKIE, sid, max_age=int(SESSION_LIFETIME_S), path="/",
                            httponly=True, samesite="strict", secure=_is_https(request))

    def find(ident: str):
        record = ledger.get(ident)
        if record is None:
            raise HTTPException(404, f"no job {ident!r} (ids look like job-000042)")
        return record

    def check_form(request: Request, form: dict) -> None:
        """The CSRF token of the signed-in session, and the Origin, or 403."""
        if not _same_origin(request):
            raise HTTPException(403, f"form posted from another site "
                                     f"({request.headers.get('origin')!r}): refused")
        if not sessions.csrf_matches(request.cookies.get(SESSION_COOKIE), form.get("csrf")):
            raise HTTPException(403, "form without this session's CSRF token: refused (reload "
                                     "the status page and try again)")

    @app.get("/", response_class=HTMLResponse)
    def status_page(request: Request, phase: str | None = None):
        chosen = phase.upper() if phase else None
        if chosen is not None and chosen not in PHASES:
            raise HTTPException(400, f"phase: {phase!r} is not one of {', '.join(PHASES)}")
        records = ledger.list(phase=chosen, limit=PAGE_LIMIT)
        counts = ledger.counts()
        status = pool.status()
        return page(request, "jobs.html", rows=[_row(r) for r in reversed(records)],
                    counts=counts, total=sum(counts.values()), chosen=chosen,
                    busy=len(status["running"]), workers=status["workers"],
                    scheduler_alive=status["scheduler_alive"], root=str(config.root),
                    limit=PAGE_LIMIT, back=f"/?phase={chosen}" if chosen else "/")

    @app.get("/ui/jobs/{ident}", response_class=HTMLResponse)
    def job_page(request: Request, ident: str):
        record = find(ident)
        manifest = manifest_of(record) if record.phase == "COMPLETED" else None
        return page(request, "job.html", job=_row(record), record=record,
                    manifest=_manifest_summary(manifest), history=ledger.history(record.id),
                    log=_log_tail(record.folder), plan_job=json.dumps(record.job, indent=2))

    async def action(request: Request, ident: str, what: str):
        form = await _form(request)
        check_form(request, form)
        record = find(ident)
        back = form.get("back") if form.get("back", "").startswith("/") else "/"
        if form.get("confirmed") != "yes":
            return page(request, "confirm.html", job=_row(record), what=what, back=back)
        if what == "abort":
            ok = await run_in_threadpool(ledger.abort, record.id, "aborted from the status page")
            if ok:
                pool.wake()
        else:
            from .housekeeping import remove_job_folder

            ok = await run_in_threadpool(ledger.delete, record.id)
            if ok:
                await run_in_threadpool(remove_job_folder, record.folder, config.jobs_dir,
                                        record.id)
                back = "/" if back.startswith("/ui/jobs/") else back
        if not ok:
            now = find(ident)
            raise HTTPException(409, f"job {now.id} is {now.phase}: cannot {what} it now")
        return RedirectResponse(back, status_code=303)

    @app.post("/ui/jobs/{ident}/abort")
    async def abort_from_page(request: Request, ident: str):
        return await action(request, ident, "abort")

    @app.post("/ui/jobs/{ident}/delete")
    async def delete_from_page(request: Request, ident: str):
        return await action(request, ident, "delete")

    @app.get("/jobs/{ident}/report")
    def job_report(ident: str):
        record = find(ident)
        if not record.report_path or not Path(record.report_path).is_file():
            why = record.report_error or ("the job has not completed" if record.phase !=
                                          "COMPLETED" else "no report was built")
            raise HTTPException(404, f"job {record.id}: no report ({why})")
        return FileResponse(record.report_path, media_type="text/html; charset=utf-8",
                            headers={"x-content-type-options": "nosniff",
                                     "cache-control": "no-store"})

    @app.get("/signin", response_class=HTMLResponse)
    def signin_form(request: Request):
        if open_service:
            return RedirectResponse("/", status_code=303)
        return page(request, "signin.html", error=None)

    @app.post("/signin", response_class=HTMLResponse)
    async def signin(request: Request):
        if open_service:
            return RedirectResponse("/", status_code=303)
        if not _same_origin(request):
            raise HTTPException(403, "sign-in posted from another site: refused")
        form = await _form(request)
        if not token_matches(f"Bearer {form.get('token', '')}", config.token):
            return page(request, "signin.html", status=401,
                        error="That is not this service's token.")
        response = RedirectResponse("/", status_code=303)
        set_cookie(request, response, sessions.create())
        return response

    @app.post("/ui/signout")
    async def signout(request: Request):
        form = await _form(request)
        check_form(request, form)
        sessions.end(request.cookies.get(SESSION_COOKIE))
        response = RedirectResponse("/signin" if not open_service else "/", status_code=303)
        response.delete_cookie(SESSION_COOKIE, path="/")
        return response

    @app.get("/static/{name}")
    def static(name: str):
        path = STATIC / name
        if "/" in name or name.startswith(".") or path.suffix not in STATIC_TYPES \
                or not path.is_file():
            raise HTTPException(404, f"no static file {name!r}")
        return FileResponse(path, media_type=STATIC_TYPES[path.suffix],
                            headers={"cache-control": "max-age=300"})

    @app.get("/metrics")
    def metrics():
        status = pool.status()
        text = render(ledger, workers=status["workers"], busy=len(status["running"]),
                      started_at=config.started_at)
        return Response(text, media_type=CONTENT_TYPE)

    app.state.page_env = env


__all__ = ["install", "format_duration", "format_rate", "PHASE_SHAPES"]
