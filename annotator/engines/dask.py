"""The Dask engine: the same job on a Dask cluster, with results identical to the local engine.

How a run is cut into work
--------------------------
One Dask task per chunk, and the task body is :func:`annotator.engines.common.process_chunk`,
the very function the local engine's stages amount to (annotate one chunk with the job's
:class:`~annotator.pipeline.Pipeline`, then commit its part and its rejected rows atomically).
So a part written on a worker has the same name (``part-SSSSS-CCCCCC.parquet``), the same rows,
the same bytes and the same VOParquet metadata as the part the local engine writes, and the
task returns the same checkpoint record, which the driver appends to
``_state/checkpoint.jsonl`` as results arrive. ``--resume`` therefore works across engines:
a run started locally can be finished on a cluster and the other way round.

* **Parquet** sources are read *on the workers*: a task carries only a descriptor
  (source, chunk index, rows per chunk), and the worker reads rows
  ``[k * chunk_rows, (k + 1) * chunk_rows)`` itself through the same
  :meth:`ParquetReader.chunks` the local engine uses (``start_chunk=k``, first chunk taken),
  reading from the row group those rows start in (so row groups no larger than a chunk cost
  nothing extra). The driver reads nothing but footers.
* **FITS** binary tables are read on the workers the same way (:class:`FitsChunkTask`): chunk
  ``k`` is a byte range of the table's data (rows ``[k * chunk_rows, (k + 1) * chunk_rows)``
  of ``NAXIS1`` bytes each), so a worker reads only its rows; the driver reads only headers.
* **CSV** sources cannot be cut at row ``k * chunk_rows`` without parsing everything before it:
  which lines are set aside (and so where chunk ``k`` begins) is only known after parsing.
  The driver therefore streams a CSV through the same :class:`CsvReader` (one thread, ahead of
  the submissions) and ships each parsed chunk (an Arrow table plus its rejected rows) to a
  worker, which annotates and commits it. CSV throughput is bounded by the driver's parsing;
  convert very large CSV catalogues to Parquet once before a cluster run.

Why futures (``client.submit``) over chunk descriptors rather than a ``dask.dataframe``
---------------------------------------------------------------------------------------
A partition here has an identity that must survive: the part file of chunk ``k`` of source ``s``
is ``part-s-k``, is committed on its own and is recorded in the checkpoint as it lands.
``dask.dataframe`` would route every partition through pandas (Arrow string, dictionary and
nullable types do not round-trip unchanged, so bit-for-bit identity would be at risk), its
``to_parquet`` names and annotates files its own way, and a dataframe graph hands results back
all at once rather than part by part. A future per chunk keeps the part identity, lets the driver
record each commit as it completes (``as_completed``) and keeps the amount of work queued on the
scheduler bounded. The output schema is explicit: the pipeline carries ``plan.output_schema`` and
builds every table with it; nothing is inferred from a sample partition.

Shared context
--------------
The pipeline (configured annotators and their cosmology) pickles small: the cosmology drops its
tables when pickled. It is scattered once to every worker (``broadcast=True``); each worker
process prepares the first copy it sees (its tables are built on its first chunk) and keeps it,
by run, for every later chunk, even if Dask's memory manager drops the replica and the worker
fetches it again. Tasks are module-level functions with plain arguments (no locks, loggers or file
handles travel).

The output folder (and, for Parquet, the inputs) must be visible at the same path on the driver
and on every worker (a shared filesystem). Before any part is written, each worker checks that,
loads the job's code and annotates a small probe of the input, which the driver compares bit for
bit with its own: a worker running other code or libraries is named and the run stops.
"""

from __future__ import annotations

import hashlib
import math
import os
import pickle
import socket
import threading
import time
import uuid
from collections.abc import Iterator
from contextlib import ExitStack, contextmanager
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

from .. import __version__
from ..errors import ConfigError, InputError, OutputError, UserError
from ..io.readers import Chunk, ParquetReader, Source, open_reader, source_sha256
from ..pipeline import Pipeline
from ..provenance import file_sha256, now_iso, part_metadata
from .common import (CommitLog, committed_chunks, finish, prepare_output, process_chunk,
                     sole_writer)
from .local import _prefetch

#: How long to wait for workers to join an existing cluster (batch queues can be slow).
WORKER_WAIT_S = 300.0
#: Seconds to wait for the scheduler to answer.
CONNECT_TIMEOUT_S = 30.0
#: How long a new run waits for tasks of an earlier run on the same output folder that are
#: still running on the cluster (a driver that died leaves them; each finishes its one chunk).
EARLIER_TASKS_WAIT_S = 600.0
#: Tasks kept queued per worker thread: enough that no worker waits for the driver, few enough
#: that a 10^10-row job never puts tens of thousands of tasks (or, for CSV, chunks) in flight.
TASKS_PER_THREAD = 2
#: Parsed CSV chunks the driver keeps ready to send.
CSV_PREFETCH_CHUNKS = 8
#: Rows of the input that the driver and every worker annotate before the run, to compare.
PROBE_ROWS = 256

# Counters of this process when it is a worker: how many pipelines it prepared (built tables
# for) and how many chunks it committed. ``worker_stats`` reads them, e.g. through
# ``client.run(worker_stats)``; a pipeline prepared once per worker, not once per chunk, shows
# there.
_worker_counts = {"pipelines_prepared": 0, "chunks_committed": 0}
_prepare_lock = threading.Lock()
# Output folder -> chunks being written to it by this process right now.
_writing_to: dict[str, int] = {}


# --------------------------------------------------------------------- worker side

@dataclass(frozen=True)
class ParquetChunkTask:
    """Chunk ``index`` of a Parquet source: what a worker needs to read it by itself."""

    source: Source
    index: int
    chunk_rows: int
    target: pa.Schema

    def read(self) -> Chunk:
        return read_parquet_chunk(self.source, self.index, self.chunk_rows, self.target)


def read_parquet_chunk(source: Source, index: int, chunk_rows: int,
                       target: pa.Schema | None = None) -> Chunk:
    """Chunk ``index`` of a Parquet source, read on its own (rows from ``index * chunk_rows``).

    It is the chunk the sequential reader yields at position ``index``: the same reader code,
    started there.
    """
    if not Path(source.path).is_file():
        raise InputError(f"input {source.path}: not visible on host {socket.gethostname()} "
                         f"(the Dask engine needs the inputs on a filesystem every worker sees)")
    chunks = ParquetReader(source, checksum=False).chunks(chunk_rows, start_chunk=index,
                                                          target=target)
    try:
        chunk = next(chunks, None)
    finally:
        chunks.close()
    if chunk is None or chunk.index != index:
        raise InputError(f"input {source.path}: has no rows from row {index * chunk_rows} "
                         f"(chunk {index}); did the file change after the run was planned?")
    return chunk


@dataclass(frozen=True)
class FitsChunkTask:
    """Chunk ``index`` of a FITS binary table: read by the worker, as rows of the file."""

    source: Source
    index: int
    chunk_rows: int
    target: pa.Schema
    hdu: int | str | None = None

    def read(self) -> Chunk:
        if not Path(self.source.path).is_file():
            raise InputError(f"input {self.source.path}: not visible on host "
                             f"{socket.gethostname()} (the Dask engine needs the inputs on a "
                             f"filesystem every worker sees)")
        chunks = open_reader(self.source, hdu=self.hdu, checksum=False).chunks(
            self.chunk_rows, start_chunk=self.index, target=self.target)
        try:
            chunk = next(chunks, None)
        finally:
            chunks.close()
        if chunk is None or chunk.index != self.index:
            raise InputError(f"input {self.source.path}: has no rows from row "
                             f"{self.index * self.chunk_rows + 1} (chunk {self.index}); did "
                             f"the file change after the run was planned?")
        return chunk


#: Work a worker reads itself (a descriptor), as opposed to a parsed :class:`Chunk`.
READ_ON_WORKER = (ParquetChunkTask, FitsChunkTask)
#: Formats whose chunks the workers read themselves.
WORKER_READ_FORMATS = ("parquet", "fits")


@dataclass(frozen=True)
class SharedPipeline:
    """The job's pipeline as scattered to the workers, with the run it belongs to."""

    run_id: str
    pipeline: Pipeline


#: Per worker process: the prepared pipeline of the last few runs, by run. Dask's memory
#: manager may drop a scattered replica a worker holds and fetch it again later (a new
#: object); this keeps the first, prepared one, so tables are built once per process and run.
_prepared_pipelines: dict[str, Pipeline] = {}
_KEEP_PIPELINES = 4


def _prepared(shared: SharedPipeline) -> Pipeline:
    with _prepare_lock:  # a worker with several threads shares one pipeline
        pipeline = _prepared_pipelines.get(shared.run_id)
        if pipeline is None:
            pipeline = shared.pipeline
            pipeline.prepare()
            _worker_counts["pipelines_prepared"] += 1
            _prepared_pipelines[shared.run_id] = pipeline
            while len(_prepared_pipelines) > _KEEP_PIPELINES:
                _prepared_pipelines.pop(next(iter(_prepared_pipelines)))
        return pipeline


def annotate_and_commit(shared: SharedPipeline, work: Chunk | ParquetChunkTask | FitsChunkTask,
                        output_dir: str, compression: str) -> dict:
    """The task body: read the chunk if only its descriptor came, then ``process_chunk``.

    :return: the checkpoint record of the committed part.
    """
    out = Path(output_dir)
    if not out.is_dir():
        raise OutputError(f"output {out}: not visible on host {socket.gethostname()} (the Dask "
                          f"engine needs the output folder on a filesystem every worker sees)")
    with _prepare_lock:
        _writing_to[output_dir] = _writing_to.get(output_dir, 0) + 1
    try:
        chunk = work.read() if isinstance(work, READ_ON_WORKER) else work
        record = process_chunk(_prepared(shared), chunk, out, compression)
    finally:
        with _prepare_lock:
            _writing_to[output_dir] -= 1
            if not _writing_to[output_dir]:
                del _writing_to[output_dir]
    _worker_counts["chunks_committed"] += 1
    return record


def chunks_in_progress(output_dir: str) -> int:
    """How many chunks for ``output_dir`` this worker process is annotating or writing now.

    The scheduler forgets the tasks of a client that died, but a task already running goes on
    to the end on its worker; only the worker knows."""
    with _prepare_lock:
        return _writing_to.get(output_dir, 0)


def worker_stats() -> dict:
    """This process's counters (see ``_worker_counts``) and its peak resident memory."""
    import resource

    peak_kib = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
    return dict(_worker_counts, pid=os.getpid(), peak_rss_mib=round(peak_kib / 1024.0, 1))


def reset_worker_stats() -> None:
    for key in _worker_counts:
        _worker_counts[key] = 0
    _prepared_pipelines.clear()


def first_differing_column(a: pa.Table, b: pa.Table) -> str | None:
    """The first column whose type, nulls or values (floats bit for bit) differ; else None."""
    if a.schema.names != b.schema.names or a.num_rows != b.num_rows:
        return "(the columns or the number of rows)"
    for name in a.column_names:
        x, y = a.column(name).combine_chunks(), b.column(name).combine_chunks()
        if x.type != y.type or not x.is_null().equals(y.is_null()):
            return name
        if pa.types.is_floating(x.type):
            bits = np.dtype(f"u{x.type.bit_width // 8}")
            same = np.array_equal(np.asarray(x.fill_null(0)).view(bits),
                                  np.asarray(y.fill_null(0)).view(bits))
        else:
            same = x.equals(y)
        if not same:
            return name
    return None


def _worker_check(pipeline_blob: bytes, output_dir: str, inputs: list[str],
                  probe: pa.Table | None) -> dict:
    """Run on each worker before any work: can it load the job's code and see the files, and
    does it annotate a probe of the input exactly as the driver does?"""
    problem, annotated = None, None
    try:
        pipeline = pickle.loads(pipeline_blob)
    except Exception as exc:  # a plugin or a dependency missing on the worker
        pipeline = None
        problem = (f"cannot load the job's annotators ({type(exc).__name__}: {exc}); install "
                   f"the same annotator and plugin packages on every worker")
    if problem is None and not Path(output_dir).is_dir():
        problem = (f"cannot see the output folder {output_dir} (it must be on a filesystem "
                   f"shared by the driver and every worker)")
    if problem is None and not os.access(output_dir, os.W_OK):
        problem = f"cannot write to the output folder {output_dir}"
    if problem is None:
        for path in inputs:
            if not Path(path).is_file():
                problem = (f"cannot see input {path} (it must be on a filesystem shared by the "
                           f"driver and every worker)")
                break
    if problem is None and probe is not None:
        annotated = pipeline.annotate(probe)[0]
    return {"annotator": __version__, "host": socket.gethostname(), "problem": problem,
            "probe": annotated}


# --------------------------------------------------------------------- driver side

def _parquet_chunk_count(source: Source, chunk_rows: int) -> int:
    try:
        rows = pq.ParquetFile(source.path).metadata.num_rows
    except Exception as exc:
        raise InputError(f"input {source.path}: not a readable Parquet file: {exc}") from exc
    return math.ceil(rows / chunk_rows)


def pending_work(plan, done: dict[int, set[int]], checksums: dict[str, str] | None = None
                 ) -> Iterator[Chunk | ParquetChunkTask | FitsChunkTask]:
    """Every chunk not yet committed, source by source, in order: descriptors for Parquet
    and FITS (read on the workers), parsed chunks for CSV (read here).

    :param checksums: filled with the SHA-256 of each CSV source once its last chunk was
        read here (hashed while it was read, as the local engine does).
    """
    job = plan.job
    for source in plan.sources:
        skip = done.get(source.index, set())
        if source.format == "parquet":
            for k in range(_parquet_chunk_count(source, job.chunk_rows)):
                if k not in skip:
                    yield ParquetChunkTask(source, k, job.chunk_rows, plan.catalogue_schema)
            continue
        reader = open_reader(source, **job.reader_options())
        if source.format == "fits":
            for k in range(reader.chunk_count(job.chunk_rows)):
                if k not in skip:
                    yield FitsChunkTask(source, k, job.chunk_rows, plan.catalogue_schema,
                                        job.hdu)
            continue
        start = 0
        while start in skip:
            start += 1
        for chunk in reader.chunks(job.chunk_rows, start_chunk=start,
                                   target=plan.catalogue_schema):
            if chunk.index not in skip:
                yield chunk
        if checksums is not None:
            checksums[str(source.path)] = source_sha256(reader)


def _work_ids(work: Chunk | ParquetChunkTask | FitsChunkTask) -> tuple[int, int]:
    return work.source.index, work.index


def _import_distributed():
    try:
        import distributed
    except ImportError as exc:  # the optional extra is not installed
        raise ConfigError("--engine dask: the Dask packages are not installed "
                          "(pip install 'annotator[dask]')") from exc
    return distributed


@contextmanager
def connect(scheduler: str | None = None, workers: int | None = None):
    """A ``distributed.Client``: on the cluster at ``scheduler`` (an address such as
    ``tcp://host:8786``, or a scheduler file ``*.json``), or on a new local cluster of
    ``workers`` processes with one thread each. A cluster started here is closed on exit."""
    distributed = _import_distributed()
    if workers is not None and workers < 1:
        raise ConfigError(f"--workers: {workers} is not a number of workers (give 1 or more)")
    if scheduler is None:
        n = workers or os.cpu_count() or 1
        cluster = distributed.LocalCluster(n_workers=n, processes=True, threads_per_worker=1,
                                           dashboard_address=":0")
        try:
            with distributed.Client(cluster) as client:
                yield client
        finally:
            cluster.close()
        return
    try:
        if scheduler.endswith(".json"):
            if not Path(scheduler).is_file():
                raise ConfigError(f"--scheduler {scheduler}: no such scheduler file")
            client = distributed.Client(scheduler_file=scheduler, timeout=CONNECT_TIMEOUT_S)
        else:
            client = distributed.Client(scheduler, timeout=CONNECT_TIMEOUT_S)
    except UserError:
        raise
    except (OSError, TimeoutError, ValueError, TypeError) as exc:
        raise ConfigError(f"--scheduler {scheduler}: cannot connect to a Dask scheduler there "
                          f"({type(exc).__name__}: {exc})") from exc
    try:
        wanted = workers or 1
        try:
            client.wait_for_workers(wanted, timeout=WORKER_WAIT_S)
        except TimeoutError as exc:
            have = len(client.scheduler_info(n_workers=-1).get("workers", {}))
            raise ConfigError(f"--scheduler {scheduler}: {have} worker(s) connected, "
                              f"{wanted} wanted, after waiting {WORKER_WAIT_S:.0f} s") from exc
        yield client
    finally:
        client.close()


def _probe(plan) -> pa.Table | None:
    """The first rows of the first input: what the driver and each worker annotate to prove
    they compute the same thing (same code, same libraries) before any part is written."""
    job = plan.job
    for source in plan.sources:
        if source.format == "parquet":
            if _parquet_chunk_count(source, PROBE_ROWS):
                return read_parquet_chunk(source, 0, PROBE_ROWS, plan.catalogue_schema).table
            continue
        reader = open_reader(source, **job.reader_options())
        for chunk in reader.chunks(PROBE_ROWS, target=plan.catalogue_schema):
            return chunk.table
    return None


def _check_workers(client, pipeline: Pipeline, plan, output_dir: Path) -> None:
    inputs = [str(s.path) for s in plan.sources if s.format in WORKER_READ_FORMATS]
    probe = _probe(plan)
    expected = pipeline.annotate(probe)[0] if probe is not None else None
    try:
        answers = client.run(_worker_check, pickle.dumps(pipeline), str(output_dir), inputs,
                             probe)
    except Exception as exc:
        raise ConfigError(f"--engine dask: the workers cannot run annotator's code "
                          f"({type(exc).__name__}: {exc}); install the same annotator and "
                          f"plugin packages on every worker") from exc
    for address, answer in sorted(answers.items()):
        where = f"Dask worker {address} on {answer['host']}"
        if answer["problem"]:
            raise ConfigError(f"{where}: {answer['problem']}")
        if answer["annotator"] != __version__:
            raise ConfigError(f"{where}: runs annotator {answer['annotator']}, this driver "
                              f"{__version__}; the results would not be those of one version "
                              f"(install the same everywhere)")
        if expected is not None:
            column = first_differing_column(expected, answer["probe"])
            if column is not None:
                raise ConfigError(
                    f"{where}: annotates the first {probe.num_rows} rows of the input "
                    f"differently from this driver (column {column!r}); it runs other code or "
                    f"libraries (install the same annotator, plugins, numpy and scipy on the "
                    f"driver and every worker, and restart workers after an upgrade)")


def output_tag(output_dir: Path) -> str:
    """Part of every task key: which output folder the task writes to (as the dashboard and
    the scheduler's logs show it)."""
    return hashlib.sha1(str(output_dir).encode()).hexdigest()[:10]


def _wait_for_earlier_tasks(client, output_dir: Path) -> None:
    """Let chunks of an earlier run on this folder finish before this run touches it.

    When a driver dies, the scheduler drops its tasks, but a task already running goes on and
    commits its part. A resumed run must not clear the temporaries of, or write, the same parts
    meanwhile; so it asks every worker, and waits."""
    deadline = time.monotonic() + EARLIER_TASKS_WAIT_S
    while True:
        busy = {address: n for address, n in
                client.run(chunks_in_progress, str(output_dir)).items() if n}
        if not busy:
            return
        if time.monotonic() > deadline:
            address, n = sorted(busy.items())[0]
            raise ConfigError(f"--engine dask: {sum(busy.values())} chunk(s) of an earlier run "
                              f"on {output_dir} are still being written on the cluster after "
                              f"{EARLIER_TASKS_WAIT_S:.0f} s (e.g. {n} on worker {address}); "
                              f"restart those workers, then resume again")
        time.sleep(0.2)


class _RecordsInOrder:
    """The checkpoint log, its records read in (source, chunk) order.

    Workers commit parts in whatever order they finish; the manifest lists them in the order
    the local engine commits them, so the two manifests are the same."""

    def __init__(self, log):
        self._log = log

    def records(self) -> list[dict]:
        return sorted(self._log.records(), key=lambda r: (r["source"], r["chunk"]))

    def append(self, record: dict) -> None:
        self._log.append(record)


def _died_error(exc: Exception, key: str) -> UserError:
    part = "part-" + key.split("-part-", 1)[-1] + ".parquet"
    return ConfigError(f"--engine dask: the workers running part {part} died repeatedly "
                       f"({exc}); most often a worker runs out of memory: give each worker "
                       f"more memory or lower [output].chunk_rows. Committed parts are kept; "
                       f"rerun with --resume")


def run_dask(plan, *, progress=None, resume: bool = False, scheduler: str | None = None,
             workers: int | None = None, cancel: threading.Event | None = None) -> dict:
    """Run a plan on a Dask cluster; return the manifest (engine ``"dask"``).

    :param scheduler: address (or scheduler file) of an existing cluster; without one a local
        cluster of ``workers`` processes (default: one per CPU) is started and closed again.
    :param workers: with ``scheduler``, how many workers to wait for before starting.
    :param progress: called with a :class:`Progress` after each committed part.
    :param resume: keep the parts a previous run of the same job committed, on any engine.
    :param cancel: a ``threading.Event``; when set, no new chunk is started.
    """
    distributed = _import_distributed()
    job = plan.job
    started_at, t0 = now_iso(), time.perf_counter()
    if job.output_dir is None:  # said before a cluster is started or reached
        raise OutputError("no output folder: give --out DIR or [output].dir")
    out = Path(job.output_dir).resolve()
    with connect(scheduler, workers) as client, ExitStack() as hold:
        _wait_for_earlier_tasks(client, out)
        hold.enter_context(sole_writer(out))  # for the rest of the run
        log = prepare_output(plan, resume=resume)
        metadata = part_metadata(plan)
        pipeline = Pipeline.from_plan(plan, metadata)
        _check_workers(client, pipeline, plan, out)
        records = log.records()
        done = committed_chunks(records)
        commits = CommitLog(log, records, plan.estimated_rows, progress)
        run_id = f"{output_tag(out)}-{uuid.uuid4().hex[:8]}"
        shared = client.scatter(SharedPipeline(run_id, pipeline), broadcast=True, hash=False)
        # Workers read Parquet and FITS chunks in parallel, each its own byte range, so no one
        # reads the whole file in order: one task per such file hashes it (a second read).
        # CSV is read here, in order, and hashed as it is read (``csv_sums``).
        sums = {str(s.path): client.submit(file_sha256, s.path, key=f"annotator-{run_id}-sha256-"
                                           f"{s.index:05d}", pure=False)
                for s in plan.sources if s.format in WORKER_READ_FORMATS}
        csv_sums: dict[str, str] = {}
        threads = max(sum(client.nthreads().values()), 1)
        window = TASKS_PER_THREAD * threads
        work = pending_work(plan, done, csv_sums)
        if any(s.format not in WORKER_READ_FORMATS for s in plan.sources):
            # parse CSV ahead while the driver waits (bounded: the driver's memory)
            work = _prefetch(work, depth=min(window, CSV_PREFETCH_CHUNKS))
        # as_completed() alone would track the futures on the default client's loop, which need not
        # be this client's (a second client in the process): a result lost with its worker and
        # recomputed would then wait on the wrong loop.
        finished = distributed.as_completed(loop=client.loop)
        in_flight: dict[str, object] = {}
        exhausted = False

        def top_up() -> None:
            nonlocal exhausted
            while not exhausted and len(in_flight) < window:
                if cancel is not None and cancel.is_set():
                    exhausted = True
                    return
                item = next(work, None)
                if item is None:
                    exhausted = True
                    return
                s, k = _work_ids(item)
                if isinstance(item, Chunk):
                    # Parsed rows go straight to a worker, not through the scheduler inside
                    # the task; the task then runs where they are.
                    item = client.scatter(item, hash=False)
                future = client.submit(annotate_and_commit, shared, item, str(out),
                                       job.compression, key=f"annotator-{run_id}-part-"
                                       f"{s:05d}-{k:06d}", pure=False)
                in_flight[future.key] = future
                finished.add(future)

        try:
            top_up()
            for future in finished:
                in_flight.pop(future.key, None)
                try:
                    record = future.result()
                except distributed.KilledWorker as exc:
                    raise _died_error(exc, str(future.key)) from exc
                commits.commit(record)
                top_up()
        except BaseException:
            # Record what is already committed, so --resume redoes as little as possible;
            # tasks still running may commit their part too, which resume rewrites identically.
            for future in list(in_flight.values()):
                if future.status == "finished":
                    try:
                        log.append(future.result())
                    except Exception:
                        pass
                else:
                    future.cancel()
            for future in sums.values():
                future.cancel()
            raise
        finally:
            if hasattr(work, "close"):
                work.close()
        if cancel is not None and cancel.is_set():
            for future in sums.values():
                future.cancel()
            raise UserError("run cancelled")
        checksums = {path: future.result() for path, future in sums.items()} | csv_sums
        del shared
        return finish(plan, _RecordsInOrder(log), started_at=started_at,
                      elapsed_s=time.perf_counter() - t0, engine="dask", checksums=checksums,
                      metadata=metadata)
