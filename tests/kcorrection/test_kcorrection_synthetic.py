"""Synthetic photometry (plugins/kcorrection/synthetic.py) against outside references."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy.integrate import quad

from _kcorr_helpers import FILTERS, band_response, early_sed, filter_table, sed_table, young_sed
from _kcorr_reference import ab_magnitude_direct, kcorrection_direct
from annotator_plugins.kcorrection.synthetic import (
    AB_FNU_CGS, C_ANGSTROM_PER_S, ab_magnitude, kcorrection_curve, photon_integral,
    pivot_wavelength,
)

Z = np.array([0.0, 0.05, 0.3, 0.7, 1.2, 2.0])


def flat_fnu_sed(fnu_cgs: float, lo=500.0, hi=40000.0, n=20000):
    lam = np.geomspace(lo, hi, n)
    return lam, fnu_cgs * C_ANGSTROM_PER_S / lam ** 2


def power_law_sed(alpha: float, lo=500.0, hi=40000.0, n=40000):
    """f_nu ~ nu^alpha, i.e. f_lambda ~ lambda^(-2 - alpha), normalised at 5500 A."""
    lam = np.geomspace(lo, hi, n)
    return lam, (lam / 5500.0) ** (-2.0 - alpha) * 1e-17


def invented_filters():
    return {name: filter_table(c, w) for name, (c, w) in FILTERS.items()}


# ----------------------------------------------------------------------- AB zero point

@pytest.mark.parametrize("name", sorted(FILTERS))
def test_ab_zero_point_oke_gunn(name):
    fw, fr = invented_filters()[name]
    # Oke & Gunn (1983, ApJ 266, 713): m_AB = -2.5 log10 f_nu - 48.60 (cgs), so a flat source
    # of 3631 Jy (3.631e-20 erg/s/cm^2/Hz) has m_AB = 0 to within 1e-4 (3631 Jy rounds
    # 10^(-19.44) erg/s/cm^2/Hz) ...
    w, f = flat_fnu_sed(3631e-23)
    assert abs(ab_magnitude(w, f, fw, fr)) < 1e-4
    # ... and a flat source of magnitude m0 comes back as m0 through any filter (to 1e-6: the
    # tabulated f_lambda ~ lambda^-2 is linearly interpolated).
    for m0 in (-2.0, 0.0, 17.3, 25.0):
        w, f = flat_fnu_sed(10 ** (-0.4 * (m0 + 48.60)))
        assert ab_magnitude(w, f, fw, fr) == pytest.approx(m0, abs=1e-6)
    assert AB_FNU_CGS == pytest.approx(3631e-23, rel=1e-4)


# ------------------------------------------------------------------ closed-form K-corrections

@pytest.mark.parametrize("name", sorted(FILTERS))
def test_flat_fnu_kcorrection_is_minus_2p5_log_1plusz(name):
    # Hogg et al. (2002, astro-ph/0210394), after eq. 13: a source flat in f_nu has
    # K = -2.5 log10(1 + z) in any band.
    fw, fr = invented_filters()[name]
    w, f = flat_fnu_sed(1e-28)
    k = kcorrection_curve(w, f, fw, fr, Z)
    np.testing.assert_allclose(k, -2.5 * np.log10(1 + Z), atol=1e-6)


@pytest.mark.parametrize("alpha", [-3.0, -2.0, -1.0, -0.5, 0.7, 2.0])
@pytest.mark.parametrize("name", ["blue", "deep"])
def test_power_law_kcorrection_closed_form(alpha, name):
    # Hogg et al. (2002): f_nu ~ nu^alpha gives K = -2.5 (1 + alpha) log10(1 + z), whatever the
    # filter; the tabulated power law is linearly interpolated, hence the 1e-5 tolerance.
    fw, fr = invented_filters()[name]
    w, f = power_law_sed(alpha)
    k = kcorrection_curve(w, f, fw, fr, Z)
    np.testing.assert_allclose(k, -2.5 * (1 + alpha) * np.log10(1 + Z), atol=1e-5)
    assert k[0] == 0.0


# ---------------------------------------------------------------- exactness of the integral

def test_photon_integral_is_exact_for_linear_interpolants():
    # Common practice (Simpson's rule integrates cubics exactly, Abramowitz & Stegun 25.4.5):
    # compare with adaptive quadrature of the same interpolants, broken at every knot.
    rng = np.random.default_rng(3)
    sw = np.sort(rng.uniform(3000, 9000, 60))
    sf = rng.uniform(0, 2, 60)
    fw = np.sort(rng.uniform(4000, 7000, 25))
    fr = rng.uniform(0, 1, 25)
    for stretch in (1.0, 1.13, 1.6):
        def g(x):
            return x * np.interp(x / stretch, sw, sf, 0, 0) * np.interp(x, fw, fr, 0, 0)
        knots = np.union1d(sw * stretch, fw)
        lo, hi = max(sw[0] * stretch, fw[0]), min(sw[-1] * stretch, fw[-1])
        pts = knots[(knots > lo) & (knots < hi)]
        ref = sum(quad(g, a, b, epsabs=0, epsrel=1e-12)[0]
                  for a, b in zip(np.r_[lo, pts], np.r_[pts, hi]))
        assert photon_integral(sw, sf, fw, fr, stretch) == pytest.approx(ref, rel=1e-11)
    # vectorised over stretches = one at a time
    many = photon_integral(sw, sf, fw, fr, np.array([1.0, 1.13, 1.6]))
    one = [photon_integral(sw, sf, fw, fr, s) for s in (1.0, 1.13, 1.6)]
    np.testing.assert_allclose(many, one, rtol=1e-13)


@pytest.mark.parametrize("func", [early_sed, young_sed])
def test_ab_magnitude_against_frequency_form_quadrature(func):
    # Hogg et al. (2002) eq. 2 / Oke & Gunn (1983) in the frequency form, by quad on the
    # analytic callables: independent of the wavelength-form tables the plugin integrates.
    fw, fr = invented_filters()["red"]
    w, f = sed_table(func)
    for z in (0.0, 0.4, 1.1):
        ref = ab_magnitude_direct(func, lambda lam: band_response(lam, 6200.0, 1400.0),
                                  (fw[0], fw[-1]), z)
        assert ab_magnitude(w, f, fw, fr, z) == pytest.approx(ref, abs=2e-4)


def test_kcorrection_curve_against_eq8_direct_integration():
    # Hogg et al. (2002) eq. 8 (frequency form, quad) vs the plugin's eq. 9 on tables, at
    # random redshifts, for the same band and for a rest band bluer than the observed one.
    rng = np.random.default_rng(11)
    zs = np.sort(rng.uniform(0.0, 1.5, 6))
    w, f = sed_table(early_sed)
    red, blue = invented_filters()["red"], invented_filters()["blue"]
    red_fn = lambda lam: band_response(lam, 6200.0, 1400.0)  # noqa: E731
    blue_fn = lambda lam: band_response(lam, 4700.0, 1300.0)  # noqa: E731
    same = kcorrection_curve(w, f, *red, zs)
    cross = kcorrection_curve(w, f, *red, zs, rest_filter=blue)
    for z, k1, k2 in zip(zs, same, cross):
        ref1 = kcorrection_direct(early_sed, red_fn, red_fn, z, (red[0][0], red[0][-1]),
                                  (red[0][0], red[0][-1]))
        ref2 = kcorrection_direct(early_sed, red_fn, blue_fn, z, (red[0][0], red[0][-1]),
                                  (blue[0][0], blue[0][-1]))
        assert k1 == pytest.approx(ref1, abs=2e-4)
        assert k2 == pytest.approx(ref2, abs=2e-4)


def test_redshifting_convention():
    # f_obs(lambda) = f(lambda / (1 + z)) / (1 + z) (Hogg et al. 2002 eq. 9 without distance
    # dimming): ab_magnitude at z equals that of the explicitly redshifted table at z = 0.
    fw, fr = invented_filters()["deep"]
    w, f = sed_table(young_sed)
    z = 0.37
    assert ab_magnitude(w, f, fw, fr, z) == pytest.approx(
        ab_magnitude(w * (1 + z), f / (1 + z), fw, fr, 0.0), abs=1e-12)


def test_pivot_wavelength_of_a_narrow_band():
    # Tokunaga & Vacca (2005) eq. A11: a narrow top-hat has its pivot at its centre, and a
    # wide top-hat on [a, b] at sqrt((b^2 - a^2) / (2 ln(b / a))) (closed form of the ratio).
    a, b = 5000.0, 8000.0
    fw = np.array([a - 1e-6, a, b, b + 1e-6])
    fr = np.array([0.0, 1.0, 1.0, 0.0])
    expect = math.sqrt((b * b - a * a) / (2 * math.log(b / a)))
    assert pivot_wavelength(fw, fr) == pytest.approx(expect, rel=1e-7)


# -------------------------------------------------------------------------------- speclite

SPECLITE_BANDS = ["sdss2010-g", "sdss2010-r", "sdss2010-i", "sdss2010-z", "decam2014-g",
                  "decam2014-r", "bessell-V", "lsst2016-r", "hsc2017-i", "twomass-J"]


@pytest.mark.parametrize("band", SPECLITE_BANDS)
@pytest.mark.parametrize("func", [early_sed, young_sed])
def test_ab_magnitudes_agree_with_speclite(band, func):
    # speclite (a general-purpose library shipping public filter curves; outside reference):
    # AB magnitudes of the same spectrum through its filters agree within 1e-3 mag. (Curves
    # sampled every 100 A, such as bessell-R, are left out: there speclite's trapezoid on the
    # filter grid and the exact integral of the interpolant differ by about 1e-3 mag.)
    filters = pytest.importorskip("speclite.filters")
    units = pytest.importorskip("astropy.units")
    curve = filters.load_filter(band)
    fw = np.asarray(curve.wavelength, dtype=np.float64)
    fr = np.asarray(curve.response, dtype=np.float64)
    w, f = sed_table(func, 900.0, 25000.0, 20000)
    flux_unit = units.erg / units.s / units.cm ** 2 / units.Angstrom
    theirs = curve.get_ab_magnitude(f * flux_unit, w * units.Angstrom)
    ours = ab_magnitude(w, f, fw, fr)
    assert ours == pytest.approx(float(theirs), abs=1e-3)
