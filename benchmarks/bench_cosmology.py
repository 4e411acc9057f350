"""Benchmark of the cosmology engine: table build time, and evaluation rate of every
quantity side by side with per-value scipy.integrate.quad (the way most users compute
it today), with the speed-up.

    python benchmarks/bench_cosmology.py [--n 2000000] [--quad-n 200] [--json out.json]

Rates are per core: numpy evaluates these on one thread, and rates are computed from
the process CPU time (time.process_time), so other load on the machine does not count
against them; the wall-clock rate is printed alongside.
"""

from __future__ import annotations

import argparse
import json
import math
import statistics
import time
import warnings

import numpy as np
from scipy.integrate import quad
from scipy.optimize import brentq

from annotator.cosmology import Cosmology, preset


class ScriptedModel:
    """What a user scripts by hand: E(z) as a Python function, one quad per value."""

    def __init__(self, c):
        self.c = c
        self.om, self.ode, self.ok = c.omega_m, c.omega_de, c.omega_k
        self.orad = c.omega_radiation
        # massive neutrinos treated as matter today (the usual hand-written shortcut)
        self.om_tot = self.om + c.omega_nu
        self.dh, self.th = c.hubble_distance_mpc, c.hubble_time_gyr

    def expansion_rate(self, z):
        zp = 1.0 + z
        return math.sqrt(self.orad * zp**4 + self.om_tot * zp**3 + self.ok * zp**2 + self.ode)

    def comoving(self, z):
        return quad(lambda x: 1.0 / self.expansion_rate(x), 0.0, z)[0] * self.dh

    def transverse(self, z):
        dc = self.comoving(z)
        if self.ok > 0:
            s = math.sqrt(self.ok)
            return self.dh / s * math.sinh(s * dc / self.dh)
        if self.ok < 0:
            s = math.sqrt(-self.ok)
            return self.dh / s * math.sin(s * dc / self.dh)
        return dc

    def lookback(self, z):
        return quad(lambda x: 1.0 / ((1 + x) * self.expansion_rate(x)), 0.0, z)[0] * self.th

    def age(self, z):
        return quad(lambda x: 1.0 / ((1 + x) * self.expansion_rate(x)), z, np.inf)[0] * self.th

    def event_horizon(self):
        # chi_EH = c int_{t0}^inf dt/a = D_H int_1^inf da / (a^2 E(a))
        return quad(lambda a: 1.0 / (a * a * self.expansion_rate(1.0 / a - 1.0)), 1.0, np.inf)[0] * self.dh

    def remaining(self, a):
        return quad(lambda b: 1.0 / (b * b * self.expansion_rate(1.0 / b - 1.0)), a, np.inf)[0]

    def age_at_a(self, a):
        return quad(lambda b: 1.0 / (b * self.expansion_rate(1.0 / b - 1.0)), 0.0, a)[0] * self.th

    def crossing(self, z):
        chi = self.comoving(z) / self.dh
        a = brentq(lambda aa: self.remaining(aa) - chi, 1e-6, 1e6)
        return self.age_at_a(a)

    def arrival(self, z):
        chi = self.comoving(z) / self.dh
        if chi >= self.event_horizon() / self.dh:
            return math.nan
        a = brentq(lambda aa: quad(lambda b: 1.0 / (b * b * self.expansion_rate(1.0 / b - 1.0)),
                                   1.0, aa)[0] - chi, 1.0, 1e6)
        return self.age_at_a(a)


def per_value(s):
    """Per-value reference implementations of every quantity."""
    dh = s.dh
    return {
        "expansion_rate": s.expansion_rate,
        "hubble_parameter_km_s_mpc": lambda z: s.c.h0 * s.expansion_rate(z),
        "comoving_distance_mpc": s.comoving,
        "transverse_comoving_distance_mpc": s.transverse,
        "angular_diameter_distance_mpc": lambda z: s.transverse(z) / (1 + z),
        "luminosity_distance_mpc": lambda z: s.transverse(z) * (1 + z),
        "distance_modulus_mag": lambda z: 5 * math.log10(s.transverse(z) * (1 + z) * 1e5),
        "lookback_time_gyr": s.lookback,
        "age_at_emission_gyr": s.age,
        "comoving_volume_mpc3": lambda z: 4 * math.pi / 3 * s.transverse(z) ** 3,
        "differential_comoving_volume_mpc3_sr": lambda z: dh * s.transverse(z) ** 2 / s.expansion_rate(z),
        "recession_velocity_now_c": lambda z: s.comoving(z) / dh,
        "recession_velocity_at_emission_c": lambda z: s.comoving(z) / dh * s.expansion_rate(z) / (1 + z),
        "dcomoving_distance_dz_mpc": lambda z: dh / s.expansion_rate(z),
        "dtransverse_comoving_distance_dz_mpc": lambda z: dh / s.expansion_rate(z),
        "dlookback_time_dz_gyr": lambda z: s.th / ((1 + z) * s.expansion_rate(z)),
        "reachable": lambda z: s.comoving(z) < s.event_horizon(),
        "horizon_crossing_age_gyr": s.crossing,
        "signal_arrival_age_gyr": s.arrival,
        "redshift_at_comoving_distance": lambda d: brentq(lambda z: s.comoving(z) - d, 0, 1e4),
        "redshift_at_lookback_time": lambda t: brentq(lambda z: s.lookback(z) - t, 0, 1e4),
        "redshift_at_age": lambda t: brentq(lambda z: s.age(z) - t, 1e-9, 1e4),
    }


SLOW = {"horizon_crossing_age_gyr", "signal_arrival_age_gyr", "redshift_at_comoving_distance",
        "redshift_at_lookback_time", "redshift_at_age", "reachable"}


def rate(f, x, repeats):
    """(values per CPU second, values per wall second), best of `repeats`."""
    f(x[:1000])
    cpu, wall = [], []
    for _ in range(repeats):
        t0, w0 = time.process_time(), time.perf_counter()
        f(x)
        cpu.append(time.process_time() - t0)
        wall.append(time.perf_counter() - w0)
    return x.size / max(min(cpu), 1e-9), x.size / max(min(wall), 1e-9)


def build_times(n=10):
    """CPU milliseconds to build the tables of new cosmologies (Planck-like)."""
    out = []
    for i in range(n):
        c = Cosmology(h0=67.0 + 0.01 * i, omega_m=0.31, omega_b=0.049, t_cmb=2.7255,
                      m_nu=[0.0, 0.0, 0.06])
        t0 = time.process_time()
        c.build()
        out.append(1e3 * (time.process_time() - t0))
    return out


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--n", type=int, default=2_000_000, help="values per engine call")
    ap.add_argument("--quad-n", type=int, default=200, help="values for per-value quad")
    ap.add_argument("--repeats", type=int, default=5)
    ap.add_argument("--json", help="also write the figures to this file")
    args = ap.parse_args(argv)

    c = preset("planck2018").build()
    rng = np.random.default_rng(1)
    z = 10 ** rng.uniform(-3, 3, args.n)  # log-uniform, 0.001 < z < 1000
    zq = 10 ** rng.uniform(-3, 3, args.quad_n)
    inputs = {
        "redshift_at_comoving_distance": c.comoving_distance_mpc,
        "redshift_at_lookback_time": c.lookback_time_gyr,
        "redshift_at_age": c.age_at_emission_gyr,
    }
    ref = per_value(ScriptedModel(c))

    bt = build_times()
    print(f"cosmology engine benchmark  (planck2018; {args.n:,} values per call, "
          f"log-uniform 1e-3 < z < 1e3)")
    print(f"table build for a new cosmology: median {statistics.median(bt):.1f} ms, "
          f"min {min(bt):.1f} ms, max {max(bt):.1f} ms (CPU time, 10 cosmologies)\n")
    head = f"{'quantity':40s} {'engine M/s':>11s} {'(wall)':>8s} {'quad /s':>10s} {'speed-up':>10s}"
    print(head)
    print("-" * len(head))
    rows = []
    for name, fq in ref.items():
        f = getattr(c, name)
        x = inputs[name](z) if name in inputs else z
        xq = inputs[name](zq) if name in inputs else zq
        eng_cpu, eng_wall = rate(f, x, args.repeats)
        nq = max(10, args.quad_n // 10) if name in SLOW else args.quad_n
        t0 = time.process_time()
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")  # quad's IntegrationWarning on wide brackets
            for v in xq[:nq]:
                fq(float(v))
        q_rate = nq / max(time.process_time() - t0, 1e-9)
        rows.append(dict(quantity=name, engine_per_s=eng_cpu, engine_wall_per_s=eng_wall,
                         quad_per_s=q_rate, speedup=eng_cpu / q_rate))
        print(f"{name:40s} {eng_cpu / 1e6:11.1f} {eng_wall / 1e6:8.1f} {q_rate:10.0f} "
              f"{eng_cpu / q_rate:10.3g}")
    slowest = min(rows, key=lambda r: r["engine_per_s"])
    print(f"\nslowest quantity: {slowest['quantity']} at {slowest['engine_per_s'] / 1e6:.1f} M/s "
          f"per core (target >= 20 M/s); build target <= 50 ms")
    if args.json:
        with open(args.json, "w") as fh:
            json.dump({"build_ms": bt, "rows": rows, "n": args.n}, fh, indent=1)
    return rows, bt


if __name__ == "__main__":
    main()
