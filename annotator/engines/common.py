"""What every engine shares: the output folder, the unit of work, the final manifest."""

from __future__ import annotations

import json
import shutil
import time
from dataclasses import dataclass
from pathlib import Path

from ..errors import OutputError
from ..io.checkpoint import JOB_FILE, STATE_DIR, CheckpointLog
from ..io.readers import Chunk
from ..io.writer import (REJECTED_DIR, part_name, rejected_table, remove_stale_temporaries,
                         write_parquet_atomic)
from ..pipeline import Pipeline
from ..provenance import MANIFEST, build_manifest, now_iso, write_json_atomic

OWNED = (MANIFEST, STATE_DIR, REJECTED_DIR)


@dataclass
class Progress:
    rows_done: int
    rows_total: int | None
    parts_done: int
    elapsed_s: float
    fraction: float | None = None   # of the whole run, from bytes of the inputs read
    eta: float | None = None        # seconds left, smoothed (see CommitLog)

    @property
    def rows_per_second(self) -> float:
        return self.rows_done / self.elapsed_s if self.elapsed_s > 0 else 0.0

    @property
    def eta_s(self) -> float | None:
        return self.eta


class CommitLog:
    """Appends each committed part's record to the checkpoint and reports progress.

    Both engines commit through this, so their checkpoints and progress reports agree.

    Progress is the fraction of the inputs' bytes read (``position`` of each commit: the
    source and its bytes consumed, compressed bytes for .gz), else of the estimated rows. The
    ETA is not taken from the first part: that one also carries the start-up and, in the local
    engine, runs before reading, annotating and writing overlap (it measured ~3x slower than
    the steady rate). From the second part on, the rate is an exponential moving average
    (weight ``SMOOTHING``) of the rate between consecutive commits.
    """

    SMOOTHING = 0.3

    def __init__(self, log: CheckpointLog, records: list[dict], rows_total: int | None,
                 progress=None, total_bytes: int | None = None):
        self.log = log
        self.rows_total = rows_total
        self.progress = progress
        self.total_bytes = total_bytes or None
        self.rows_done = sum(r["rows_read"] for r in records)
        self.parts_done = len(records)
        self.t0 = time.perf_counter()
        self.positions: dict[int, int] = {}
        self._last: tuple[float, float] | None = None  # (time, fraction) of the last commit
        self._rate: float | None = None                 # smoothed fraction per second

    def fraction(self) -> float | None:
        if self.total_bytes and self.positions:
            return min(sum(self.positions.values()) / self.total_bytes, 1.0)
        if self.rows_total:
            return min(self.rows_done / self.rows_total, 1.0)
        return None

    def commit(self, record: dict, position: tuple[int, int | None] | None = None) -> None:
        self.log.append(record)
        self.rows_done += record["rows_read"]
        self.parts_done += 1
        if position is not None and position[1] is not None:
            source, consumed = position
            self.positions[source] = max(self.positions.get(source, 0), consumed)
        now = time.perf_counter()
        fraction = self.fraction()
        eta = None
        if fraction is not None:
            if self._last is not None and now > self._last[0] and fraction > self._last[1]:
                rate = (fraction - self._last[1]) / (now - self._last[0])
                self._rate = rate if self._rate is None else \
                    self.SMOOTHING * rate + (1 - self.SMOOTHING) * self._rate
            if self._rate:
                eta = max(1.0 - fraction, 0.0) / self._rate
            self._last = (now, fraction)
        if self.progress is not None:
            self.progress(Progress(self.rows_done, self.rows_total, self.parts_done,
                                   now - self.t0, fraction, eta))


def _is_owned(p: Path) -> bool:
    return p.name in OWNED or (p.name.startswith("part-") and ".parquet" in p.name)


def interrupted_run(out: Path, fingerprint: dict) -> tuple[bool, int] | None:
    """``(same_job, parts_committed)`` when ``out`` holds a run that never finished, else None.

    An interrupted run has its job record in ``_state/`` but no manifest yet.
    """
    out = Path(out)
    job_file = out / STATE_DIR / JOB_FILE
    if not job_file.is_file() or (out / MANIFEST).exists():
        return None
    try:
        recorded = json.loads(job_file.read_text())
    except (OSError, ValueError):
        return None
    same = recorded == json.loads(json.dumps(fingerprint, default=str))
    return same, len(CheckpointLog(out).records())


def prepare_output(plan, *, resume: bool) -> CheckpointLog:
    """Make the output folder ready; refuse to mix runs.

    * empty or absent: used;
    * holds a run of the same job and ``resume``: committed parts are kept;
    * otherwise non-empty: refused unless ``overwrite``, which removes only what annotator
      wrote there (parts, rejected/, manifest, state) and refuses if anything else is present.
    """
    out = plan.job.output_dir
    if out is None:
        raise OutputError("no output folder: give --out DIR or [output].dir")
    out = Path(out)
    if out.exists() and not out.is_dir():
        raise OutputError(f"output {out}: exists and is not a folder")
    log = CheckpointLog(out)
    fingerprint = plan.job.fingerprint()
    existing = list(out.iterdir()) if out.is_dir() else []
    if resume and not log.exists() and [p.name for p in existing] == [STATE_DIR]:
        # A run stopped before its checkpoint existed committed no part: nothing to keep,
        # so resuming it is starting it afresh.
        shutil.rmtree(out / STATE_DIR)
        existing = []
    if existing:
        if resume and log.exists():
            recorded = json.loads((out / STATE_DIR / JOB_FILE).read_text())
            if recorded != json.loads(json.dumps(fingerprint, default=str)):
                raise OutputError(f"output {out}: holds a run of a different job; cannot resume "
                                  f"it with this one (use another --out, or --overwrite)")
            remove_stale_temporaries(out)
            log.start()
            return log
        if not plan.job.overwrite:
            stopped = interrupted_run(out, fingerprint)
            if stopped is not None and stopped[0]:
                raise OutputError(f"output {out}: holds an interrupted run of this job "
                                  f"({stopped[1]} parts committed); continue it with --resume "
                                  f"(or start again with --overwrite)")
            raise OutputError(f"output {out}: folder is not empty; use --overwrite to replace "
                              f"an earlier annotated output, or choose another --out")
        foreign = [p.name for p in existing if not _is_owned(p)]
        if foreign:
            raise OutputError(f"output {out}: --overwrite only replaces annotator's own files, "
                              f"and the folder also holds {foreign[0]!r}; choose another --out")
        for p in existing:
            if p.is_dir():
                shutil.rmtree(p)
            else:
                p.unlink()
    out.mkdir(parents=True, exist_ok=True)
    (out / STATE_DIR).mkdir(exist_ok=True)
    write_json_atomic(json.loads(json.dumps(fingerprint, default=str)), out / STATE_DIR / JOB_FILE)
    log.start()
    return log


def committed_chunks(records: list[dict]) -> dict[int, set[int]]:
    done: dict[int, set[int]] = {}
    for rec in records:
        done.setdefault(rec["source"], set()).add(rec["chunk"])
    return done


def write_chunk(output_dir: Path, compression: str, metadata: dict, chunk: Chunk,
                annotated, flag_counts: dict, flagged: int) -> dict:
    """Commit one annotated chunk: rejected rows first, then the part, both atomically.

    :return: the checkpoint record for the part.
    """
    output_dir = Path(output_dir)
    name = part_name(chunk.source.index, chunk.index)
    rejected_name = None
    if chunk.rejected:
        rej_dir = output_dir / REJECTED_DIR
        rej_dir.mkdir(exist_ok=True)
        rejected_name = f"{REJECTED_DIR}/{name}"
        write_parquet_atomic(rejected_table(chunk.rejected), output_dir / rejected_name,
                             compression=compression)
    size = write_parquet_atomic(annotated, output_dir / name, compression=compression,
                                metadata=metadata)
    if annotated.num_rows + len(chunk.rejected) != chunk.rows_read:
        raise AssertionError(f"part {name}: rows do not reconcile")
    return {
        "part": name,
        "source": chunk.source.index,
        "chunk": chunk.index,
        "rows_read": chunk.rows_read,
        "rows_written": annotated.num_rows,
        "rows_rejected": len(chunk.rejected),
        "rows_flagged": flagged,
        "flags": {k: v for k, v in flag_counts.items() if v},
        "bytes": size,
        "rejected_part": rejected_name,
        "committed_at": time.time(),
    }


def process_chunk(pipeline: Pipeline, chunk: Chunk, output_dir: Path, compression: str) -> dict:
    """The unit of work: annotate one chunk and commit it. Engines call exactly this."""
    annotated, counts, flagged = pipeline.annotate(chunk.table)
    return write_chunk(output_dir, compression, pipeline.schema_metadata, chunk, annotated,
                       counts, flagged)


def finish(plan, log: CheckpointLog, *, started_at: str, elapsed_s: float, engine: str,
           checksums: dict[str, str], metadata: dict) -> dict:
    records = log.records()
    if not records:  # an empty catalogue still gets one (empty) part so SQL sees its schema
        out = Path(plan.job.output_dir)
        empty = plan.output_schema.empty_table()
        name = part_name(0, 0)
        size = write_parquet_atomic(empty, out / name, compression=plan.job.compression,
                                    metadata=metadata)
        log.append({"part": name, "source": 0, "chunk": 0, "rows_read": 0, "rows_written": 0,
                    "rows_rejected": 0, "rows_flagged": 0, "flags": {}, "bytes": size,
                    "rejected_part": None, "committed_at": time.time()})
        records = log.records()
    manifest = build_manifest(plan, records, started_at=started_at, finished_at=now_iso(),
                              elapsed_s=elapsed_s, engine=engine, checksums=checksums)
    if manifest["rows_read"] != manifest["rows_written"] + manifest["rows_rejected"]:
        raise AssertionError("row counts do not reconcile: "
                             f"read {manifest['rows_read']}, written {manifest['rows_written']}, "
                             f"rejected {manifest['rows_rejected']}")
    write_json_atomic(manifest, Path(plan.job.output_dir) / MANIFEST)
    return manifest
