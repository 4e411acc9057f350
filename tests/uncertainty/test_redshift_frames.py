"""Heliocentric -> CMB-frame redshifts: the rotation, the dipole, the relativistic composition.

Outside references: the Hipparcos galactic-frame matrix (ESA 1997, SP-1200, Vol. 1, eq. 1.5.11),
astropy.coordinates (Galactic frame; SpectralCoord's relativistic Doppler shift), and the
Lorentz transformation of a photon's four-momentum (Jackson 1999, Classical Electrodynamics,
3rd ed., eq. 11.19 for the general boost).
"""

from __future__ import annotations

import math
import warnings

import numpy as np
import pyarrow as pa
import pytest

from annotator.config import job_from_mapping
from annotator.errors import ConfigError
from annotator.pipeline import Pipeline
from annotator.plan import build_plan
from annotator_plugins.redshift_frames import (
    PLANCK2018_DIPOLE, Dipole, doppler_factor_minus_one, galactic_to_icrs, heliocentric_to_cmb,
    icrs_to_galactic_matrix, parse_dipole,
)

C_KM_S = 299_792.458  # exact (SI 2019)


def _sky(n, seed=3):
    rng = np.random.default_rng(seed)
    ra = rng.uniform(0.0, 360.0, n)
    dec = np.degrees(np.arcsin(rng.uniform(-1.0, 1.0, n)))
    return ra, dec


def _unit(ra_deg, dec_deg):
    ra, dec = np.radians(ra_deg), np.radians(dec_deg)
    return np.stack([np.cos(dec) * np.cos(ra), np.cos(dec) * np.sin(ra), np.sin(dec)], axis=-1)


# ----------------------------------------------------------------- ICRS -> galactic
def test_rotation_matches_the_hipparcos_matrix():
    # ESA 1997, The Hipparcos and Tycho Catalogues, SP-1200, Vol. 1, eq. 1.5.11 (the matrix
    # A_G' that takes ICRS to galactic Cartesian components), printed to 10 decimals
    # (from memory).
    published = np.array([
        [-0.0548755604, -0.8734370902, -0.4838350155],
        [+0.4941094279, -0.4448296300, +0.7469822445],
        [-0.8676661490, -0.1980763734, +0.4559837762],
    ])
    r = icrs_to_galactic_matrix()
    np.testing.assert_allclose(r, published, atol=1e-10)
    np.testing.assert_allclose(r @ r.T, np.eye(3), atol=1e-15)
    assert np.linalg.det(r) == pytest.approx(1.0, abs=1e-15)


def test_rotation_matches_astropy_galactic_frame():
    coords = pytest.importorskip("astropy.coordinates")
    u = pytest.importorskip("astropy.units")
    ra, dec = _sky(200)
    gal = coords.SkyCoord(ra=ra * u.deg, dec=dec * u.deg, frame="icrs").galactic
    ref = _unit(gal.l.deg, gal.b.deg)
    ours = _unit(ra, dec) @ icrs_to_galactic_matrix().T
    # astropy reaches the galactic frame through FK5 (with the ~20 mas ICRS-FK5 frame bias);
    # the Hipparcos definition places the same pole and node directly in the ICRS, so the
    # two agree to ~1e-7 rad (0.02 arcsec), not to rounding.
    assert np.max(np.linalg.norm(ours - ref, axis=1)) < 2e-7


def test_planck_apex_direction_matches_astropy():
    coords = pytest.importorskip("astropy.coordinates")
    u = pytest.importorskip("astropy.units")
    apex = coords.SkyCoord(l=264.021 * u.deg, b=48.253 * u.deg, frame="galactic").icrs
    ref = apex.cartesian.xyz.value
    assert np.linalg.norm(PLANCK2018_DIPOLE.apex_icrs() - ref) < 2e-7
    # The apex of the Planck 2018 dipole lies near RA 168 deg, Dec -7 deg (Planck
    # Collaboration 2020, A&A 641, A1; from memory); astropy agrees.
    assert apex.ra.deg == pytest.approx(167.94, abs=0.01)
    assert apex.dec.deg == pytest.approx(-6.94, abs=0.01)


# -------------------------------------------------------------- the composition
def _astropy_cmb_redshift(z, ra, dec, dipole):
    """z_cmb from astropy's SpectralCoord: observer at the barycentre, then an observer at
    rest in the CMB frame (moving at -v towards the apex relative to the barycentre)."""
    coords = pytest.importorskip("astropy.coordinates")
    u = pytest.importorskip("astropy.units")
    n = len(z)
    apex = coords.SkyCoord(l=dipole.l_deg * u.deg, b=dipole.b_deg * u.deg,
                           frame="galactic").icrs.cartesian.xyz.value
    zero = coords.CartesianDifferential([0.0, 0.0, 0.0] * u.km / u.s)
    observer = coords.ICRS(coords.CartesianRepresentation([0.0, 0.0, 0.0] * u.km,
                                                          differentials=zero))
    target = coords.SkyCoord(ra=ra * u.deg, dec=dec * u.deg, distance=np.full(n, 1e3) * u.Mpc,
                             pm_ra_cosdec=np.zeros(n) * u.mas / u.yr,
                             pm_dec=np.zeros(n) * u.mas / u.yr,
                             radial_velocity=np.zeros(n) * u.km / u.s, frame="icrs")
    seen = coords.SpectralCoord(np.ones(n) * u.m, observer=observer, target=target)
    v_cmb = coords.CartesianDifferential(-dipole.speed_km_s * apex * u.km / u.s)
    cmb_observer = coords.ICRS(coords.CartesianRepresentation([0.0, 0.0, 0.0] * u.km,
                                                              differentials=v_cmb))
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        moved = seen.with_observer_stationary_relative_to(cmb_observer)
    # (1 + z_cmb) / (1 + z_helio) = lambda_cmb / lambda_helio
    z_cmb = (1.0 + z) * moved.to_value(u.m) - 1.0
    mu = _unit(ra, dec) @ apex
    return z_cmb, mu


def test_on_the_dipole_axis_astropy_agrees_to_1e9():
    # Along the axis the motion is purely radial, where SpectralCoord's relativistic Doppler
    # shift sqrt((1 + beta)/(1 - beta)) is the whole effect (astropy SpectralCoord docs).
    coords = pytest.importorskip("astropy.coordinates")
    u = pytest.importorskip("astropy.units")
    apex = coords.SkyCoord(l=264.021 * u.deg, b=48.253 * u.deg, frame="galactic").icrs
    anti = apex.directional_offset_by(0 * u.deg, 180 * u.deg)
    ra = np.array([apex.ra.deg] * 3 + [anti.ra.deg] * 3)
    dec = np.array([apex.dec.deg] * 3 + [anti.dec.deg] * 3)
    z = np.array([0.0, 0.1, 2.5, 0.0, 0.1, 2.5])
    ref, mu = _astropy_cmb_redshift(z, ra, dec, PLANCK2018_DIPOLE)
    ours = heliocentric_to_cmb(z, ra, dec)
    np.testing.assert_allclose(np.abs(mu), 1.0, atol=1e-12)
    np.testing.assert_allclose(ours, ref, rtol=0, atol=1e-9)
    # Sign (derivation in the module): towards the apex the CMB-frame redshift is larger.
    beta = 369.82 / C_KM_S
    np.testing.assert_allclose(ours[:3], (1 + z[:3]) * math.sqrt((1 + beta) / (1 - beta)) - 1,
                               atol=1e-12)
    assert np.all(ours[:3] > z[:3]) and np.all(ours[3:] < z[3:])


def test_everywhere_astropy_agrees_once_time_dilation_is_added():
    # SpectralCoord shifts by the radial component of the velocity only,
    # sqrt((1 + beta mu)/(1 - beta mu)); the exact factor 1/(gamma (1 - beta mu)) differs from
    # it by 1/(gamma sqrt(1 - beta^2 mu^2)) = sqrt((1 - beta^2)/(1 - beta^2 mu^2)), the
    # transverse (time-dilation) part, ~7.6e-7 sin^2(theta) here.
    ra, dec = _sky(300, seed=11)
    z = np.random.default_rng(5).uniform(0.0, 3.0, 300)
    ref, mu = _astropy_cmb_redshift(z, ra, dec, PLANCK2018_DIPOLE)
    ours = heliocentric_to_cmb(z, ra, dec)
    beta = 369.82 / C_KM_S
    time_dilation = np.sqrt((1 - beta**2) / (1 - beta**2 * mu**2))
    np.testing.assert_allclose(ours, (1 + ref) * time_dilation - 1, rtol=0, atol=1e-9)
    # ... and without that factor the difference is the size predicted, so it matters.
    assert np.max(np.abs(ours - ref)) > 1e-6


def test_matches_an_explicit_lorentz_boost_of_the_photon():
    # Jackson 1999, eq. 11.19 (general boost): a frame moving with velocity beta (units of c)
    # sees E = gamma (E' - beta . p'), p = p' + ((gamma - 1)/beta^2 (beta . p') - gamma E') beta.
    # The CMB frame moves at -beta_sun relative to the Sun; the photon seen from the Sun has
    # E' = 1 and travels along -n (n towards the source).
    # The apex direction comes from the rotation tested above, so this checks the composition.
    dipole = Dipole(speed_km_s=30_000.0, l_deg=40.0, b_deg=-20.0)  # a large speed: beta = 0.1
    a = dipole.apex_icrs()
    ra, dec = _sky(100, seed=2)
    n = _unit(ra, dec)
    bvec = -dipole.speed_km_s / C_KM_S * a
    b2 = bvec @ bvec
    g = 1 / math.sqrt(1 - b2)
    p_sun = -n
    e_cmb = g * (1.0 - p_sun @ bvec)
    p_cmb = p_sun + (((g - 1) / b2) * (p_sun @ bvec) - g)[:, None] * bvec
    np.testing.assert_allclose(np.linalg.norm(p_cmb, axis=1), e_cmb, rtol=1e-13)  # null vector
    z = np.linspace(0.0, 3.0, 100)
    expected = (1 + z) * (1.0 / e_cmb) - 1  # (1+z_cmb)/(1+z_sun) = E_sun / E_cmb
    np.testing.assert_allclose(heliocentric_to_cmb(z, ra, dec, dipole), expected, rtol=0,
                               atol=1e-13)


def test_zero_speed_changes_nothing_and_the_factor_is_precise_near_one():
    ra, dec = _sky(50)
    z = np.linspace(0.0, 2.0, 50)
    still = Dipole(0.0, 10.0, 10.0)
    assert np.array_equal(heliocentric_to_cmb(z, ra, dec, still), z)
    # D - 1 keeps relative precision: compare with a high-precision evaluation.
    from decimal import Decimal, getcontext

    getcontext().prec = 40
    dm1 = doppler_factor_minus_one(ra[:5], dec[:5])
    a = PLANCK2018_DIPOLE.apex_icrs()
    beta = Decimal(369.82) / Decimal(C_KM_S)
    gamma = 1 / (1 - beta * beta).sqrt()
    for i in range(5):
        mu = Decimal(float(_unit(ra[i], dec[i]) @ a))
        exact = 1 / (gamma * (1 - beta * mu)) - 1
        assert float(dm1[i]) == pytest.approx(float(exact), rel=1e-12)


def test_invalid_positions_give_nan():
    ra = np.array([10.0, -1.0, 361.0, 10.0, np.nan, 360.0, 0.0])
    dec = np.array([0.0, 0.0, 0.0, 90.5, 0.0, -90.0, 90.0])
    dm1 = doppler_factor_minus_one(ra, dec)
    assert list(np.isnan(dm1)) == [False, True, True, True, True, False, False]


# ------------------------------------------------------------------------ settings
def test_parse_dipole():
    assert parse_dipole(None) == PLANCK2018_DIPOLE
    d = parse_dipole({"speed_km_s": 370, "l_deg": 264.0, "b_deg": 48.0})
    assert d == Dipole(370.0, 264.0, 48.0)
    for bad, word in [({"speed_km_s": 1, "l_deg": 1}, "b_deg"),
                      ({"speed_km_s": -1, "l_deg": 1, "b_deg": 0}, "speed_km_s"),
                      ({"speed_km_s": 3e5, "l_deg": 1, "b_deg": 0}, "speed_km_s"),
                      ({"speed_km_s": 1, "l_deg": 1, "b_deg": 91}, "b_deg"),
                      ({"speed_km_s": 1, "l_deg": "x", "b_deg": 0}, "l_deg"),
                      ({"speed_km_s": 1, "l_deg": 1, "b_deg": 0, "v": 2}, "v"),
                      ([370, 264, 48], "cmb_dipole")]:
        with pytest.raises(ConfigError, match=word):
            parse_dipole(bad)


def _table(n=6):
    return pa.table({
        "z": pa.array([0.5, 1.0, None, 0.2, 0.3, 2.0][:n], type=pa.float64()),
        "ra": [10.0, 200.0, 30.0, -5.0, 100.0, 170.0][:n],
        "dec": [5.0, -30.0, 0.0, 0.0, 95.0, -7.0][:n],
        "z_err": [0.01, -0.02, 0.01, 0.01, 0.01, np.nan][:n],
    })


def _plan(tmp_path, columns, table=None, **extra):
    import pyarrow.parquet as pq

    path = tmp_path / "cat.parquet"
    pq.write_table(table if table is not None else _table(), path)
    data = {"input": {"paths": [str(path)]}, "output": {"dir": str(tmp_path / "out")},
            "columns": columns, **extra}
    return build_plan(job_from_mapping(data, base_dir=tmp_path))


def test_settings_are_validated(tmp_path):
    with pytest.raises(ConfigError, match=r"\[columns\].redshift_frame: 'lsr'"):
        _plan(tmp_path, {"redshift_frame": "lsr"})
    with pytest.raises(ConfigError, match=r"\[columns\].cmb_dipole: only used"):
        _plan(tmp_path, {"cmb_dipole": {"speed_km_s": 1, "l_deg": 1, "b_deg": 1}})
    with pytest.raises(ConfigError, match=r"\[columns\].cmb_dipole: only used"):
        _plan(tmp_path, {"redshift_frame": "cmb",
                         "cmb_dipole": {"speed_km_s": 1, "l_deg": 1, "b_deg": 1}})
    # "cmb": the redshift is already in the CMB frame; nothing is added.
    plan = _plan(tmp_path, {"redshift_frame": "cmb"})
    assert "redshift_cmb" not in [c.name for c in plan.added_columns]


def test_heliocentric_plan_runs_first_and_redefines_the_redshift(tmp_path):
    plan = _plan(tmp_path, {"redshift_frame": "heliocentric"})
    names = [s.name for s in plan.steps]
    assert names[0] == "redshift_frames"
    for step in plan.steps[1:]:
        if "redshift" in step.resolve:
            assert step.resolve["redshift"] == ("computed", "redshift_cmb")
        if "redshift_error" in step.resolve:
            assert step.resolve["redshift_error"] == ("computed", "redshift_cmb_err")


def test_bad_rows_keep_their_place_with_nulls_and_flags(tmp_path):
    plan = _plan(tmp_path, {"redshift_frame": "heliocentric"})
    out, counts, flagged = Pipeline.from_plan(plan).annotate(_table())
    assert out.num_rows == 6
    z_cmb = out.column("redshift_cmb").to_pylist()
    err = out.column("redshift_cmb_err").to_pylist()
    flags = out.column("annotation_flags").to_pylist()
    # row 0 fine; row 1 negative error; row 2 null z; row 3 ra < 0; row 4 dec > 90;
    # row 5 NaN error
    assert z_cmb[0] is not None and z_cmb[1] is not None and z_cmb[5] is not None
    assert z_cmb[2] is None and z_cmb[3] is None and z_cmb[4] is None
    assert err[0] is not None and err[1] is None and err[5] is None
    assert "position_invalid" in flags[3] and "position_invalid" in flags[4]
    assert "redshift_error_invalid" in flags[1] and "redshift_error_invalid" in flags[5]
    assert flags[0] == ""
    assert counts["position_invalid"] == 2
    assert counts["redshift_error_invalid"] == 2
    # the error follows the Jacobian d z_cmb / d z_helio = (1 + z_cmb)/(1 + z_helio): the
    # conversion is affine in z, so a central difference is exact up to rounding
    z0, ra0, dec0 = 0.5, 10.0, 5.0
    h = 1e-3
    jac = (heliocentric_to_cmb(np.array([z0 + h]), [ra0], [dec0])[0]
           - heliocentric_to_cmb(np.array([z0 - h]), [ra0], [dec0])[0]) / (2 * h)
    assert err[0] == pytest.approx(0.01 * jac, rel=1e-9)


def test_user_dipole_is_used(tmp_path):
    dip = {"speed_km_s": 600.0, "l_deg": 276.0, "b_deg": 30.0}
    plan = _plan(tmp_path, {"redshift_frame": "heliocentric", "cmb_dipole": dip})
    out, _, _ = Pipeline.from_plan(plan).annotate(_table(1))
    expected = heliocentric_to_cmb(np.array([0.5]), [10.0], [5.0], Dipole(600.0, 276.0, 30.0))
    assert out.column("redshift_cmb")[0].as_py() == pytest.approx(expected[0], abs=1e-15)
    assert expected[0] != pytest.approx(heliocentric_to_cmb(np.array([0.5]), [10.0], [5.0])[0],
                                        abs=1e-6)


def test_galactic_to_icrs_round_trip():
    v = galactic_to_icrs(123.4, -56.7)
    g = icrs_to_galactic_matrix() @ v
    assert math.degrees(math.atan2(g[1], g[0])) % 360 == pytest.approx(123.4, abs=1e-12)
    assert math.degrees(math.asin(g[2])) == pytest.approx(-56.7, abs=1e-12)


def test_missing_position_column_is_a_plan_error(tmp_path):
    from annotator.errors import PlanError

    table = pa.table({"z": [0.5], "dec": [1.0]})
    with pytest.raises(PlanError, match="'ra'"):
        _plan(tmp_path, {"redshift_frame": "heliocentric"}, table=table)


def test_pipeline_pickles_for_workers(tmp_path):
    # Dask ships the pipeline to workers by pickle (common practice): same output after.
    import pickle

    plan = _plan(tmp_path, {"redshift_frame": "heliocentric"})
    pipe = Pipeline.from_plan(plan)
    before, _, _ = pipe.annotate(_table())
    after, _, _ = pickle.loads(pickle.dumps(pipe)).annotate(_table())
    added = [c.name for c in plan.added_columns] + ["annotation_flags"]
    assert after.select(added).equals(before.select(added))  # (inputs hold a NaN != NaN)
