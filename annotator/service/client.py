"""A small client of the batch service, used by ``annotator submit``, ``jobs`` and ``abort``."""

from __future__ import annotations

import json
import os
import time
from pathlib import Path

from ..errors import ConfigError, UserError

SERVER_ENV = "ANNOTATOR_SERVER"
TOKEN_ENV = "ANNOTATOR_SERVICE_TOKEN"
DEFAULT_PORT = 8642
DEFAULT_SERVER = f"http://127.0.0.1:{DEFAULT_PORT}"


class ServiceError(UserError):
    """The service refused a request, or could not be reached."""

    def __init__(self, message: str, status: int | None = None):
        super().__init__(message)
        self.status = status


def default_server() -> str:
    return os.environ.get(SERVER_ENV) or DEFAULT_SERVER


def default_token() -> str | None:
    return os.environ.get(TOKEN_ENV) or None


def read_job_for_submission(path: str | Path) -> tuple[dict, Path]:
    """Parse a job file and make its ``[input].paths`` absolute against the file's folder.

    Relative paths in a job file mean "next to this file", as they do for ``annotator run``;
    the service runs elsewhere, so they are resolved here, before sending.

    :return: the mapping to send and the folder it was resolved against.
    """
    from ..config import load_job_file

    p = Path(path).expanduser().resolve()
    if p.suffix.lower() == ".json":
        if not p.is_file():
            raise ConfigError(f"job file {p}: no such file")
        try:
            data = json.loads(p.read_text(encoding="utf-8"))
        except (json.JSONDecodeError, UnicodeDecodeError) as exc:
            raise ConfigError(f"job file {p}: not valid JSON: {exc}") from None
        if not isinstance(data, dict):
            raise ConfigError(f"job file {p}: expected an object of sections")
    else:
        data = load_job_file(p)
    inp = data.get("input")
    if isinstance(inp, dict):
        paths = inp.get("paths")
        if isinstance(paths, str):
            paths = [paths]
        if isinstance(paths, list):
            inp["paths"] = [str((p.parent / Path(x).expanduser()).resolve())
                            if isinstance(x, str) else x for x in paths]
    return data, p.parent


class ServiceClient:
    """Talks JSON to one service."""

    def __init__(self, server: str | None = None, token: str | None = None,
                 timeout_s: float = 60.0):
        try:
            import httpx
        except ImportError:
            raise ConfigError("talking to the service needs the 'service' extra (httpx is "
                              "missing): pip install 'annotator[service]'") from None

        self.server = (server or default_server()).rstrip("/")
        if not self.server.startswith(("http://", "https://")):
            raise ConfigError(f"--server {self.server}: expected a URL such as {DEFAULT_SERVER}")
        token = token if token is not None else default_token()
        headers = {"Authorization": f"Bearer {token}"} if token else {}
        self._http = httpx.Client(base_url=self.server, headers=headers, timeout=timeout_s)

    def close(self) -> None:
        self._http.close()

    def __enter__(self) -> ServiceClient:
        return self

    def __exit__(self, *exc) -> None:
        self.close()

    def _request(self, method: str, url: str, **kwargs) -> dict:
        import httpx

        try:
            response = self._http.request(method, url, **kwargs)
        except httpx.TransportError as exc:
            raise ServiceError(f"cannot reach the service at {self.server}: {exc} (is "
                               f"`annotator serve` running there?)") from None
        try:
            payload = response.json()
        except ValueError:
            payload = {"error": response.text.strip()[:500] or response.reason_phrase}
        if response.status_code >= 400:
            message = payload.get("error") if isinstance(payload, dict) else None
            raise ServiceError(f"the service refused ({response.status_code}): "
                               f"{message or response.reason_phrase}",
                               status=response.status_code)
        return payload

    # -- the API -------------------------------------------------------------------------
    def health(self) -> dict:
        return self._request("GET", "/health")

    def submit(self, mapping: dict, *, name: str | None = None,
               base_dir: str | Path | None = None) -> dict:
        params = {}
        if name:
            params["name"] = name
        if base_dir:
            params["base_dir"] = str(base_dir)
        return self._request("POST", "/jobs", params=params, content=json.dumps(mapping),
                             headers={"Content-Type": "application/json"})

    def submit_file(self, path: str | Path, *, name: str | None = None) -> dict:
        mapping, base = read_job_for_submission(path)
        return self.submit(mapping, name=name or Path(path).name, base_dir=base)

    def jobs(self, phase: str | None = None, limit: int | None = None) -> list[dict]:
        params = {"phase": phase} if phase else {}
        if limit:
            params["limit"] = limit
        return self._request("GET", "/jobs", params=params)["jobs"]

    def job(self, ident: str) -> dict:
        return self._request("GET", f"/jobs/{ident}")

    def abort(self, ident: str) -> dict:
        return self._request("POST", f"/jobs/{ident}/abort")

    def delete(self, ident: str) -> dict:
        return self._request("DELETE", f"/jobs/{ident}")

    def wait(self, ident: str, *, timeout_s: float | None = None, poll_s: float = 1.0) -> dict:
        """Poll a job until it reaches COMPLETED, ERROR or ABORTED."""
        deadline = None if timeout_s is None else time.monotonic() + timeout_s
        while True:
            job = self.job(ident)
            if job["phase"] in ("COMPLETED", "ERROR", "ABORTED"):
                return job
            if deadline is not None and time.monotonic() > deadline:
                raise ServiceError(f"job {ident}: still {job['phase']} after {timeout_s:g} s")
            time.sleep(poll_s)
