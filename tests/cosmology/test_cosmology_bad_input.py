"""Invalid input never raises mid-catalogue and never yields a wrong number."""

from __future__ import annotations

import warnings

import numpy as np
import pytest

from _cosmo_models import built

from annotator.cosmology import preset

Z_FUNCS = [
    "expansion_rate", "hubble_parameter_km_s_mpc", "comoving_distance_mpc",
    "transverse_comoving_distance_mpc", "angular_diameter_distance_mpc",
    "luminosity_distance_mpc", "distance_modulus_mag", "lookback_time_gyr",
    "age_at_emission_gyr", "comoving_volume_mpc3", "differential_comoving_volume_mpc3_sr",
    "recession_velocity_now_c", "recession_velocity_at_emission_c",
    "dcomoving_distance_dz_mpc", "dtransverse_comoving_distance_dz_mpc",
    "dlookback_time_dz_gyr", "horizon_crossing_age_gyr", "signal_arrival_age_gyr",
]
INVERSE_FUNCS = ["redshift_at_comoving_distance", "redshift_at_lookback_time",
                 "redshift_at_age"]
# NaN, inf and negative values (including catalogue sentinels and a value a rounding
# error below zero)
INVALID = [np.nan, np.inf, -np.inf, -1.0, -0.5, -1e-300, -99.0, -1e300]
MODELS = ["planck_like", "flat_cpl_no_horizon", "closed_cpl_nu"]


@pytest.mark.parametrize("model_name", MODELS)
@pytest.mark.parametrize("func", Z_FUNCS + INVERSE_FUNCS + ["reachable"])
def test_invalid_inputs_give_nan(model_name, func):
    c, _ = built(model_name)
    f = getattr(c, func)
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        out = f(np.array(INVALID))
        scalar = [f(v) for v in INVALID]
    if func == "reachable":
        assert out.dtype == bool and not out.any()
        assert not any(scalar)
    else:
        assert out.dtype == np.float64 and np.isnan(out).all()
        assert all(np.isnan(s) for s in scalar)


@pytest.mark.parametrize("func", Z_FUNCS + INVERSE_FUNCS)
def test_mixed_arrays_keep_shape_and_valid_values(func):
    c = preset("planck2018")
    f = getattr(c, func)
    good = np.array([0.1, 1.0, 2.0, 5.0])
    if func in INVERSE_FUNCS:
        fwd = {"redshift_at_comoving_distance": c.comoving_distance_mpc,
               "redshift_at_lookback_time": c.lookback_time_gyr,
               "redshift_at_age": c.age_at_emission_gyr}[func]
        good = fwd(good)
    grid = np.array([[good[0], np.nan, good[1]], [-1.0, good[2], good[3]]])
    out = f(grid)
    assert out.shape == (2, 3)
    np.testing.assert_array_equal(out[[0, 0, 1, 1], [0, 2, 1, 2]], f(good))
    assert np.isnan(out[0, 1]) and np.isnan(out[1, 0])
    # other array-likes and dtypes
    np.testing.assert_array_equal(f(list(good)), f(good))
    assert f(np.array([], float)).shape == (0,)
    assert np.ndim(f(float(good[1]))) == 0
    np.testing.assert_allclose(f(good.astype(np.float32)), f(good.astype(np.float32)
                                                            .astype(float)))
    big = np.tile(good, 10000)  # several evaluation chunks
    np.testing.assert_array_equal(f(big), np.tile(f(good), 10000))


def test_beyond_table_is_nan_not_clamped():
    c = preset("planck2018")
    zmax = c.z_max_tabulated
    assert zmax >= 1e10
    for func in Z_FUNCS:
        assert np.isnan(getattr(c, func)(2 * zmax)), func
    # distances and ages just beyond their inverse range
    assert np.isnan(c.redshift_at_comoving_distance(c.particle_horizon_mpc * 1.01))
    assert np.isnan(c.redshift_at_lookback_time(c.age_today_gyr))
    assert np.isnan(c.redshift_at_age(c.age_today_gyr * 1.001))
    assert np.isnan(c.redshift_at_age(0.0))


def test_zero_redshift():
    c = preset("planck2018")
    assert c.comoving_distance_mpc(0.0) == 0.0
    assert c.distance_modulus_mag(0.0) == -np.inf  # documented: D_L = 0 at z = 0
    assert c.horizon_crossing_age_gyr(0.0) == np.inf  # we never leave our own horizon
    assert c.signal_arrival_age_gyr(0.0) == pytest.approx(c.age_today_gyr, rel=1e-9)
    assert c.redshift_at_comoving_distance(0.0) == 0.0
    assert c.redshift_at_age(c.age_today_gyr) == 0.0
    assert c.reachable(0.0)


def test_reachability_consistency():
    c = preset("planck2018")
    z = np.array([0.0, 0.5, 1.0, 1.8, 1.9, 3.0, 1e3])
    reach = c.reachable(z)
    arrive = c.signal_arrival_age_gyr(z)
    assert (reach == np.isfinite(arrive)).all()
    cross = c.horizon_crossing_age_gyr(z)
    t0 = c.age_today_gyr
    # crossing in the future for reachable objects, in the past for the others
    assert (cross[reach] > t0).all() and (cross[~reach] < t0).all()
    assert (c.comoving_distance_mpc(z)[reach] < c.event_horizon_mpc).all()
