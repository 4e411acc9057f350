"""Independent reference computations for the K-correction tests.

These do not use the plugin's integrators: they integrate analytic callables with
scipy.integrate.quad, in the frequency form of Hogg, Baldry, Blanton & Eisenstein (2002,
astro-ph/0210394) eq. 8, where the plugin uses the wavelength form (eq. 9) on tables.
"""

from __future__ import annotations

import math

import numpy as np
from scipy.integrate import quad

C_A = 2.99792458e18  # speed of light, Angstrom / s


def _band_integral(func_of_nu, filt, lam_lo, lam_hi):
    """int dnu / nu func(nu) R(nu) over the band, by quad in u = ln nu."""
    u_lo, u_hi = math.log(C_A / lam_hi), math.log(C_A / lam_lo)

    def integrand(u):
        nu = math.exp(u)
        return func_of_nu(nu) * float(filt(C_A / nu))

    val, _ = quad(integrand, u_lo, u_hi, limit=400, epsabs=0.0, epsrel=1e-10)
    return val


def fnu_of(sed_flambda):
    """L_nu(nu) from an f_lambda callable: f_nu = f_lambda lambda^2 / c."""
    def f(nu):
        lam = C_A / nu
        return float(sed_flambda(lam)) * lam * lam / C_A
    return f


def kcorrection_direct(sed_flambda, filt_r, filt_q, z: float, band_r, band_q) -> float:
    """K_QR(z) by Hogg et al. (2002) eq. 8, integrating in frequency with quad.

    ``band_r``/``band_q``: (lambda_lo, lambda_hi) in Angstrom that hold the filters' support.
    """
    fnu = fnu_of(sed_flambda)
    one = 1.0 + z
    observed = _band_integral(lambda nu: fnu(nu * one), filt_r, *band_r)
    emitted = _band_integral(fnu, filt_q, *band_q)
    g_r = _band_integral(lambda nu: 1.0, filt_r, *band_r)  # AB: g_nu constant
    g_q = _band_integral(lambda nu: 1.0, filt_q, *band_q)
    return -2.5 * math.log10(one * observed * g_q / (g_r * emitted))


def ab_magnitude_direct(sed_flambda, filt, band, z: float = 0.0) -> float:
    """m_AB = -2.5 log10(<f_nu>) - 48.60 (Oke & Gunn 1983), <f_nu> the photon-counting band
    average int f_nu R dnu/nu / int R dnu/nu (Hogg et al. 2002 eq. 2); at redshift z the
    observed f_nu(nu) is (1 + z) f_nu(nu (1 + z)) (eq. 8 without distance dimming)."""
    fnu = fnu_of(sed_flambda)
    one = 1.0 + z
    num = _band_integral(lambda nu: one * fnu(nu * one), filt, *band)
    den = _band_integral(lambda nu: 1.0, filt, *band)
    return -2.5 * math.log10(num / den) - 48.60


def mixture(sed_a, sed_b, weight_a: float, weight_b: float):
    def f(lam):
        return weight_a * sed_a(lam) + weight_b * sed_b(lam)
    return f


def as_callable(wave, value):
    wave = np.asarray(wave)
    value = np.asarray(value)

    def f(lam):
        return np.interp(lam, wave, value, left=0.0, right=0.0)
    return f
