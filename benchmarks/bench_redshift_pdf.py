"""Redshift posteriors: gridded photo-z PDFs streamed from Parquet, against a per-object
Monte Carlo loop in numpy, in the same run.

Data: ``--rows`` objects x ``--grid`` float32 densities on one shared grid 0 <= z <= 6, as a
Parquet list<float> column (85 % one Gaussian, 15 % with an invented secondary peak), written
once in chunks of 100 000 rows into benchmarks/_data/ (bounded memory) and reused.

Measured, each in its own process (so its peak RSS is its own):

* ``kernel reachability`` / ``kernel all``: the file read row group by row group (pyarrow
  ``read_row_group``; ``iter_batches`` grew to 4.4 GB on the 10 M-object file) and
  annotated by the real Pipeline with only ``redshift_pdf`` enabled,
  ``outputs = "reachability"`` or every output; CPU time of the annotation alone and of read +
  annotation (process CPU time, all threads: a per-core figure), peak RSS;
* ``annotator run``: the whole command (read, every default annotator, redshift_pdf, write
  Parquet) on the same file: wall, CPU and peak RSS;
* ``Monte Carlo``: for ``--mc-objects`` objects, a Python loop drawing ``--mc-draws`` redshifts
  per object from its PDF (inverse CDF by numpy.interp) and taking the fraction below z_EH,
  the percentiles and means of the same six quantities with numpy: the way one scripts it
  without this tool. Its rate is per core (CPU time) and the ratio is printed.

Targets (issue 14): >= 1 M objects/s per core for the reachability, >= 200 k objects/s per
core for all percentiles, streaming in < 2 GB.

    python benchmarks/bench_redshift_pdf.py                      # 1 M objects
    python benchmarks/bench_redshift_pdf.py --rows 10000000      # the full 10 M (8 GB raw)
    python benchmarks/bench_redshift_pdf.py --rows 100000 --mc-objects 200    # quick
"""

from __future__ import annotations

import argparse
import json
import os
import resource
import subprocess
import sys
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent))
# Per-core figures: pin the BLAS pools before numpy loads (children inherit the setting).
for var in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ.setdefault(var, "1")

import numpy as np  # noqa: E402
import pyarrow as pa  # noqa: E402
import pyarrow.parquet as pq  # noqa: E402

from _common import DATA, OUT  # noqa: E402

Z_MAX = 6.0
CHUNK = 100_000


def make_data(rows: int, g: int, seed: int = 14) -> Path:
    path = DATA / f"redshift_pdf_{rows}x{g}.parquet"
    if path.exists():
        return path
    DATA.mkdir(parents=True, exist_ok=True)
    grid = np.linspace(0.0, Z_MAX, g)
    rng = np.random.default_rng(seed)
    tmp = path.with_name(path.name + ".tmp")
    writer = None
    try:
        for start in range(0, rows, CHUNK):
            n = min(CHUNK, rows - start)
            z = rng.gamma(2.2, 0.45, n)
            s = 0.04 * (1 + z) * rng.uniform(0.6, 1.6, n)
            dens = np.exp(-0.5 * ((grid[None, :] - z[:, None]) / s[:, None]) ** 2) / s[:, None]
            bi = rng.random(n) < 0.15
            z2 = np.where(z < 1.5, z + rng.uniform(1.0, 2.5, n), z * rng.uniform(0.2, 0.5, n))
            w2 = rng.uniform(0.05, 0.45, n)
            dens2 = np.exp(-0.5 * ((grid[None, :] - z2[:, None]) / (1.5 * s[:, None])) ** 2) \
                / (1.5 * s[:, None])
            dens[bi] = (1 - w2[bi, None]) * dens[bi] + w2[bi, None] * dens2[bi]
            dens = dens.astype(np.float32)
            flat = pa.array(dens.ravel())
            offsets = pa.array(np.arange(0, n * g + 1, g, dtype=np.int32))
            table = pa.table({"objid": np.arange(start, start + n, dtype=np.int64), "z": z,
                              "pz": pa.ListArray.from_arrays(offsets, flat)})
            if writer is None:
                writer = pq.ParquetWriter(tmp, table.schema, compression="snappy")
            writer.write_table(table, row_group_size=CHUNK)
    finally:
        if writer is not None:
            writer.close()
    os.replace(tmp, path)
    return path


def _job(path: Path, g: int, outputs: str, only: bool, out_dir: Path | None = None) -> dict:
    from annotator.config import job_from_mapping

    annotators = {}
    if only:
        for name in ("redshift_checks", "distances", "times", "velocities", "horizons",
                     "uncertainties", "redshift_frames", "kcorrection"):
            annotators[name] = False
    mapping = {"input": {"paths": [str(path)]}, "cosmology": {"preset": "planck2018"},
               "columns": {} if only else {"redshift": "z"}, "annotators": annotators,
               "redshift_pdf": {"kind": "gridded", "column": "pz", "outputs": outputs,
                                "grid": {"start": 0.0, "stop": Z_MAX, "count": g}}}
    if out_dir is not None:
        mapping["output"] = {"dir": str(out_dir), "overwrite": True}
    return job_from_mapping(mapping, base_dir=path.parent)


def child_kernel(path: Path, g: int, outputs: str, batch: int) -> None:
    from annotator.pipeline import Pipeline
    from annotator.plan import build_plan

    plan = build_plan(_job(path, g, outputs, only=True))
    pipe = Pipeline.from_plan(plan)
    pipe.prepare()
    cpu0 = time.process_time()
    wall0 = time.perf_counter()
    annotate_cpu = 0.0
    rows = 0
    pf = pq.ParquetFile(path)
    for group in range(pf.num_row_groups):  # one row group at a time: flat memory
        whole = pf.read_row_group(group)
        for start in range(0, whole.num_rows, batch):
            table = whole.slice(start, batch)
            c = time.process_time()
            pipe.annotate(table)
            annotate_cpu += time.process_time() - c
            rows += table.num_rows
    print(json.dumps({"rows": rows, "annotate_cpu": annotate_cpu,
                      "total_cpu": time.process_time() - cpu0,
                      "wall": time.perf_counter() - wall0,
                      "peak_mib": resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024}))


def child_mc(path: Path, g: int, objects: int, draws: int) -> None:
    """The competing approach: one object at a time, Monte Carlo draws from its PDF."""
    from annotator.cosmology import preset

    cosmo = preset("planck2018")
    z_eh = cosmo.derived()["event_horizon_redshift"]
    grid = np.linspace(0.0, Z_MAX, g)
    pdfs = next(pq.ParquetFile(path).iter_batches(batch_size=objects, columns=["pz"]))
    pdfs = pdfs.column(0).values.to_numpy().reshape(-1, g)[:objects].astype(np.float64)
    rng = np.random.default_rng(1)
    methods = ("comoving_distance_mpc", "luminosity_distance_mpc", "distance_modulus_mag",
               "lookback_time_gyr", "age_at_emission_gyr")
    t0 = time.process_time()
    t_reach = 0.0
    for p in pdfs:
        c = time.process_time()
        cdf = np.concatenate(([0.0], np.cumsum(0.5 * (p[1:] + p[:-1]) * np.diff(grid))))
        zs = np.interp(rng.random(draws), cdf / cdf[-1], grid)
        _ = np.mean(zs < z_eh)
        t_reach += time.process_time() - c
        _ = np.percentile(zs, [16, 50, 84]), zs.mean()
        for m in methods:
            v = getattr(cosmo, m)(zs)
            _ = np.percentile(v, [16, 50, 84]), v.mean()
    total = time.process_time() - t0
    print(json.dumps({"objects": len(pdfs), "reach_cpu": t_reach, "all_cpu": total}))


def _run_child(args: list[str]) -> dict:
    out = subprocess.run([sys.executable, __file__, *args], capture_output=True, text=True)
    if out.returncode:
        raise RuntimeError(out.stderr[-3000:])
    return json.loads(out.stdout.strip().splitlines()[-1])


def _run_cli(path: Path, g: int) -> dict:
    OUT.mkdir(parents=True, exist_ok=True)
    job_file = OUT / "redshift_pdf_job.toml"
    out_dir = OUT / "redshift_pdf_run"
    job_file.write_text(
        f'[input]\npaths = ["{path}"]\n[output]\ndir = "{out_dir}"\noverwrite = true\n'
        f'chunk_rows = {CHUNK}\n[cosmology]\npreset = "planck2018"\n[columns]\nredshift = "z"\n'
        f'[redshift_pdf]\nkind = "gridded"\ncolumn = "pz"\n'
        f'grid = {{ start = 0.0, stop = {Z_MAX}, count = {g} }}\n')
    code = ("import resource, subprocess, sys, time, json;"
            "t = time.perf_counter();"
            "r = subprocess.run(sys.argv[1:]);"
            "dt = time.perf_counter() - t;"
            "u = resource.getrusage(resource.RUSAGE_CHILDREN);"
            "print(json.dumps({'wall': dt, 'cpu': u.ru_utime + u.ru_stime, "
            "'peak_mib': u.ru_maxrss / 1024, 'rc': r.returncode}))")
    out = subprocess.run([sys.executable, "-c", code, sys.executable, "-m", "annotator", "run",
                          "--config", str(job_file), "--quiet"], capture_output=True, text=True)
    res = json.loads(out.stdout.strip().splitlines()[-1])
    if res["rc"]:
        raise RuntimeError(out.stderr[-3000:])
    manifest = json.loads((out_dir / "manifest.json").read_text())
    res["rows"] = manifest["rows_written"]
    res["reconciles"] = manifest["rows_read"] == manifest["rows_written"] + \
        manifest["rows_rejected"]
    return res


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--rows", type=int, default=1_000_000)
    ap.add_argument("--grid", type=int, default=200)
    ap.add_argument("--batch", type=int, default=CHUNK)
    ap.add_argument("--mc-objects", type=int, default=2000)
    ap.add_argument("--mc-draws", type=int, default=1000)
    ap.add_argument("--skip-cli", action="store_true", help="skip the annotator run")
    ap.add_argument("--child", choices=("kernel", "mc"), help=argparse.SUPPRESS)
    ap.add_argument("--outputs", default="all", help=argparse.SUPPRESS)
    ap.add_argument("--path", help=argparse.SUPPRESS)
    a = ap.parse_args()
    if a.child == "kernel":
        child_kernel(Path(a.path), a.grid, a.outputs, a.batch)
        return 0
    if a.child == "mc":
        child_mc(Path(a.path), a.grid, a.mc_objects, a.mc_draws)
        return 0

    t = time.perf_counter()
    path = make_data(a.rows, a.grid)
    size = path.stat().st_size / 1e9
    print(f"redshift posterior benchmark: {a.rows:,} objects x {a.grid} float32 densities "
          f"({a.rows * a.grid * 4 / 1e9:.2f} GB raw, {size:.2f} GB Parquet), batches of "
          f"{a.batch:,}; data ready in {time.perf_counter() - t:.0f} s")
    print(f"load average at start: {os.getloadavg()[0]:.1f}")
    common = ["--path", str(path), "--grid", str(a.grid), "--batch", str(a.batch)]
    res = {}
    for outputs in ("reachability", "all"):
        res[outputs] = _run_child(["--child", "kernel", "--outputs", outputs, *common])
    mc = _run_child(["--child", "mc", "--mc-objects", str(a.mc_objects), "--mc-draws",
                     str(a.mc_draws), *common])
    mc_reach = mc["objects"] / mc["reach_cpu"]
    mc_all = mc["objects"] / mc["all_cpu"]
    print(f"\n{'measurement':<34}{'objects/s/core':>16}{'(incl. read)':>14}{'peak MiB':>10}"
          f"{'vs MC':>10}")
    print("-" * 84)
    for outputs, target, mc_rate in (("reachability", 1e6, mc_reach), ("all", 2e5, mc_all)):
        r = res[outputs]
        rate = r["rows"] / r["annotate_cpu"]
        rate_read = r["rows"] / r["total_cpu"]
        print(f"{'kernel ' + outputs:<34}{rate:>16,.0f}{rate_read:>14,.0f}{r['peak_mib']:>10.0f}"
              f"{rate / mc_rate:>10,.0f}   (target >= {target:,.0f})")
    print(f"{'Monte Carlo loop, reachability':<34}{mc_reach:>16,.0f}{'':>14}{'':>10}{1:>10}   "
          f"({mc['objects']:,} objects x {a.mc_draws} draws)")
    print(f"{'Monte Carlo loop, all':<34}{mc_all:>16,.0f}")
    if not a.skip_cli:
        cli = _run_cli(path, a.grid)
        print(f"\nannotator run (every default annotator + redshift_pdf, Parquet out): "
              f"{cli['rows']:,} rows, wall {cli['wall']:.1f} s, CPU {cli['cpu']:.1f} s "
              f"({cli['rows'] / cli['cpu']:,.0f} rows/s per core), peak RSS "
              f"{cli['peak_mib']:.0f} MiB, rows reconcile: {cli['reconciles']}")
    print(f"load average at end: {os.getloadavg()[0]:.1f}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
