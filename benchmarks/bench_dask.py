"""Dask engine throughput with 1 and 2 workers, the local engine beside it, in the same run.

The same job (every built-in annotator, Parquet -> Parquet) runs on the local engine, then on
a LocalCluster of 1 and of 2 worker processes (one thread each). The cluster's start-up is timed
apart from the run; the table shows both. Then the figures the on-paper scaling estimate needs:

* compute: ``Pipeline.annotate`` alone on a chunk already in memory (rows/s on one core);
* I/O: reading the input chunk and writing the annotated part with pyarrow, no annotation;
* scheduler: the cost per task of an empty task submitted and gathered the way the engine
  does it (``client.submit`` + ``as_completed``).

    python benchmarks/bench_dask.py                  # 2 M rows
    python benchmarks/bench_dask.py --rows 10000000 --repeat 3   # the issue's 10 M rows
    python benchmarks/bench_dask.py --rows 200000 --csv-rows 0   # quick
"""

from __future__ import annotations

import argparse
import os
import shutil
import statistics
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


def _warmup_input(src: Path) -> Path:
    import pyarrow.parquet as pq

    path = DATA / "bench_dask_warmup.parquet"
    if not path.exists():
        pq.write_table(pq.ParquetFile(src).read_row_group(0).slice(0, 10_000), path)
    return path


def _round(args, src: Path, results: dict, scheduler_cost: dict, peaks: dict,
           starts: dict, warmups: dict) -> None:
    """One run of every configuration, appended to ``results`` (seconds per configuration)."""
    from distributed import Client, LocalCluster

    from annotator.engines.dask import reset_worker_stats, worker_stats

    counts = [int(w) for w in args.workers.split(",")]
    t, _ = _run(src, OUT / "dask_bench_local", args.chunk_rows, "local")
    results.setdefault("local", []).append(t)
    csv = None
    if args.csv_rows:
        csv = synthetic_catalogue(DATA / f"bench_{args.csv_rows}.csv", args.csv_rows, fmt="csv")
        t, _ = _run(csv, OUT / "dask_bench_csv_local", args.chunk_rows, "local")
        results.setdefault("csv local", []).append(t)
    for n in counts:
        t = time.perf_counter()
        with LocalCluster(n_workers=n, processes=True, threads_per_worker=1,
                          dashboard_address=":0") as cluster, Client(cluster) as client:
            starts.setdefault(n, []).append(time.perf_counter() - t)
            # The first job on fresh workers pays their imports (about 1 s); time it apart so
            # the rows/s below are the steady state a long run sees.
            t, _ = _run(_warmup_input(src), OUT / "dask_bench_warmup", args.chunk_rows, "dask",
                        scheduler=cluster.scheduler_address)
            warmups.setdefault(n, []).append(t)
            client.run(reset_worker_stats)
            t, manifest = _run(src, OUT / f"dask_bench_{n}", args.chunk_rows, "dask",
                               scheduler=cluster.scheduler_address)
            assert manifest["rows_written"] == args.rows
            results.setdefault(f"dask {n}", []).append(t)
            peaks[n] = max([peaks.get(n, 0.0)] + [s["peak_rss_mib"] for s in
                                                  client.run(worker_stats).values()])
            if n == max(counts) and args.row_group_rows:
                import pyarrow.parquet as pq

                coarse = DATA / f"bench_{args.rows}_rg{args.row_group_rows}.parquet"
                if not coarse.exists():
                    pq.write_table(pq.read_table(src), coarse, compression="zstd",
                                   row_group_size=args.row_group_rows)
                t, _ = _run(coarse, OUT / "dask_bench_coarse", args.chunk_rows, "dask",
                            scheduler=cluster.scheduler_address)
                results.setdefault(f"dask {n} coarse", []).append(t)
            if n == max(counts) and csv is not None:
                t, _ = _run(csv, OUT / "dask_bench_csv", args.chunk_rows, "dask",
                            scheduler=cluster.scheduler_address)
                results.setdefault(f"csv dask {n}", []).append(t)
            scheduler_cost.setdefault(n, []).append(_scheduler_cost(client))
        for d in OUT.glob("dask_bench_*"):
            shutil.rmtree(d, ignore_errors=True)


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--rows", type=int, default=2_000_000, help="catalogue rows (default 2 M)")
    ap.add_argument("--chunk-rows", type=int, default=250_000)
    ap.add_argument("--workers", default="1,2", help="comma-separated worker counts")
    ap.add_argument("--csv-rows", type=int, default=500_000,
                    help="also time a CSV input of this many rows (0: skip)")
    ap.add_argument("--row-group-rows", type=int, default=0,
                    help="also time the largest cluster on a copy with row groups of this "
                         "size (e.g. 1048576, to see the cost of chunks that cut row groups)")
    ap.add_argument("--repeat", type=int, default=1,
                    help="rounds of every configuration, interleaved (best and median shown; "
                         "on a shared machine use 3)")
    ap.add_argument("--codec", default="zstd")
    args = ap.parse_args()

    src = synthetic_catalogue(DATA / f"bench_{args.rows}.parquet", args.rows)
    load = os.getloadavg()[0]
    results: dict[str, list[float]] = {}
    scheduler_cost: dict[int, list] = {}
    peaks: dict[int, float] = {}
    starts: dict[int, list[float]] = {}
    warmups: dict[int, list[float]] = {}
    for _ in range(args.repeat):
        _round(args, src, results, scheduler_cost, peaks, starts, warmups)
    print(f"input: {src.name}, {args.rows:,} rows, {src.stat().st_size / 1e6:.0f} MB, "
          f"chunk_rows {args.chunk_rows:,}; {os.cpu_count()} CPUs, load average "
          f"{load:.1f} before, {os.getloadavg()[0]:.1f} after; {args.repeat} round(s)")
    print("start s: cluster start + first small job (the workers' imports), median")
    print(f"{'engine':<26} {'start s':>8} {'best s':>8} {'median s':>9} {'rows/s (best)':>14} "
          f"{'vs local':>9} {'worker peak MiB':>16}")
    best_local = min(results["local"])

    def row(label, times, rows, start="-", peak="-", reference=best_local):
        print(f"{label:<26} {start:>8} {min(times):>8.2f} {statistics.median(times):>9.2f} "
              f"{rows / min(times):>14,.0f} {reference / min(times):>9.2f} {peak:>16}",
              flush=True)

    row("local", results["local"], args.rows)
    for n in sorted(starts):
        row(f"dask, {n} worker(s)", results[f"dask {n}"], args.rows,
            f"{statistics.median(starts[n]):.1f}+{statistics.median(warmups[n]):.1f}",
            f"{peaks[n]:.0f}")
        if f"dask {n} coarse" in results:
            row(f"  row groups {args.row_group_rows:,}", results[f"dask {n} coarse"], args.rows)
    if "csv local" in results:
        best_csv = min(results["csv local"])
        row(f"CSV {args.csv_rows:,}: local", results["csv local"], args.csv_rows,
            reference=best_csv)
        for key in [k for k in results if k.startswith("csv dask")]:
            row(f"CSV {args.csv_rows:,}: {key[4:]} workers", results[key], args.csv_rows,
                reference=best_csv)

    f = _compute_and_io(src, args.chunk_rows, args.codec)
    print("\nper core, chunks of {:,} rows (inputs for the scaling estimate):".format(
        args.chunk_rows))
    print(f"  annotate (compute only)   {f['rows'] / f['annotate_s']:>12,.0f} rows/s")
    print(f"  read input chunk          {f['rows'] / f['read_s']:>12,.0f} rows/s  "
          f"({f['in_bytes_per_row']:.1f} bytes/row on disk)")
    print(f"  write annotated part      {f['rows'] / f['write_s']:>12,.0f} rows/s  "
          f"({f['out_bytes_per_row']:.1f} bytes/row on disk)")
    for n, costs in scheduler_cost.items():
        at_once = min(c[0] for c in costs)
        windowed = min(c[1] for c in costs)
        print(f"  scheduler, empty tasks    {at_once * 1e3:>9.2f} ms per task submitted at once, "
              f"{windowed * 1e3:.2f} ms in the engine's window ({n} worker(s))")


if __name__ == "__main__":
    main()
