"""Keeping the disk in hand: retention of finished jobs' folders, and the guard before a start.

* **Retention** (``--keep-days N``, ``--keep-count N``): the folder of a finished job
  (COMPLETED, ERROR, ABORTED) is removed once it finished more than N days ago, or once N more
  recently finished jobs exist; the job stays in the ledger as ARCHIVED (an IVOA UWS 1.1
  phase, 2016, section 2.1.3), with its history. Active jobs are never touched: only jobs in
  a final phase are candidates, and the phase change is guarded by that phase.
* **Disk guard**: before the scheduler starts a job it compares the plan's estimate of the
  output size (the one ``annotator run --dry-run`` prints) with ``fraction`` x the free space
  of the file system holding the root. A job that does not fit waits in the queue (saying why)
  and ends in ERROR after ``wait_s``; one that could not fit even in an empty disk ends at once.
"""

from __future__ import annotations

import shutil
import time
from dataclasses import dataclass
from pathlib import Path

from .ledger import Ledger


def remove_job_folder(folder: str | None, jobs_dir: Path, ident: str) -> bool:
    """Remove a job's own folder (only ever ``jobs_dir/<id>``); True if it is gone."""
    if not folder:
        return True
    path = Path(folder).resolve()
    if path.parent != Path(jobs_dir).resolve() or path.name != ident:
        return False
    if path.is_dir():
        shutil.rmtree(path, ignore_errors=True)
    return not path.exists()


@dataclass
class Retention:
    jobs_dir: Path
    keep_days: float | None = None
    keep_count: int | None = None

    @property
    def active(self) -> bool:
        return self.keep_days is not None or self.keep_count is not None

    def sweep(self, ledger: Ledger, now: float | None = None) -> list[str]:
        """Archive the finished jobs past the limits; returns their ids."""
        if not self.active:
            return []
        now = time.time() if now is None else now
        finished = ledger.finished()  # oldest finished first
        doomed: dict[str, str] = {}
        if self.keep_days is not None:
            limit = now - self.keep_days * 86400
            for r in finished:
                if (r.finished_at or r.updated_at) < limit:
                    doomed[r.id] = f"finished more than {self.keep_days:g} days ago"
        if self.keep_count is not None and len(finished) > self.keep_count:
            for r in finished[:len(finished) - self.keep_count]:
                doomed.setdefault(r.id, f"more than {self.keep_count} finished jobs kept")
        archived = []
        for r in finished:
            if r.id not in doomed or r.report_pending:  # its report is still being built
                continue
            if not remove_job_folder(r.folder, self.jobs_dir, r.id):
                continue
            if ledger.archive(r.id, f"archived: folder {r.folder} removed ({doomed[r.id]})"):
                archived.append(r.id)
        return archived


@dataclass
class DiskGuard:
    jobs_dir: Path
    fraction: float = 0.8
    wait_s: float = 3600.0

    def usage(self):
        return shutil.disk_usage(self.jobs_dir)

    def verdict(self, estimated: int | None, waited_s: float) -> tuple[str, str | None]:
        """('start' | 'wait' | 'fail', reason) for a job whose output is ``estimated`` bytes."""
        if not estimated:
            return "start", None
        disk = self.usage()
        allowed = disk.free * self.fraction
        if estimated <= allowed:
            return "start", None
        need = (f"its estimated output of {_mb(estimated)} exceeds {self.fraction:g} x the "
                f"free space ({_mb(disk.free)} free on the file system of {self.jobs_dir})")
        if estimated > disk.total * self.fraction:
            return "fail", f"{need}, and would not fit even in the empty disk ({_mb(disk.total)})"
        if waited_s >= self.wait_s:
            return "fail", f"{need}; waited {waited_s:.0f} s for space (--disk-wait)"
        return "wait", f"waiting for disk space: {need}"


def _mb(n: float) -> str:
    return f"{n / 1e6:,.1f} MB"


__all__ = ["Retention", "DiskGuard", "remove_job_folder"]
