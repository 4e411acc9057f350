"""Worker processes: one per job, started in submission order, at most ``--workers`` at once.

The scheduler (a thread of the service) claims the oldest QUEUED job, starts a process for
it and watches it. The worker runs the job through :func:`annotator.runner.run_job` with
``resume=True`` (the same code path as ``annotator run --resume``), writes its progress into
the ledger itself and ends the job in COMPLETED or ERROR.

Crash safety rests on three things:

* the local engine commits each part atomically and appends a checkpoint line, so a worker
  killed at any moment can be resumed from its last committed part;
* each worker holds an exclusive lock on ``jobs/<id>/worker.lock`` while it runs, so a restarted
  service never starts a second worker on a folder an orphaned one is still writing;
* a worker ends itself as soon as the service that started it is gone.

A worker that dies without reporting (killed, out of memory) is put back in the queue and
resumed, up to ``max_crashes`` times; then the job ends in ERROR saying so.

Processes come from a fork server that has imported the heavy modules once, so a job starts
in milliseconds rather than the second a fresh interpreter needs, and still runs in a
process of its own that shares nothing with the service or the other jobs.
"""

from __future__ import annotations

import fcntl
import json
import multiprocessing
import multiprocessing.connection
import os
import resource
import signal
import sys
import threading
import time
import traceback
from dataclasses import dataclass, field
from pathlib import Path

from .ledger import EXECUTING, PENDING, QUEUED, Ledger

LOCK_FILE = "worker.lock"
LOG_FILE = "worker.log"
REPORT_FILE = "report.html"
#: how often the scheduler applies retention (it also does at start)
SWEEP_INTERVAL_S = 60.0
#: how often the free space is looked at again while the next job waits for it
DISK_RECHECK_S = 5.0
PROGRESS_INTERVAL_S = 0.5
#: imported once by the fork server (see :mod:`.preload`), inherited by every worker
PRELOAD = ["annotator.service.preload"]

#: exit status of a worker that found its job folder locked by another live worker
EXIT_BUSY = 75
#: exit status of a worker stopped by SIGTERM (a service stop, `systemctl stop`): not a crash
EXIT_STOPPED = 76


def signal_name(returncode: int) -> str:
    if returncode < 0:
        try:
            return f"signal {-returncode} ({signal.Signals(-returncode).name})"
        except ValueError:
            return f"signal {-returncode}"
    return f"exit status {returncode}"


# ---------------------------------------------------------------------------------------
# the worker side (runs in its own process)
# ---------------------------------------------------------------------------------------

def _exit_with_parent() -> None:
    """End this process the moment the service that started it is gone (kill -9 included)."""
    parent = multiprocessing.parent_process()
    if parent is None:
        return

    def watch():
        multiprocessing.connection.wait([parent.sentinel])
        os._exit(70)

    threading.Thread(target=watch, name="annotator-parent-watch", daemon=True).start()


def acquire_lock(path: Path):
    """An exclusive, non-blocking lock on ``path``; None if another process holds it.

    The lock file holds the holder's pid, so a restarted service can stop an orphan.
    """
    fd = os.open(path, os.O_RDWR | os.O_CREAT, 0o644)
    try:
        fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
    except BlockingIOError:
        os.close(fd)
        return None
    os.ftruncate(fd, 0)
    os.write(fd, str(os.getpid()).encode())
    return fd


def release_lock(fd) -> None:
    if fd is not None:
        fcntl.flock(fd, fcntl.LOCK_UN)
        os.close(fd)


class _ProgressWriter:
    """The ``progress`` callback of a worker: throttled ledger updates, rate of this run only."""

    def __init__(self, ledger: Ledger, ident: str, rows_at_start: int):
        self.ledger, self.ident = ledger, ident
        self.rows_at_start = rows_at_start
        self.t0 = time.perf_counter()
        self.last = 0.0

    def rate(self, rows_done: int) -> float | None:
        elapsed = time.perf_counter() - self.t0
        new = rows_done - self.rows_at_start
        return new / elapsed if elapsed > 0 and new > 0 else None

    def __call__(self, p) -> None:
        now = time.perf_counter()
        if now - self.last < PROGRESS_INTERVAL_S and (p.rows_total is None
                                                     or p.rows_done < p.rows_total):
            return
        self.last = now
        rate = self.rate(p.rows_done)
        eta = None
        if rate and p.rows_total is not None:
            eta = max(p.rows_total - p.rows_done, 0) / rate
        self.ledger.progress(self.ident, rows_done=p.rows_done, rows_total=p.rows_total,
                             parts_done=p.parts_done, rows_per_second=rate, eta_s=eta)


def job_for_record(record, data_roots: list[Path]):
    """Rebuild the validated :class:`~annotator.config.Job` a ledger record describes."""
    from ..config import job_from_mapping

    job = job_from_mapping(record.job, base_dir=Path(record.base_dir),
                           output_dir=record.output_dir)
    job.allowed_roots = tuple(data_roots)
    return job


def _redirect_output(folder: Path) -> None:
    log = open(folder / LOG_FILE, "a", buffering=1, encoding="utf-8")
    os.dup2(log.fileno(), 1)
    os.dup2(log.fileno(), 2)
    sys.stdout = sys.stderr = log


def run_worker(root: str, ident: str, data_roots: list[str], umask: int = 0o077,
               report: bool = True) -> None:
    """Entry point of a worker process: run one job to COMPLETED or ERROR.

    Exits 0 once the outcome is in the ledger; any other ending (a signal, a crash of the
    interpreter) means the job is still EXECUTING and the scheduler decides what comes next.
    """
    # what this process writes (output parts, manifest, log, report) is as private as the
    # service's own files; set here, not inherited, since the fork server started earlier
    os.umask(umask)
    _exit_with_parent()
    signal.signal(signal.SIGINT, signal.SIG_IGN)  # Ctrl-C on the service's terminal
    # A polite stop (systemd sends SIGTERM to every process of the service) ends the worker at
    # once; its committed parts stay, and the job resumes without counting a crash.
    signal.signal(signal.SIGTERM, lambda signum, frame: os._exit(EXIT_STOPPED))
    ledger = Ledger(root)
    record = ledger.get(ident)
    if record is None or record.phase != EXECUTING:
        return  # aborted between its claim and this start
    folder = Path(record.folder)
    _redirect_output(folder)
    lock = acquire_lock(folder / LOCK_FILE)
    if lock is None:
        print(f"{time.ctime()}: {ident}: another worker holds {folder / LOCK_FILE}", flush=True)
        sys.exit(EXIT_BUSY)
    try:
        ledger.set_worker(ident, os.getpid())
        print(f"{time.ctime()}: {ident}: worker {os.getpid()} starts run {record.runs}",
              flush=True)
        outcome = execute(ledger, record, [Path(r) for r in data_roots], report=report)
        usage = resource.getrusage(resource.RUSAGE_SELF)
        print(f"{time.ctime()}: {ident}: {outcome} (CPU {usage.ru_utime + usage.ru_stime:.2f} s, "
              f"peak memory {usage.ru_maxrss / 1024:.0f} MiB)", flush=True)
    finally:
        release_lock(lock)
        ledger.close()


def execute(ledger: Ledger, record, data_roots: list[Path], *, report: bool = True) -> str:
    """Run the job of ``record`` (resuming its committed parts) and record the outcome."""
    from ..errors import UserError
    from ..io.checkpoint import CheckpointLog
    from ..io.readers import expand_inputs
    from ..runner import run_job
    from .security import check_input_files, check_input_paths, check_output

    ident = record.id
    try:
        job = job_for_record(record, data_roots)
        # Checked again: a file under a data root may have become a link since submission.
        check_input_paths([str(p) for p in job.inputs], job.inputs, data_roots)
        check_input_files(expand_inputs(job.inputs, job.input_format), data_roots)
        check_output(job.output_dir, ledger.root)
        rows_at_start = sum(r["rows_read"] for r in CheckpointLog(job.output_dir).records())
        progress = _ProgressWriter(ledger, ident, rows_at_start)
        preloaded = sys.modules.get("annotator.service.preload")
        manifest = run_job(job, pm=getattr(preloaded, "plugin_manager", None),
                           progress=progress, resume=True)
    except UserError as exc:
        ledger.fail(ident, str(exc))
        return f"ERROR: {exc}"
    except Exception as exc:
        traceback.print_exc()
        message = f"{type(exc).__name__}: {exc} (details in {Path(record.folder) / LOG_FILE})"
        ledger.fail(ident, message)
        return f"ERROR: {message}"
    from ..provenance import MANIFEST

    rate = progress.rate(manifest["rows_read"]) or manifest.get("rows_per_second")
    ledger.complete(ident, manifest_path=str(Path(job.output_dir) / MANIFEST),
                    rows_done=manifest["rows_read"], rows_per_second=rate,
                    parts_done=len(manifest.get("parts", [])) or None,
                    rows_written=manifest.get("rows_written"),
                    rows_rejected=manifest.get("rows_rejected"), report_pending=report)
    return f"COMPLETED: {manifest['rows_read']} rows"


def build_job_report(output_dir: str | Path, folder: Path) -> tuple[str | None, str | None]:
    """The HTML report of a finished output (the code of ``annotator report``), written to
    ``folder/report.html``: (its path, None), or (None, why not). Never raises: a report that
    cannot be built does not fail the job."""
    target = Path(folder) / REPORT_FILE
    try:
        from ..report import build_report

        build_report(output_dir, target)
        return str(target), None
    except Exception as exc:  # noqa: BLE001 - any failure is reported, never fatal
        traceback.print_exc()
        target.unlink(missing_ok=True)
        return None, f"{type(exc).__name__}: {exc}"


def run_report(root: str, ident: str, umask: int = 0o077) -> None:
    """Entry point of a report process: build the report of one COMPLETED job.

    A job is COMPLETED as soon as its manifest is written; its report is built afterwards, in
    a process of its own at low priority, one at a time, so reports never hold up jobs or
    occupy a worker slot. The outcome is written into the ledger either way.
    """
    os.umask(umask)
    _exit_with_parent()
    signal.signal(signal.SIGINT, signal.SIG_IGN)
    try:
        os.nice(10)
    except OSError:
        pass
    ledger = Ledger(root)
    try:
        record = ledger.get(ident)
        if record is None or not record.manifest_path:
            return
        folder = Path(record.folder)
        _redirect_output(folder)
        t0 = time.perf_counter()
        path, error = build_job_report(Path(record.manifest_path).parent, folder)
        ledger.set_report(ident, path, error)
        print(f"{time.ctime()}: {ident}: report "
              f"{'written to ' + path if path else 'not built: ' + str(error)} "
              f"({time.perf_counter() - t0:.1f} s)", flush=True)
    finally:
        ledger.close()


# ---------------------------------------------------------------------------------------
# the service side
# ---------------------------------------------------------------------------------------

@dataclass
class _Running:
    ident: str
    process: multiprocessing.process.BaseProcess
    started: float = field(default_factory=time.monotonic)
    killing: str | None = None


class WorkerPool:
    """The scheduler: runs QUEUED jobs in submission order, ``workers`` at a time."""

    def __init__(self, ledger: Ledger, data_roots: list[Path], *, workers: int = 1,
                 max_crashes: int = 3, poll_s: float = 0.2, umask: int = 0o077,
                 retention=None, disk_guard=None, reports: bool = True):
        self.ledger = ledger
        self.umask = umask
        self.retention = retention
        self.disk_guard = disk_guard
        self.reports = reports
        self.reporting: dict[str, multiprocessing.process.BaseProcess] = {}
        self._last_sweep = 0.0
        self._waiting_since: dict[str, float] = {}
        self._disk_checked = 0.0
        self.data_roots = [str(r) for r in data_roots]
        self.workers = workers
        self.max_crashes = max_crashes
        self.poll_s = poll_s
        self.context = multiprocessing.get_context("forkserver")
        self.context.set_forkserver_preload(PRELOAD)
        self.running: dict[str, _Running] = {}
        # The loop sleeps on the workers' sentinels and this pipe, so it reacts at once to a
        # worker ending, a submission or an abort; poll_s only bounds the sleep.
        self._wake_r, self._wake_w = os.pipe()
        os.set_blocking(self._wake_w, False)
        self._stop = threading.Event()
        self._thread: threading.Thread | None = None
        self._lock = threading.Lock()

    # -- life cycle ----------------------------------------------------------------------
    def start(self) -> None:
        self.recover()
        self._thread = threading.Thread(target=self._loop, name="annotator-scheduler",
                                        daemon=True)
        self._thread.start()

    def stop(self, timeout_s: float = 10.0) -> int:
        """Stop the scheduler; running jobs are stopped and put back in the queue (how many
        is returned)."""
        self._stop.set()
        self.wake()
        if self._thread is not None:
            self._thread.join(timeout_s)
        with self._lock:
            for run in list(self.running.values()):
                run.process.kill()
            for process in list(self.reporting.values()):  # resumed at the next start
                process.kill()
                process.join(timeout_s)
            self.reporting.clear()
            requeued = 0
            for ident, run in list(self.running.items()):
                run.process.join(timeout_s)
                requeued += self.ledger.requeue(ident, "service stopped; resumes when it "
                                                "starts again")
            self.running.clear()
        return requeued

    def wake(self) -> None:
        try:
            os.write(self._wake_w, b"!")
        except BlockingIOError:  # the pipe is full: a wake-up is pending anyway
            pass

    def recover(self) -> None:
        """After a stop or crash: every EXECUTING job goes back in the queue, in its place."""
        for record in self.ledger.list(phase=EXECUTING):
            self._stop_orphan(record)
            self.ledger.requeue(record.id, "service restarted; resumes from its last "
                                "committed part")
        for record in self.ledger.list(phase=PENDING):
            # The submission never got its answer: the client did not learn the id.
            self.ledger.fail(record.id, "submission interrupted by a service stop before it "
                             "was acknowledged; submit the job again", from_phases=(PENDING,))

    def _stop_orphan(self, record, wait_s: float = 10.0) -> None:
        """Make sure no worker of an earlier service still writes this job's folder."""
        if not record.folder:
            return
        lock_path = Path(record.folder) / LOCK_FILE
        if not lock_path.exists():
            return
        deadline = time.monotonic() + wait_s
        killed = False
        while True:
            fd = acquire_lock(lock_path)
            if fd is not None:
                release_lock(fd)
                return
            if not killed:
                try:
                    pid = int(lock_path.read_text().strip() or 0)
                    if pid > 0:
                        os.kill(pid, signal.SIGKILL)
                except (ValueError, ProcessLookupError, PermissionError, OSError):
                    pass
                killed = True
            if time.monotonic() > deadline:
                raise RuntimeError(f"job {record.id}: a worker still holds {lock_path}")
            time.sleep(0.05)

    # -- the loop ------------------------------------------------------------------------
    def _loop(self) -> None:
        warm = threading.Thread(target=self._warm_up, daemon=True)
        warm.start()
        while not self._stop.is_set():
            try:
                with self._lock:
                    self._reap()
                    self._enforce_aborts()
                    self._start_next()
                    self._reports()
                self._sweep()
            except Exception:  # the scheduler must outlive any one bad job
                traceback.print_exc()
            with self._lock:
                sentinels = [run.process.sentinel for run in self.running.values()]
                sentinels += [p.sentinel for p in self.reporting.values()]
            ready = multiprocessing.connection.wait([self._wake_r, *sentinels], self.poll_s)
            if self._wake_r in ready:
                os.read(self._wake_r, 4096)

    def _warm_up(self) -> None:
        from multiprocessing import forkserver

        try:
            forkserver.ensure_running()
        except Exception:
            traceback.print_exc()

    def _reports(self) -> None:
        """Reap the report process, and start the next one (one at a time)."""
        for ident, process in list(self.reporting.items()):
            if process.exitcode is None:
                continue
            process.join()
            del self.reporting[ident]
            self._last_sweep = 0.0
            if process.exitcode != 0:
                self.ledger.set_report(ident, None, f"the report process ended "
                                       f"({signal_name(process.exitcode)})")
            process.close()
        if self.reporting or not self.reports or self._stop.is_set():
            return
        ident = self.ledger.next_report()
        if ident is None:
            return
        process = self.context.Process(target=run_report,
                                       args=(str(self.ledger.root), ident, self.umask),
                                       name=f"annotator-report-{ident}", daemon=False)
        try:
            process.start()
        except Exception as exc:
            self.ledger.set_report(ident, None, f"could not start a report process: {exc}")
            return
        self.reporting[ident] = process

    def _sweep(self) -> None:
        """Retention, at start and then every SWEEP_INTERVAL_S."""
        if self.retention is None or not self.retention.active:
            return
        now = time.monotonic()
        if self._last_sweep and now - self._last_sweep < SWEEP_INTERVAL_S:
            return
        self._last_sweep = now
        for ident in self.retention.sweep(self.ledger):
            print(f"annotator: {ident} archived (retention)", file=sys.stderr, flush=True)

    def _fits_on_disk(self) -> bool:
        """Whether the next queued job may start as far as the disk goes; a job that may
        never start is ended here (ERROR, saying why)."""
        while self.disk_guard is not None:
            record = self.ledger.peek_next()
            if record is None:
                self._waiting_since = {}
                return True
            # only the head of the queue waits (jobs start in submission order)
            now = time.monotonic()
            since = self._waiting_since.get(record.id, now)
            self._waiting_since = {record.id: since}
            if record.waiting and now - self._disk_checked < DISK_RECHECK_S:
                return False  # it waits; the free space is looked at again every few seconds
            self._disk_checked = now
            verdict, reason = self.disk_guard.verdict(record.estimated_bytes, now - since)
            if verdict == "start":
                self._waiting_since.pop(record.id, None)
                if record.waiting:
                    self.ledger.set_waiting(record.id, None)
                return True
            if verdict == "wait":
                self.ledger.set_waiting(record.id, reason)
                return False
            self._waiting_since.pop(record.id, None)
            self.ledger.fail(record.id, f"not started: {reason}", from_phases=(QUEUED,))
        return True

    def _start_next(self) -> None:
        while len(self.running) < self.workers and not self._stop.is_set():
            if not self._fits_on_disk():
                return
            record = self.ledger.claim_next()
            if record is None:
                return
            process = self.context.Process(
                target=run_worker, args=(str(self.ledger.root), record.id, self.data_roots,
                                         self.umask, self.reports),
                name=f"annotator-worker-{record.id}", daemon=False)
            try:
                Path(record.folder).mkdir(parents=True, exist_ok=True)
                process.start()
            except Exception as exc:
                self.ledger.fail(record.id, f"could not start a worker process: {exc}")
                continue
            self.running[record.id] = _Running(record.id, process)

    def _enforce_aborts(self) -> None:
        for ident, run in self.running.items():
            if run.killing is None:
                record = self.ledger.get(ident)
                if record is not None and record.phase != EXECUTING:
                    run.killing = record.phase
                    run.process.kill()

    def _reap(self) -> None:
        for ident, run in list(self.running.items()):
            code = run.process.exitcode
            if code is None:
                continue
            run.process.join()
            del self.running[ident]
            run.process.close()
            self._last_sweep = 0.0  # a job ended: retention looks again at once
            record = self.ledger.get(ident)
            if record is None or record.phase != EXECUTING:
                continue  # it reported its outcome, or was aborted
            self._worker_died(record, code)

    def _worker_died(self, record, code: int) -> None:
        how = signal_name(code)
        if code == EXIT_STOPPED:
            self.ledger.requeue(record.id, f"worker stopped (SIGTERM) at {record.rows_done} rows; "
                                f"resumes from its last committed part")
            return
        if code == EXIT_BUSY:
            how = "its folder was locked by another worker"
        crashes = record.crashes + 1
        log = Path(record.folder) / LOG_FILE
        if crashes >= self.max_crashes:
            self.ledger.count_crash()
            self.ledger.fail(record.id, f"the worker process ended without finishing "
                             f"({how}) {crashes} times; last at {record.rows_done} rows; "
                             f"see {log}")
            return
        self.ledger.requeue(record.id, f"worker process ended ({how}) at {record.rows_done} "
                            f"rows; resumes from its last committed part", crashed=True)

    # -- reporting -----------------------------------------------------------------------
    def status(self) -> dict:
        with self._lock:
            running = {ident: run.process.pid for ident, run in self.running.items()}
            reporting = sorted(self.reporting)
        return {"workers": self.workers, "running": running, "building_reports": reporting,
                "queue_waiting_for_disk": bool(self._waiting_since),
                "scheduler_alive": bool(self._thread and self._thread.is_alive())}


def manifest_of(record) -> dict | None:
    """The manifest of a COMPLETED job, read from its output folder."""
    if not record.manifest_path:
        return None
    try:
        return json.loads(Path(record.manifest_path).read_text())
    except (OSError, json.JSONDecodeError):
        return None


__all__ = ["WorkerPool", "run_worker", "execute", "manifest_of"]
