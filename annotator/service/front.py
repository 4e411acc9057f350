"""The HTTP front of the service: the connection-level defences uvicorn does not give by itself.

Why 256 idle connections used to stall the service: it ran uvicorn with
``limit_concurrency=256``, and uvicorn counts *open connections* (idle ones included) against
that limit, answering 503 to every request once it is reached; and uvicorn arms its keep-alive
timer only after a first response, so a connection that never sends a byte was never closed.
Anyone able to reach the port could hold 256 sockets open and deny service without a token.

What this module does instead:

* no concurrency limit on connections (requests are cheap; jobs run in worker processes);
* a **head timeout**: a connection must deliver a complete request head (request line and
  headers) within ``head_timeout_s`` of opening, and again within it after each response, or it
  is closed (with a 408 JSON answer if it had started one). The timer is not reset by each
  byte, so a client dripping one byte a second is cut off too;
* a **body timeout** is applied by the application while it reads a body (see
  :func:`annotator.service.app.read_body`);
* requests h11 itself refuses (a NUL or a space in the target, a bad header, a head over the
  size limit) get a JSON 400/431 answer instead of uvicorn's plain-text one;
* the soft limit on open files is raised to the hard limit at start, so thousands of sockets
  fit (see :func:`raise_open_file_limit`).
"""

from __future__ import annotations

import json
import logging
import resource

import h11
from uvicorn.protocols.http.h11_impl import H11Protocol

DEFAULT_HEAD_TIMEOUT_S = 10.0
DEFAULT_BODY_TIMEOUT_S = 30.0
#: largest request head (request line + headers) accepted, in bytes
MAX_HEAD_BYTES = 16 * 1024

log = logging.getLogger("annotator.service")


def json_response_bytes(status: int, reason: str, payload: dict) -> bytes:
    """A complete HTTP/1.1 response with a JSON body that closes the connection."""
    body = json.dumps(payload).encode()
    head = (f"HTTP/1.1 {status} {reason}\r\ncontent-type: application/json\r\n"
            f"content-length: {len(body)}\r\nconnection: close\r\n\r\n").encode("ascii")
    return head + body


class GuardedH11Protocol(H11Protocol):
    """uvicorn's h11 protocol with a head timeout and JSON answers to unparseable requests."""

    head_timeout_s: float = DEFAULT_HEAD_TIMEOUT_S

    def connection_made(self, transport) -> None:
        self._head_timer = None
        self._head_bytes = 0
        super().connection_made(transport)
        self._arm_head_timer()

    def connection_lost(self, exc) -> None:
        self._cancel_head_timer()
        super().connection_lost(exc)

    def data_received(self, data: bytes) -> None:
        if self.conn.their_state is h11.IDLE:
            self._head_bytes += len(data)
        super().data_received(data)

    def handle_events(self) -> None:
        try:
            super().handle_events()
        except (UnicodeDecodeError, ValueError) as exc:  # a target uvicorn cannot decode
            log.warning("refused a request whose target cannot be decoded: %s", exc)
            self._refuse(400, "Bad Request", "the request target is not ASCII text "
                                              "(percent-encode it)")
            return
        if self.conn.their_state is not h11.IDLE:
            self._cancel_head_timer()  # a complete head arrived

    def on_response_complete(self) -> None:
        if not self.transport.is_closing():
            self._head_bytes = 0
            self._arm_head_timer()  # the next request's head, on a kept-alive connection
        super().on_response_complete()

    def send_400_response(self, msg: str) -> None:
        too_big = self.conn.their_state is h11.IDLE and self._head_bytes > MAX_HEAD_BYTES
        if too_big:
            self._refuse(431, "Request Header Fields Too Large",
                         f"request head over {MAX_HEAD_BYTES} bytes")
        else:
            self._refuse(400, "Bad Request", "malformed HTTP request (not HTTP/1.1 as "
                                              "RFC 9112 defines it)")

    # -- internals -----------------------------------------------------------------------
    def _refuse(self, status: int, reason: str, message: str) -> None:
        self._cancel_head_timer()
        if not self.transport.is_closing():
            self.transport.write(json_response_bytes(status, reason, {"error": message}))
            self.transport.close()

    def _arm_head_timer(self) -> None:
        self._cancel_head_timer()
        self._head_timer = self.loop.call_later(self.head_timeout_s, self._head_timed_out)

    def _cancel_head_timer(self) -> None:
        timer = getattr(self, "_head_timer", None)
        if timer is not None:
            timer.cancel()
            self._head_timer = None

    def _head_timed_out(self) -> None:
        self._head_timer = None
        if self.transport.is_closing() or self.conn.their_state is not h11.IDLE:
            return
        if self._head_bytes:
            self._refuse(408, "Request Timeout", f"no complete request head within "
                                                  f"{self.head_timeout_s:g} s")
        else:  # never said anything: just close
            self.transport.close()


def protocol_class(head_timeout_s: float) -> type[GuardedH11Protocol]:
    """The protocol class uvicorn should use, with this head timeout."""
    return type("AnnotatorH11Protocol", (GuardedH11Protocol,),
                {"head_timeout_s": float(head_timeout_s)})


def raise_open_file_limit() -> tuple[int, int]:
    """Raise the soft limit on open files to the hard limit; returns (soft, hard) after."""
    soft, hard = resource.getrlimit(resource.RLIMIT_NOFILE)
    target = hard if hard != resource.RLIM_INFINITY else max(soft, 65536)
    if soft < target:
        try:
            resource.setrlimit(resource.RLIMIT_NOFILE, (target, hard))
            soft = target
        except (ValueError, OSError):
            pass
    return soft, hard


__all__ = ["GuardedH11Protocol", "protocol_class", "raise_open_file_limit",
           "DEFAULT_HEAD_TIMEOUT_S", "DEFAULT_BODY_TIMEOUT_S"]
