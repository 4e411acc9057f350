"""Run every benchmark with its default sizes, one after another (``make bench``).

Each script measures its competing approach in the same run; this only sequences them so
they do not compete with each other for the machine.
"""

from __future__ import annotations

import subprocess
import sys
import time
from pathlib import Path

HERE = Path(__file__).resolve().parent
SCRIPTS = [
    ("bench_cosmology.py", []),
    ("bench_cosmology_accuracy.py", []),
    ("bench_pipeline.py", []),
    ("bench_fits.py", []),
    ("bench_kcorrection.py", []),
    ("bench_ktable_cache.py", []),
    ("bench_recovery.py", []),
    ("bench_luminosity_function.py", []),
    ("bench_uncertainty.py", []),
    ("bench_redshift_pdf.py", []),
    ("bench_sql.py", ["--rows", "20000000"]),  # the target is stated on a 20 M-row output
    ("bench_dask.py", []),
    ("bench_report.py", []),
    ("bench_csv.py", []),
    ("bench_service.py", []),
]


def main() -> int:
    failed = []
    for script, args in SCRIPTS:
        print(f"\n===== {script} {' '.join(args)}", flush=True)
        t = time.perf_counter()
        rc = subprocess.call([sys.executable, str(HERE / script), *args])
        print(f"===== {script}: exit {rc}, {time.perf_counter() - t:.0f} s", flush=True)
        if rc:
            failed.append(script)
    if failed:
        print("failed: " + ", ".join(failed))
    return 1 if failed else 0


if __name__ == "__main__":
    sys.exit(main())
