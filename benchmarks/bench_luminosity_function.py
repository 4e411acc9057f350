"""z_max / V_max and the 1/V_max luminosity function: closed loop at full size, and the cost
of the vectorised z_max solve against a per-row scipy.optimize.brentq loop, in the same run.

1. Closed loop: a flux-limited catalogue drawn from a known Schechter (1976) function,
   uniform in comoving volume (tests/kcorrection/_schechter.py), annotated by the
   kcorrection plugin (power-law K, zmax/vmax columns); the shipped ``luminosity_function``
   selection's SQL is run by DuckDB on the result and fitted with scipy: fitted phi*, M*,
   alpha with their 1-sigma errors and pulls, and <V/V_max> against 1/2 +- 1/sqrt(12 N)
   (Schmidt 1968).
2. z_max solve per row, on the Quillfield amber band with the template-mixture K (each
   object's own K-curve from its amber - infrared colour): the annotator's batch solve
   (bracketing grid + Illinois, all rows at once) against brentq per row on the same
   function, timed on ``--sample`` rows; both in this process's CPU seconds (best of
   ``--repeat``), with the largest difference of their z_max.
3. Extinction coefficients R_band = A_band / E(B-V) of the five Quillfield bands (F99 and
   CCM89, R_V = 3.1) for the flat f_nu reference and for the three bundled SEDs at z = 0 and
   1, which is how much the fixed reference spectrum matters.

    python benchmarks/bench_luminosity_function.py              # full size
    python benchmarks/bench_luminosity_function.py --quick      # small, for development
"""

from __future__ import annotations

import argparse
import math
import os
import sys
import time
from pathlib import Path

for var in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ.setdefault(var, "1")

import numpy as np  # noqa: E402
import pyarrow as pa  # noqa: E402
from scipy.optimize import brentq  # noqa: E402

ROOT = Path(__file__).resolve().parents[1]
SAMPLES = ROOT / "sample_catalogues"
sys.path.insert(0, str(ROOT / "tests" / "kcorrection"))

import _schechter  # noqa: E402

from annotator.api import Setup  # noqa: E402
from annotator.cosmology import preset  # noqa: E402
from annotator.config import job_from_mapping  # noqa: E402
from annotator.pipeline import Pipeline  # noqa: E402
from annotator.plan import build_plan  # noqa: E402
from annotator_plugins.kcorrection import KCorrection  # noqa: E402
from annotator_plugins.kcorrection.extinction import band_coefficient  # noqa: E402
from annotator_plugins.kcorrection.tables import Curve  # noqa: E402
from annotator_plugins.kcorrection.vmax import (  # noqa: E402
    GRID_POINTS, luminosity_function_selection)

BANDS = ("violet", "cyan", "amber", "crimson", "infrared")


def closed_loop(n_expected: int, seed: int) -> None:
    import duckdb
    import pyarrow.parquet as pq
    import tempfile

    cosmo = preset("planck2018")
    t0 = time.process_time()
    table, area, drawn = _schechter.draw(cosmo, n_expected=n_expected, m_lim=22.0, seed=seed)
    t_draw = time.process_time() - t0
    with tempfile.TemporaryDirectory() as tmp:
        path = Path(tmp) / "schechter.parquet"
        pq.write_table(table, path)
        job = job_from_mapping({
            "input": {"paths": [str(path)]}, "output": {"dir": str(Path(tmp) / "out")},
            "bands": {"r": {"magnitude": "mag_r", "limit_mag": 22.0,
                            "kcorrection": {"method": "power_law", "alpha": -2.0}}},
            "annotators": {"kcorrection": {"area_deg2": area,
                                           "sample_redshift_range": [0.02, 0.6]}}},
            base_dir=tmp)
        pipe = Pipeline.from_plan(build_plan(job))
        t0 = time.process_time()
        out, _, _ = pipe.annotate(table)
        t_annotate = time.process_time() - t0
    width = 0.25
    sql = luminosity_function_selection(["r"]).render({"band": "r", "bin_mag": width})
    con = duckdb.connect()
    con.register("catalogue", out)
    rows = con.execute(sql).fetchall()
    mean, n = con.execute("SELECT avg(v_over_vmax_r), count(v_over_vmax_r) FROM catalogue"
                          ).fetchone()
    centres, counts, phi, err = (np.array([r[i] for r in rows], dtype=float) for i in range(4))
    use = counts >= 5
    fitted, sigma = _schechter.fit(centres[use], phi[use], err[use], width)
    print(f"closed loop: {drawn:,} objects drawn (Schechter, uniform in comoving volume, "
          f"0.02 <= z <= 0.6, {area:.3f} deg2), {table.num_rows:,} with m <= 22 kept; "
          f"draw {t_draw:.1f} s, annotate {t_annotate:.1f} s CPU "
          f"({t_annotate / table.num_rows * 1e6:.1f} us/row, all columns)")
    print(f"  {'parameter':10} {'truth':>12} {'fitted':>12} {'1-sigma':>10} {'pull':>7}")
    for name in ("phi_star", "m_star", "alpha"):
        t, f, s = _schechter.TRUTH[name], fitted[name], sigma[name]
        print(f"  {name:10} {t:12.5g} {f:12.5g} {s:10.3g} {(f - t) / s:7.2f}")
    e = 1.0 / math.sqrt(12 * n)
    print(f"  <V/V_max> = {mean:.5f} +- {e:.5f} over {n:,} objects "
          f"(pull {(mean - 0.5) / e:.2f}; Schmidt 1968: 0.5)")


def _amber_band():
    filters = SAMPLES / "filters"
    seds = SAMPLES / "seds"
    raw = {
        "infrared": {"magnitude": "mag_infrared", "filter": str(filters / "infrared.csv")},
        "amber": {"magnitude": "mag_amber", "filter": str(filters / "amber.csv"),
                  "limit_mag": 24.5, "kcorrection": {
                      "method": "template_mix", "seds": [str(seds / "early.csv"),
                                                         str(seds / "starforming.csv")],
                      "colour": ["amber", "infrared"], "z_max": 3.5}},
    }
    schema = pa.schema([("z", pa.float64()), ("mag_amber", pa.float64()),
                        ("mag_infrared", pa.float64())])
    setup = Setup(annotator_name="kcorrection", options={"area_deg2": 1.0,
                                                         "sample_redshift_range": [0.0, 3.5]},
                  sections={"bands": raw}, columns={}, catalogue_schema=schema,
                  cosmology=preset("planck2018"), base_dir=ROOT)
    return KCorrection.configure(setup)


def zmax_cost(rows: int, sample: int, repeat: int, seed: int) -> None:
    inst = _amber_band()
    band = next(b for b in inst.bands if b.name == "amber")
    method = band.method
    cosmo = inst.cosmology
    rng = np.random.default_rng(seed)
    z = rng.uniform(0.05, 2.5, rows)
    # each object a mixture (1 - w) early + w star-forming: its colour at z from the
    # method's own tabulated fluxes of both templates in the two colour filters
    w = rng.uniform(0.0, 1.0, rows)
    idx, frac, _ = method.table.grid.locate(z)
    t = method.table
    r, p, q = method.columns
    fp = (1 - w) * t.at(2 * p, idx, frac) + w * t.at(2 * p + 1, idx, frac)
    fq = (1 - w) * t.at(2 * q, idx, frac) + w * t.at(2 * q + 1, idx, frac)
    colour = -2.5 * np.log10(fp / fq)
    mag_amber = rng.uniform(19.0, 24.4, rows)
    mag_ir = mag_amber - colour
    k, _ = method.evaluate(z, mag_amber - mag_ir)
    mu = cosmo.distance_modulus_mag(z)
    shape = method.shape(z, mag_amber - mag_ir)
    absolute = mag_amber - mu - k

    best = math.inf
    for _ in range(repeat):
        t0 = time.process_time()
        res = inst.vmax.compute(_NullBatch(), "amber", method, shape, z, mag_amber, k, mu,
                                absolute)
        best = min(best, time.process_time() - t0)
    zmax_batch = res["zmax_amber"]
    per_row_batch = best / rows

    lim = 24.5
    top = method.z_max
    picks = rng.choice(rows, size=min(sample, rows), replace=False)
    t0 = time.process_time()
    zmax_loop = np.full(picks.size, np.nan)
    for j, i in enumerate(picks):
        sh = shape[i:i + 1]
        base = mag_amber[i] - mu[i] - k[i]

        def g(x):
            return base + float(cosmo.distance_modulus_mag(x)) + float(
                method.k_at(np.array([x]), sh)[0]) - lim
        if g(top) > 0:
            zmax_loop[j] = brentq(g, z[i], top, xtol=1e-12)
    t_loop = time.process_time() - t0
    per_row_loop = t_loop / picks.size
    both = np.isfinite(zmax_loop) & np.isfinite(zmax_batch[picks])
    diff = np.max(np.abs(zmax_loop[both] - zmax_batch[picks][both])) if both.any() else math.nan
    agree = int(np.sum(np.isfinite(zmax_loop) == np.isfinite(zmax_batch[picks])))
    print(f"z_max solve (amber, template_mix K per object, limit {lim}): "
          f"{rows:,} rows batch, {picks.size:,} rows brentq")
    print(f"  batch (grid {GRID_POINTS} + Illinois, zmax/vmax/v_over_vmax):  "
          f"{per_row_batch * 1e6:8.2f} us/row")
    print(f"  per-row scipy.optimize.brentq loop:                    "
          f"{per_row_loop * 1e6:8.2f} us/row")
    print(f"  speed-up {per_row_loop / per_row_batch:.0f}x; max |z_max batch - brentq| = "
          f"{diff:.2e} over {int(both.sum())} rows; defined/undefined agree on "
          f"{agree}/{picks.size}")


class _NullBatch:
    """Stands in for the pipeline's Batch when timing the solve alone (flags are counted)."""

    def __init__(self):
        self.flags = {}

    def flag(self, reason, mask):
        self.flags[reason] = int(np.count_nonzero(mask))


def extinction_table() -> None:
    from annotator_plugins.kcorrection.tables import load_filter, load_sed

    setup = Setup(annotator_name="kcorrection", options={}, sections={}, columns={},
                  catalogue_schema=pa.schema([]), cosmology=preset("planck2018"),
                  base_dir=SAMPLES)
    seds = {n: load_sed(setup, f"seds/{n}.csv", "sed") for n in
            ("early", "intermediate", "starforming")}
    for law in ("f99", "ccm89"):
        print(f"extinction R_band = A_band / E(B-V), law {law}, R_V = 3.1, photon-weighted over "
              f"the filter, for reference spectra: flat f_nu (used) and the bundled SEDs")
        head = "  band      flat f_nu" + "".join(f" {n + ' z=' + str(zz):>16}" for n in seds
                                                 for zz in (0, 1))
        print(head)
        for band in BANDS:
            filt = load_filter(setup, f"filters/{band}.csv", band)
            vals = [band_coefficient(filt, 3.1, law=law)]
            for sed in seds.values():
                for zz in (0, 1):
                    shifted = Curve(sed.wave * (1 + zz), sed.value, sed.path, sed.key)
                    vals.append(band_coefficient(filt, 3.1, shifted, law=law))
            spread = max(vals) - min(vals)
            print(f"  {band:9} {vals[0]:9.4f}" + "".join(f" {v:16.4f}" for v in vals[1:])
                  + f"   spread {spread:.4f} ({100 * spread / vals[0]:.1f} %)")


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--objects", type=int, default=4_000_000,
                    help="expected objects drawn before the flux limit (closed loop)")
    ap.add_argument("--rows", type=int, default=200_000, help="rows of the z_max timing")
    ap.add_argument("--sample", type=int, default=400, help="rows of the brentq loop")
    ap.add_argument("--repeat", type=int, default=3)
    ap.add_argument("--seed", type=int, default=7)
    ap.add_argument("--quick", action="store_true", help="small sizes for development")
    args = ap.parse_args()
    if args.quick:
        args.objects, args.rows, args.sample, args.repeat = 200_000, 20_000, 100, 1
    print(f"load average {os.getloadavg()[0]:.1f} (1 min) on {os.cpu_count()} cores")
    closed_loop(args.objects, args.seed)
    zmax_cost(args.rows, args.sample, args.repeat, args.seed)
    extinction_table()
    return 0


if __name__ == "__main__":
    sys.exit(main())
