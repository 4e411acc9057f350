"""The per-part checkpoint log that makes a run resumable.

After a part file has been renamed into place, one JSON line describing it is appended and
fsync'ed. A crash between the rename and the append only means the part is written again on
resume (part names are deterministic), so every row lands exactly once.
"""

from __future__ import annotations

import json
import os
from pathlib import Path

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
        tmp = self.path.with_suffix(".tmp")
        with tmp.open("w", encoding="utf-8") as fh:
            for rec in good:
                fh.write(json.dumps(rec, sort_keys=True) + "\n")
            fh.flush()
            os.fsync(fh.fileno())
        os.replace(tmp, self.path)

    def append(self, record: dict) -> None:
        with self.path.open("a", encoding="utf-8") as fh:
            fh.write(json.dumps(record, sort_keys=True) + "\n")
            fh.flush()
            os.fsync(fh.fileno())
