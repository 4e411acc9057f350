"""K-correction throughput per band: tabulated K(z) (and K(z, colour)) against per-row
synthetic photometry, measured in the same run on one core.

For each method, on the invented Quillfield filters and SEDs (sample_catalogues/):

* ``build s``: configuring the band (reading and checking files, tabulating K);
* ``K rows/s``: the method's vectorised evaluation of K for ``--rows`` rows;
* ``band rows/s``: the whole per-band work of the annotator (K, M = m - mu - K, flags; mu is
  computed once per batch for all bands and timed on its own line);
* ``+error rows/s``: the same with the error column (magnitude, colour and redshift terms;
  dmu/dz is shared by all bands and timed on its own line);
* ``per-row rows/s``: the competing approach, synthetic photometry integrated for every row
  (no table), timed on ``--sample`` rows and extrapolated;
* ``speed-up``: band rows/s over per-row rows/s.

Times are this process's CPU seconds (``time.process_time``, best of ``--repeat``), so the
figures stay meaningful on a shared machine; the work is single-threaded numpy.

    python benchmarks/bench_kcorrection.py                  # 2 M rows
    python benchmarks/bench_kcorrection.py --rows 200000    # quick
"""

from __future__ import annotations

import argparse
import os
import sys
import time
from pathlib import Path

# One core: pin the BLAS pools before numpy loads (the numpy work here is single-threaded).
for var in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ.setdefault(var, "1")
# "build s" times building the tables: no on-disk cache (bench_ktable_cache.py measures that).
os.environ["ANNOTATOR_KTABLE_CACHE"] = "off"

import numpy as np  # noqa: E402
import pyarrow as pa  # noqa: E402
from scipy.optimize import brentq  # noqa: E402

ROOT = Path(__file__).resolve().parents[1]
SAMPLES = ROOT / "sample_catalogues"

from annotator.api import Batch, Setup  # noqa: E402
from annotator.cosmology import preset  # noqa: E402
from annotator_plugins.kcorrection import KCorrection  # noqa: E402
from annotator_plugins.kcorrection.methods import power_law_colours  # noqa: E402
from annotator_plugins.kcorrection.synthetic import ab_maggies  # noqa: E402

SEDS = {n: SAMPLES / "seds" / f"{n}.csv" for n in ("early", "intermediate", "starforming")}
FILTERS = {n: SAMPLES / "filters" / f"{n}.csv" for n in ("cyan", "amber", "crimson")}

BANDS = {
    "cyan": {"magnitude": "mag_cyan", "filter": str(FILTERS["cyan"])},
    "power_law": {"magnitude": "mag_amber", "error": "magerr_amber",
                  "filter": str(FILTERS["amber"]),
                  "kcorrection": {"method": "power_law", "alpha": -1.5}},
    "power_law_colour": {"magnitude": "mag_amber", "error": "magerr_amber",
                         "filter": str(FILTERS["amber"]),
                         "kcorrection": {"method": "power_law_colour",
                                         "colour": ["cyan", "power_law_colour"]}},
    "template": {"magnitude": "mag_amber", "error": "magerr_amber",
                 "filter": str(FILTERS["amber"]),
                 "kcorrection": {"method": "template", "sed": str(SEDS["early"]), "z_max": 3.0}},
    "template_rest": {"magnitude": "mag_crimson", "error": "magerr_crimson",
                      "filter": str(FILTERS["crimson"]), "rest_filter": str(FILTERS["amber"]),
                      "kcorrection": {"method": "template", "sed": str(SEDS["intermediate"]),
                                      "z_max": 3.0}},
    "template_mix": {"magnitude": "mag_amber", "error": "magerr_amber",
                     "filter": str(FILTERS["amber"]),
                     "kcorrection": {"method": "template_mix",
                                     "seds": [str(SEDS["early"]), str(SEDS["starforming"])],
                                     "colour": ["cyan", "template_mix"], "z_max": 3.0}},
    "polynomial": {"magnitude": "mag_amber", "error": "magerr_amber",
                   "kcorrection": {"method": "polynomial", "colour": ["cyan", "polynomial"],
                                   "coefficients": [[0, 0, 0], [1.1, 0.4, -0.05],
                                                    [-0.3, 0.9, 0.1], [0.2, -0.1, 0.0]],
                                   "z_max": 3.0}},
}


def catalogue(n: int, seed: int = 3) -> pa.Table:
    rng = np.random.default_rng(seed)
    z = rng.gamma(2.0, 0.35, n).clip(0.001, 2.99)
    amber = rng.normal(22.0, 1.2, n)
    cyan = amber + rng.normal(0.9, 0.4, n)
    return pa.table({
        "z": z, "z_err": 0.03 * (1 + z),
        "mag_cyan": cyan, "mag_amber": amber, "magerr_amber": np.full(n, 0.05),
        "mag_crimson": amber - 0.4, "magerr_crimson": np.full(n, 0.05),
    })


def configure_band(name: str, schema: pa.Schema, cosmology) -> tuple[KCorrection, float]:
    bands = {name: BANDS[name]}
    if BANDS[name]["kcorrection"].get("colour"):
        bands = {"cyan": BANDS["cyan"], **bands}
    setup = Setup("kcorrection", {}, {"bands": bands}, {}, schema, cosmology, ROOT)
    t0 = time.process_time()
    inst = KCorrection.configure(setup)
    return inst, time.process_time() - t0


def best_of(fn, repeat: int) -> float:
    best = float("inf")
    for _ in range(repeat):
        t0 = time.process_time()
        fn()
        best = min(best, time.process_time() - t0)
    return best


def make_batch(inst: KCorrection, table: pa.Table) -> Batch:
    rb = table.to_batches(max_chunksize=table.num_rows)[0]
    resolve = {"redshift": ("catalogue", "z"), "observed:redshift": ("catalogue", "z"),
               "redshift_error": ("catalogue", "z_err")}
    for logical, col in inst.column_map.items():
        resolve[logical] = ("catalogue", col)
    return Batch(rb, resolve, {}, lambda owner, reason, mask: None, "kcorrection")


# ------------------------------------------------------------- per-row competing approach
def _curve(path):
    return np.loadtxt(path, delimiter=",", skiprows=1).T


def per_row(name: str, z: np.ndarray, colour: np.ndarray) -> None:
    """K for each row by synthetic photometry at that row's redshift (no table)."""
    band = BANDS[name]
    method = band["kcorrection"]["method"]
    fw, fr = _curve(band["filter"]) if "filter" in band else (None, None)
    if method == "template":
        sw, sf = _curve(band["kcorrection"]["sed"])
        qw, qr = _curve(band.get("rest_filter", band["filter"]))
        rest = ab_maggies(sw, sf, qw, qr, 0.0)
        for zi in z:
            -2.5 * np.log10(ab_maggies(sw, sf, fw, fr, float(zi)) / rest)
    elif method == "template_mix":
        seds = [_curve(p) for p in band["kcorrection"]["seds"]]
        cw, cr = _curve(FILTERS["cyan"])
        rest = [ab_maggies(s[0], s[1], fw, fr, 0.0) for s in seds]
        for zi, ci in zip(z, colour):
            zi = float(zi)
            f = [[ab_maggies(s[0], s[1], x, y, zi) / r for x, y in ((fw, fr), (cw, cr))]
                 for s, r in zip(seds, rest)]
            rho = 10 ** (-0.4 * ci)
            a = f[0][1] - rho * f[0][0]
            b = f[1][1] - rho * f[1][0]
            w = min(max(a / (a - b), 0.0), 1.0)
            -2.5 * np.log10((1 - w) * f[0][0] + w * f[1][0])
    elif method == "power_law_colour":
        from annotator_plugins.kcorrection.tables import Filter
        from annotator_plugins.kcorrection.synthetic import filter_support, pivot_wavelength
        filters = []
        for p in (FILTERS["cyan"], band["filter"]):
            w_, r_ = _curve(p)
            filters.append(Filter(w_, r_, str(p), "", support=filter_support(w_, r_),
                                  pivot_A=pivot_wavelength(w_, r_)))
        for zi, ci in zip(z, colour):
            # Solve colour(alpha) = c by root finding, integrating both bands each step.
            alpha = brentq(lambda a: power_law_colours(*filters, np.array([a]))[0] - ci,
                           -10, 10, xtol=1e-6)
            -2.5 * (1 + alpha) * np.log10(1 + zi)
    else:
        raise ValueError(method)


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--rows", type=int, default=2_000_000)
    ap.add_argument("--sample", type=int, default=200,
                    help="rows for the per-row synthetic photometry (extrapolated)")
    ap.add_argument("--repeat", type=int, default=3)
    args = ap.parse_args()

    cosmology = preset("planck2018")
    table = catalogue(args.rows)
    z = table.column("z").to_numpy()
    cyan = table.column("mag_cyan").to_numpy()
    amber = table.column("mag_amber").to_numpy()
    cosmology.distance_modulus_mag(z[:1000])  # build the cosmology's tables first
    t_mu = best_of(lambda: cosmology.distance_modulus_mag(z), args.repeat)
    probe, _ = configure_band("power_law", table.schema, cosmology)
    t_dmu = best_of(lambda: probe._dmu_dz(z), args.repeat)
    print(f"rows: {args.rows:,}; one core; CPU time, best of {args.repeat}")
    print(f"shared by all bands, once per batch: distance modulus mu(z) "
          f"{args.rows / t_mu:,.0f} rows/s; dmu/dz (error columns only) "
          f"{args.rows / t_dmu:,.0f} rows/s")
    print()
    head = (f"{'method':<18} {'build s':>8} {'table pts':>9} {'K rows/s':>14} "
            f"{'band rows/s':>14} {'+error rows/s':>14} {'per-row rows/s':>15} {'speed-up':>9}")
    print(head)
    print("-" * len(head))
    for name in ("power_law", "power_law_colour", "template", "template_rest", "template_mix",
                 "polynomial"):
        inst, t_build = configure_band(name, table.schema, cosmology)
        band = next(b for b in inst.bands if b.name == name)
        method = band.method
        colour = cyan - amber if method.colour else None
        # a fresh solve each time: the mixture keeps its last solution for the same arrays
        t_k = best_of(lambda: (method.release(), method.evaluate(z, colour)), args.repeat)
        # The per-band work of annotate(): one band's K, M and flags, mu excluded.
        no_err = KCorrection([b for b in inst.bands if b.name != name] + [
            type(band)(**{**band.__dict__, "error_input": None, "error_column": None})],
            cosmology, False)
        batch = make_batch(no_err, table)
        t_band = best_of(lambda: no_err.annotate(batch), args.repeat) - t_mu
        batch_err = make_batch(inst, table)
        t_err = best_of(lambda: inst.annotate(batch_err), args.repeat) - t_mu - t_dmu
        table_pts = getattr(getattr(method, "table", None), "grid", None)
        pts = str(table_pts.n) if table_pts is not None else (
            str(method.colour_grid.n) if hasattr(method, "colour_grid") else "-")
        if method.kind in ("power_law", "polynomial"):
            per_row_rate = None  # closed forms: nothing to integrate per row
        else:
            n = args.sample if method.kind != "power_law_colour" else max(20, args.sample // 10)
            t_row = best_of(lambda: per_row(name, z[:n], (cyan - amber)[:n]), 1)
            per_row_rate = n / t_row
        rate_band = args.rows / t_band
        print(f"{method.kind + ('+rest' if name == 'template_rest' else ''):<18} "
              f"{t_build:>8.2f} {pts:>9} {args.rows / t_k:>14,.0f} {rate_band:>14,.0f} "
              f"{args.rows / t_err:>14,.0f} "
              f"{(f'{per_row_rate:,.0f}' if per_row_rate else 'closed form'):>15} "
              f"{(f'{rate_band / per_row_rate:,.0f}x' if per_row_rate else '-'):>9}",
              flush=True)


if __name__ == "__main__":
    sys.exit(main())
