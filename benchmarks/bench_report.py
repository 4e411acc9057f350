"""``annotator report`` on a large output, against plotting every row, in the same run.

Builds (once, cached in benchmarks/_data and benchmarks/_out) an annotated output of ``--rows``
rows with the real pipeline (the synthetic catalogue of ``_common.py``: ids, positions,
gamma-distributed redshifts, 5 magnitudes), then measures:

* ``annotator report`` as a user runs it (its own process: wall, peak memory) with the default
  20 000-row sample, and its stage timings (``ReportResult.timings``) in this process with CPU
  time (``time.process_time``);
* the competing approach: the same sky map drawn from every row (``ra``, ``dec``,
  ``reachable`` of all parts) instead of the sample, CPU time, and the ratio.

    python benchmarks/bench_report.py                  # 2 M rows
    python benchmarks/bench_report.py --rows 10000000  # the 10 M rows of docs/report.md
    python benchmarks/bench_report.py --rows 200000    # quick
"""

from __future__ import annotations

import argparse
import os
import shutil
import subprocess
import sys
import time

import numpy as np
import pyarrow.parquet as pq
from _common import DATA, OUT, annotator_cmd, measured, synthetic_catalogue


def _annotated(rows: int):
    src = synthetic_catalogue(DATA / f"report_{rows}.parquet", rows)
    out = OUT / f"report_{rows}"
    if not (out / "manifest.json").exists():
        shutil.rmtree(out, ignore_errors=True)
        subprocess.run(annotator_cmd("run", str(src), "--out", str(out), "--chunk-rows",
                                     str(min(rows, 1_000_000)), "--quiet"), check=True)
    return out


def _cpu(fn):
    c0, t0 = time.process_time(), time.perf_counter()
    result = fn()
    return result, time.process_time() - c0, time.perf_counter() - t0


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--rows", type=int, default=2_000_000)
    args = ap.parse_args(argv)
    out = _annotated(args.rows)
    html = OUT / f"report_{args.rows}.html"
    print(f"load average before: {' '.join(f'{x:.1f}' for x in os.getloadavg())}")

    wall, peak = measured(annotator_cmd("report", str(out), "--to", str(html), "--overwrite"))
    print(f"annotator report, {args.rows:,} rows (own process): {wall:.1f} s wall, "
          f"peak {peak:.0f} MiB, page {html.stat().st_size / 1e6:.2f} MB")

    from annotator.report import build_report
    from annotator.report.data import REACHABLE, UNKNOWN, UNREACHABLE, draw_sample, open_output
    from annotator.report.figures import sky_map

    result, cpu, wall = _cpu(lambda: build_report(out, html))
    print(f"build_report in this process: {wall:.1f} s wall, {cpu:.1f} s CPU; stages: "
          + ", ".join(f"{k} {v:.2f} s" for k, v in result.timings.items()))

    output = open_output(out)
    sample = draw_sample(output, ["ra", "dec"], 20_000, 0)
    _, cpu_sampled, wall_sampled = _cpu(lambda: sky_map(sample.values["ra"],
                                                        sample.values["dec"], sample.reach, 0))

    def every_row():
        table = pq.read_table(output.parts, columns=["ra", "dec", "reachable"])
        reach = table.column("reachable").to_numpy(zero_copy_only=False)
        codes = np.full(len(reach), UNKNOWN)
        codes[reach == True] = REACHABLE  # noqa: E712 (object array with None)
        codes[reach == False] = UNREACHABLE  # noqa: E712
        return sky_map(table.column("ra").to_numpy(), table.column("dec").to_numpy(), codes, 0)

    _, cpu_all, wall_all = _cpu(every_row)
    print(f"sky map from the 20,000-row sample: {cpu_sampled:.2f} s CPU ({wall_sampled:.1f} s "
          f"wall)")
    print(f"sky map from every row (competing approach): {cpu_all:.2f} s CPU ({wall_all:.1f} s "
          f"wall); ratio {cpu_all / max(cpu_sampled, 1e-9):.0f}x")
    print(f"load average after: {' '.join(f'{x:.1f}' for x in os.getloadavg())}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
