"""The local engine: one machine, three overlapping stages.

A reader thread parses the next chunk while the main thread annotates the current one and
``WRITERS`` writer threads commit the previous ones (Arrow's readers and writers release the
GIL, and encoding + compressing a part is the largest single cost of a run, so two writers
keep both cores busy). Parts are committed to the checkpoint in chunk order whatever order the
writers finish in, and chunk k always becomes the same part file, so resume is unchanged.
Memory is bounded by the chunks in flight: ``PREFETCH`` read ahead, one being annotated and
at most ``WRITERS`` being written.
"""

from __future__ import annotations

import os
import queue
import threading
import time
from concurrent.futures import Future, ThreadPoolExecutor
from pathlib import Path

from ..io.readers import open_reader, source_sha256
from ..pipeline import Pipeline
from ..provenance import now_iso, part_metadata
from .common import (CommitLog, committed_chunks, finish, prepare_output, sole_writer,
                     write_chunk)

_DONE = object()
WRITERS = int(os.environ.get("ANNOTATOR_WRITER_THREADS", "2"))
PREFETCH = 2


def _prefetch(iterable, depth: int):
    """Run ``iterable`` in a thread, ``depth`` items ahead; re-raise its errors here."""
    q: queue.Queue = queue.Queue(maxsize=depth)
    stop = threading.Event()

    def work():
        try:
            for item in iterable:
                while not stop.is_set():
                    try:
                        q.put(item, timeout=0.1)
                        break
                    except queue.Full:
                        continue
                if stop.is_set():
                    return
            q.put(_DONE)
        except BaseException as exc:  # handed to the consumer
            q.put(exc)

    t = threading.Thread(target=work, name="annotator-reader", daemon=True)
    t.start()
    try:
        while True:
            item = q.get()
            if item is _DONE:
                return
            if isinstance(item, BaseException):
                raise item
            yield item
    finally:
        stop.set()


def iter_pending_chunks(plan, done: dict[int, set[int]],
                        checksums: dict[str, str] | None = None):
    """Every chunk not yet committed, source by source, in order.

    :param checksums: filled with the SHA-256 of each source (its path as key) once its last
        chunk was read: the reader hashes the file as it reads it, and reads what it skipped
        (committed chunks of a resumed run) to hash it in order, so the file is read once.
    """
    job = plan.job
    for source in plan.sources:
        reader = open_reader(source, **job.reader_options())
        skip = done.get(source.index, set())
        start = 0
        while start in skip:
            start += 1
        rows = -1  # the reader's row estimate, asked for only if a chunk needs it
        for chunk in reader.chunks(job.chunk_rows, start_chunk=start,
                                   target=plan.catalogue_schema):
            if chunk.index in skip:
                continue
            if chunk.bytes_read is None:  # progress: the source's share read, by rows
                if rows == -1:
                    rows = reader.estimate_rows() if hasattr(reader, "estimate_rows") else None
                if rows:
                    end = min((chunk.index + 1) * job.chunk_rows, rows)
                    chunk.bytes_read = int(source.size_bytes * end / rows)
            yield chunk
        if checksums is not None:
            checksums[str(source.path)] = source_sha256(reader)


def run_local(plan, *, progress=None, resume: bool = False, cancel=None) -> dict:
    """Run a plan on this machine; return the manifest.

    :param progress: called with a :class:`Progress` after each committed part.
    :param resume: keep the parts a previous run of the same job committed.
    :param cancel: a ``threading.Event``; when set, stop after the part in flight.
    """
    job = plan.job
    out = Path(job.output_dir)
    started_at, t0 = now_iso(), time.perf_counter()
    with sole_writer(out):
        log = prepare_output(plan, resume=resume)
        metadata = part_metadata(plan)
        pipeline = Pipeline.from_plan(plan, metadata)
        pipeline.prepare()
        records = log.records()
        done = committed_chunks(records)
        commits = CommitLog(log, records, plan.estimated_rows, progress,
                            total_bytes=sum(s.size_bytes for s in plan.sources))

        checksums: dict[str, str] = {}  # filled by the reader thread, source by source
        with ThreadPoolExecutor(max_workers=WRITERS, thread_name_prefix="annotator-writer") \
                as writer:
            in_flight: list[tuple[Future, tuple[int, int | None]]] = []

            def drain(limit: int) -> None:
                while len(in_flight) > limit:
                    future, position = in_flight.pop(0)
                    commits.commit(future.result(), position)

            try:
                for chunk in _prefetch(iter_pending_chunks(plan, done, checksums),
                                       depth=PREFETCH):
                    annotated, counts, flagged = pipeline.annotate(chunk.table)
                    in_flight.append((writer.submit(write_chunk, out, job.compression, metadata,
                                                    chunk, annotated, counts, flagged),
                                      (chunk.source.index, chunk.bytes_read)))
                    drain(WRITERS)
                    if cancel is not None and cancel.is_set():
                        break
                drain(0)
            except BaseException:
                for f, _ in in_flight:  # commit what is already annotated, then stop
                    try:
                        log.append(f.result())
                    except Exception:
                        pass
                raise
            if cancel is not None and cancel.is_set():
                from ..errors import UserError

                raise UserError("run cancelled")
        return finish(plan, log, started_at=started_at, elapsed_s=time.perf_counter() - t0,
                      engine="local", checksums=checksums, metadata=metadata)
