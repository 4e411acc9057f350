"""``annotator serve --root DIR --data-root PATH``: run the batch service."""

from __future__ import annotations

import os
import socket
import sys
from pathlib import Path

from ..errors import ConfigError


def add_arguments(p) -> None:
    from ..service.client import DEFAULT_PORT, TOKEN_ENV

    p.add_argument("--root", required=True, metavar="DIR",
                   help="service root: the job ledger and one folder per job (created if absent)")
    p.add_argument("--data-root", action="append", required=True, metavar="PATH", dest="data_roots",
                   help="folder inputs may be read from (repeat for several); required")
    p.add_argument("--host", default="127.0.0.1",
                   help="address to listen on (default 127.0.0.1; anything but loopback "
                        "needs --token)")
    p.add_argument("--port", type=int, default=DEFAULT_PORT,
                   help=f"port (default {DEFAULT_PORT}; 0 picks a free one, written to "
                        f"DIR/service.json)")
    p.add_argument("--workers", type=int, default=1, metavar="N",
                   help="jobs executing at once, each in its own process (default 1)")
    p.add_argument("--token", default=None,
                   help=f"bearer token required on every request (default: ${TOKEN_ENV})")
    p.add_argument("--token-file", default=None, metavar="FILE",
                   help="read the token from FILE (keeps it out of the process list)")
    p.add_argument("--max-request-bytes", type=int, default=1 << 20, metavar="N",
                   help="largest job file accepted (default 1 MiB)")
    p.add_argument("--max-crashes", type=int, default=3, metavar="N",
                   help="times a job's worker may die before the job ends in ERROR (default 3)")
    p.add_argument("--group", default=None, metavar="NAME",
                   help="members of this group may read the root, outputs and reports "
                        "(files 0640, folders 0750); default: private (0600/0700)")
    p.add_argument("--keep-days", type=float, default=None, metavar="N",
                   help="remove the folder of a job N days after it finished; the job stays "
                        "in the ledger as ARCHIVED (default: keep)")
    p.add_argument("--keep-count", type=int, default=None, metavar="N",
                   help="keep the folders of the N most recently finished jobs; older ones "
                        "are removed and their jobs ARCHIVED (default: keep all)")
    p.add_argument("--disk-use-fraction", type=float, default=0.8, metavar="F",
                   help="start a job only if its estimated output fits in F x the free space "
                        "(default 0.8)")
    p.add_argument("--disk-wait", type=float, default=3600.0, metavar="S",
                   help="how long a job waits for disk space before it ends in ERROR "
                        "(default 3600 s)")
    p.add_argument("--no-reports", action="store_false", dest="reports",
                   help="do not build an HTML report of each completed job (default: build "
                        "it, in a low-priority process after the job completes)")
    p.add_argument("--head-timeout", type=float, default=10.0, metavar="S",
                   help="a connection must send a complete request head within S seconds "
                        "(default 10)")
    p.add_argument("--body-timeout", type=float, default=30.0, metavar="S",
                   help="a request body must arrive within S seconds (default 30)")
    p.add_argument("--log-level", default="info",
                   choices=("critical", "error", "warning", "info", "debug"))


def _token(args) -> str | None:
    from ..service.client import TOKEN_ENV

    if args.token_file:
        try:
            token = Path(args.token_file).read_text(encoding="utf-8").strip()
        except OSError as exc:
            raise ConfigError(f"--token-file {args.token_file}: cannot read it: {exc}") from None
        if not token:
            raise ConfigError(f"--token-file {args.token_file}: the file is empty")
        return token
    return args.token or os.environ.get(TOKEN_ENV) or None


def _bind(host: str, port: int) -> socket.socket:
    try:
        infos = socket.getaddrinfo(host, port, type=socket.SOCK_STREAM, flags=socket.AI_PASSIVE)
    except socket.gaierror as exc:
        raise ConfigError(f"--host {host}: cannot resolve it: {exc}") from None
    family, kind, proto, _, address = infos[0]
    sock = socket.socket(family, kind, proto)
    sock.setsockopt(socket.SOL_SOCKET, socket.SO_REUSEADDR, 1)
    try:
        sock.bind(address)
    except OSError as exc:
        sock.close()
        raise ConfigError(f"--host {host} --port {port}: cannot listen there: {exc}") from None
    sock.listen(2048)
    return sock


def _url(sock: socket.socket) -> str:
    host, port = sock.getsockname()[:2]
    if ":" in host:
        host = f"[{host}]"
    return f"http://{host}:{port}"


def main(args) -> int:
    from ..provenance import write_json_atomic
    from ..service.security import check_bind, resolve_data_roots
    from ..service.workers import acquire_lock

    if not 1 <= args.workers <= 64:
        raise ConfigError(f"--workers: {args.workers} is outside 1 to 64")
    if not 1024 <= args.max_request_bytes <= 64 << 20:
        raise ConfigError(f"--max-request-bytes: {args.max_request_bytes} is outside 1024 to "
                          f"{64 << 20}")
    if args.max_crashes < 1:
        raise ConfigError("--max-crashes: expected at least 1")
    for name, value, low, high in (("--head-timeout", args.head_timeout, 0.1, 3600),
                                   ("--body-timeout", args.body_timeout, 0.1, 3600),
                                   ("--disk-use-fraction", args.disk_use_fraction, 1e-15, 1.0),
                                   ("--disk-wait", args.disk_wait, 0, 30 * 86400),
                                   ("--keep-days", args.keep_days, 0, 1e5),
                                   ("--keep-count", args.keep_count, 0, 10 ** 9)):
        if value is not None and not low <= value <= high:
            raise ConfigError(f"{name}: {value} is outside {low:g} to {high:g}")
    from ..service.privacy import apply_umask, privacy_for, secure_root

    privacy = privacy_for(args.group)
    # before anything is created: every file of the service and its workers gets these modes
    apply_umask(privacy)
    token = _token(args)
    check_bind(args.host, token)
    data_roots = resolve_data_roots(args.data_roots)
    root = Path(args.root).expanduser().resolve()
    if root.exists() and not root.is_dir():
        raise ConfigError(f"--root {root}: exists and is not a folder")
    root.mkdir(parents=True, exist_ok=True)
    for change in secure_root(root, privacy)[:20]:
        print(f"annotator: {change}", file=sys.stderr, flush=True)
    lock = acquire_lock(root / "service.lock")
    if lock is None:
        other = (root / "service.lock").read_text().strip()
        raise ConfigError(f"--root {root}: another service (pid {other or 'unknown'}) is "
                          f"using this root; stop it first or choose another --root")
    try:  # the heavy imports only once every check has passed
        import uvicorn

        from ..service.app import ServiceConfig, create_app
        from ..service.front import MAX_HEAD_BYTES, protocol_class, raise_open_file_limit
    except ImportError as exc:
        raise ConfigError(f"annotator serve needs the 'service' extra ({exc.name} is missing): "
                          f"pip install 'annotator[service]'") from None

    sock = _bind(args.host, args.port)
    url = _url(sock)
    config = ServiceConfig(root=root, data_roots=data_roots, token=token,
                           workers=args.workers, max_request_bytes=args.max_request_bytes,
                           max_crashes=args.max_crashes, head_timeout_s=args.head_timeout,
                           body_timeout_s=args.body_timeout, group=args.group,
                           keep_days=args.keep_days, keep_count=args.keep_count,
                           disk_fraction=args.disk_use_fraction, disk_wait_s=args.disk_wait,
                           reports=args.reports)
    app = create_app(config)
    write_json_atomic({"url": url, "pid": os.getpid(), "root": str(root),
                       "data_roots": [str(r) for r in data_roots], "workers": args.workers,
                       "token_required": bool(token)}, root / "service.json")
    print(f"annotator: serving {root} on {url} ({args.workers} worker"
          f"{'s' if args.workers != 1 else ''}; inputs under "
          f"{', '.join(map(str, data_roots))})", file=sys.stderr, flush=True)
    # No limit_concurrency: uvicorn counts idle connections against it and answers 503 to
    # everybody once they fill it. Idle and slow clients are cut off by the head timeout of
    # the protocol (see annotator/service/front.py) and the body timeout of the app instead.
    raise_open_file_limit()
    server = uvicorn.Server(uvicorn.Config(
        app, log_level=args.log_level, lifespan="on", http=protocol_class(args.head_timeout),
        h11_max_incomplete_event_size=MAX_HEAD_BYTES, timeout_keep_alive=5,
        timeout_graceful_shutdown=10, server_header=False, backlog=2048))
    server.run(sockets=[sock])
    return 0
