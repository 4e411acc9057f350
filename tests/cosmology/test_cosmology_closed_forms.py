"""Closed-form cosmologies (outside references) and the distance definitions of Hogg 1999
(consistency checks, named so).

Sources of the closed forms: Einstein-de Sitter, a ~ t^(2/3) (Einstein & de Sitter 1932,
PNAS 18, 213; Weinberg 1972, Gravitation and Cosmology, ch. 15; Hogg 1999,
arXiv:astro-ph/9905116, sec. 5); Lambda = 0 models: Mattig 1958 for D_L and the open-model
age t0 (Weinberg 1972, ch. 15, eq. 15.3.x; Peebles 1993, Principles of Physical Cosmology,
eq. 13.10; equation numbers from memory); de Sitter, E = 1 (de Sitter 1917; its event
horizon c/H0: Rindler 1956, MNRAS 116, 662).  Constants are the references' own
(_reference_constants.py), never the engine's.
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from annotator.cosmology import Cosmology, CosmologyError
import _reference_constants as RC

Z = np.array([1e-5, 1e-3, 0.1, 0.5, 1.0, 2.0, 7.5, 30.0, 1100.0, 1e4])
REL = 1e-9


def close(a, b, rel=REL):
    np.testing.assert_allclose(a, b, rtol=rel, atol=0)


# ----------------------------------------------------------------- Einstein-de Sitter
@pytest.fixture(scope="module")
def eds():
    return Cosmology(h0=70.0, omega_m=1.0, name="eds")


def test_eds_distances(eds):
    # Einstein-de Sitter: D_C = 2 D_H (1 - (1+z)^-1/2) (e.g. Hogg 1999, astro-ph/9905116,
    # sec. 5, the Omega_M = 1 case of Mattig's relation)
    dh = RC.SPEED_OF_LIGHT_KM_S / 70.0
    dc = 2 * dh * (1 - 1 / np.sqrt(1 + Z))
    close(eds.comoving_distance_mpc(Z), dc)
    close(eds.transverse_comoving_distance_mpc(Z), dc)
    close(eds.luminosity_distance_mpc(Z), (1 + Z) * dc)
    close(eds.angular_diameter_distance_mpc(Z), dc / (1 + Z))
    close(eds.comoving_volume_mpc3(Z), 4 * math.pi / 3 * dc**3)
    close(eds.expansion_rate(Z), (1 + Z) ** 1.5)
    assert eds.particle_horizon_mpc == pytest.approx(2 * dh, rel=REL)
    assert eds.derived()["hubble_sphere_redshift"] == pytest.approx(3.0, rel=REL)


def test_eds_ages(eds):
    # EdS: t(z) = (2/3) t_H (1+z)^-3/2 (a ~ t^2/3)
    th = RC.MEGAPARSEC_KM / 70.0 / RC.GIGAYEAR_S
    close(eds.age_at_emission_gyr(Z), 2 / 3 * th * (1 + Z) ** -1.5)
    close(eds.lookback_time_gyr(Z), 2 / 3 * th * (1 - (1 + Z) ** -1.5))
    assert eds.age_today_gyr == pytest.approx(2 / 3 * th, rel=REL)
    close(eds.redshift_at_age(2 / 3 * th * (1 + Z) ** -1.5), Z, rel=1e-8)


def test_eds_has_no_event_horizon(eds):
    # decelerating forever: no event horizon, every object reachable, no crossing
    assert eds.event_horizon_mpc == math.inf
    assert eds.future_visibility_limit_mpc == math.inf
    d = eds.derived()
    assert d["event_horizon_mpc"] is None and d["event_horizon_redshift"] is None
    assert d["future_visibility_limit_mpc"] is None
    assert eds.reachable(Z).all()
    assert np.isnan(eds.horizon_crossing_age_gyr(Z)).all()
    # a signal sent now (conformal time eta0 = 2 D_H) reaches chi when eta = 2 + chi
    # (units D_H); with a = (eta/2)^2 and t = (2/3) a^3/2 t_H: t = (2/3) t_H ((2+chi)/2)^3
    th = RC.MEGAPARSEC_KM / 70.0 / RC.GIGAYEAR_S
    chi = 2 * (1 - 1 / np.sqrt(1 + Z))
    close(eds.signal_arrival_age_gyr(Z), 2 / 3 * th * ((2 + chi) / 2) ** 3)


# ---------------------------------------------------------- Mattig relation, Lambda = 0
@pytest.mark.parametrize("om", [0.05, 0.3, 0.7])
def test_mattig(om):
    # Mattig 1958 (Astron. Nachr. 284, 109): for Lambda = 0,
    # D_L = 2 D_H / Om^2 [Om z + (Om - 2)(sqrt(1 + Om z) - 1)]
    c = Cosmology(h0=70.0, omega_m=om, omega_de=0.0)
    dh = RC.SPEED_OF_LIGHT_KM_S / 70.0
    sqrt_m1 = om * Z / (np.sqrt(1 + om * Z) + 1)  # sqrt(1 + Om z) - 1 without cancellation
    dl = 2 * dh / om**2 * (om * Z + (om - 2) * sqrt_m1)
    close(c.luminosity_distance_mpc(Z), dl)
    # its open-model age today: t0 = t_H [1/(1-Om) - Om/(2 (1-Om)^3/2) acosh(2/Om - 1)]
    th = RC.MEGAPARSEC_KM / 70.0 / RC.GIGAYEAR_S
    t0 = th * (1 / (1 - om) - om / (2 * (1 - om) ** 1.5) * math.acosh(2 / om - 1))
    assert c.age_today_gyr == pytest.approx(t0, rel=REL)
    assert math.isinf(c.event_horizon_mpc)  # coasting forever: no event horizon


def test_closed_matter_only_recollapses():
    # Lambda = 0 and Omega_m > 1: the model recollapses, and is refused
    with pytest.raises(CosmologyError, match="recollapse"):
        Cosmology(h0=70.0, omega_m=2.0, omega_de=0.0)


# --------------------------------------------------------------------------- de Sitter
def test_de_sitter_limit():
    # de Sitter (E = 1): D_C = c z / H0, lookback = t_H ln(1+z), event horizon c / H0.
    # An exact de Sitter model has no big bang and is refused, so test the limit
    # Omega_m -> 0 (1e-12: corrections ~ Omega_m (1+z)^3 stay below 1e-8 for z <= 10).
    c = Cosmology(h0=70.0, omega_m=1e-12)
    dh = RC.SPEED_OF_LIGHT_KM_S / 70.0
    th = RC.MEGAPARSEC_KM / 70.0 / RC.GIGAYEAR_S
    z = np.array([1e-4, 0.1, 1.0, 3.0, 10.0])
    close(c.comoving_distance_mpc(z), dh * z, rel=1e-8)
    close(c.lookback_time_gyr(z), th * np.log1p(z), rel=1e-8)
    close(c.expansion_rate(z), np.ones_like(z), rel=1e-8)
    assert c.event_horizon_mpc == pytest.approx(dh, rel=1e-8)
    # at the event horizon today, z_EH = 1 (D_C = c z / H0 = c / H0)
    assert c.derived()["event_horizon_redshift"] == pytest.approx(1.0, rel=1e-8)
    # and the recession velocity now equals c there (the Hubble sphere coincides)
    assert c.derived()["hubble_sphere_redshift"] == pytest.approx(1.0, rel=1e-8)


def test_exact_de_sitter_refused():
    with pytest.raises(CosmologyError, match="big bang"):
        Cosmology(h0=70.0, omega_m=0.0)


# ------------------------------------------------------------------------ Hogg (1999)
@pytest.mark.parametrize("params", [
    dict(h0=70.0, omega_m=0.3, omega_de=0.5, t_cmb=2.7255),  # open
    dict(h0=70.0, omega_m=0.4, omega_de=0.8, t_cmb=2.7255, m_nu=[0, 0, 0.1]),  # closed
    dict(h0=67.0, omega_m=0.3),  # flat
])
def test_consistency_hogg_definitions(params):
    # Consistency check: every quantity below is built from the engine's own D_C and E(z),
    # so it tests the definitions, not the integrals.  Outside references for the same
    # quantities: test_cosmology_quadrature.py (test_distances, test_comoving_volume,
    # test_exact_derivatives: independent quadrature with its own constants) and astropy.
    # Hogg 1999, astro-ph/9905116: D_M from D_C (eq. 16), D_A = D_M/(1+z) (eq. 18),
    # D_L = (1+z) D_M (eq. 21), DM = 5 log10(D_L / 10 pc) (eq. 25),
    # dV_C = D_H (1+z)^2 D_A^2 / E dOmega dz (eq. 28), V_C (eq. 29).
    c = Cosmology(**params)
    dh = c.hubble_distance_mpc
    ok = c.omega_k
    dc = c.comoving_distance_mpc(Z)
    if ok > 0:
        dm = dh / math.sqrt(ok) * np.sinh(math.sqrt(ok) * dc / dh)
    elif ok < 0:
        dm = dh / math.sqrt(-ok) * np.sin(math.sqrt(-ok) * dc / dh)
    else:
        dm = dc
    close(c.transverse_comoving_distance_mpc(Z), dm)
    close(c.angular_diameter_distance_mpc(Z), dm / (1 + Z))
    close(c.luminosity_distance_mpc(Z), dm * (1 + Z))
    np.testing.assert_allclose(c.distance_modulus_mag(Z),
                               5 * np.log10(dm * (1 + Z) / 1e-5), rtol=0, atol=1e-9)
    da = dm / (1 + Z)
    close(c.differential_comoving_volume_mpc3_sr(Z), dh * (1 + Z) ** 2 * da**2 / c.expansion_rate(Z))
    x = dm / dh
    if ok > 0:
        v = 4 * math.pi * dh**3 / (2 * ok) * (x * np.sqrt(1 + ok * x**2)
                                              - np.arcsinh(math.sqrt(ok) * x) / math.sqrt(ok))
    elif ok < 0:
        v = 4 * math.pi * dh**3 / (2 * ok) * (x * np.sqrt(1 + ok * x**2)
                                              - np.arcsin(math.sqrt(-ok) * x) / math.sqrt(-ok))
    else:
        v = 4 * math.pi / 3 * dm**3
    big = Z > 0.05  # Hogg's closed form cancels catastrophically at small z
    close(c.comoving_volume_mpc3(Z)[big], v[big], rel=1e-8)
    # exact derivatives: dD_C/dz = D_H / E (eq. 15), d t_L/dz = t_H / ((1+z) E) (eq. 30)
    close(c.dcomoving_distance_dz_mpc(Z), dh / c.expansion_rate(Z))
    close(c.dlookback_time_dz_gyr(Z), c.hubble_time_gyr / ((1 + Z) * c.expansion_rate(Z)))
