"""Random valid models across the allowed parameter space: the engine must build, stay
finite and monotonic, invert itself, keep its horizon bookkeeping consistent (consistency
checks), and agree with independent quadrature (_cosmo_reference.Reference: E(z) written
out, scipy quad, its own constants) to its 1e-8 promise, not only by its own error
estimate."""

from __future__ import annotations

import math

import numpy as np
import pytest

from _cosmo_reference import Reference

from annotator.cosmology import Cosmology, CosmologyError

Z = np.concatenate([[0.0], 10 ** np.linspace(-5, 4, 120)])


def random_models(n, seed=11):
    rng = np.random.default_rng(seed)
    out = []
    while len(out) < n:
        p = dict(h0=float(rng.uniform(40, 120)), omega_m=float(rng.uniform(0.05, 1.2)),
                 t_cmb=float(rng.choice([0.0, 2.7255])), w0=float(rng.uniform(-2.0, -0.4)),
                 wa=float(rng.choice([0.0, rng.uniform(-1.5, 1.0)])))
        if rng.random() < 0.5:
            p["omega_de"] = float(rng.uniform(0.0, 1.5))
        if p["t_cmb"] > 0 and rng.random() < 0.5:
            p["m_nu"] = [0.0, float(rng.uniform(0, 0.1)), float(rng.uniform(0, 0.3))]
        try:
            out.append(Cosmology(**p))
        except CosmologyError:
            continue  # refused (recollapse, bounce, w0 + wa > 0): that is tested elsewhere
    return out


Z_QUAD = np.array([1e-4, 0.05, 0.7, 2.0, 9.0, 300.0, 1e4])


@pytest.mark.parametrize("c", random_models(12), ids=lambda c: f"h0={c.h0:.0f}")
def test_random_model_against_quadrature(c):
    r = Reference(**{k: v for k, v in c.to_dict().items() if k != "name"})
    worst = {
        "D_C": np.max(np.abs(c.comoving_distance_mpc(Z_QUAD)
                             / np.array([r.comoving_distance(z) for z in Z_QUAD]) - 1)),
        "lookback": np.max(np.abs(c.lookback_time_gyr(Z_QUAD)
                                  / np.array([r.lookback(z) for z in Z_QUAD]) - 1)),
        "age": np.max(np.abs(c.age_at_emission_gyr(Z_QUAD)
                             / np.array([r.age(z) for z in Z_QUAD]) - 1)),
        "E": np.max(np.abs(c.expansion_rate(Z_QUAD)
                           / np.array([r.expansion_rate(z) for z in Z_QUAD]) - 1)),
    }
    assert max(worst.values()) <= 1e-8, worst


@pytest.mark.parametrize("c", random_models(12), ids=lambda c: f"h0={c.h0:.0f}")
def test_consistency_random_model(c):
    # consistency checks (the engine against itself: finiteness, monotonicity, inverses,
    # horizon bookkeeping, its own error estimate); the outside reference is above
    d = c.derived()
    assert d["interpolation_error_estimate"] <= 1e-8
    dc = c.comoving_distance_mpc(Z)
    age = c.age_at_emission_gyr(Z)
    for q in (dc, age, c.luminosity_distance_mpc(Z), c.lookback_time_gyr(Z),
              c.comoving_volume_mpc3(Z), c.expansion_rate(Z)):
        assert np.isfinite(q).all()
    assert (np.diff(dc) >= 0).all() and (np.diff(age) <= 0).all()
    zz = Z[1:]
    back = c.comoving_distance_mpc(c.redshift_at_comoving_distance(dc[1:]))
    np.testing.assert_allclose(back, dc[1:], rtol=1e-8, atol=0)
    back = c.age_at_emission_gyr(c.redshift_at_age(age[1:]))
    np.testing.assert_allclose(back, age[1:], rtol=1e-8, atol=0)
    reach = c.reachable(zz)
    arrive = c.signal_arrival_age_gyr(zz)
    if math.isfinite(c.event_horizon_mpc):
        assert (np.isfinite(arrive) == reach).all()
        cross = c.horizon_crossing_age_gyr(zz)
        assert np.isfinite(cross).all() and (np.diff(cross) < 0).all()
        assert (cross[reach] > c.age_today_gyr).all() and (cross[~reach] < c.age_today_gyr).all()
    else:
        assert reach.all() and np.isfinite(arrive).all()
        assert (arrive >= c.age_today_gyr).all()
