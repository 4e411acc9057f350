"""The engine against per-value adaptive quadrature of the same integrals.

Requirement: relative error <= 1e-8 at random redshifts from 0 to 1e4, for flat,
open and closed models, with and without radiation and massive neutrinos, constant
and evolving w (the model set of _cosmo_models.MODELS).  The reference
(_cosmo_reference.py) writes E(z) out from the raw parameters and integrates with
scipy.integrate.quad at epsrel = 1e-13.
"""

from __future__ import annotations

import math

import numpy as np
import pytest

import _reference_constants as RC

TOL = 1e-8

_rng = np.random.default_rng(20240601)
# random redshifts in [0, 1e4]: log-uniform (to sample small z) plus uniform
Z_RANDOM = np.concatenate([10 ** _rng.uniform(-4, 4, 14), _rng.uniform(0, 1e4, 4),
                           [1e-6, 0.5, 1.0, 3.0]])


def rel(a, b):
    a, b = np.asarray(a, float), np.asarray(b, float)
    return np.max(np.abs(a / b - 1.0))


def test_expansion_rate_and_hubble(model):
    c, r = model
    ref = np.array([r.expansion_rate(z) for z in Z_RANDOM])
    assert rel(c.expansion_rate(Z_RANDOM), ref) <= TOL
    assert rel(c.hubble_parameter_km_s_mpc(Z_RANDOM), c.h0 * ref) <= TOL


def test_densities_today(model):
    c, r = model
    assert c.omega_gamma == pytest.approx(r.og, rel=1e-12, abs=1e-300)
    assert c.omega_nu == pytest.approx(r.onu0, rel=1e-12, abs=1e-300)
    assert c.omega_k == pytest.approx(r.ok, rel=1e-9, abs=1e-14)
    assert float(c.expansion_rate(0.0)) == pytest.approx(1.0, abs=1e-14)


def test_distances(model):
    c, r = model
    dc = np.array([r.comoving_distance(z) for z in Z_RANDOM])
    dm = np.array([r.transverse(z) for z in Z_RANDOM])
    assert rel(c.comoving_distance_mpc(Z_RANDOM), dc) <= TOL
    assert rel(c.transverse_comoving_distance_mpc(Z_RANDOM), dm) <= TOL
    assert rel(c.angular_diameter_distance_mpc(Z_RANDOM), dm / (1 + Z_RANDOM)) <= TOL
    assert rel(c.luminosity_distance_mpc(Z_RANDOM), dm * (1 + Z_RANDOM)) <= TOL
    mu_ref = 5 * np.log10(dm * (1 + Z_RANDOM) / RC.TEN_PARSEC_MPC)
    assert np.max(np.abs(c.distance_modulus_mag(Z_RANDOM) - mu_ref)) <= 5 / math.log(10) * TOL
    # recession velocities (in c): now D_C H0 / c, at emission D_C/(1+z) H(z) / c
    e = np.array([r.expansion_rate(z) for z in Z_RANDOM])
    assert rel(c.recession_velocity_now_c(Z_RANDOM), dc / r.dh) <= TOL
    assert rel(c.recession_velocity_at_emission_c(Z_RANDOM), dc / r.dh * e / (1 + Z_RANDOM)) <= TOL


def test_times(model):
    c, r = model
    lb = np.array([r.lookback(z) for z in Z_RANDOM])
    age = np.array([r.age(z) for z in Z_RANDOM])
    assert rel(c.lookback_time_gyr(Z_RANDOM), lb) <= TOL
    assert rel(c.age_at_emission_gyr(Z_RANDOM), age) <= TOL
    assert c.age_today_gyr == pytest.approx(r.age(0.0), rel=TOL)


def test_exact_derivatives(model):
    c, r = model
    e = np.array([r.expansion_rate(z) for z in Z_RANDOM])
    assert rel(c.dcomoving_distance_dz_mpc(Z_RANDOM), r.dh / e) <= TOL
    assert rel(c.dlookback_time_dz_gyr(Z_RANDOM), r.th / ((1 + Z_RANDOM) * e)) <= TOL
    # dD_M/dz = cosn(sqrt|Ok| D_C/D_H) D_H/E (derivative of Hogg 1999 eq. 16)
    chi = np.array([r.chi(z) for z in Z_RANDOM])
    s = math.sqrt(abs(r.ok))
    cosn = np.cosh(s * chi) if r.ok > 0 else (np.cos(s * chi) if r.ok < 0 else 1.0)
    assert rel(c.dtransverse_comoving_distance_dz_mpc(Z_RANDOM), cosn * r.dh / e) <= TOL


def test_comoving_volume(model):
    c, r = model
    zs = np.array([1e-3, 0.3, 2.0, 50.0, 5000.0])
    ref = np.array([r.volume(z) for z in zs])
    assert rel(c.comoving_volume_mpc3(zs), ref) <= TOL
    dm = np.array([r.transverse(z) for z in zs])
    e = np.array([r.expansion_rate(z) for z in zs])
    # Hogg 1999 eq. 28: dV/dz/dOmega = D_H D_M^2 / E
    assert rel(c.differential_comoving_volume_mpc3_sr(zs), r.dh * dm**2 / e) <= TOL


def test_horizons(model):
    c, r = model
    assert c.particle_horizon_mpc == pytest.approx(r.particle_horizon(), rel=TOL)
    if math.isfinite(c.event_horizon_mpc):
        assert c.event_horizon_mpc == pytest.approx(r.event_horizon(), rel=TOL)
        assert c.future_visibility_limit_mpc == pytest.approx(
            r.event_horizon() + r.particle_horizon(), rel=TOL)


def test_horizon_crossing_age(model):
    c, r = model
    if not math.isfinite(c.event_horizon_mpc):
        pytest.skip("no event horizon")
    zs = np.array([0.01, 1.0, 4.0, 3000.0])
    ref = np.array([r.crossing_age(z) for z in zs])
    assert rel(c.horizon_crossing_age_gyr(zs), ref) <= TOL


def test_signal_arrival_age(model):
    c, r = model
    zs = np.array([0.02, 0.7])
    assert c.reachable(zs).all()
    ref = np.array([r.arrival_age(z) for z in zs])
    assert rel(c.signal_arrival_age_gyr(zs), ref) <= TOL


def test_inverses_round_trip(model):
    c, r = model
    zs = Z_RANDOM
    dc = np.array([r.comoving_distance(z) for z in zs])
    age = np.array([r.age(z) for z in zs])
    assert rel(c.redshift_at_comoving_distance(dc), zs) <= TOL
    assert rel(c.redshift_at_age(age), zs) <= TOL
    # lookback time is ill-conditioned at high z (t_L -> t0): test where it is not
    low = zs[zs < 100]
    lb = np.array([r.lookback(z) for z in low])
    assert rel(c.redshift_at_lookback_time(lb), low) <= TOL


def test_horizon_and_hubble_sphere_redshifts(model):
    # Outside references for the two derived redshifts: the Hubble sphere is where the
    # recession velocity now is c, D_C(z) = D_H (Davis & Lineweaver 2004, PASA 21, 97,
    # sec. 2); the event horizon today is where D_C(z) equals the remaining conformal time
    # R0 (Rindler 1956).  Both solved by brentq on the reference's quadrature.
    from scipy.optimize import brentq

    c, r = model
    d = c.derived()
    z_hs = brentq(lambda z: r.chi(z) - 1.0, 1e-6, 1e4, xtol=1e-14, rtol=1e-14)
    assert d["hubble_sphere_redshift"] == pytest.approx(z_hs, rel=TOL)
    if math.isfinite(c.event_horizon_mpc):
        r0 = r.remaining_eta(0.0)
        z_eh = brentq(lambda z: r.chi(z) - r0, 1e-6, 1e4, xtol=1e-14, rtol=1e-14)
        assert d["event_horizon_redshift"] == pytest.approx(z_eh, rel=TOL)
    else:
        assert d["event_horizon_redshift"] is None
