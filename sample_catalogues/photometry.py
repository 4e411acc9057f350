"""Vectorised synthetic photometry for the sample generator: AB colours and K-corrections of
an SED through the Quillfield filter curves.

This is the generator's own small helper (it only needs K(z) tables for a few templates); the
product's K-correction plugin lives in ``plugins/kcorrection/``.

Formulae (Hogg, Baldry, Blanton & Eisenstein 2002, astro-ph/0210394):

* AB magnitude through a photon-counting response R (their eqs. 2 and 7, with the AB
  standard g_nu = 3631 Jy; Oke & Gunn 1983, ApJ 266, 713):
  ``m = -2.5 log10( int f_lambda lambda R dlambda / (c int R / lambda dlambda) ) - 48.60``
  with f_lambda in erg s^-1 cm^-2 A^-1 and c in A/s.
* K-correction from a rest-frame band Q to an observed band R (their eq. 13, AB in both, so
  the standard-source integrals reduce to ``int R / lambda``):
  ``K_QR(z) = -2.5 log10[ 1/(1+z) * int lambda_o L(lambda_o/(1+z)) R(lambda_o) dlambda_o
  * int Q(lambda_e)/lambda_e dlambda_e / ( int R(lambda_o)/lambda_o dlambda_o
  * int lambda_e L(lambda_e) Q(lambda_e) dlambda_e ) ]``
  so that ``m_R = M_Q + mu(z) + K_QR(z)``.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np

SPEED_OF_LIGHT_ANGSTROM_S = 2.99792458e18
AB_ZERO_POINT = 48.60  # Oke & Gunn 1983: m_AB = -2.5 log10 f_nu[erg s^-1 cm^-2 Hz^-1] - 48.60


class CurveError(ValueError):
    """A filter or SED file that cannot be used (the message names the file and the row)."""


def read_curve(path: str | Path, value_name: str) -> tuple[np.ndarray, np.ndarray]:
    """Two-column CSV (header ``wavelength_angstrom,<value_name>``): strictly increasing,
    positive wavelengths and non-negative, finite values."""
    path = Path(path)
    try:
        data = np.loadtxt(path, delimiter=",", skiprows=1, ndmin=2)
    except (OSError, ValueError) as exc:
        raise CurveError(f"{path}: not a two-column numeric CSV ({exc})") from exc
    with path.open() as fh:
        header = fh.readline().strip().split(",")
    if header != ["wavelength_angstrom", value_name]:
        raise CurveError(f"{path}: header must be 'wavelength_angstrom,{value_name}', "
                         f"got {','.join(header)!r}")
    if data.shape[1] != 2 or data.shape[0] < 2:
        raise CurveError(f"{path}: expected at least two rows of two columns")
    wl, values = data[:, 0], data[:, 1]
    bad = np.flatnonzero(~np.isfinite(data).all(axis=1))
    if bad.size:
        raise CurveError(f"{path}: line {bad[0] + 2}: non-finite value")
    steps = np.flatnonzero(np.diff(wl) <= 0)
    if steps.size:
        raise CurveError(f"{path}: line {steps[0] + 3}: wavelengths must strictly increase")
    if wl[0] <= 0:
        raise CurveError(f"{path}: line 2: wavelengths must be positive")
    negative = np.flatnonzero(values < 0)
    if negative.size:
        raise CurveError(f"{path}: line {negative[0] + 2}: {value_name} must not be negative")
    return wl, values


def _trapezoid(y: np.ndarray, x: np.ndarray) -> np.ndarray:
    """Trapezoid rule along the last axis (x increasing)."""
    dx = np.diff(x)
    return 0.5 * ((y[..., 1:] + y[..., :-1]) * dx).sum(axis=-1)


def _support(wl: np.ndarray, response: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """The filter restricted to where it responds (plus one zero sample either side)."""
    nonzero = np.flatnonzero(response > 0)
    if nonzero.size == 0:
        raise CurveError("filter response is zero everywhere")
    lo, hi = max(nonzero[0] - 1, 0), min(nonzero[-1] + 1, wl.size - 1)
    return wl[lo:hi + 1], response[lo:hi + 1]


def ab_magnitude(sed_wl: np.ndarray, sed_flambda: np.ndarray, filter_wl: np.ndarray,
                 response: np.ndarray) -> float:
    """AB magnitude of an f_lambda spectrum (erg s^-1 cm^-2 A^-1) through a response."""
    wl, r = _support(filter_wl, response)
    _check_coverage(sed_wl, wl, "the filter")
    f = np.interp(wl, sed_wl, sed_flambda)
    mean_fnu = _trapezoid(f * wl * r, wl) / (SPEED_OF_LIGHT_ANGSTROM_S * _trapezoid(r / wl, wl))
    return float(-2.5 * np.log10(mean_fnu) - AB_ZERO_POINT)


def _check_coverage(sed_wl: np.ndarray, needed: np.ndarray, what: str) -> None:
    if needed[0] < sed_wl[0] or needed[-1] > sed_wl[-1]:
        raise CurveError(
            f"the SED covers {sed_wl[0]:g}-{sed_wl[-1]:g} A but {what} needs "
            f"{needed[0]:g}-{needed[-1]:g} A"
        )


def kcorrection_table(sed_wl: np.ndarray, sed_flambda: np.ndarray,
                      observed_wl: np.ndarray, observed_response: np.ndarray,
                      z: np.ndarray,
                      rest_wl: np.ndarray | None = None,
                      rest_response: np.ndarray | None = None) -> np.ndarray:
    """K_QR(z) for an SED, observed band R and rest-frame band Q (default Q = R), AB system,
    evaluated for every redshift in ``z`` at once (Hogg et al. 2002, eq. 13).

    ``z`` may include small negative values (blueshifts): the formula holds for any 1 + z > 0.
    """
    z = np.asarray(z, dtype=np.float64)
    if np.any(1.0 + z <= 0):
        raise CurveError("redshifts must satisfy 1 + z > 0")
    if rest_wl is None:
        rest_wl, rest_response = observed_wl, observed_response
    owl, orr = _support(observed_wl, observed_response)
    qwl, qrr = _support(rest_wl, rest_response)
    _check_coverage(sed_wl, qwl, "the rest-frame band")
    one_plus_z = 1.0 + z.reshape(-1, 1)
    emitted = owl / one_plus_z  # (nz, n_lambda): rest wavelength seen at each observed one
    _check_coverage(sed_wl, np.array([emitted.min(), emitted.max()]),
                    f"the observed band at z = {z.min():g}-{z.max():g}")
    flux = np.interp(emitted.ravel(), sed_wl, sed_flambda).reshape(emitted.shape)
    observed = _trapezoid(owl * flux * orr, owl) / one_plus_z[:, 0]
    rest = _trapezoid(qwl * np.interp(qwl, sed_wl, sed_flambda) * qrr, qwl)
    ratio = (observed / rest) * (_trapezoid(qrr / qwl, qwl) / _trapezoid(orr / owl, owl))
    return -2.5 * np.log10(ratio)
