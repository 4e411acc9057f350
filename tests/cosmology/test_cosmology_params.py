"""Parameters, presets, the job-file table, serialisation and model refusal."""

from __future__ import annotations

import json
import math
import pickle

import numpy as np
import pytest

from annotator.cosmology import PRESET_SOURCES, PRESETS, Cosmology, CosmologyError, preset

BAD = [
    ("h0", -70.0), ("h0", 0.0), ("h0", "70"), ("h0", True), ("h0", float("nan")),
    ("h0", None), ("omega_m", -0.1), ("omega_m", float("inf")), ("omega_de", -0.2),
    ("omega_de", "flat"), ("t_cmb", -1.0), ("n_eff", -1.0), ("w0", "x"),
    ("w0", -50.0), ("wa", float("nan")), ("m_nu", [-0.1, 0.0, 0.0]), ("m_nu", 0.06),
    ("m_nu", "0.06"), ("m_nu", ["a", 0, 0]),
]


@pytest.mark.parametrize("param,value", BAD)
def test_invalid_parameter_is_named_with_range(param, value):
    kw = dict(h0=70.0, omega_m=0.3, t_cmb=2.7255)
    kw[param] = value
    with pytest.raises(CosmologyError) as err:
        Cosmology(**kw)
    assert err.value.parameter == param
    msg = str(err.value)
    assert param in msg and ("must be" in msg)
    assert any(ch in msg for ch in "[(")  # the allowed range is quoted


def test_omega_b_bounded_by_omega_m():
    with pytest.raises(CosmologyError, match=r"omega_b must be in \[0, omega_m=0.3\]") as err:
        Cosmology(omega_m=0.3, omega_b=0.5)
    assert err.value.parameter == "omega_b"


def test_m_nu_count_and_temperature():
    with pytest.raises(CosmologyError, match="floor\\(n_eff\\)=3") as err:
        Cosmology(t_cmb=2.7255, m_nu=[0.06])
    assert err.value.parameter == "m_nu"
    with pytest.raises(CosmologyError, match="t_cmb > 0"):
        Cosmology(t_cmb=0.0, m_nu=[0.0, 0.0, 0.06])


def test_flat_closure_negative_dark_energy():
    with pytest.raises(CosmologyError, match="omega_de") as err:
        Cosmology(omega_m=1.5)
    assert err.value.parameter == "omega_de"


def test_early_dark_energy_refused():
    with pytest.raises(CosmologyError, match="w0 \\+ wa") as err:
        Cosmology(w0=-0.5, wa=0.8)
    assert err.value.parameter == "wa"


def test_refinement_of_a_near_loitering_model():
    # closed, strongly phantom: the expansion nearly stalls near z ~ 0.65, so the
    # tables are refined until their measured error is within budget
    params = dict(h0=70.0, omega_m=0.3, t_cmb=2.7255, w0=-2.6, omega_de=1.22)
    c = Cosmology(**params)
    est = c.derived()["interpolation_error_estimate"]
    assert 0 < est <= 5e-9  # the engine's ERROR_BUDGET
    # and not only by its own estimate: against independent quadrature (E(z) written out,
    # own constants), dense around the near-stall
    from _cosmo_reference import Reference

    r = Reference(**params)
    z = np.concatenate([np.linspace(0.3, 1.0, 15), [2.0, 10.0, 1e3]])
    ref_dc = np.array([r.comoving_distance(zz) for zz in z])
    ref_age = np.array([r.age(zz) for zz in z])
    assert np.max(np.abs(c.comoving_distance_mpc(z) / ref_dc - 1)) <= 1e-8
    assert np.max(np.abs(c.age_at_emission_gyr(z) / ref_age - 1)) <= 1e-8


def test_refused_models():
    with pytest.raises(CosmologyError, match="no big bang"):
        Cosmology(omega_m=0.3, omega_de=2.0)  # closed, Lambda-dominated: a bounce
    with pytest.raises(CosmologyError, match="recollapse"):
        Cosmology(omega_m=0.3, omega_de=0.9, w0=-0.9, wa=-2.0)  # closed, DE decays
    with pytest.raises(CosmologyError, match="big bang"):
        Cosmology(omega_m=0.0, t_cmb=0.0)  # de Sitter


def test_presets():
    assert set(PRESETS) == {"planck2018", "planck2015", "wmap9", "textbook"}
    assert set(PRESET_SOURCES) == set(PRESETS)
    for name in PRESETS:
        c = preset(name)
        assert c.name == name and c is preset(name)
        assert c == Cosmology.from_dict({"preset": name})
    p = preset("planck2018")
    assert (p.h0, p.omega_m, p.omega_b, p.t_cmb, p.n_eff, p.m_nu) == (
        67.66, 0.30966, 0.04897, 2.7255, 3.046, (0.0, 0.0, 0.06))
    with pytest.raises(CosmologyError) as err:
        preset("planck2020")
    assert "planck2020" in str(err.value) and "planck2018" in str(err.value)
    assert "wmap9" in str(err.value)


def test_from_dict():
    c = Cosmology.from_dict({"preset": "planck2018", "h0": 70.0})
    assert c.h0 == 70.0 and c.omega_m == 0.30966 and c.flat_space
    assert "planck2018" in c.name
    c = Cosmology.from_dict({"h0": 70, "omega_m": 0.3, "omega_de": 0.6, "name": "open"})
    assert c.omega_k == pytest.approx(0.1) and c.name == "open"
    with pytest.raises(CosmologyError) as err:
        Cosmology.from_dict({"h0": 70, "Omega_m": 0.3})
    assert "Omega_m" in str(err.value) and "omega_m" in str(err.value)
    with pytest.raises(CosmologyError):
        Cosmology.from_dict(["h0", 70])
    with pytest.raises(CosmologyError, match="unknown cosmology preset"):
        Cosmology.from_dict({"preset": "nope"})


def test_to_dict_round_trip_and_json():
    for c in [preset("planck2018"), Cosmology(h0=72, omega_m=0.25, omega_de=0.7,
                                              t_cmb=2.7, m_nu=[0.01, 0.02, 0.05],
                                              w0=-0.9, wa=0.1, name="mine")]:
        d = c.to_dict()
        back = Cosmology.from_dict(json.loads(json.dumps(d)))
        assert back == c and back.name == c.name and back.to_dict() == d
        derived = json.loads(json.dumps(c.derived()))
        assert set(derived) >= {
            "omega_k", "omega_radiation", "omega_nu", "omega_gamma", "hubble_distance_mpc",
            "hubble_time_gyr", "age_today_gyr", "event_horizon_mpc", "particle_horizon_mpc",
            "future_visibility_limit_mpc", "event_horizon_redshift",
            "hubble_sphere_redshift", "z_max_tabulated"}


def test_pickle_small_and_rebuilds():
    c = Cosmology(h0=68, omega_m=0.31, t_cmb=2.7255, m_nu=[0, 0, 0.06], name="x")
    z = np.array([0.1, 1.0, 3.0])
    before = c.luminosity_distance_mpc(z)  # builds the tables
    blob = pickle.dumps(c)
    assert len(blob) < 1000
    back = pickle.loads(blob)
    assert back == c and hash(back) == hash(c) and back.name == "x"
    assert back._tables is None  # rebuilt lazily
    np.testing.assert_array_equal(back.luminosity_distance_mpc(z), before)


def test_equality_and_hash_follow_parameters():
    a = Cosmology(h0=70, omega_m=0.3, name="a")
    b = Cosmology(h0=70.0, omega_m=0.3, name="b")
    assert a == b and hash(a) == hash(b)  # the name is a label only
    assert a != Cosmology(h0=70, omega_m=0.31)
    assert a != Cosmology(h0=70, omega_m=0.3, omega_de=0.7)  # explicit vs flat closure
    assert len({a, b, Cosmology(h0=71, omega_m=0.3)}) == 2


def test_immutable():
    c = preset("textbook")
    with pytest.raises(AttributeError):
        c.h0 = 50.0


def test_no_event_horizon_model():
    # w0 = -0.75, wa = -0.9: dark energy fades in the future, flat, decelerates forever
    c = Cosmology(h0=68, omega_m=0.31, t_cmb=2.7255, w0=-0.75, wa=-0.9)
    z = np.array([0.0, 0.5, 2.0, 1e3])
    assert math.isinf(c.event_horizon_mpc) and c.derived()["event_horizon_mpc"] is None
    assert c.reachable(z).all()
    assert np.isnan(c.horizon_crossing_age_gyr(z)).all()
    assert np.isfinite(c.signal_arrival_age_gyr(z)).all()
