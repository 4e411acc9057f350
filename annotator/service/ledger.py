"""The job ledger: one SQLite database under the service root, in WAL mode.

The service (HTTP threads and the scheduler) and every worker process open their own
connection; each change is one short transaction, so a ``kill -9`` of any of them leaves the
ledger as of its last committed change. Phases are the IVOA UWS names.

Every phase change is guarded by the phase it leaves (``UPDATE ... WHERE phase = ?``), so two
writers racing (a worker finishing while a user aborts) cannot both win.
"""

from __future__ import annotations

import json
import sqlite3
import threading
import time
from dataclasses import dataclass
from pathlib import Path

PENDING, QUEUED, EXECUTING = "PENDING", "QUEUED", "EXECUTING"
COMPLETED, ERROR, ABORTED = "COMPLETED", "ERROR", "ABORTED"
#: a finished job whose folder retention removed; its ledger entry and history remain
ARCHIVED = "ARCHIVED"
PHASES = (PENDING, QUEUED, EXECUTING, COMPLETED, ERROR, ABORTED, ARCHIVED)
ACTIVE = (PENDING, QUEUED, EXECUTING)
FINAL = (COMPLETED, ERROR, ABORTED)
#: the phases a job can be deleted (forgotten) from
DELETABLE = (*FINAL, ARCHIVED)
#: service-lifetime counters kept in the ledger (never decrease, even when jobs are deleted)
COUNTERS = ("rows_read", "rows_written", "rows_rejected", "worker_crashes", "jobs_archived")

LEDGER_FILE = "ledger.sqlite"
SCHEMA_VERSION = 1
JOB_ID_PREFIX = "job-"

_SCHEMA = """
CREATE TABLE IF NOT EXISTS meta (key TEXT PRIMARY KEY, value TEXT NOT NULL);
CREATE TABLE IF NOT EXISTS jobs (
    seq INTEGER PRIMARY KEY AUTOINCREMENT,
    id TEXT UNIQUE,
    name TEXT,
    phase TEXT NOT NULL,
    job_json TEXT NOT NULL,
    base_dir TEXT NOT NULL,
    folder TEXT,
    output_dir TEXT,
    notes TEXT NOT NULL DEFAULT '[]',
    submitted_at REAL NOT NULL,
    started_at REAL,
    finished_at REAL,
    updated_at REAL NOT NULL,
    rows_done INTEGER NOT NULL DEFAULT 0,
    rows_total INTEGER,
    parts_done INTEGER NOT NULL DEFAULT 0,
    rows_per_second REAL,
    eta_s REAL,
    runs INTEGER NOT NULL DEFAULT 0,
    crashes INTEGER NOT NULL DEFAULT 0,
    worker_pid INTEGER,
    error TEXT,
    manifest_path TEXT
);
CREATE INDEX IF NOT EXISTS jobs_by_phase ON jobs (phase, seq);
CREATE TABLE IF NOT EXISTS events (
    n INTEGER PRIMARY KEY AUTOINCREMENT,
    job_seq INTEGER NOT NULL REFERENCES jobs (seq),
    at REAL NOT NULL,
    phase TEXT NOT NULL,
    message TEXT NOT NULL
);
CREATE INDEX IF NOT EXISTS events_by_job ON events (job_seq, n);
CREATE TABLE IF NOT EXISTS counters (name TEXT PRIMARY KEY, value INTEGER NOT NULL);
CREATE TABLE IF NOT EXISTS durations (
    n INTEGER PRIMARY KEY AUTOINCREMENT,
    phase TEXT NOT NULL,
    seconds REAL NOT NULL
);
"""

#: columns added after the first release of schema 1 (added in place when missing)
_ADDED_COLUMNS = {"estimated_bytes": "INTEGER", "report_path": "TEXT",
                  "report_error": "TEXT", "waiting": "TEXT", "report_pending": "INTEGER"}


def job_id(seq: int) -> str:
    return f"{JOB_ID_PREFIX}{seq:06d}"


def job_seq(identifier: str) -> int | None:
    """The ledger key of a job id (``job-000042`` -> 42), or None if it is not one."""
    if not identifier.startswith(JOB_ID_PREFIX):
        return None
    digits = identifier[len(JOB_ID_PREFIX):]
    # at most 18 digits: a SQLite INTEGER holds any of them (and nothing longer is an id)
    return int(digits) if digits.isascii() and digits.isdigit() and len(digits) <= 18 \
        else None


def _iso(t: float | None) -> str | None:
    if t is None:
        return None
    return time.strftime("%Y-%m-%dT%H:%M:%S", time.gmtime(t)) + f".{int(t % 1 * 1000):03d}Z"


@dataclass
class JobRecord:
    """One row of the ledger, as the API reports it."""

    seq: int
    id: str
    name: str | None
    phase: str
    job: dict
    base_dir: str
    folder: str | None
    output_dir: str | None
    notes: list[str]
    submitted_at: float
    started_at: float | None
    finished_at: float | None
    updated_at: float
    rows_done: int
    rows_total: int | None
    parts_done: int
    rows_per_second: float | None
    eta_s: float | None
    runs: int
    crashes: int
    worker_pid: int | None
    error: str | None
    manifest_path: str | None
    estimated_bytes: int | None = None
    report_path: str | None = None
    report_error: str | None = None
    waiting: str | None = None
    report_pending: int | None = None

    @classmethod
    def from_row(cls, row: sqlite3.Row) -> JobRecord:
        d = dict(row)
        d["job"] = json.loads(d.pop("job_json"))
        d["notes"] = json.loads(d["notes"])
        return cls(**d)

    def to_api(self) -> dict:
        """The JSON the HTTP API returns for this job (the manifest is added by the caller)."""
        return {
            "id": self.id,
            "name": self.name,
            "phase": self.phase,
            "rows_done": self.rows_done,
            "rows_total": self.rows_total,
            "parts_done": self.parts_done,
            "rows_per_second": self.rows_per_second,
            "eta_s": self.eta_s,
            "output": self.output_dir,
            "manifest_path": self.manifest_path,
            "report": f"/jobs/{self.id}/report" if self.report_path else None,
            "report_path": self.report_path,
            "report_error": self.report_error,
            "report_pending": bool(self.report_pending),
            "estimated_output_bytes": self.estimated_bytes,
            "waiting": self.waiting if self.phase == QUEUED else None,
            "error": self.error,
            "notes": list(self.notes),
            "runs": self.runs,
            "crashes": self.crashes,
            "worker_pid": self.worker_pid if self.phase == EXECUTING else None,
            "submitted_at": _iso(self.submitted_at),
            "started_at": _iso(self.started_at),
            "finished_at": _iso(self.finished_at),
            "updated_at": _iso(self.updated_at),
        }


class Ledger:
    """Access to the ledger; safe to share between threads (one connection per thread)."""

    def __init__(self, root: str | Path, *, timeout_s: float = 30.0):
        self.root = Path(root)
        self.path = self.root / LEDGER_FILE
        self.timeout_s = timeout_s
        self._local = threading.local()
        with self._connect() as con:
            con.executescript(_SCHEMA)
            con.execute("INSERT OR IGNORE INTO meta (key, value) VALUES ('schema_version', ?)",
                        (str(SCHEMA_VERSION),))
            version = con.execute("SELECT value FROM meta WHERE key = 'schema_version'"
                                  ).fetchone()[0]
            present = {r[1] for r in con.execute("PRAGMA table_info(jobs)").fetchall()}
            for column, kind in _ADDED_COLUMNS.items():
                if column not in present:
                    con.execute(f"ALTER TABLE jobs ADD COLUMN {column} {kind}")
        if int(version) != SCHEMA_VERSION:
            from ..errors import ConfigError

            raise ConfigError(f"--root {self.root}: ledger {self.path} has schema version "
                              f"{version}; this annotator reads version {SCHEMA_VERSION}")

    # -- connections ---------------------------------------------------------------------
    def _connect(self) -> sqlite3.Connection:
        con = getattr(self._local, "con", None)
        if con is None:
            con = sqlite3.connect(self.path, timeout=self.timeout_s, isolation_level=None,
                                  check_same_thread=False)
            con.row_factory = sqlite3.Row
            con.execute("PRAGMA journal_mode = WAL")
            # FULL: a committed phase change survives a power cut, not only a crash.
            con.execute("PRAGMA synchronous = FULL")
            con.execute("PRAGMA foreign_keys = ON")
            self._local.con = con
        return _Transaction(con)

    def close(self) -> None:
        con = getattr(self._local, "con", None)
        if con is not None:
            con.close()
            self._local.con = None

    # -- reading -------------------------------------------------------------------------
    def get(self, identifier: str) -> JobRecord | None:
        seq = job_seq(identifier)
        if seq is None:
            return None
        with self._connect() as con:
            row = con.execute("SELECT * FROM jobs WHERE seq = ?", (seq,)).fetchone()
        return JobRecord.from_row(row) if row is not None and row["id"] else None

    def list(self, phase: str | None = None, limit: int | None = None) -> list[JobRecord]:
        """Jobs in submission order; with ``limit``, the most recent ``limit`` of them."""
        sql, args = "SELECT * FROM jobs WHERE id IS NOT NULL", []
        if phase:
            sql += " AND phase = ?"
            args.append(phase)
        sql += " ORDER BY seq DESC"
        if limit:
            sql += " LIMIT ?"
            args.append(int(limit))
        with self._connect() as con:
            rows = con.execute(sql, args).fetchall()
        return [JobRecord.from_row(r) for r in reversed(rows)]

    def counts(self) -> dict[str, int]:
        with self._connect() as con:
            rows = con.execute("SELECT phase, COUNT(*) FROM jobs WHERE id IS NOT NULL "
                               "GROUP BY phase").fetchall()
        out = {p: 0 for p in PHASES}
        out.update({r[0]: r[1] for r in rows})
        return out

    def history(self, identifier: str) -> list[dict]:
        seq = job_seq(identifier)
        with self._connect() as con:
            rows = con.execute("SELECT at, phase, message FROM events WHERE job_seq = ? "
                               "ORDER BY n", (seq,)).fetchall()
        return [{"at": _iso(r["at"]), "phase": r["phase"], "message": r["message"]} for r in rows]

    # -- submission ----------------------------------------------------------------------
    def create(self, *, name: str | None, job: dict, base_dir: str, notes: list[str],
               jobs_dir: Path, rows_total: int | None = None,
               estimated_bytes: int | None = None) -> JobRecord:
        """Insert a job in PENDING with its id and folder; :meth:`queue` once the folder exists."""
        now = time.time()
        with self._connect() as con:
            con.execute("BEGIN IMMEDIATE")
            cur = con.execute(
                "INSERT INTO jobs (name, phase, job_json, base_dir, notes, rows_total, "
                "estimated_bytes, submitted_at, updated_at) VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?)",
                (name, PENDING, json.dumps(job), base_dir, json.dumps(notes), rows_total,
                 estimated_bytes, now, now))
            seq = cur.lastrowid
            ident = job_id(seq)
            folder = Path(jobs_dir) / ident
            con.execute("UPDATE jobs SET id = ?, folder = ?, output_dir = ? WHERE seq = ?",
                        (ident, str(folder), str(folder / "output"), seq))
            self._event(con, seq, PENDING, "submitted", now)
        return self.get(ident)

    def queue(self, identifier: str, message: str = "queued") -> bool:
        return self._move(identifier, (PENDING,), QUEUED, message)

    # -- scheduling ----------------------------------------------------------------------
    def claim_next(self) -> JobRecord | None:
        """Move the oldest QUEUED job to EXECUTING and return it (None when the queue is empty)."""
        now = time.time()
        with self._connect() as con:
            con.execute("BEGIN IMMEDIATE")
            row = con.execute("SELECT seq FROM jobs WHERE phase = ? ORDER BY seq LIMIT 1",
                              (QUEUED,)).fetchone()
            if row is None:
                con.execute("COMMIT")
                return None
            seq = row[0]
            con.execute("UPDATE jobs SET phase = ?, runs = runs + 1, worker_pid = NULL, "
                        "started_at = COALESCE(started_at, ?), rows_per_second = NULL, "
                        "eta_s = NULL, updated_at = ? WHERE seq = ?",
                        (EXECUTING, now, now, seq))
            runs = con.execute("SELECT runs FROM jobs WHERE seq = ?", (seq,)).fetchone()[0]
            self._event(con, seq, EXECUTING,
                        "started" if runs == 1 else f"resumed (run {runs})", now)
        return self.get(job_id(seq))

    def set_worker(self, identifier: str, pid: int) -> None:
        with self._connect() as con:
            con.execute("UPDATE jobs SET worker_pid = ?, updated_at = ? WHERE seq = ?",
                        (pid, time.time(), job_seq(identifier)))

    def progress(self, identifier: str, *, rows_done: int, rows_total: int | None,
                 parts_done: int, rows_per_second: float | None, eta_s: float | None) -> bool:
        """Record progress of an EXECUTING job (ignored once it has left EXECUTING)."""
        with self._connect() as con:
            cur = con.execute(
                "UPDATE jobs SET rows_done = ?, rows_total = ?, parts_done = ?, "
                "rows_per_second = ?, eta_s = ?, updated_at = ? WHERE seq = ? AND phase = ?",
                (rows_done, rows_total, parts_done, rows_per_second, eta_s, time.time(),
                 job_seq(identifier), EXECUTING))
        return cur.rowcount == 1

    def complete(self, identifier: str, *, manifest_path: str, rows_done: int,
                 rows_per_second: float | None, parts_done: int | None = None,
                 rows_written: int | None = None, rows_rejected: int | None = None,
                 report_pending: bool = False) -> bool:
        now = time.time()
        seq = job_seq(identifier)
        with self._connect() as con:
            con.execute("BEGIN IMMEDIATE")
            cur = con.execute(
                "UPDATE jobs SET phase = ?, manifest_path = ?, rows_done = ?, "
                "rows_total = ?, parts_done = COALESCE(?, parts_done), rows_per_second = ?, "
                "eta_s = 0, error = NULL, report_pending = ?, finished_at = ?, "
                "updated_at = ? WHERE seq = ? AND phase = ?",
                (COMPLETED, manifest_path, rows_done, rows_done, parts_done, rows_per_second,
                 1 if report_pending else 0, now, now, seq, EXECUTING))
            if cur.rowcount == 1:
                self._event(con, seq, COMPLETED, f"{rows_done} rows", now)
                self._bump(con, "rows_read", rows_done)
                self._bump(con, "rows_written", rows_written or 0)
                self._bump(con, "rows_rejected", rows_rejected or 0)
                self._duration(con, seq, COMPLETED, now)
        return cur.rowcount == 1

    def fail(self, identifier: str, error: str, *, from_phases=(EXECUTING,)) -> bool:
        return self._move(identifier, tuple(from_phases), ERROR, error, finished=True,
                          assignments=", error = ?, eta_s = NULL", values=(error,))

    def abort(self, identifier: str, message: str = "aborted on request") -> bool:
        return self._move(identifier, ACTIVE, ABORTED, message, finished=True,
                          assignments=", eta_s = NULL")

    def delete(self, identifier: str) -> bool:
        """Forget a finished job (COMPLETED, ERROR, ABORTED, ARCHIVED) and its history; ids
        are never reused (AUTOINCREMENT). Active jobs are refused: abort them first."""
        seq = job_seq(identifier)
        marks = ",".join("?" * len(DELETABLE))
        with self._connect() as con:
            con.execute("BEGIN IMMEDIATE")
            # the history first: events reference the job
            con.execute(f"DELETE FROM events WHERE job_seq = ? AND EXISTS (SELECT 1 FROM jobs "
                        f"WHERE seq = ? AND phase IN ({marks}))", (seq, seq, *DELETABLE))
            cur = con.execute(f"DELETE FROM jobs WHERE seq = ? AND phase IN ({marks})",
                              (seq, *DELETABLE))
        return cur.rowcount == 1

    def archive(self, identifier: str, message: str) -> bool:
        """A finished job whose folder retention removed: ARCHIVED (from a final phase only)."""
        moved = self._move(identifier, FINAL, ARCHIVED, message,
                           assignments=", worker_pid = NULL, eta_s = NULL")
        if moved:
            with self._connect() as con:
                self._bump(con, "jobs_archived", 1)
        return moved

    def finished(self) -> list[JobRecord]:
        """Jobs in a final phase (their folders still exist), oldest finished first."""
        marks = ",".join("?" * len(FINAL))
        with self._connect() as con:
            rows = con.execute(f"SELECT * FROM jobs WHERE id IS NOT NULL AND phase IN ({marks}) "
                               f"ORDER BY COALESCE(finished_at, updated_at), seq",
                               FINAL).fetchall()
        return [JobRecord.from_row(r) for r in rows]

    def peek_next(self) -> JobRecord | None:
        """The job :meth:`claim_next` would claim, without claiming it."""
        with self._connect() as con:
            row = con.execute("SELECT id FROM jobs WHERE phase = ? ORDER BY seq LIMIT 1",
                              (QUEUED,)).fetchone()
        return self.get(row[0]) if row is not None else None

    def set_waiting(self, identifier: str, reason: str | None) -> bool:
        """Say why a QUEUED job is not started yet (None: it no longer waits); an event is
        written when it starts waiting. True if it changed."""
        seq = job_seq(identifier)
        with self._connect() as con:
            con.execute("BEGIN IMMEDIATE")
            row = con.execute("SELECT waiting FROM jobs WHERE seq = ? AND phase = ?",
                              (seq, QUEUED)).fetchone()
            if row is None or row[0] == reason:
                return False
            con.execute("UPDATE jobs SET waiting = ?, updated_at = ? WHERE seq = ?",
                        (reason, time.time(), seq))
            if reason and row[0] is None:  # one event when it starts waiting, not each check
                self._event(con, seq, QUEUED, reason, time.time())
        return True

    def set_report(self, identifier: str, report_path: str | None, error: str | None) -> None:
        """The outcome of building a job's report (it is no longer pending)."""
        with self._connect() as con:
            con.execute("UPDATE jobs SET report_path = ?, report_error = ?, report_pending = 0 "
                        "WHERE seq = ?", (report_path, error, job_seq(identifier)))

    def next_report(self) -> str | None:
        """The oldest COMPLETED job whose report is still to be built."""
        with self._connect() as con:
            row = con.execute("SELECT id FROM jobs WHERE phase = ? AND report_pending = 1 "
                              "ORDER BY seq LIMIT 1", (COMPLETED,)).fetchone()
        return row[0] if row else None

    def count_crash(self) -> None:
        with self._connect() as con:
            self._bump(con, "worker_crashes", 1)

    def totals(self) -> dict[str, int]:
        """The service-lifetime counters (:data:`COUNTERS`), 0 for those never bumped."""
        with self._connect() as con:
            rows = con.execute("SELECT name, value FROM counters").fetchall()
        out = {name: 0 for name in COUNTERS}
        out.update({r[0]: r[1] for r in rows})
        return out

    def durations(self) -> list[tuple[str, float]]:
        """(final phase, seconds from first start to the end) of every job that ended."""
        with self._connect() as con:
            rows = con.execute("SELECT phase, seconds FROM durations ORDER BY n").fetchall()
        return [(r[0], r[1]) for r in rows]

    def oldest_queued_at(self) -> float | None:
        with self._connect() as con:
            row = con.execute("SELECT MIN(submitted_at) FROM jobs WHERE phase = ?",
                              (QUEUED,)).fetchone()
        return row[0] if row else None

    def requeue(self, identifier: str, message: str, *, crashed: bool = False) -> bool:
        """Put an EXECUTING job back in the queue, keeping its place (submission order)."""
        now = time.time()
        seq = job_seq(identifier)
        with self._connect() as con:
            con.execute("BEGIN IMMEDIATE")
            cur = con.execute(
                "UPDATE jobs SET phase = ?, worker_pid = NULL, rows_per_second = NULL, "
                "eta_s = NULL, crashes = crashes + ?, updated_at = ? WHERE seq = ? AND phase = ?",
                (QUEUED, 1 if crashed else 0, now, seq, EXECUTING))
            if cur.rowcount == 1:
                self._event(con, seq, QUEUED, message, now)
                if crashed:
                    self._bump(con, "worker_crashes", 1)
        return cur.rowcount == 1

    def note(self, identifier: str, phase: str, message: str) -> None:
        with self._connect() as con:
            self._event(con, job_seq(identifier), phase, message, time.time())

    # -- internals -----------------------------------------------------------------------
    def _move(self, identifier: str, sources: tuple[str, ...], target: str, message: str, *,
              finished: bool = False, assignments: str = "", values: tuple = ()) -> bool:
        """Move a job to ``target`` only from one of ``sources`` (the guard that lets a
        finishing worker and an abort never both win), with extra ``assignments``."""
        now = time.time()
        seq = job_seq(identifier)
        marks = ",".join("?" * len(sources))
        if finished:
            assignments += ", finished_at = ?"
            values = (*values, now)
        with self._connect() as con:
            con.execute("BEGIN IMMEDIATE")
            cur = con.execute(f"UPDATE jobs SET phase = ?{assignments}, updated_at = ? "
                              f"WHERE seq = ? AND phase IN ({marks})",
                              (target, *values, now, seq, *sources))
            if cur.rowcount == 1:
                self._event(con, seq, target, message, now)
                if finished:
                    self._duration(con, seq, target, now)
        return cur.rowcount == 1

    @staticmethod
    def _bump(con, name: str, by: int) -> None:
        con.execute("INSERT INTO counters (name, value) VALUES (?, ?) ON CONFLICT (name) DO "
                    "UPDATE SET value = value + excluded.value", (name, int(by)))

    @staticmethod
    def _duration(con, seq: int, phase: str, now: float) -> None:
        """Record how long a job that just ended took (from its first start; 0 if never
        started)."""
        row = con.execute("SELECT started_at FROM jobs WHERE seq = ?", (seq,)).fetchone()
        started = row[0] if row and row[0] is not None else now
        con.execute("INSERT INTO durations (phase, seconds) VALUES (?, ?)",
                    (phase, max(now - started, 0.0)))

    @staticmethod
    def _event(con, seq: int, phase: str, message: str, at: float) -> None:
        con.execute("INSERT INTO events (job_seq, at, phase, message) VALUES (?, ?, ?, ?)",
                    (seq, at, phase, message))


class _Transaction:
    """``with`` on a connection in autocommit mode: COMMIT an explicit BEGIN on success,
    ROLLBACK on error; statements outside a BEGIN commit one by one."""

    def __init__(self, con: sqlite3.Connection):
        self.con = con

    def __enter__(self) -> sqlite3.Connection:
        return self.con

    def __exit__(self, exc_type, exc, tb) -> None:
        if self.con.in_transaction:
            self.con.execute("ROLLBACK" if exc_type else "COMMIT")
