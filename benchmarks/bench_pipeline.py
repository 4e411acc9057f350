"""Pipeline throughput and memory against the I/O floor, measured in the same run.

For each catalogue size: ``annotator run`` Parquet -> Parquet with every built-in annotator,
then the I/O floor: read the annotated output and write it again with pyarrow, same codec
and encoding options, no annotation. Peak memory is each process's own maximum RSS. A CSV input is timed too.

    python benchmarks/bench_pipeline.py                     # 2 M and 10 M rows
    python benchmarks/bench_pipeline.py --rows 200000       # quick
"""

from __future__ import annotations

import argparse
import shutil
import sys
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


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--rows", default="2000000,10000000",
                    help="comma-separated catalogue sizes (default 2M and 10M)")
    ap.add_argument("--csv-rows", type=int, default=1_000_000)
    ap.add_argument("--chunk-rows", type=int, default=250_000)
    ap.add_argument("--codec", default="zstd")
    args = ap.parse_args()

    print(f"{'rows':>11} {'annotate s':>10} {'rows/s':>12} {'peak MiB':>9} "
          f"{'I/O floor s':>11} {'ratio':>6}")
    for rows in [int(r) for r in args.rows.split(",")]:
        src = synthetic_catalogue(DATA / f"bench_{rows}.parquet", rows)
        out = OUT / f"pipeline_{rows}"
        shutil.rmtree(out, ignore_errors=True)
        t_ann, peak = measured(annotator_cmd("run", str(src), "--out", str(out), "--quiet",
                                             "--chunk-rows", str(args.chunk_rows)))
        copy = OUT / f"pipeline_{rows}_copy"
        shutil.rmtree(copy, ignore_errors=True)
        t_io, peak_io = measured(python_cmd(IO_FLOOR, str(out), str(copy), args.codec))
        print(f"{rows:>11,} {t_ann:>10.2f} {rows / t_ann:>12,.0f} {peak:>9.0f} "
              f"{t_io:>11.2f} {t_ann / t_io:>6.2f}", flush=True)
        shutil.rmtree(copy, ignore_errors=True)
        shutil.rmtree(out, ignore_errors=True)

    if args.csv_rows:
        src = synthetic_catalogue(DATA / f"bench_{args.csv_rows}.csv", args.csv_rows, fmt="csv")
        out = OUT / "pipeline_csv"
        shutil.rmtree(out, ignore_errors=True)
        t_csv, peak = measured(annotator_cmd("run", str(src), "--out", str(out), "--quiet",
                                             "--chunk-rows", str(args.chunk_rows)))
        print(f"CSV input: {args.csv_rows:,} rows in {t_csv:.2f} s = "
              f"{args.csv_rows / t_csv:,.0f} rows/s, peak {peak:.0f} MiB")
        shutil.rmtree(out, ignore_errors=True)


if __name__ == "__main__":
    main()
