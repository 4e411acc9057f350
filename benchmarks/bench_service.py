"""Service front under idle connections: the earlier uvicorn set-up against the current one.

Opens ``--idle`` TCP connections that never send a byte, then makes ``--requests``
authenticated ``GET /jobs`` requests (``--concurrency`` at a time) and reports how many
succeeded and how long they took, for

* ``previous``: uvicorn's own h11 protocol with ``limit_concurrency=256`` (the service's
  set-up before issue 15; uvicorn counts idle connections against the limit and answers 503);
* ``current``: the service's front (:mod:`annotator.service.front`: no connection limit, a head
  timeout, here 120 s so that the idle connections stay open for the whole measurement).

Both run the same application (:func:`annotator.service.app.create_app`) in a subprocess on
loopback, one after the other. The ratio printed is current/previous successful requests.

    python benchmarks/bench_service.py [--idle 1000] [--requests 200] [--concurrency 10]
"""

from __future__ import annotations

import argparse
import json
import os
import resource
import socket
import statistics
import subprocess
import sys
import tempfile
import threading
import time
from pathlib import Path

TOKEN = "bench-token-" + "b" * 24


def serve(kind: str, root: str, data: str, port_file: str) -> None:
    """Run one server (in the subprocess)."""
    import uvicorn

    from annotator.service.app import ServiceConfig, create_app
    from annotator.service.front import MAX_HEAD_BYTES, protocol_class, raise_open_file_limit

    raise_open_file_limit()
    app = create_app(ServiceConfig(root=Path(root), data_roots=[Path(data)], token=TOKEN,
                                   reports=False))
    sock = socket.socket()
    sock.bind(("127.0.0.1", 0))
    sock.listen(2048)
    Path(port_file).write_text(str(sock.getsockname()[1]))
    if kind == "previous":
        config = uvicorn.Config(app, log_level="critical", lifespan="on", limit_concurrency=256,
                                timeout_graceful_shutdown=2, server_header=False)
    else:
        config = uvicorn.Config(app, log_level="critical", lifespan="on",
                                http=protocol_class(120.0),
                                h11_max_incomplete_event_size=MAX_HEAD_BYTES,
                                timeout_graceful_shutdown=2, server_header=False, backlog=2048)
    uvicorn.Server(config).run(sockets=[sock])


def measure(kind: str, idle: int, requests: int, concurrency: int) -> dict:
    import httpx

    with tempfile.TemporaryDirectory(prefix="annotator-bench-svc-") as tmp:
        port_file = Path(tmp) / "port"
        (Path(tmp) / "data").mkdir()
        proc = subprocess.Popen([sys.executable, __file__, "--serve", kind, "--root",
                                 str(Path(tmp) / "root"), "--data", str(Path(tmp) / "data"),
                                 "--port-file", str(port_file)])
        sockets: list[socket.socket] = []
        try:
            deadline = time.monotonic() + 60
            url = None
            while time.monotonic() < deadline:
                if port_file.exists() and port_file.read_text():
                    url = f"http://127.0.0.1:{port_file.read_text()}"
                    try:
                        if httpx.get(url + "/health", headers={"Authorization":
                                                               f"Bearer {TOKEN}"},
                                     timeout=5).status_code == 200:
                            break
                    except httpx.TransportError:
                        pass
                time.sleep(0.1)
            else:
                raise SystemExit(f"{kind}: the server did not start")
            port = int(port_file.read_text())
            for _ in range(idle):
                sockets.append(socket.create_connection(("127.0.0.1", port), timeout=10))
            time.sleep(1.0)  # let the server accept them all
            times, codes = [], []
            lock = threading.Lock()
            todo = list(range(requests))

            def worker():
                with httpx.Client(timeout=30) as c:
                    while True:
                        with lock:
                            if not todo:
                                return
                            todo.pop()
                        t = time.perf_counter()
                        try:
                            code = c.get(url + "/jobs", headers={
                                "Authorization": f"Bearer {TOKEN}"}).status_code
                        except httpx.TransportError:
                            code = 0
                        with lock:
                            times.append(time.perf_counter() - t)
                            codes.append(code)

            threads = [threading.Thread(target=worker) for _ in range(concurrency)]
            t0 = time.perf_counter()
            for t in threads:
                t.start()
            for t in threads:
                t.join(300)
            wall = time.perf_counter() - t0
        finally:
            for s in sockets:
                s.close()
            proc.terminate()
            try:
                proc.wait(20)
            except subprocess.TimeoutExpired:
                proc.kill()
    ok = [t for t, c in zip(times, codes) if c == 200]
    return {"kind": kind, "ok": len(ok), "requests": requests,
            "codes": {str(c): codes.count(c) for c in sorted(set(codes))},
            "median_ms": statistics.median(ok) * 1000 if ok else None,
            "p95_ms": sorted(ok)[int(0.95 * (len(ok) - 1))] * 1000 if ok else None,
            "wall_s": wall}


def main() -> int:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--idle", type=int, default=1000)
    p.add_argument("--requests", type=int, default=200)
    p.add_argument("--concurrency", type=int, default=10)
    p.add_argument("--serve", choices=("previous", "current"))
    p.add_argument("--root")
    p.add_argument("--data")
    p.add_argument("--port-file")
    a = p.parse_args()
    if a.serve:
        serve(a.serve, a.root, a.data, a.port_file)
        return 0
    soft, hard = resource.getrlimit(resource.RLIMIT_NOFILE)
    if soft < a.idle + 256:
        resource.setrlimit(resource.RLIMIT_NOFILE, (min(hard, a.idle + 1024), hard))
    print(f"load average before: {' '.join(f'{x:.2f}' for x in os.getloadavg())}")
    print(f"{a.idle} idle connections, {a.requests} authenticated GET /jobs, "
          f"{a.concurrency} at a time")
    results = [measure(kind, a.idle, a.requests, a.concurrency)
               for kind in ("previous", "current")]
    for r in results:
        med = f"{r['median_ms']:.1f} ms" if r["median_ms"] is not None else "-"
        p95 = f"{r['p95_ms']:.1f} ms" if r["p95_ms"] is not None else "-"
        print(f"{r['kind']:>9}: {r['ok']:>4}/{r['requests']} succeeded, statuses "
              f"{json.dumps(r['codes'])}, median {med}, p95 {p95}, wall {r['wall_s']:.1f} s")
    prev, cur = results
    ratio = cur["ok"] / prev["ok"] if prev["ok"] else float("inf")
    print(f"successful requests, current / previous: {cur['ok']} / {prev['ok']} = "
          f"{ratio:.1f}" + (" (previous served none)" if not prev["ok"] else ""))
    print(f"load average after: {' '.join(f'{x:.2f}' for x in os.getloadavg())}")
    return 0 if cur["ok"] == cur["requests"] else 1


if __name__ == "__main__":
    sys.exit(main())
