"""Accuracy and cost of the cosmology tables near their limit (docs/cosmology-accuracy.md).

For the near-loitering family (h0 = 70, omega_m = 0.05, omega_de = 1.15, w0 -> -1.2844029):
the refinement level the engine chose, its own error estimate, the build time, and the
worst relative error of D_C against direct adaptive quadrature (scipy quad of 1/E written
out here, epsrel 1e-13) on redshifts packed around the stall; refused models are shown as
refused.  Then the competing approach to refusing a model -- computing it by direct
quadrature per row -- timed against the tables on the same redshifts, with the ratio.

    python benchmarks/bench_cosmology_accuracy.py [--rows N]
"""

from __future__ import annotations

import argparse
import math
import os
import time

import numpy as np
from scipy.integrate import quad

from annotator.cosmology import Cosmology, CosmologyError

FAMILY = dict(h0=70.0, omega_m=0.05, omega_de=1.15)
W0S = [-1.0, -1.2, -1.25, -1.27, -1.28, -1.283, -1.284, -1.2842, -1.2844, -1.28440282]
Z = np.concatenate([np.linspace(0.01, 1.9, 20), np.linspace(1.95, 1.975, 26),
                    np.geomspace(2.0, 1e4, 20)])


def e_of_z(z, om, ode, w0):
    ok = 1.0 - om - ode
    zp = 1.0 + z
    return math.sqrt(om * zp**3 + ok * zp**2 + ode * zp ** (3.0 * (1.0 + w0)))


def chi_quad(z, w0, stall):
    f = lambda zz: 1.0 / e_of_z(zz, FAMILY["omega_m"], FAMILY["omega_de"], w0)  # noqa: E731
    pts = [stall] if 0 < stall < z else None
    return quad(f, 0.0, z, points=pts, epsabs=0.0, epsrel=1e-13, limit=800)[0]


def main() -> int:
    ap = argparse.ArgumentParser()
    ap.add_argument("--rows", type=int, default=1_000_000,
                    help="rows for the tables-versus-quadrature timing")
    args = ap.parse_args()
    print(f"load average {os.getloadavg()[0]:.2f}")
    print(f"{'w0':>12} {'min E^2':>9} {'level':>5} {'estimate':>9} {'build s':>8} "
          f"{'worst D_C err vs quad':>22}")
    for w0 in W0S:
        zs = np.linspace(0.0, 3.0, 300001)
        e2 = np.array([e_of_z(z, FAMILY["omega_m"], FAMILY["omega_de"], w0) ** 2
                       for z in zs[::100]])
        stall = float(zs[::100][np.argmin(e2)])
        t0 = time.perf_counter()
        try:
            c = Cosmology(w0=w0, **FAMILY).build()
        except CosmologyError:
            secs = time.perf_counter() - t0
            print(f"{w0:>12.8g} {e2.min():9.2g} {'-':>5} {'-':>9} {secs:8.3f} "
                  f"{'refused':>22}")
            continue
        secs = time.perf_counter() - t0
        dh = c.hubble_distance_mpc
        ref = np.array([chi_quad(z, w0, stall) for z in Z]) * dh
        err = float(np.max(np.abs(c.comoving_distance_mpc(Z) / ref - 1.0)))
        t = c._t()
        print(f"{w0:>12.8g} {e2.min():9.2g} {t.refine:>5d} {t.error_estimate:9.2g} "
              f"{secs:8.3f} {err:22.2g}")

    # The competing approach: direct quadrature per row (what a fallback would cost).
    c = Cosmology(w0=-1.284, **FAMILY).build()
    rng = np.random.default_rng(1)
    z = rng.uniform(0.0, 5.0, args.rows)
    t0 = time.perf_counter()
    c.comoving_distance_mpc(z)
    t_tab = time.perf_counter() - t0
    n_q = 2000
    t0 = time.perf_counter()
    for zi in z[:n_q]:
        chi_quad(float(zi), -1.284, 1.9619)
    t_quad = (time.perf_counter() - t0) / n_q * args.rows
    print(f"D_C of {args.rows} rows: tables {t_tab:.3f} s, direct quadrature "
          f"{t_quad:.0f} s (extrapolated from {n_q} rows): quadrature/tables = "
          f"{t_quad / t_tab:.0f}x")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
