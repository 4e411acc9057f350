"""Pipeline throughput and memory against the I/O floor, measured in the same run.

For each catalogue size, in interleaved rounds (best and median reported):

* ``annotator run`` Parquet -> Parquet with every built-in annotator and two part writers
  (the default), and with one part writer (``ANNOTATOR_WRITER_THREADS=1``, the previous engine);
* the I/O floor: read the annotated output and write it again with pyarrow in one thread, same
  codec and encoding options, no annotation (a single-writer copy of the same bytes).

Peak memory is each process's own maximum RSS; CPU is its user + system time.
``--encodings`` also compares, on one annotated part, the float encodings the writer could use
(plain vs BYTE_STREAM_SPLIT, with zstd): bytes per row, write time, and read time by pyarrow
and by DuckDB.

    python benchmarks/bench_pipeline.py                     # 5 M and 20 M rows
    python benchmarks/bench_pipeline.py --rows 200000 --rounds 1   # quick
    python benchmarks/bench_pipeline.py --start-up                 # start-up only
    python benchmarks/bench_pipeline.py --checksum                 # checksum while reading
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

from _common import DATA, OUT, annotator_cmd, measured, python_cmd, synthetic_catalogue  # noqa

IO_FLOOR = r"""
import sys, glob, os
import pyarrow.parquet as pq
from annotator.io.writer import parquet_write_options
src, dst, codec = sys.argv[1], sys.argv[2], sys.argv[3]
os.makedirs(dst, exist_ok=True)
for i, path in enumerate(sorted(glob.glob(os.path.join(src, "part-*.parquet")))):
    table = pq.read_table(path)
    pq.write_table(table, os.path.join(dst, f"copy-{i:06d}.parquet"),
                   row_group_size=table.num_rows, **parquet_write_options(table.schema, codec))
"""


def _run(src: Path, out: Path, chunk_rows: int, writers: int,
         env: dict | None = None) -> tuple[float, float, float]:
    shutil.rmtree(out, ignore_errors=True)
    env = dict(os.environ if env is None else env, ANNOTATOR_WRITER_THREADS=str(writers))
    return measured(annotator_cmd("run", str(src), "--out", str(out), "--quiet",
                                  "--chunk-rows", str(chunk_rows)), env=env, cpu=True)


def pipeline(rows: int, rounds: int, chunk_rows: int, codec: str) -> None:
    src = synthetic_catalogue(DATA / f"bench_{rows}.parquet", rows)
    out = OUT / f"pipeline_{rows}"
    copy = OUT / f"pipeline_{rows}_copy"
    times: dict[str, list[tuple[float, float, float]]] = {"two writers": [], "one writer": [],
                                                          "I/O floor": []}
    for _ in range(rounds):
        times["one writer"].append(_run(src, out, chunk_rows, 1))
        times["two writers"].append(_run(src, out, chunk_rows, 2))
        shutil.rmtree(copy, ignore_errors=True)
        times["I/O floor"].append(measured(python_cmd(IO_FLOOR, str(out), str(copy), codec),
                                           cpu=True))
    size = sum(p.stat().st_size for p in out.glob("part-*.parquet"))
    shutil.rmtree(copy, ignore_errors=True)
    shutil.rmtree(out, ignore_errors=True)
    floor_best = min(t for t, _, _ in times["I/O floor"])
    floor_median = statistics.median(t for t, _, _ in times["I/O floor"])
    print(f"\n{rows:,} rows, chunks of {chunk_rows:,}, {rounds} interleaved rounds; output "
          f"{size / rows:.1f} bytes/row; load average "
          f"{', '.join(f'{v:.1f}' for v in os.getloadavg())}")
    print(f"  {'':<12} {'best s':>8} {'median s':>9} {'rows/s':>11} {'CPU s':>7} "
          f"{'peak MiB':>9} {'best/floor':>10} {'median/floor':>12}")
    for label, runs in times.items():
        walls = [t for t, _, _ in runs]
        best, median = min(walls), statistics.median(walls)
        cpu = min(c for _, _, c in runs)
        peak = max(p for _, p, _ in runs)
        print(f"  {label:<12} {best:>8.2f} {median:>9.2f} {rows / best:>11,.0f} {cpu:>7.2f} "
              f"{peak:>9.0f} {best / floor_best:>10.2f} {median / floor_median:>12.2f}",
              flush=True)


ENCODINGS = r"""
import glob, io, sys, time
import duckdb, pyarrow as pa, pyarrow.parquet as pq
from annotator.io.writer import parquet_write_options
part = sorted(glob.glob(sys.argv[1] + "/part-*.parquet"))[0]
table = pq.read_table(part)
floats = [f.name for f in table.schema if pa.types.is_floating(f.type)]
con = duckdb.connect()
sums = ", ".join(f'sum("{c}")' for c in floats)
print(f"  one part of {table.num_rows:,} rows, {len(floats)} float columns of {table.num_columns}")
print(f"  {'float encoding':<28} {'bytes/row':>9} {'write ms':>9} {'pyarrow read ms':>16} "
      f"{'DuckDB scan ms':>15}")
for label, bss in (("plain (previous)", False), ("BYTE_STREAM_SPLIT (chosen)", floats)):
    opts = dict(parquet_write_options(table.schema, "zstd"), use_byte_stream_split=bss)
    w = r = d = 1e9
    for _ in range(5):
        buf = io.BytesIO()
        t = time.perf_counter(); pq.write_table(table, buf, row_group_size=table.num_rows, **opts)
        w = min(w, time.perf_counter() - t)
        data = buf.getvalue()
        t = time.perf_counter(); pq.read_table(pa.BufferReader(data)); r = min(r, time.perf_counter() - t)
    path = sys.argv[2] + f"/enc_{bool(bss)}.parquet"
    open(path, "wb").write(data)
    for _ in range(5):
        t = time.perf_counter(); con.execute(f"SELECT {sums} FROM read_parquet('{path}')").fetchall()
        d = min(d, time.perf_counter() - t)
    print(f"  {label:<28} {len(data) / table.num_rows:>9.1f} {w * 1e3:>9.1f} {r * 1e3:>16.1f} "
          f"{d * 1e3:>15.1f}")
"""


def encodings(chunk_rows: int) -> None:
    rows = chunk_rows
    src = synthetic_catalogue(DATA / f"bench_{rows}.parquet", rows)
    out = OUT / "pipeline_encodings"
    _run(src, out, chunk_rows, 2)
    print("\nfloat encodings (best of 5 each):")
    import subprocess

    subprocess.run(python_cmd(ENCODINGS, str(out), str(OUT)), check=True)
    shutil.rmtree(out, ignore_errors=True)
    for p in OUT.glob("enc_*.parquet"):
        p.unlink()


def start_up(repeats: int = 7) -> None:
    """``annotator run`` on a 1 000-row file: almost all of it is start-up (imports, plan).

    Measured as an installed package runs: with its modules' bytecode cached (pip compiles
    it at install), so ``PYTHONDONTWRITEBYTECODE`` is dropped and one first run, not
    counted, writes what is missing.
    """
    src = synthetic_catalogue(DATA / "bench_1000.parquet", 1_000)
    out = OUT / "pipeline_start_up"
    env = {k: v for k, v in os.environ.items() if k != "PYTHONDONTWRITEBYTECODE"}
    _run(src, out, 250_000, 2, env)
    runs = [_run(src, out, 250_000, 2, env) for _ in range(repeats)]
    shutil.rmtree(out, ignore_errors=True)
    walls = sorted(t for t, _, _ in runs)
    cpus = sorted(c for _, _, c in runs)
    print(f"\nstart-up: annotator run on 1 000 rows, {repeats} runs: best {walls[0]:.2f} s, "
          f"median {statistics.median(walls):.2f} s wall; CPU best {cpus[0]:.2f} s, median "
          f"{statistics.median(cpus):.2f} s; load average "
          f"{', '.join(f'{v:.1f}' for v in os.getloadavg())}")


CHECKSUM_READ = r"""
import sys, time
import pyarrow.parquet as pq
from annotator.io.parquet import ParquetReader
from annotator.io.readers import Source
from annotator.provenance import file_sha256
path, repeats = sys.argv[1], int(sys.argv[2])
source = Source(0, __import__("pathlib").Path(path), "parquet", 0)

def native():  # the reader as it was, without any checksum
    f = pq.ParquetFile(path, pre_buffer=False, page_checksum_verification=True)
    for _ in f.iter_batches(batch_size=250_000):
        pass

def one_pass():  # the reader now: hashed while read
    r = ParquetReader(source)
    for _ in r.chunks(250_000):
        pass
    r.sha256()

def two_reads():  # the previous engine's work: the read, and a second read to hash
    native()
    file_sha256(path)

print(f"  {'':<44} {'best ms':>8} {'CPU ms':>8}")
for label, fn in (("read, no checksum", native), ("read + hash in the same pass (now)", one_pass),
                  ("read, then file_sha256 (before, one thread)", two_reads),
                  ("file_sha256 alone (before: its own thread)", lambda: file_sha256(path))):
    wall = cpu = 1e9
    for _ in range(repeats):
        t, c = time.perf_counter(), time.process_time()
        fn()
        wall, cpu = min(wall, time.perf_counter() - t), min(cpu, time.process_time() - c)
    print(f"  {label:<44} {wall * 1e3:>8.0f} {cpu * 1e3:>8.0f}")
"""


def checksum_read(rows: int = 2_000_000, repeats: int = 5) -> None:
    """Reading a Parquet input with its SHA-256 taken in the same pass, against the read
    alone and against the read plus a second read to hash it (the previous engine)."""
    import subprocess

    src = synthetic_catalogue(DATA / f"bench_{rows}.parquet", rows)
    print(f"\nParquet read with the input checksum, {rows:,} rows, "
          f"{src.stat().st_size / 2**20:.0f} MiB, best of {repeats}; load average "
          f"{', '.join(f'{v:.1f}' for v in os.getloadavg())}")
    subprocess.run(python_cmd(CHECKSUM_READ, str(src), str(repeats)), check=True)


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--rows", default="5000000,20000000",
                    help="comma-separated catalogue sizes (default 5 M and 20 M)")
    ap.add_argument("--rounds", type=int, default=3)
    ap.add_argument("--chunk-rows", type=int, default=250_000)
    ap.add_argument("--codec", default="zstd")
    ap.add_argument("--no-encodings", action="store_true")
    ap.add_argument("--start-up", action="store_true",
                    help="only the start-up measurement (annotator run on 1 000 rows)")
    ap.add_argument("--checksum", action="store_true",
                    help="only the Parquet read with the input checksum in the same pass")
    args = ap.parse_args()
    t0 = time.perf_counter()
    if args.start_up or args.checksum:
        if args.start_up:
            start_up()
        if args.checksum:
            checksum_read()
        return
    for rows in [int(r) for r in args.rows.split(",")]:
        pipeline(rows, args.rounds, args.chunk_rows, args.codec)
    if not args.no_encodings:
        encodings(args.chunk_rows)
    start_up()
    checksum_read()
    print(f"\n(bench_pipeline: {time.perf_counter() - t0:.0f} s)")


if __name__ == "__main__":
    main()
