"""The per-part checkpoint log that makes a run resumable.

After a part file has been renamed into place, one JSON line describing it is appended and
fsync'ed. A crash between the rename and the append only means the part is written again on
resume (part names are deterministic), so every row lands exactly once.
"""

from __future__ import annotations

import json
import os
from pathlib import Path

from .writer import DiskFullError, is_disk_full, temporary_name

STATE_DIR = "_state"
CHECKPOINT_FILE = "checkpoint.jsonl"
JOB_FILE = "job.json"


class CheckpointLog:
    def __init__(self, output_dir: Path):
        self.dir = Path(output_dir) / STATE_DIR
        self.path = self.dir / CHECKPOINT_FILE

    def exists(self) -> bool:
        return self.path.is_file()

    def records(self) -> list[dict]:
        """Committed records in order; a torn last line (crash mid-append) is ignored."""
        if not self.path.is_file():
            return []
        out = []
        with self.path.open("r", encoding="utf-8") as fh:
            for line in fh:
                if not line.endswith("\n"):
                    break
                try:
                    out.append(json.loads(line))
                except json.JSONDecodeError:
                    break
        return out

    def start(self) -> None:
        self.dir.mkdir(parents=True, exist_ok=True)
        # Drop a torn tail so appends start on a clean line.
        good = self.records()
        tmp = temporary_name(self.path)
        try:
            with tmp.open("w", encoding="utf-8") as fh:
                for rec in good:
                    fh.write(json.dumps(rec, sort_keys=True) + "\n")
                fh.flush()
                os.fsync(fh.fileno())
            os.replace(tmp, self.path)
        except BaseException as exc:
            tmp.unlink(missing_ok=True)
            if is_disk_full(exc):
                raise DiskFullError(self.dir.parent, None, CHECKPOINT_FILE) from exc
            raise

    def append(self, record: dict) -> None:
        line = (json.dumps(record, sort_keys=True) + "\n").encode("utf-8")
        fd = os.open(self.path, os.O_WRONLY | os.O_APPEND | os.O_CREAT, 0o644)
        try:
            at = os.lseek(fd, 0, os.SEEK_END)
            try:
                view = memoryview(line)
                while view:
                    view = view[os.write(fd, view):]
                os.fsync(fd)
            except OSError as exc:
                try:  # no torn line: the part is simply written again on resume
                    os.ftruncate(fd, at)
                except OSError:
                    pass
                if is_disk_full(exc):
                    raise DiskFullError(self.dir.parent, len(line), CHECKPOINT_FILE) from exc
                raise
        finally:
            os.close(fd)
