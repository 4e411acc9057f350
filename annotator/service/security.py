"""What the service lets a job touch, and who may talk to it.

* Inputs must lie under one of the ``--data-root`` folders. Every input path is resolved
  (symbolic links and ``..`` followed) *before* anything is opened, so a refused path reveals
  nothing about what lies outside; the files found inside an input folder are checked the same
  way, since a folder under a data root may hold a link that points elsewhere.
* Outputs go only under the service root (``--root``): the service chooses the folder.
* A bind to anything but a loopback address needs a token, then required on every request
  (compared in constant time).
"""

from __future__ import annotations

import hmac
import ipaddress
import os
import socket
from collections.abc import Sequence
from pathlib import Path

from ..errors import ConfigError, PathRefusedError


class AccessError(PathRefusedError):
    """A job names a file or folder the service may not read or write (HTTP 403)."""


def real_path(path: str | Path) -> Path:
    """The absolute path with every symbolic link and ``..`` resolved (need not exist)."""
    return Path(os.path.realpath(Path(path).expanduser()))


def resolve_data_roots(paths: Sequence[str | Path]) -> list[Path]:
    """Resolve ``--data-root`` folders; each must exist and be a folder."""
    if not paths:
        raise ConfigError("--data-root: give at least one folder the service may read inputs from")
    roots = []
    for raw in paths:
        root = real_path(raw)
        if not root.is_dir():
            raise ConfigError(f"--data-root {raw}: no such folder")
        if root == Path(root.anchor):
            raise ConfigError(f"--data-root {raw}: the file-system root is too wide; name the "
                              f"folder that holds the catalogues")
        if root not in roots:
            roots.append(root)
    return roots


def within(path: str | Path, roots: Sequence[Path]) -> bool:
    """Whether ``path``, once resolved, lies in (or is) one of ``roots``."""
    real = real_path(path)
    return any(real == r or real.is_relative_to(r) for r in roots)


def _describe(raw: str, real: Path) -> str:
    shown = raw if str(real) == raw else f"{raw} (resolves to {real})"
    return shown


def check_input_paths(raw_paths: Sequence[str], resolved: Sequence[Path],
                      roots: Sequence[Path]) -> None:
    """Refuse any input that resolves outside the data roots; nothing is opened here.

    :param raw_paths: the paths as the job file gave them (for the message).
    :param resolved: the same paths made absolute by :func:`annotator.config.job_from_mapping`.
    """
    names = list(raw_paths) if len(raw_paths) == len(resolved) else [str(p) for p in resolved]
    for raw, path in zip(names, resolved):
        real = real_path(path)
        if not within(real, roots):
            raise AccessError(
                f"[input].paths: {_describe(raw, real)} is outside the data roots of this "
                f"service ({', '.join(map(str, roots))}); it reads only under --data-root"
            )


def check_input_files(sources, roots: Sequence[Path]) -> None:
    """Refuse any file found inside an input folder that resolves outside the data roots."""
    for source in sources:
        real = real_path(source.path)
        if not within(real, roots):
            raise AccessError(
                f"[input].paths: file {source.path} (resolves to {real}) is outside the data "
                f"roots of this service ({', '.join(map(str, roots))})"
            )


def check_output(path: str | Path, root: Path) -> None:
    if not within(path, [real_path(root)]):
        raise AccessError(f"output {path}: outside the service root {root}")


def is_loopback_host(host: str) -> bool:
    """Whether every address ``host`` names is a loopback address (127.0.0.0/8, ::1)."""
    try:
        return ipaddress.ip_address(host.strip("[]")).is_loopback
    except ValueError:
        pass
    try:
        infos = socket.getaddrinfo(host, None)
    except socket.gaierror:
        return False
    addresses = {info[4][0] for info in infos}
    return bool(addresses) and all(ipaddress.ip_address(a.split("%")[0]).is_loopback
                                   for a in addresses)


def check_bind(host: str, token: str | None) -> None:
    """Refuse to listen beyond this machine without a token."""
    if token is not None and len(token) < 16:
        raise ConfigError("--token: use at least 16 characters (for example the output of "
                          "`python -c 'import secrets; print(secrets.token_urlsafe(32))'`)")
    if not is_loopback_host(host) and not token:
        raise ConfigError(
            f"--host {host}: not a loopback address; a service reachable from other machines "
            f"needs --token (or ANNOTATOR_SERVICE_TOKEN), then required on every request"
        )


def token_matches(header: str | None, token: str) -> bool:
    """Check an ``Authorization: Bearer ...`` header against the token in constant time."""
    if not header:
        return False
    scheme, _, given = header.partition(" ")
    if scheme.lower() != "bearer":
        return False
    return hmac.compare_digest(given.strip().encode("utf-8"), token.encode("utf-8"))


# -- the status page's sessions --------------------------------------------------------------

SESSION_COOKIE = "annotator_session"
SESSION_LIFETIME_S = 12 * 3600


class Sessions:
    """Sessions of the status page, kept in memory (a restart signs everybody out).

    A session id is 32 random bytes; it is only ever sent in an ``HttpOnly; SameSite=Strict``
    cookie. Its CSRF token is an HMAC of the id under a secret drawn at start, so a page of
    another site can neither read nor forge it. On a service without a token every visitor's
    session counts as signed in (loopback only), and the CSRF token still guards every form.
    """

    def __init__(self, *, open_service: bool, lifetime_s: float = SESSION_LIFETIME_S):
        import secrets
        import threading

        self.open_service = open_service
        self.lifetime_s = lifetime_s
        self._secret = secrets.token_bytes(32)
        self._expiry: dict[str, float] = {}
        self._lock = threading.Lock()

    def create(self) -> str:
        import secrets
        import time

        sid = secrets.token_urlsafe(32)
        with self._lock:
            now = time.time()
            for old in [s for s, t in self._expiry.items() if t < now]:
                del self._expiry[old]
            self._expiry[sid] = now + self.lifetime_s
        return sid

    def signed_in(self, sid: str | None) -> bool:
        import time

        if not sid:
            return False
        with self._lock:
            expiry = self._expiry.get(sid)
        return expiry is not None and expiry > time.time()

    def end(self, sid: str | None) -> None:
        with self._lock:
            self._expiry.pop(sid or "", None)

    def csrf(self, sid: str) -> str:
        return hmac.new(self._secret, sid.encode(), "sha256").hexdigest()

    def csrf_matches(self, sid: str | None, given: str | None) -> bool:
        if not sid or not given or not self.signed_in(sid):
            return False
        return hmac.compare_digest(self.csrf(sid), given)
