"""The HTTP JSON API of the batch service (FastAPI).

Routes (every answer is JSON; errors are ``{"error": "..."}`` with a 4xx/5xx status):

* ``GET /health`` - the service is up: version, workers, jobs per phase.
* ``POST /jobs`` - submit a job file: TOML text (``Content-Type: application/toml`` or
  ``text/plain``) or the same mapping as JSON (``application/json``). Query parameters:
  ``name`` (a label), ``base_dir`` (absolute folder that relative paths are resolved
  against, normally the job file's folder). 201 with the job; 4xx with the reason.
* ``GET /jobs`` - ``{"jobs": [...], "counts": {phase: n}}``, oldest first; ``?phase=``,
  ``?limit=N`` (the N most recent).
* ``GET /jobs/{id}`` - one job, with its manifest once COMPLETED and its history.
* ``POST /jobs/{id}/abort`` - to ABORTED (its worker process is killed); 409 if it has ended.
* ``DELETE /jobs/{id}`` - forget a finished or archived job and remove its folder.
* ``GET /jobs/{id}/report`` - the job's HTML report, once built.
* ``GET /metrics`` - OpenMetrics text (:mod:`.metrics`).
* ``GET /``, ``/ui/...``, ``/signin``, ``/static/...`` - the status page (:mod:`.web`).

Every answer carries ``X-Request-Id``; a 500 names it, and the log has the traceback under it.
"""

from __future__ import annotations

import asyncio
import json
import logging
import secrets
import sys
import threading
import time
import traceback
from contextlib import asynccontextmanager
from dataclasses import dataclass, field
from pathlib import Path
from urllib.parse import unquote_plus

from fastapi import FastAPI, HTTPException, Request
from starlette.exceptions import HTTPException as StarletteHTTPException
from fastapi.concurrency import run_in_threadpool
from fastapi.exceptions import RequestValidationError
from fastapi.responses import JSONResponse

from .. import __version__
from ..errors import ConfigError, PathRefusedError, UserError
from .ledger import ACTIVE, DELETABLE, PHASES, Ledger
from .security import (SESSION_COOKIE, Sessions, check_input_files,
                       check_input_paths, token_matches)
from .housekeeping import DiskGuard, Retention, remove_job_folder
from .privacy import privacy_for
from .workers import WorkerPool, manifest_of

log = logging.getLogger("annotator.service")

if sys.version_info >= (3, 11):
    import tomllib
else:  # pragma: no cover
    import tomli as tomllib

MAX_REQUEST_BYTES = 1 << 20
MAX_NAME_CHARS = 200
JOBS_DIR = "jobs"
TOML_TYPES = ("", "application/toml", "text/toml", "text/x-toml", "text/plain",
              "application/octet-stream")
JSON_TYPES = ("application/json",)


@dataclass
class ServiceConfig:
    """How one service runs.

    :ivar root: the service root: ledger, and one folder per job under ``jobs/``.
    :ivar data_roots: resolved folders inputs must lie under.
    :ivar token: bearer token required on every request (None: no token, loopback only).
    :ivar workers: jobs executing at once.
    :ivar max_request_bytes: largest request body accepted (a job file).
    :ivar max_crashes: times a job's worker may die before the job ends in ERROR.
    """

    root: Path
    data_roots: list[Path]
    token: str | None = None
    workers: int = 1
    max_request_bytes: int = MAX_REQUEST_BYTES
    max_crashes: int = 3
    head_timeout_s: float = 10.0
    body_timeout_s: float = 30.0
    group: str | None = None
    keep_days: float | None = None
    keep_count: int | None = None
    disk_fraction: float = 0.8
    disk_wait_s: float = 3600.0
    reports: bool = True
    started_at: float = field(default_factory=time.time)

    @property
    def jobs_dir(self) -> Path:
        return self.root / JOBS_DIR


MAX_PATH_CHARS = 2048
MAX_HEAD_BYTES = 16 * 1024
MAX_QUERY_CHARS = 4096
#: deepest nesting of tables/arrays a job mapping may have (a real job file has 3)
MAX_JOB_DEPTH = 32
#: the paths that need neither the token nor a session: the sign-in form and its styles
PUBLIC_PREFIXES = ("/signin", "/static/")
REQUEST_ID = "annotator.request_id"
AUTH = "annotator.auth"


def _has_control(text: str) -> bool:
    return any(ord(ch) < 32 or ord(ch) == 127 for ch in text)


class Guard:
    """ASGI middleware run on every request, before any route.

    * gives the request an id (``X-Request-Id`` on every answer; a 500 names it and the
      service log has the traceback under it);
    * refuses a target with control characters (NUL included: 400) or over
      ``MAX_PATH_CHARS``/``MAX_QUERY_CHARS`` (414) before any route sees it;
    * checks who is asking: the bearer token (when the service has one) on every request, or a
      signed-in session cookie of the status page for reading (GET/HEAD) and for the page's
      own forms under ``/ui/`` (which carry a CSRF token, checked by :mod:`.web`);
    * refuses a declared ``Content-Length`` over the limit before the body is read (a body
      sent without one is counted as it arrives, see :func:`read_body`).
    """

    def __init__(self, app, token: str | None, max_bytes: int, sessions=None):
        self.app, self.token, self.max_bytes, self.sessions = app, token, max_bytes, sessions

    async def __call__(self, scope, receive, send):
        if scope["type"] != "http":
            return await self.app(scope, receive, send)
        rid = secrets.token_hex(6)
        scope[REQUEST_ID] = rid

        async def send_with_id(message):
            if message["type"] == "http.response.start":
                message = {**message, "headers": [*message.get("headers", []),
                                                  (b"x-request-id", rid.encode())]}
            await send(message)

        refusal = self._refusal(scope)
        if refusal is not None:
            status, payload, extra = refusal
            return await _send_json(send_with_id, status, {**payload, "request_id": rid},
                                    extra=extra)
        return await self.app(scope, receive, send_with_id)

    def _refusal(self, scope):
        """(status, payload, extra headers) if the request is refused here, else None."""
        path, query = scope.get("path", ""), scope.get("query_string", b"")
        if len(scope.get("raw_path", b"")) > MAX_PATH_CHARS or len(path) > MAX_PATH_CHARS:
            return 414, {"error": f"request path over {MAX_PATH_CHARS} characters"}, ()
        if len(query) > MAX_QUERY_CHARS:
            return 414, {"error": f"query string over {MAX_QUERY_CHARS} characters"}, ()
        if _has_control(path):
            return 400, {"error": "request path holds a control character (NUL, newline...)"}, ()
        try:
            decoded_query = unquote_plus(query.decode("latin-1"), errors="strict")
        except UnicodeDecodeError:
            return 400, {"error": "query string is not UTF-8 once percent-decoded"}, ()
        if _has_control(decoded_query):
            return 400, {"error": "query string holds a control character (NUL, newline...)"}, ()
        raw_headers = scope.get("headers", [])
        if sum(len(k) + len(v) + 4 for k, v in raw_headers) > MAX_HEAD_BYTES:
            return 431, {"error": f"request headers over {MAX_HEAD_BYTES} bytes"}, ()  # RFC 6585
        headers = {k.lower(): v for k, v in raw_headers}
        scope[AUTH] = self._who(scope, headers)
        if scope[AUTH] is None:
            method = scope.get("method", "GET")
            if method in ("GET", "HEAD") and (path == "/" or path.startswith("/ui/")):
                return 303, {"error": "sign in first: /signin"}, [(b"location", b"/signin")]
            return 401, {
                "error": "this service needs a token: send 'Authorization: Bearer <token>' "
                         "(annotator submit/jobs/abort --token, or ANNOTATOR_SERVICE_TOKEN), "
                         "or sign in on the status page"}, [(b"www-authenticate", b"Bearer")]
        length = headers.get(b"content-length")
        if length is not None:
            try:
                declared = int(length)
            except ValueError:
                return 400, {"error": "Content-Length is not a number"}, ()
            if declared > self.max_bytes:
                return 413, {"error": _too_large(self.max_bytes)}, ()
        return None

    def _who(self, scope, headers) -> str | None:
        """'bearer', 'session', 'open' (no token set) or 'public'; None if not allowed."""
        path, method = scope.get("path", ""), scope.get("method", "GET")
        if self.token is None:
            return "open"
        given = headers.get(b"authorization", b"").decode("latin-1")
        if token_matches(given, self.token):
            return "bearer"
        if path.startswith(PUBLIC_PREFIXES):
            return "public"
        if self.sessions is not None and self.sessions.signed_in(
                session_cookie(headers.get(b"cookie", b""))):
            if method in ("GET", "HEAD") or path.startswith("/ui/"):
                return "session"
        return None


def session_cookie(raw: bytes) -> str | None:
    """The status page's session id from a Cookie header (None if absent or unreadable)."""
    from http.cookies import CookieError, SimpleCookie

    try:
        jar = SimpleCookie(raw.decode("latin-1"))
    except CookieError:
        return None
    morsel = jar.get(SESSION_COOKIE)
    return morsel.value if morsel is not None else None


async def _send_json(send, status: int, payload: dict, extra=()) -> None:
    body = json.dumps(payload).encode()
    await send({"type": "http.response.start", "status": status,
                "headers": [(b"content-type", b"application/json"),
                            (b"content-length", str(len(body)).encode()), *extra]})
    await send({"type": "http.response.body", "body": body})


def _too_large(limit: int) -> str:
    return (f"request body over the limit of {limit} bytes (a job file names its catalogues; "
            f"it does not carry them)")


async def read_body(request: Request, limit: int, timeout_s: float) -> bytes:
    """The request body, refused over ``limit`` bytes (413) or when it has not fully arrived
    ``timeout_s`` after the head (408: a slow client cannot hold the request open)."""
    body = bytearray()

    async def collect():
        async for chunk in request.stream():
            body.extend(chunk)
            if len(body) > limit:
                raise HTTPException(413, _too_large(limit))

    try:
        await asyncio.wait_for(collect(), timeout_s)
    except asyncio.TimeoutError:
        # and close the connection: the rest of the body may still trickle in
        raise HTTPException(408, f"request body not received within {timeout_s:g} s "
                                 f"({len(body)} bytes arrived)",
                            headers={"connection": "close"}) from None
    return bytes(body)


def _depth(value) -> int:
    """How deeply tables and arrays nest in ``value`` (iterative: no recursion limit)."""
    deepest, stack = 0, [(value, 1)]
    while stack:
        item, level = stack.pop()
        if isinstance(item, dict):
            children = item.values()
        elif isinstance(item, list):
            children = item
        else:
            continue
        deepest = max(deepest, level)
        if deepest > MAX_JOB_DEPTH:
            return deepest
        stack.extend((c, level + 1) for c in children)
    return deepest


def parse_job_body(body: bytes, content_type: str | None) -> dict:
    """The job mapping from a request body (TOML text or JSON)."""
    ctype = (content_type or "").split(";")[0].strip().lower()
    if ctype not in TOML_TYPES + JSON_TYPES:
        raise HTTPException(415, f"Content-Type {ctype!r}: send the job file as "
                                 f"application/toml (or text/plain), or its mapping as "
                                 f"application/json")
    if not body.strip():
        raise ConfigError("job: the request body is empty; send the job file (TOML) or the "
                          "same mapping as JSON")
    try:
        text = body.decode("utf-8")
    except UnicodeDecodeError as exc:
        raise ConfigError(f"job: the request body is not UTF-8 text ({exc})") from None
    if ctype in JSON_TYPES:
        try:
            data = json.loads(text)
        except json.JSONDecodeError as exc:
            raise ConfigError(f"job: not valid JSON: {exc}") from None
        except RecursionError:
            raise ConfigError(f"job: JSON nested more than {MAX_JOB_DEPTH} levels deep "
                              f"(a job file needs 3)") from None
    else:
        try:
            data = tomllib.loads(text)
        except tomllib.TOMLDecodeError as exc:
            raise ConfigError(f"job: not valid TOML: {exc}") from None
        except RecursionError:
            raise ConfigError(f"job: TOML nested more than {MAX_JOB_DEPTH} levels deep "
                              f"(a job file needs 3)") from None
    if not isinstance(data, dict):
        raise ConfigError("job: expected a table of sections ([input], [output], ...)")
    if _depth(data) > MAX_JOB_DEPTH:
        raise ConfigError(f"job: tables and arrays nested more than {MAX_JOB_DEPTH} levels "
                          f"deep (a job file needs 3)")
    return data


@dataclass
class Submission:
    """A job that passed every check, ready for the ledger."""

    stored: dict  # the mapping the worker runs: inputs absolute, no [output].dir
    base_dir: str
    notes: list[str]
    rows_total: int | None
    plan: dict


def validate_submission(mapping: dict, *, base_dir: str | None, config: ServiceConfig,
                        pm=None) -> Submission:
    """Every check a job passes before it is accepted; raises a UserError naming the key.

    Nothing outside the data roots is opened: paths are checked before the plan reads the
    catalogues' schemas.
    """
    from ..config import job_from_mapping
    from ..io.readers import expand_inputs
    from ..plan import build_plan

    notes: list[str] = []
    if base_dir is not None and not Path(base_dir).is_absolute():
        raise ConfigError(f"base_dir: {base_dir!r} is not an absolute folder")
    output = mapping.get("output")
    try:
        stored = json.loads(json.dumps(mapping))  # a deep copy that is sure to be JSON
    except (TypeError, ValueError) as exc:
        raise ConfigError(f"job: values must be strings, numbers, booleans, lists or tables "
                          f"(TOML dates and times are not used by any key): {exc}") from None
    if isinstance(output, dict):
        if "dir" in output:
            notes.append(f"[output].dir {output['dir']!r} ignored: the service writes each "
                         f"job's output to its own folder under {config.jobs_dir}")
        if "overwrite" in output:
            notes.append("[output].overwrite ignored: each job has a fresh output folder")
        stored["output"] = {k: v for k, v in output.items() if k not in ("dir", "overwrite")}
    placeholder = config.jobs_dir / "_validating" / "output"
    base = Path(base_dir) if base_dir else config.jobs_dir
    job = job_from_mapping(stored, base_dir=base, output_dir=str(placeholder))

    raw = stored.get("input", {}).get("paths", [])
    raw = [raw] if isinstance(raw, str) else list(raw)
    if base_dir is None:
        for item in raw:
            if not Path(item).expanduser().is_absolute():
                raise ConfigError(
                    f"[input].paths: {item!r} is relative and no base_dir was given; send "
                    f"absolute paths (annotator submit resolves relative ones against the job "
                    f"file's folder)")
    check_input_paths(raw, job.inputs, config.data_roots)
    check_input_files(expand_inputs(job.inputs, job.input_format), config.data_roots)
    job.allowed_roots = tuple(config.data_roots)
    plan = build_plan(job, pm)
    stored.setdefault("input", {})["paths"] = [str(p) for p in job.inputs]
    summary = {
        "inputs": [str(s.path) for s in plan.sources],
        "annotators": [s.name for s in plan.steps],
        "columns_added": [c.name for c in plan.added_columns],
        "estimated_rows": plan.estimated_rows,
        "estimated_output_bytes": plan.estimated_output_bytes(),
        "chunk_rows": job.chunk_rows,
    }
    return Submission(stored, str(job.base_dir), notes, plan.estimated_rows, summary)


MAX_LIMIT = 100_000


def parse_limit(text: str | None) -> int | None:
    """``?limit=N``: a whole number from 1 to MAX_LIMIT (400 otherwise, naming it)."""
    if text is None:
        return None
    if not (text.isascii() and text.isdigit()) or len(text) > 6 or not 1 <= int(text) <= MAX_LIMIT:
        raise HTTPException(400, f"limit: {text[:40]!r} is not a whole number from 1 to "
                                 f"{MAX_LIMIT}")
    return int(text)


def _status_of(exc: UserError) -> int:
    """403 for a path the service may not touch; 400 for anything else wrong with the job."""
    return 403 if isinstance(exc, PathRefusedError) else 400


def create_app(config: ServiceConfig) -> FastAPI:
    """The FastAPI application; starts the scheduler on startup, stops it on shutdown."""
    # modes from the umask the service set (annotator/service/privacy.py)
    config.root.mkdir(parents=True, exist_ok=True)
    config.jobs_dir.mkdir(exist_ok=True)
    ledger = Ledger(config.root)
    privacy = privacy_for(config.group)
    pool = WorkerPool(ledger, config.data_roots, workers=config.workers,
                      max_crashes=config.max_crashes, umask=privacy.umask,
                      retention=Retention(config.jobs_dir, config.keep_days, config.keep_count),
                      disk_guard=DiskGuard(config.jobs_dir, config.disk_fraction,
                                           config.disk_wait_s), reports=config.reports)
    sessions = Sessions(open_service=config.token is None)
    plugins = _PluginManager()
    # One validation at a time: annotators' configure() need not be thread-safe, and
    # validation is CPU-bound (the interpreter lock serialises it anyway).
    validating = threading.Lock()

    def validate(mapping: dict, base_dir: str | None) -> Submission:
        with validating:
            return validate_submission(mapping, base_dir=base_dir, config=config,
                                       pm=plugins.get())

    @asynccontextmanager
    async def lifespan(app):
        pool.start()
        threading.Thread(target=plugins.get, name="annotator-plugins", daemon=True).start()
        try:
            yield
        finally:
            requeued = await run_in_threadpool(pool.stop)
            print(f"annotator: service stopped; {requeued} executing job"
                  f"{'s' if requeued != 1 else ''} put back in the queue", file=sys.stderr,
                  flush=True)

    app = FastAPI(title="annotator batch service", version=__version__, lifespan=lifespan,
                  docs_url=None, redoc_url=None)
    app.add_middleware(Guard, token=config.token, max_bytes=config.max_request_bytes,
                       sessions=sessions)
    app.state.ledger, app.state.pool, app.state.config = ledger, pool, config
    app.state.sessions = sessions

    @app.exception_handler(StarletteHTTPException)
    async def http_error(request, exc: StarletteHTTPException):
        return JSONResponse({"error": str(exc.detail)}, status_code=exc.status_code,
                            headers=getattr(exc, "headers", None))

    @app.exception_handler(404)
    async def not_found(request, exc):
        detail = getattr(exc, "detail", None)
        if detail and detail != "Not Found":
            return JSONResponse({"error": str(detail)}, status_code=404)
        return JSONResponse({"error": f"no route {request.method} {request.url.path[:200]} "
                                      f"(routes: /, /health, /metrics, /jobs, /jobs/ID, "
                                      f"/jobs/ID/abort, /jobs/ID/report)"},
                            status_code=404)

    @app.exception_handler(RequestValidationError)
    async def bad_request(request, exc: RequestValidationError):
        parts = []
        for err in exc.errors():
            where = ".".join(str(x) for x in err.get("loc", ()) if x not in ("query", "path"))
            parts.append(f"{where}: {err.get('msg')}")
        return JSONResponse({"error": "; ".join(parts) or "invalid request"}, status_code=422)

    @app.exception_handler(UserError)
    async def user_error(request, exc: UserError):
        return JSONResponse({"error": str(exc)}, status_code=_status_of(exc))

    @app.exception_handler(Exception)
    async def internal_error(request, exc: Exception):
        rid = request.scope.get(REQUEST_ID, "-")
        text = "".join(traceback.format_exception(exc))
        log.error("request %s (%s %s) failed:\n%s", rid, request.method, request.url.path, text)
        print(f"annotator: request {rid} ({request.method} {request.url.path}) failed:\n{text}",
              file=sys.stderr, flush=True)
        return JSONResponse({"error": f"internal error ({type(exc).__name__}); the service "
                                      f"log has the details under request id {rid}",
                             "request_id": rid}, status_code=500,
                            headers={"x-request-id": rid})  # sent outside the Guard

    def find(ident: str):
        record = ledger.get(ident)
        if record is None:
            raise HTTPException(404, f"no job {ident!r} (ids look like job-000042; "
                                     f"GET /jobs lists them)")
        return record

    @app.get("/health")
    def health() -> dict:
        return {"status": "ok", "version": __version__, "root": str(config.root),
                "data_roots": [str(r) for r in config.data_roots],
                "uptime_s": round(time.time() - config.started_at, 3),
                "jobs": ledger.counts(), **pool.status()}

    @app.post("/jobs", status_code=201)
    async def submit(request: Request, name: str | None = None, base_dir: str | None = None):
        if name is not None and (len(name) > MAX_NAME_CHARS or not name.isprintable()):
            raise HTTPException(400, f"name: at most {MAX_NAME_CHARS} printable characters")
        body = await read_body(request, config.max_request_bytes, config.body_timeout_s)
        mapping = parse_job_body(body, request.headers.get("content-type"))
        checked = await run_in_threadpool(validate, mapping, base_dir)
        suffix = ".json" if request.headers.get("content-type", "").startswith(JSON_TYPES) \
            else ".toml"
        record = await run_in_threadpool(_accept, ledger, config, checked, name, body, suffix)
        pool.wake()
        answer = record.to_api()
        answer["plan"] = checked.plan
        return JSONResponse(answer, status_code=201, headers={"Location": f"/jobs/{record.id}"})

    @app.get("/jobs")
    def list_jobs(phase: str | None = None, limit: str | None = None) -> dict:
        if phase is not None and phase.upper() not in PHASES:
            raise HTTPException(400, f"phase: {phase!r} is not one of {', '.join(PHASES)}")
        records = ledger.list(phase=phase.upper() if phase else None,
                              limit=parse_limit(limit))
        return {"jobs": [r.to_api() for r in records], "counts": ledger.counts()}

    @app.get("/jobs/{ident}")
    def get_job(ident: str) -> dict:
        record = find(ident)
        answer = record.to_api()
        answer["manifest"] = manifest_of(record) if record.phase == "COMPLETED" else None
        answer["history"] = ledger.history(record.id)
        return answer

    @app.post("/jobs/{ident}/abort")
    def abort_job(ident: str) -> dict:
        record = find(ident)
        if not ledger.abort(record.id):
            record = find(ident)
            raise HTTPException(409, f"job {record.id} is already {record.phase}; only "
                                     f"{', '.join(ACTIVE)} jobs can be aborted")
        pool.wake()
        return find(ident).to_api()

    @app.delete("/jobs/{ident}")
    def delete_job(ident: str) -> dict:
        """Destroy a finished job: its ledger entry and its folder (in IVOA UWS 1.1 a job is
        destroyed by DELETE on its resource; from memory), so nightly runs do not fill the
        disk."""
        record = find(ident)
        if not ledger.delete(record.id):
            record = find(ident)
            raise HTTPException(409, f"job {record.id} is {record.phase}; only "
                                     f"{', '.join(DELETABLE)} jobs can be deleted (abort it "
                                     f"first)")
        folder = Path(record.folder).resolve() if record.folder else None
        # only ever the job's own folder, directly under the service's jobs folder
        removed = folder is not None and folder.is_dir() and \
            remove_job_folder(record.folder, config.jobs_dir, record.id)
        return {"id": record.id, "phase": record.phase, "deleted": True,
                "folder": str(folder) if folder else None, "folder_removed": removed}

    from .web import install

    install(app, ledger=ledger, pool=pool, config=config, sessions=sessions)
    return app


class _PluginManager:
    """One plugin manager for validating submissions, loaded once (plugins installed later
    are seen after a restart; workers load their own)."""

    def __init__(self):
        self._pm = None
        self._lock = threading.Lock()

    def get(self):
        with self._lock:
            if self._pm is None:
                from ..registry import load_registry

                self._pm = load_registry()
            return self._pm


def _accept(ledger: Ledger, config: ServiceConfig, checked: Submission, name: str | None,
            body: bytes, suffix: str):
    """Record the job (PENDING), write its folder, then queue it."""
    record = ledger.create(name=name, job=checked.stored, base_dir=checked.base_dir,
                           notes=checked.notes, jobs_dir=config.jobs_dir,
                           rows_total=checked.rows_total,
                           estimated_bytes=checked.plan.get("estimated_output_bytes"))
    try:
        folder = Path(record.folder)
        folder.mkdir(parents=True, exist_ok=False)
        (folder / f"submitted{suffix}").write_bytes(body)
        (folder / "job.json").write_text(json.dumps(checked.stored, indent=2) + "\n")
    except OSError as exc:
        ledger.fail(record.id, f"could not create the job folder: {exc}", from_phases=("PENDING",))
        raise HTTPException(500, f"job {record.id}: could not create its folder: {exc}") from exc
    ledger.queue(record.id)
    return ledger.get(record.id)


__all__ = ["ServiceConfig", "create_app", "parse_job_body", "validate_submission"]
