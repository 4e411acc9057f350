"""Helpers shared by the benchmark scripts: input generation and measured subprocesses."""

from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

HERE = Path(__file__).resolve().parent
DATA = HERE / "_data"
OUT = HERE / "_out"


def synthetic_catalogue(path: Path, rows: int, *, seed: int = 1, chunk: int = 1_000_000,
                        fmt: str = "parquet") -> Path:
    """A plain synthetic catalogue (ids, positions, redshifts, 5 magnitudes), written in chunks."""
    path.parent.mkdir(parents=True, exist_ok=True)
    if path.exists():
        return path
    rng = np.random.default_rng(seed)
    writer = None
    tmp = path.with_name(path.name + ".tmp")
    try:
        for start in range(0, rows, chunk):
            n = min(chunk, rows - start)
            z = rng.gamma(2.0, 0.35, n)
            cols = {
                "objid": np.arange(start, start + n, dtype=np.int64),
                "ra": rng.uniform(30.0, 40.0, n),
                "dec": rng.uniform(-2.0, 2.0, n),
                "z": z,
                "z_err": 0.03 * (1 + z),
            }
            for band in "ugriz":
                cols[f"mag_{band}"] = rng.normal(22.0, 1.2, n)
            table = pa.table(cols)
            if fmt == "parquet":
                if writer is None:
                    writer = pq.ParquetWriter(tmp, table.schema, compression="zstd")
                writer.write_table(table, row_group_size=250_000)
            else:
                import pyarrow.csv as pacsv

                with open(tmp, "ab") as fh:
                    pacsv.write_csv(table, fh, pacsv.WriteOptions(include_header=start == 0))
    finally:
        if writer is not None:
            writer.close()
    os.replace(tmp, path)
    return path


def measured(cmd: list[str], *, cpu: bool = False, **kw):
    """Run a command; return (wall seconds, peak RSS of that child in MiB), and with
    ``cpu=True`` also its user + system CPU seconds.

    Each measured command runs in its own wrapper process so ru_maxrss is its own peak.
    """
    wrapper = [sys.executable, "-c",
               "import resource, subprocess, sys, time;"
               "t = time.perf_counter();"
               "r = subprocess.run(sys.argv[1:]);"
               "dt = time.perf_counter() - t;"
               "u = resource.getrusage(resource.RUSAGE_CHILDREN);"
               "print(f'@@ {dt} {u.ru_maxrss} {u.ru_utime + u.ru_stime}', file=sys.stderr);"
               "sys.exit(r.returncode)", *cmd]
    proc = subprocess.run(wrapper, capture_output=True, text=True, **kw)
    if proc.returncode != 0:
        raise RuntimeError(f"{' '.join(cmd)} failed:\n{proc.stderr[-2000:]}")
    line = [ln for ln in proc.stderr.splitlines() if ln.startswith("@@ ")][-1]
    _, dt, peak_kib, cpu_s = line.split()
    if cpu:
        return float(dt), float(peak_kib) / 1024.0, float(cpu_s)
    return float(dt), float(peak_kib) / 1024.0


def annotator_cmd(*args: str) -> list[str]:
    return [sys.executable, "-m", "annotator", *args]


def python_cmd(code: str, *args: str) -> list[str]:
    return [sys.executable, "-c", code, *args]
