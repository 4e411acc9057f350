"""Published and commonly quoted values, each with its source.

Checks that compare the engine with itself (a quantity evaluated at the engine's own
derived redshift) are named ``test_consistency_*`` and say so; each sits beside an outside
reference for the same quantity (a published value here, or independent quadrature in
test_cosmology_quadrature.py: test_horizon_and_hubble_sphere_redshifts,
test_horizon_crossing_age, test_distances for the recession velocity).
"""

from __future__ import annotations

import math

import numpy as np
import pytest

import _reference_constants as RC
from _cosmo_reference import Reference

from annotator.cosmology import Cosmology, constants as K, preset

GLY_PER_MPC = RC.MEGAPARSEC_M / RC.GIGA_LIGHT_YEAR_M  # IAU 2015 B2 parsec, IAU light-year


def test_planck2018_age():
    # Planck Collaboration 2020, A&A 641, A6, Table 2: age 13.787 +- 0.020 Gyr
    assert abs(preset("planck2018").age_today_gyr - 13.787) <= 0.020


def test_planck2018_last_scattering_distance():
    # D_M(z* = 1089.92) = r*/theta* ~ 13.88 Gpc (from the same table; from memory:
    # hold it to 0.2 %)
    dm = float(preset("planck2018").transverse_comoving_distance_mpc(1089.92))
    assert dm == pytest.approx(13880.0, rel=2e-3)


@pytest.fixture(scope="module")
def dl04():
    # Davis & Lineweaver 2004, PASA 21, 97: Omega_m = 0.3, Omega_Lambda = 0.7, H0 = 70
    return preset("textbook")


def test_davis_lineweaver_hubble_sphere(dl04):
    # Davis & Lineweaver 2004: the Hubble sphere is at z ~ 1.46
    d = dl04.derived()
    assert d["hubble_sphere_redshift"] == pytest.approx(1.46, abs=0.01)


def test_consistency_velocity_at_the_engines_hubble_sphere(dl04):
    # Consistency check (the engine with itself): at the engine's own Hubble-sphere
    # redshift the engine's recession velocity now is c.  Outside reference for the same
    # redshift: test_cosmology_quadrature.py::test_horizon_and_hubble_sphere_redshifts.
    d = dl04.derived()
    assert float(dl04.recession_velocity_now_c(d["hubble_sphere_redshift"])) == pytest.approx(
        1.0, rel=1e-9)


def test_davis_lineweaver_event_horizon(dl04):
    # Davis & Lineweaver 2004: event horizon today at z ~ 1.8, about 16 Gly (comoving)
    d = dl04.derived()
    assert d["event_horizon_redshift"] == pytest.approx(1.8, abs=0.05)
    assert d["event_horizon_mpc"] * GLY_PER_MPC == pytest.approx(16.0, abs=0.3)


def test_consistency_crossing_age_at_the_engines_horizon_redshift(dl04):
    # Consistency check: an object at the engine's own z_EH crosses the engine's event
    # horizon today.  Outside reference: the crossing age of the independent quadrature
    # (root of R(x) = D_C) at the quadrature's own z_EH, below.
    d = dl04.derived()
    assert float(dl04.horizon_crossing_age_gyr(d["event_horizon_redshift"])) == pytest.approx(
        dl04.age_today_gyr, rel=1e-9)


def test_crossing_age_at_the_horizon_redshift_by_quadrature():
    # Outside reference (Reference: E(z) written out, scipy quad, own constants): at the
    # redshift where D_C equals the event horizon, the crossing age is the age today.
    from scipy.optimize import brentq

    params = dict(h0=70.0, omega_m=0.3)  # the textbook preset's parameters
    r = Reference(**params)
    r0 = r.remaining_eta(0.0)
    z_eh = brentq(lambda z: r.chi(z) - r0, 0.5, 5.0, xtol=1e-14, rtol=1e-14)
    c = Cosmology(**params)
    assert float(c.horizon_crossing_age_gyr(z_eh)) == pytest.approx(r.age(0.0), rel=1e-8)


@pytest.mark.parametrize("name", ["planck2018", "textbook"])
def test_common_practice_horizons(name):
    c = preset(name)
    ph = c.particle_horizon_mpc * GLY_PER_MPC
    # common practice (no source): particle horizon about 46 Gly, observable universe
    # about 93 Gly across, future visibility limit about 62 Gly
    assert ph == pytest.approx(46.0, abs=1.0)
    assert 2 * ph == pytest.approx(93.0, abs=2.0)
    assert c.future_visibility_limit_mpc * GLY_PER_MPC == pytest.approx(62.0, abs=1.5)
    # common practice: only about 4-5 % of the observable volume is inside the event horizon
    zeh = c.derived()["event_horizon_redshift"]
    frac = float(c.comoving_volume_mpc3(zeh)) / (4 * math.pi / 3 * c.particle_horizon_mpc**3)
    assert 0.04 <= frac <= 0.05


def test_consistency_recession_velocity_3_mpc():
    # Consistency check (Hubble's law v = H0 D restated, 204 = 3 x 68, through the engine's
    # own inverse distance and its own c): with H0 = 68 km/s/Mpc an object 3 Mpc away
    # recedes at 204 km/s.
    c = Cosmology(h0=68.0, omega_m=0.31, t_cmb=2.7255)
    z = c.redshift_at_comoving_distance(3.0)
    assert float(c.recession_velocity_now_c(z)) * K.C_KM_S == pytest.approx(204.0, rel=1e-9)


def test_recession_velocity_3_mpc_outside_reference():
    # Outside reference: the redshift at which D_C = 3 Mpc from independent quadrature
    # (own constants: c of SI 2019, parsec of IAU 2015 B2); the engine's velocity now there,
    # times c, is H0 x 3 Mpc = 204 km/s (Hubble's law for the proper distance now; Davis &
    # Lineweaver 2004, eq. 1).
    from scipy.optimize import brentq

    params = dict(h0=68.0, omega_m=0.31, t_cmb=2.7255)
    r = Reference(**params)
    z = brentq(lambda zz: r.comoving_distance(zz) - 3.0, 1e-6, 1e-2, xtol=1e-16, rtol=1e-15)
    v = float(Cosmology(**params).recession_velocity_now_c(z)) * RC.SPEED_OF_LIGHT_KM_S
    assert v == pytest.approx(204.0, rel=1e-8)


def test_constants():
    # common practice: 1 Mpc ~ 3.26 million light years
    assert K.MPC_IN_LY == pytest.approx(3.26e6, rel=2e-3)
    assert K.MPC_IN_GLY == pytest.approx(3.26e-3, rel=2e-3)
    # SI 2019 / CODATA 2018: c exact
    assert K.C_KM_S == 299792.458
    # IAU 2012 Resolution B2: au exact; IAU 2015 Resolution B2: pc = 648000/pi au,
    # quoted there as 3.085 677 581 491 367 e16 m
    assert K.AU_M == 149597870700.0
    assert K.PARSEC_M == pytest.approx(3.085677581491367e16, rel=1e-15)
    # IAU: Julian year = 365.25 d; light-year = c x Julian year = 9 460 730 472 580 800 m
    assert K.JULIAN_YEAR_S == 31557600.0
    assert K.LY_M == 9460730472580800.0
    assert K.GYR_S == 31557600.0e9


def test_derived_flat_planck():
    d = preset("planck2018").derived()
    # Planck 2018 Table 2 (TT,TE,EE+lowE+lensing+BAO): Omega_m = 0.3111 including
    # neutrinos, Omega_Lambda = 0.6889
    assert 0.30966 + d["omega_nu"] == pytest.approx(0.3111, abs=2e-4)
    assert d["omega_de"] == pytest.approx(0.6889, abs=2e-4)
    assert d["omega_k"] == 0.0
    # Omega_nu h^2 = sum m_nu / 93.14 eV (standard relic density, e.g. Lesgourgues &
    # Pastor 2006, Phys. Rep. 429, 307): the fitting formula agrees to ~1 %
    assert d["omega_nu"] * 0.6766**2 == pytest.approx(0.06 / 93.14, rel=0.015)
    assert np.isfinite(d["event_horizon_mpc"])
