"""Dask engine throughput with 1 and 2 workers, the local engine beside it, in the same run.

The same job (every built-in annotator, Parquet -> Parquet) runs on the local engine, then on
a LocalCluster of 1 and of 2 worker processes (one thread each). The cluster's start-up is timed
apart from the run; the table shows both. Then the figures the on-paper scaling estimate needs:

* compute: ``Pipeline.annotate`` alone on a chunk already in memory (rows/s on one core);
* I/O: reading the input chunk and writing the annotated part with pyarrow, no annotation;
* scheduler: the cost per task of an empty task submitted and gathered the way the engine
  does it (``client.submit`` + ``as_completed``).

    python benchmarks/bench_dask.py                  # 2 M rows
    python benchmarks/bench_dask.py --rows 10000000  # the issue's 10 M rows
    python benchmarks/bench_dask.py --rows 200000 --csv-rows 0   # quick
"""

from __future__ import annotations

import argparse
import shutil
import sys
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent))

from _common import DATA, OUT, synthetic_catalogue  # noqa: E402


def _plan(src: Path, out: Path, chunk_rows: int):
    from annotator.config import job_from_mapping
    from annotator.plan import build_plan

    job = job_from_mapping({"output": {"chunk_rows": chunk_rows, "overwrite": True}},
                           inputs=[str(src)], output_dir=str(out))
    return build_plan(job)


def _run(src: Path, out: Path, chunk_rows: int, engine: str, **options) -> tuple[float, dict]:
    from annotator.runner import run_plan

    shutil.rmtree(out, ignore_errors=True)
    plan = _plan(src, out, chunk_rows)
    t = time.perf_counter()
    manifest = run_plan(plan, engine=engine, engine_options=options or None)
    return time.perf_counter() - t, manifest


def _noop(i: int) -> int:
    return i


def _scheduler_cost(client, n: int = 400) -> tuple[float, float]:
    """Seconds per empty task: (a) all submitted at once (the scheduler's throughput), (b) in
    the engine's bounded window, one gathered before the next is sent (its latency)."""
    from distributed import as_completed, wait

    t = time.perf_counter()
    wait(client.map(_noop, range(n), pure=False))
    at_once = (time.perf_counter() - t) / n
    window = 2 * max(sum(client.nthreads().values()), 1)
    t = time.perf_counter()
    pending = as_completed(loop=client.loop)
    submitted = 0
    while submitted < min(window, n):
        pending.add(client.submit(_noop, submitted, pure=False))
        submitted += 1
    for future in pending:
        future.result()
        if submitted < n:
            pending.add(client.submit(_noop, submitted, pure=False))
            submitted += 1
    return at_once, (time.perf_counter() - t) / n


def _compute_and_io(src: Path, chunk_rows: int, codec: str) -> dict:
    """One core: annotate chunks already in memory; read + write the same chunks unannotated."""
    import pyarrow.parquet as pq

    from annotator.engines.dask import read_parquet_chunk
    from annotator.io.writer import write_parquet_atomic
    from annotator.pipeline import Pipeline
    from annotator.provenance import part_metadata

    scratch = OUT / "dask_io_floor"
    shutil.rmtree(scratch, ignore_errors=True)
    scratch.mkdir(parents=True)
    plan = _plan(src, scratch / "unused", chunk_rows)
    pipeline = Pipeline.from_plan(plan, part_metadata(plan))
    pipeline.prepare()
    n_chunks = min(4, -(-pq.ParquetFile(src).metadata.num_rows // chunk_rows))
    t_read = t_annotate = t_write = 0.0
    rows = in_bytes = out_bytes = 0
    for k in range(n_chunks):
        t = time.perf_counter()
        chunk = read_parquet_chunk(plan.sources[0], k, chunk_rows, plan.catalogue_schema)
        t_read += time.perf_counter() - t
        t = time.perf_counter()
        annotated, _, _ = pipeline.annotate(chunk.table)
        t_annotate += time.perf_counter() - t
        t = time.perf_counter()
        out_bytes += write_parquet_atomic(annotated, scratch / f"p{k}.parquet",
                                          compression=codec, metadata=pipeline.schema_metadata)
        t_write += time.perf_counter() - t
        rows += chunk.table.num_rows
    in_bytes = src.stat().st_size * rows / pq.ParquetFile(src).metadata.num_rows
    shutil.rmtree(scratch, ignore_errors=True)
    return {"rows": rows, "read_s": t_read, "annotate_s": t_annotate, "write_s": t_write,
            "in_bytes_per_row": in_bytes / rows, "out_bytes_per_row": out_bytes / rows}


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--rows", type=int, default=2_000_000, help="catalogue rows (default 2 M)")
    ap.add_argument("--chunk-rows", type=int, default=250_000)
    ap.add_argument("--workers", default="1,2", help="comma-separated worker counts")
    ap.add_argument("--csv-rows", type=int, default=500_000,
                    help="also time a CSV input of this many rows (0: skip)")
    ap.add_argument("--row-group-rows", type=int, default=0,
                    help="also time the 2-worker run on a copy with row groups of this size "
                         "(e.g. 1048576, to see the cost of chunks that cut row groups)")
    ap.add_argument("--codec", default="zstd")
    args = ap.parse_args()

    from distributed import Client, LocalCluster

    from annotator.engines.dask import reset_worker_stats, worker_stats

    src = synthetic_catalogue(DATA / f"bench_{args.rows}.parquet", args.rows)
    print(f"input: {src.name}, {args.rows:,} rows, {src.stat().st_size / 1e6:.0f} MB, "
          f"chunk_rows {args.chunk_rows:,}")
    print(f"{'engine':<22} {'start s':>8} {'run s':>8} {'rows/s':>12} {'speed-up':>9} "
          f"{'worker peak MiB':>16}")
    t_local, _ = _run(src, OUT / "dask_bench_local", args.chunk_rows, "local")
    print(f"{'local':<22} {'-':>8} {t_local:>8.2f} {args.rows / t_local:>12,.0f} "
          f"{1.0:>9.2f} {'-':>16}", flush=True)
    scheduler_cost = {}
    for n in [int(w) for w in args.workers.split(",")]:
        t = time.perf_counter()
        with LocalCluster(n_workers=n, processes=True, threads_per_worker=1,
                          dashboard_address=":0") as cluster, Client(cluster) as client:
            t_start = time.perf_counter() - t
            client.run(reset_worker_stats)
            t_run, manifest = _run(src, OUT / f"dask_bench_{n}", args.chunk_rows, "dask",
                                   scheduler=cluster.scheduler_address)
            assert manifest["rows_written"] == args.rows
            peaks = [s["peak_rss_mib"] for s in client.run(worker_stats).values()]
            print(f"{'dask, ' + str(n) + ' worker(s)':<22} {t_start:>8.2f} {t_run:>8.2f} "
                  f"{args.rows / t_run:>12,.0f} {t_local / t_run:>9.2f} "
                  f"{max(peaks):>16.0f}", flush=True)
            if n == max(int(w) for w in args.workers.split(",")) and args.row_group_rows:
                import pyarrow.parquet as pq

                coarse = DATA / f"bench_{args.rows}_rg{args.row_group_rows}.parquet"
                if not coarse.exists():
                    pq.write_table(pq.read_table(src), coarse, compression="zstd",
                                   row_group_size=args.row_group_rows)
                t_coarse, _ = _run(coarse, OUT / "dask_bench_coarse", args.chunk_rows, "dask",
                                   scheduler=cluster.scheduler_address)
                label = f"  row groups {args.row_group_rows:,}"
                print(f"{label:<22} {'':>8} {t_coarse:>8.2f} {args.rows / t_coarse:>12,.0f} "
                      f"{t_local / t_coarse:>9.2f}", flush=True)
            if args.csv_rows and n == max(int(w) for w in args.workers.split(",")):
                csv = synthetic_catalogue(DATA / f"bench_{args.csv_rows}.csv", args.csv_rows,
                                          fmt="csv")
                t_csv_local, _ = _run(csv, OUT / "dask_bench_csv_local", args.chunk_rows,
                                      "local")
                t_csv, _ = _run(csv, OUT / "dask_bench_csv", args.chunk_rows, "dask",
                                scheduler=cluster.scheduler_address)
                print(f"CSV input, {args.csv_rows:,} rows (parsed by the driver): local "
                      f"{args.csv_rows / t_csv_local:,.0f} rows/s, dask {n} workers "
                      f"{args.csv_rows / t_csv:,.0f} rows/s", flush=True)
            scheduler_cost[n] = _scheduler_cost(client)
        for d in OUT.glob("dask_bench_*"):
            shutil.rmtree(d, ignore_errors=True)

    f = _compute_and_io(src, args.chunk_rows, args.codec)
    print("\nper core, chunks of {:,} rows (inputs for the scaling estimate):".format(
        args.chunk_rows))
    print(f"  annotate (compute only)   {f['rows'] / f['annotate_s']:>12,.0f} rows/s")
    print(f"  read input chunk          {f['rows'] / f['read_s']:>12,.0f} rows/s  "
          f"({f['in_bytes_per_row']:.1f} bytes/row on disk)")
    print(f"  write annotated part      {f['rows'] / f['write_s']:>12,.0f} rows/s  "
          f"({f['out_bytes_per_row']:.1f} bytes/row on disk)")
    for n, (at_once, windowed) in scheduler_cost.items():
        print(f"  scheduler, empty tasks    {at_once * 1e3:>9.2f} ms per task submitted at once, "
              f"{windowed * 1e3:.2f} ms in the engine's window ({n} worker(s))")


if __name__ == "__main__":
    main()
