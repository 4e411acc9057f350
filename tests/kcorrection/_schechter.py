"""A flux-limited catalogue drawn from a known Schechter luminosity function, and the fit that
should recover it (used by test_kcorrection_vmax.py and benchmarks/bench_luminosity_function.py).

Schechter (1976, ApJ 203, 297) in absolute magnitudes:
phi(M) = 0.4 ln10 phi* x^(alpha + 1) exp(-x), x = 10^(0.4 (M* - M)), per Mpc^3 per mag.
Objects are uniform in comoving volume between z_lo and z_hi over a solid angle, with
K = -2.5 (1 + a) log10(1 + z) (a power law f_nu ~ nu^a, Hogg et al. 2002) and m = M + mu + K;
only m <= m_lim (and >= the bright limit) are kept.
"""

from __future__ import annotations

import math

import numpy as np
import pyarrow as pa

LN10 = math.log(10.0)
FULL_SKY_DEG2 = 4.0 * math.pi * (180.0 / math.pi) ** 2
TRUTH = {"phi_star": 4.0e-3, "m_star": -20.8, "alpha": -1.25}


def schechter(m, phi_star, m_star, alpha):
    x = 10.0 ** (0.4 * (m_star - np.asarray(m, dtype=np.float64)))
    return 0.4 * LN10 * phi_star * x ** (alpha + 1.0) * np.exp(-x)


def schechter_binned(centres, width, phi_star, m_star, alpha, sub: int = 9):
    """The Schechter function averaged over bins [c - w/2, c + w/2] (Simpson, ``sub`` points),
    which is what a binned 1/V_max estimate measures."""
    t = np.linspace(-0.5, 0.5, sub)
    wt = np.ones(sub)
    wt[1:-1:2], wt[2:-1:2] = 4.0, 2.0
    wt /= wt.sum()
    grid = np.asarray(centres)[:, None] + width * t[None, :]
    return schechter(grid, phi_star, m_star, alpha) @ wt


def draw(cosmology, *, n_expected: float, z_range=(0.02, 0.6), m_range=(-24.0, -16.5),
         m_lim=22.0, bright=None, k_slope=-2.0, seed=1):
    """(table, area_deg2, n_drawn): a catalogue with columns z, mag_r (kept rows only)."""
    rng = np.random.default_rng(seed)
    z_lo, z_hi = z_range
    grid_m = np.linspace(*m_range, 4001)
    pdf = schechter(grid_m, 1.0, TRUTH["m_star"], TRUTH["alpha"])
    cdf = np.concatenate([[0.0], np.cumsum(0.5 * (pdf[1:] + pdf[:-1]) * np.diff(grid_m))])
    per_volume = TRUTH["phi_star"] * cdf[-1]  # objects per Mpc^3 with M in m_range
    volume_sky = cosmology.comoving_volume_mpc3(z_hi) - cosmology.comoving_volume_mpc3(z_lo)
    area = n_expected / (per_volume * volume_sky) * FULL_SKY_DEG2
    n = rng.poisson(n_expected)
    m_abs = np.interp(rng.uniform(0.0, cdf[-1], n), cdf, grid_m)
    grid_z = np.linspace(z_lo, z_hi, 20001)
    vol = cosmology.comoving_volume_mpc3(grid_z)
    z = np.interp(rng.uniform(vol[0], vol[-1], n), vol, grid_z)
    k = -2.5 * (1.0 + k_slope) * np.log10(1.0 + z)
    m = m_abs + cosmology.distance_modulus_mag(z) + k
    keep = m <= m_lim
    if bright is not None:
        keep &= m >= bright
    table = pa.table({"z": z[keep], "mag_r": m[keep], "true_absolute_mag": m_abs[keep]})
    return table, area, n


def fit(centres, phi, err, width):
    """Least-squares Schechter fit of binned 1/V_max values: (parameters, 1-sigma errors)."""
    from scipy.optimize import curve_fit

    def model(c, log_phi_star, m_star, alpha):
        return schechter_binned(c, width, 10.0 ** log_phi_star, m_star, alpha)

    p0 = (math.log10(TRUTH["phi_star"]) + 0.2, TRUTH["m_star"] + 0.3, TRUTH["alpha"] + 0.1)
    p, cov = curve_fit(model, centres, phi, p0=p0, sigma=err, absolute_sigma=True,
                       maxfev=20000)
    e = np.sqrt(np.diag(cov))
    phi_star = 10.0 ** p[0]
    return ({"phi_star": phi_star, "m_star": p[1], "alpha": p[2]},
            {"phi_star": phi_star * LN10 * e[0], "m_star": e[1], "alpha": e[2]})
