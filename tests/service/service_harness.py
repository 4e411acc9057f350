"""A real ``annotator serve`` on loopback for the service tests: started as a subprocess on a
free port in a temporary root, every wait bounded, always killed at teardown."""

from __future__ import annotations

import json
import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import httpx

START_TIMEOUT_S = 60.0


def alive(pid: int) -> bool:
    """Whether ``pid`` is a live process (a zombie counts as dead)."""
    try:
        state = Path(f"/proc/{pid}/stat").read_text().rsplit(")", 1)[1].split()[0]
        return state not in ("Z", "X")
    except (FileNotFoundError, IndexError):
        pass
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        return True
    return not Path("/proc").is_dir()


def wait_until(predicate, timeout_s: float, what: str, poll_s: float = 0.05):
    deadline = time.monotonic() + timeout_s
    while True:
        value = predicate()
        if value:
            return value
        if time.monotonic() > deadline:
            raise AssertionError(f"timed out after {timeout_s:g} s waiting for {what}")
        time.sleep(poll_s)


class Service:
    """One ``annotator serve`` subprocess."""

    def __init__(self, root: Path, data_roots: list[Path], *, workers: int = 1,
                 token: str | None = None, extra: tuple[str, ...] = ()):
        self.root, self.data_roots = Path(root), list(data_roots)
        self.workers, self.token, self.extra = workers, token, extra
        self.process: subprocess.Popen | None = None
        self.url: str | None = None
        self.starts = 0

    def command(self) -> list[str]:
        cmd = [sys.executable, "-m", "annotator", "serve", "--root", str(self.root),
               "--port", "0", "--workers", str(self.workers), "--log-level", "warning",
               *self.extra]
        for d in self.data_roots:
            cmd += ["--data-root", str(d)]
        if self.token:
            cmd += ["--token", self.token]
        return cmd

    def start(self) -> Service:
        self.root.mkdir(parents=True, exist_ok=True)
        info = self.root / "service.json"
        info.unlink(missing_ok=True)
        self.starts += 1
        log = open(self.root / f"serve-{self.starts}.log", "w")
        self.process = subprocess.Popen(self.command(), stdout=log, stderr=subprocess.STDOUT)
        log.close()

        def ready():
            if self.process.poll() is not None:
                raise AssertionError(f"annotator serve exited {self.process.returncode}:\n"
                                     + self.log())
            if not info.is_file():
                return None
            data = json.loads(info.read_text())
            if data["pid"] != self.process.pid:
                return None
            try:
                r = httpx.get(data["url"] + "/health", headers=self.headers(), timeout=5)
            except httpx.TransportError:
                return None
            return data["url"] if r.status_code == 200 else None

        self.url = wait_until(ready, START_TIMEOUT_S, "the service to answer /health", 0.1)
        return self

    def log(self) -> str:
        return "\n".join(p.read_text() for p in sorted(self.root.glob("serve-*.log")))

    def headers(self) -> dict:
        return {"Authorization": f"Bearer {self.token}"} if self.token else {}

    def client(self) -> httpx.Client:
        return httpx.Client(base_url=self.url, headers=self.headers(), timeout=60)

    def kill(self) -> None:
        """kill -9, as a crash or a power cut would."""
        if self.process is not None and self.process.poll() is None:
            self.process.send_signal(signal.SIGKILL)
            self.process.wait(10)

    def stop(self) -> None:
        if self.process is not None and self.process.poll() is None:
            self.process.send_signal(signal.SIGTERM)
            try:
                self.process.wait(20)
            except subprocess.TimeoutExpired:
                self.kill()

    # -- API helpers ---------------------------------------------------------------------
    def submit(self, body: str | dict, **params) -> httpx.Response:
        with self.client() as c:
            if isinstance(body, dict):
                return c.post("/jobs", params=params, json=body)
            return c.post("/jobs", params=params, content=body.encode(),
                          headers={"Content-Type": "application/toml"})

    def job(self, ident: str) -> dict:
        with self.client() as c:
            r = c.get(f"/jobs/{ident}")
            r.raise_for_status()
            return r.json()

    def wait_phase(self, ident: str, phases: tuple[str, ...], timeout_s: float = 60.0) -> dict:
        def reached():
            job = self.job(ident)
            return job if job["phase"] in phases else None

        return wait_until(reached, timeout_s, f"job {ident} to reach {'/'.join(phases)}", 0.05)

    def run_cli(self, *args: str) -> subprocess.CompletedProcess:
        cmd = [sys.executable, "-m", "annotator", *args, "--server", self.url]
        if self.token:
            cmd += ["--token", self.token]
        return subprocess.run(cmd, capture_output=True, text=True, timeout=120)


def corrupt_parquet(good: Path, bad: Path) -> None:
    """A Parquet file whose footer reads (so the plan passes) but whose second row group's
    page headers are garbage (so reading its rows fails mid-job)."""
    import pyarrow.parquet as pq

    data = bytearray(good.read_bytes())
    meta = pq.ParquetFile(good).metadata
    for c in range(meta.num_columns):
        start = meta.row_group(1).column(c).data_page_offset
        data[start:start + 24] = b"\xff" * 24
    bad.write_bytes(bytes(data))


def job_toml(path, chunk_rows: int = 1_000) -> str:
    """A minimal job file for one input, in the service's default output folder."""
    return (f'[input]\npaths = ["{path}"]\n\n[output]\nchunk_rows = {chunk_rows}\n\n'
            f'[cosmology]\npreset = "planck2018"\n')
