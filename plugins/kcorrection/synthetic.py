"""Synthetic photometry: AB magnitudes of a spectrum through a photon-counting filter.

Conventions (Hogg, Baldry, Blanton & Eisenstein 2002, astro-ph/0210394, eqs. 2, 8 and 9):

* a spectrum is tabulated as wavelength in Angstrom and f_lambda (erg s^-1 cm^-2 A^-1 for
  absolute magnitudes; any scale when only differences such as K-corrections matter);
* a filter is tabulated as wavelength in Angstrom and its response R per photon (the
  probability that a photon of that wavelength is counted);
* the AB magnitude (Oke & Gunn 1983, ApJ 266, 713) is
  ``m_AB = -2.5 log10(<f_nu>) - 48.60`` with f_nu in erg s^-1 cm^-2 Hz^-1, where the
  photon-counting band average is ``<f_nu> = int f_lambda R lambda dlambda / int c R / lambda
  dlambda``. A flat f_nu = 3631 Jy source has m_AB = 0 (to 1e-4 mag).

Both tables are taken as their linear interpolants and are zero outside their ends. The
integrals here are *exact* for those interpolants: on every interval between consecutive
knots of the two tables the photon integrand lambda f(lambda) R(lambda) is a cubic, which
Simpson's rule integrates exactly, and the zero-point integral of R / lambda has a closed form.
So the only approximation is the one the tables themselves make.

Redshift: at redshift z a rest-frame spectrum f(lambda) is observed as
``f_obs(lambda) = f(lambda / (1 + z)) / (1 + z)``, i.e. without the luminosity-distance
dimming, which the distance modulus carries. With that convention the K-correction of Hogg
et al. (2002) eq. 9 is simply ``K_QR(z) = m_R(z) - m_Q(0)`` (R observed band, Q rest-frame
band), which is what :func:`kcorrection_curve` returns.

These functions validate nothing but shapes; the plugin validates files first
(:mod:`annotator_plugins.kcorrection.tables`).
"""

from __future__ import annotations

import math

import numpy as np

__all__ = [
    "AB_ZERO_POINT_MAG",
    "AB_FNU_CGS",
    "C_ANGSTROM_PER_S",
    "photon_integral",
    "zero_point_integral",
    "ab_maggies",
    "ab_magnitude",
    "kcorrection_curve",
    "pivot_wavelength",
    "filter_support",
]

#: Oke & Gunn (1983): m_AB = -2.5 log10 f_nu - 48.60 (f_nu in erg s^-1 cm^-2 Hz^-1).
AB_ZERO_POINT_MAG = 48.60
#: The AB reference flux density, 10^(-48.6/2.5) erg s^-1 cm^-2 Hz^-1 (about 3631 Jy).
AB_FNU_CGS = 10.0 ** (-0.4 * AB_ZERO_POINT_MAG)
#: Speed of light in Angstrom per second (CODATA, exact).
C_ANGSTROM_PER_S = 2.99792458e18


def filter_support(filt_wave: np.ndarray, filt_resp: np.ndarray) -> tuple[float, float]:
    """Wavelength range (Angstrom) where the linear interpolant of the response is non-zero."""
    nz = np.flatnonzero(np.asarray(filt_resp) > 0)
    if nz.size == 0:
        raise ValueError("the filter response is zero everywhere")
    lo = filt_wave[max(nz[0] - 1, 0)]
    hi = filt_wave[min(nz[-1] + 1, len(filt_wave) - 1)]
    return float(lo), float(hi)


def _trim(filt_wave: np.ndarray, filt_resp: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """The filter table restricted to its support (keeping the bracketing zero knots)."""
    nz = np.flatnonzero(filt_resp > 0)
    lo = max(nz[0] - 1, 0)
    hi = min(nz[-1] + 1, len(filt_wave) - 1)
    return filt_wave[lo:hi + 1], filt_resp[lo:hi + 1]


def photon_integral(sed_wave: np.ndarray, sed_flam: np.ndarray, filt_wave: np.ndarray,
                    filt_resp: np.ndarray, stretch=1.0):
    """``int lambda F(lambda) R(lambda) dlambda`` for ``F(lambda) = f(lambda / stretch)``.

    Exact for the linear interpolants of both tables (zero outside them): on the merged grid of
    both tables' knots the integrand is a cubic between consecutive knots, and Simpson's rule
    integrates a cubic exactly. ``stretch`` may be an array (one integral each); the work is
    vectorised over it.
    """
    stretches = np.atleast_1d(np.asarray(stretch, dtype=np.float64))
    out = np.empty(stretches.size)
    # Bound the temporary (stretches x knots) arrays to a few million elements.
    width = len(filt_wave) + len(sed_wave) + 2
    chunk = max(1, 4_000_000 // width)
    for start in range(0, stretches.size, chunk):
        part = stretches[start:start + chunk]
        out[start:start + part.size] = _photon_integrals(sed_wave, sed_flam, filt_wave,
                                                         filt_resp, part)
    return float(out[0]) if np.ndim(stretch) == 0 else out.reshape(np.shape(stretch))


def _photon_integrals(sw, sf, fw, fr, s):
    """Vectorised core of :func:`photon_integral` for an array of stretches ``s``."""
    lo = np.maximum(sw[0] * s, fw[0])
    hi = np.minimum(sw[-1] * s, fw[-1])
    empty = ~(hi > lo)
    hi = np.where(empty, lo, hi)
    # Rest-frame SED knots inside [lo, hi] / s, per stretch; padded to a common count with
    # copies of ``hi``: repeated knots only add zero-width intervals, which integrate to 0.
    i0 = np.searchsorted(sw, lo / s, side="right")
    i1 = np.searchsorted(sw, hi / s, side="left")
    n_sed = int(np.max(i1 - i0, initial=0))
    cols = np.arange(n_sed)
    idx = i0[:, None] + cols[None, :]
    sed_knots = np.where(idx < i1[:, None], sw[np.minimum(idx, len(sw) - 1)] * s[:, None],
                         hi[:, None])
    filt_knots = np.clip(np.broadcast_to(fw, (s.size, fw.size)), lo[:, None], hi[:, None])
    knots = np.concatenate((lo[:, None], sed_knots, filt_knots, hi[:, None]), axis=1)
    knots.sort(axis=1)
    # Both tables are linear between consecutive merged knots, so their values at a midpoint
    # are the means of those at its ends: two interpolations instead of four.
    f = np.interp((knots / s[:, None]).ravel(), sw, sf, left=0.0, right=0.0).reshape(knots.shape)
    r = np.interp(knots.ravel(), fw, fr, left=0.0, right=0.0).reshape(knots.shape)
    g_k = knots * f * r
    g_m = (0.125 * (knots[:, :-1] + knots[:, 1:]) * (f[:, :-1] + f[:, 1:])
           * (r[:, :-1] + r[:, 1:]))
    h = np.diff(knots, axis=1)
    total = np.sum(h * (g_k[:, :-1] + 4.0 * g_m + g_k[:, 1:]), axis=1) / 6.0
    total[empty] = 0.0
    return total


def zero_point_integral(filt_wave: np.ndarray, filt_resp: np.ndarray) -> float:
    """``int R(lambda) / lambda dlambda`` in closed form for the linear interpolant of R.

    On [a, b] with R = r_a + s (lambda - a): int R / lambda = (r_a - s a) ln(b / a) + s (b - a).
    """
    a, b = filt_wave[:-1], filt_wave[1:]
    ra, rb = filt_resp[:-1], filt_resp[1:]
    s = (rb - ra) / (b - a)
    return float(np.sum((ra - s * a) * np.log(b / a) + s * (b - a)))


def ab_maggies(wave_A, flambda, filter_wave_A, filter_response, z=0.0):
    """AB maggies (10^(-0.4 m_AB)) of a rest-frame spectrum observed at redshift ``z``.

    :param wave_A: spectrum wavelengths, Angstrom, increasing.
    :param flambda: f_lambda at those wavelengths, erg s^-1 cm^-2 A^-1.
    :param filter_wave_A: filter wavelengths, Angstrom, increasing.
    :param filter_response: photon-counting response at those wavelengths (>= 0).
    :param z: a redshift or an array of redshifts (the spectrum is shifted to
        ``lambda (1 + z)`` and divided by ``1 + z``, without distance dimming).
    :return: a float, or an array shaped like ``z``.
    """
    sw = np.asarray(wave_A, dtype=np.float64)
    sf = np.asarray(flambda, dtype=np.float64)
    fw, fr = _trim(np.asarray(filter_wave_A, dtype=np.float64),
                   np.asarray(filter_response, dtype=np.float64))
    # <f_nu> = int f_lambda R lambda dlambda / (c int R / lambda dlambda); maggies = <f_nu>/g_nu.
    norm = C_ANGSTROM_PER_S * zero_point_integral(fw, fr) * AB_FNU_CGS
    zs = np.asarray(z, dtype=np.float64)
    stretch = 1.0 + zs
    out = photon_integral(sw, sf, fw, fr, stretch) / stretch / norm
    return float(out) if zs.ndim == 0 else np.asarray(out)


def ab_magnitude(wave_A, flambda, filter_wave_A, filter_response, z=0.0):
    """AB magnitude of a rest-frame spectrum observed at redshift ``z`` (see :func:`ab_maggies`).

    Infinite (not an error) where the spectrum gives no flux through the filter.
    """
    maggies = ab_maggies(wave_A, flambda, filter_wave_A, filter_response, z)
    with np.errstate(divide="ignore"):
        return -2.5 * np.log10(maggies)


def kcorrection_curve(sed_wave, sed_flam, filt_wave, filt_resp, z_grid, rest_filter=None):
    """K-correction K_QR(z) of an SED (Hogg et al. 2002, eq. 9), so that m_R = M_Q + mu + K.

    :param sed_wave: rest-frame wavelengths of the SED, Angstrom.
    :param sed_flam: its f_lambda (any scale).
    :param filt_wave: wavelengths of the observed-frame filter R, Angstrom.
    :param filt_resp: its photon-counting response.
    :param z_grid: redshifts (array-like).
    :param rest_filter: ``(wavelengths, response)`` of the rest-frame filter Q; default R.
    :return: K in magnitudes at each redshift; ``K(0) = 0`` when Q = R.
    """
    rest_wave, rest_resp = (filt_wave, filt_resp) if rest_filter is None else rest_filter
    observed = ab_magnitude(sed_wave, sed_flam, filt_wave, filt_resp, np.asarray(z_grid))
    emitted = ab_magnitude(sed_wave, sed_flam, rest_wave, rest_resp, 0.0)
    return observed - emitted


def pivot_wavelength(filt_wave, filt_resp) -> float:
    """Pivot wavelength sqrt(int R lambda dlambda / int R / lambda dlambda), Angstrom.

    The photon-counting form (Tokunaga & Vacca 2005, PASP 117, 421, eq. A11): the wavelength
    at which <f_nu> and <f_lambda> convert as for a monochromatic band.
    """
    fw = np.asarray(filt_wave, dtype=np.float64)
    fr = np.asarray(filt_resp, dtype=np.float64)
    fw, fr = _trim(fw, fr)
    # int lambda R dlambda is exact with the trapezoid of (lambda R) only to second order, so
    # use the same Simpson scheme with a unit spectrum.
    num = photon_integral(fw, np.ones_like(fw), fw, fr)
    return math.sqrt(num / zero_point_integral(fw, fr))
