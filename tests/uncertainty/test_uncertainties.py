"""Propagated errors and the probability of being reachable.

Outside references: closed forms of the Einstein-de Sitter model (Hogg 1999, astro-ph/9905116,
eqs. 14-16, 21, 28-30 with E(z) = (1+z)^(3/2)); scipy.stats.norm and scipy.stats.truncnorm; the split-normal
density (Wallis 2014, Statist. Sci. 29, 106, eq. 1) integrated numerically with scipy.
Consistency check (named so): the errors against central finite differences of the
cosmology's own functions (for curved models and Planck 2018, where no closed form exists;
the engine's functions themselves are checked against quadrature in tests/cosmology).
"""

from __future__ import annotations

import math

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
from scipy import integrate, stats

from annotator.config import job_from_mapping
from annotator.cosmology import Cosmology, preset
from annotator.errors import ConfigError
from annotator.pipeline import Pipeline
from annotator.plan import build_plan
from annotator_plugins.uncertainties import (
    reachable_probability_gaussian, reachable_probability_split,
)

C_KM_S = 299_792.458  # exact (SI 2019)
GYR_S = 1e9 * 365.25 * 86400.0  # Julian gigayear (IAU)
MPC_KM = 1e6 * 149_597_870_700.0 * 648_000.0 / math.pi / 1e3  # IAU 2012 B2, IAU 2015 B2

ERR_COLUMNS = ["comoving_distance_err_mpc", "luminosity_distance_err_mpc",
               "distance_modulus_err_mag", "lookback_time_err_gyr", "age_at_emission_err_gyr"]
EDS = {"h0": 70.0, "omega_m": 1.0, "omega_de": 0.0, "t_cmb": 0.0}


def _run_pipeline(tmp_path, table, columns=None, cosmology=None, annotators=None):
    path = tmp_path / "cat.parquet"
    pq.write_table(table, path)
    data = {"input": {"paths": [str(path)]}, "output": {"dir": str(tmp_path / "out")},
            "columns": columns or {}, "cosmology": cosmology or {"preset": "planck2018"}}
    if annotators:
        data["annotators"] = annotators
    plan = build_plan(job_from_mapping(data, base_dir=tmp_path))
    out, counts, _ = Pipeline.from_plan(plan).annotate(table)
    return out, counts, plan


def _col(t, name):
    return t.column(name).to_numpy(zero_copy_only=False)


def test_einstein_de_sitter_closed_forms(tmp_path):
    # Hogg 1999 with Omega_M = 1: D_C = 2 D_H (1 - (1+z)^(-1/2)), dD_C/dz = D_H (1+z)^(-3/2),
    # D_L = (1+z) D_C, t_L = (2/3) t_H (1 - (1+z)^(-3/2)), dt_L/dz = t_H (1+z)^(-5/2).
    z = np.array([0.01, 0.1, 0.5, 1.0, 2.0, 5.0, 10.0])
    sigma = 0.02 * (1 + z)
    table = pa.table({"z": z, "z_err": sigma})
    out, _, _ = _run_pipeline(tmp_path, table, cosmology=EDS)
    d_h = C_KM_S / 70.0
    t_h = MPC_KM / 70.0 / GYR_S
    dc = 2 * d_h * (1 - 1 / np.sqrt(1 + z))
    ddc = d_h * (1 + z) ** -1.5
    dl = (1 + z) * dc
    ddl = dc + (1 + z) * ddc
    dt = t_h * (1 + z) ** -2.5
    np.testing.assert_allclose(_col(out, "comoving_distance_err_mpc"), ddc * sigma, rtol=1e-9)
    np.testing.assert_allclose(_col(out, "luminosity_distance_err_mpc"), ddl * sigma, rtol=1e-9)
    np.testing.assert_allclose(_col(out, "distance_modulus_err_mag"),
                               5 / math.log(10) * ddl / dl * sigma, rtol=1e-9)
    np.testing.assert_allclose(_col(out, "lookback_time_err_gyr"), dt * sigma, rtol=1e-9)
    np.testing.assert_allclose(_col(out, "age_at_emission_err_gyr"), dt * sigma, rtol=1e-9)
    # No event horizon in Einstein-de Sitter: every object is reachable, probability 1.
    assert np.all(_col(out, "reachable_probability") == 1.0)


@pytest.mark.parametrize("cosmo", [
    preset("planck2018"),
    # open, with dark energy: exercises dD_M/dz != dD_C/dz
    Cosmology(h0=70.0, omega_m=0.25, omega_de=0.6, t_cmb=2.7255),
    # closed
    Cosmology(h0=65.0, omega_m=0.4, omega_de=0.75, t_cmb=0.0),
], ids=["planck2018", "open", "closed"])
def test_consistency_errors_match_finite_differences_of_the_cosmology(tmp_path, cosmo):
    # Consistency check: derivatives compared with finite differences of the same engine
    # (outside reference for the method: test_einstein_de_sitter_closed_forms).
    z = np.array([0.003, 0.05, 0.3, 0.9, 1.8, 3.5, 7.0])
    sigma = np.full_like(z, 0.01)
    table = pa.table({"z": z, "z_err": sigma})
    cosmology = {k: v for k, v in cosmo.to_dict().items() if k != "name"}
    out, _, _ = _run_pipeline(tmp_path, table, cosmology=cosmology)
    h = 1e-4 * z  # relative step: mu = 5 log10 D_L varies on the scale of z itself

    def slope(f):  # central difference, error O(h^2)
        return (f(z + h) - f(z - h)) / (2 * h)

    checks = {
        "comoving_distance_err_mpc": cosmo.comoving_distance_mpc,
        "luminosity_distance_err_mpc": cosmo.luminosity_distance_mpc,
        "distance_modulus_err_mag": cosmo.distance_modulus_mag,
        "lookback_time_err_gyr": cosmo.lookback_time_gyr,
        "age_at_emission_err_gyr": cosmo.age_at_emission_gyr,
    }
    for column, f in checks.items():
        np.testing.assert_allclose(_col(out, column), np.abs(slope(f)) * sigma, rtol=1e-7,
                                   err_msg=column)


def test_probability_matches_scipy_norm_and_truncnorm():
    rng = np.random.default_rng(4)
    z = np.concatenate([rng.uniform(0, 4, 200), [0.0, 1.85, 0.01]])
    sigma = np.concatenate([rng.uniform(0.001, 1.5, 200), [0.3, 0.1, 2.0]])
    z_eh = 1.8524
    # plain Gaussian: P = Phi((z_EH - z)/sigma)
    plain = reachable_probability_gaussian(z, sigma, z_eh, truncate_at_zero=False)
    np.testing.assert_allclose(plain, stats.norm.cdf(z_eh, loc=z, scale=sigma), rtol=1e-12,
                               atol=1e-300)
    # truncated to z_true >= 0 and renormalised: scipy.stats.truncnorm with a = -z/sigma
    trunc = reachable_probability_gaussian(z, sigma, z_eh)
    ref = stats.truncnorm.cdf(z_eh, a=-z / sigma, b=np.inf, loc=z, scale=sigma)
    np.testing.assert_allclose(trunc, ref, rtol=1e-9, atol=1e-14)
    # the coin toss of the issue: z = 1.84 +- 0.1 against z_EH = 1.8524
    p = reachable_probability_gaussian(np.array([1.84]), np.array([0.1]), z_eh)[0]
    assert p == pytest.approx(stats.norm.cdf((z_eh - 1.84) / 0.1), rel=1e-12)
    assert 0.5 < p < 0.56


def test_probability_far_beyond_the_horizon_keeps_relative_precision():
    z = np.array([5.0])
    sigma = np.array([0.4])
    p = reachable_probability_gaussian(z, sigma, 1.85)[0]
    ref = stats.norm.cdf((1.85 - 5.0) / 0.4)  # ~ 1.7e-15; the truncation is negligible here
    assert p == pytest.approx(ref, rel=1e-9)


def test_split_normal_probability_matches_integrated_density():
    # Wallis 2014, eq. 1: f(x) = A exp(-(x-z)^2 / (2 s1^2)) below the mode, with s2 above,
    # A = sqrt(2/pi) / (s1 + s2).  Integrate it with scipy.integrate.quad.
    def cdf(x, z, s1, s2):
        a = math.sqrt(2 / math.pi) / (s1 + s2)

        def f(t):
            s = s1 if t < z else s2
            return a * math.exp(-0.5 * ((t - z) / s) ** 2)
        lo = z - 40 * s1
        if x <= z:
            return integrate.quad(f, lo, x, epsabs=1e-14, epsrel=1e-12)[0]
        return (integrate.quad(f, lo, z, epsabs=1e-14, epsrel=1e-12)[0]
                + integrate.quad(f, z, x, epsabs=1e-14, epsrel=1e-12)[0])

    z_eh = 1.85
    cases = [(1.0, 0.2, 0.5), (2.0, 0.1, 0.6), (1.85, 0.3, 0.1), (0.2, 0.4, 0.1), (3.0, 1.0, 0.3)]
    for z, s1, s2 in cases:
        plain = reachable_probability_split(np.array([z]), np.array([s1]), np.array([s2]), z_eh,
                                            truncate_at_zero=False)[0]
        assert plain == pytest.approx(cdf(z_eh, z, s1, s2), abs=1e-10)
        trunc = reachable_probability_split(np.array([z]), np.array([s1]), np.array([s2]), z_eh)[0]
        f0 = cdf(0.0, z, s1, s2)
        assert trunc == pytest.approx((cdf(z_eh, z, s1, s2) - f0) / (1 - f0), abs=1e-10)
    # equal halves: the Gaussian (scipy.stats.truncnorm)
    z = np.array([0.3, 1.9])
    s = np.array([0.5, 0.2])
    np.testing.assert_allclose(reachable_probability_split(z, s, s, z_eh),
                               stats.truncnorm.cdf(z_eh, a=-z / s, b=np.inf, loc=z, scale=s),
                               rtol=1e-9)


def test_exact_redshifts_and_bad_errors():
    z = np.array([1.0, 2.0, 1.85, 0.0, 1.0, 1.0, np.nan, -0.1])
    s = np.array([0.0, 0.0, 0.0, 0.0, -0.1, np.nan, 0.1, 0.1])
    p = reachable_probability_gaussian(z, s, 1.85)
    # sigma = 0: a step, consistent with Cosmology.reachable (z < z_EH strictly)
    assert list(p[:4]) == [1.0, 0.0, 0.0, 1.0]
    assert np.all(np.isnan(p[4:]))
    ps = reachable_probability_split(z, s, s, 1.85)
    assert list(ps[:4]) == [1.0, 0.0, 0.0, 1.0] and np.all(np.isnan(ps[4:]))
    # a half-normal (zero lower width): all mass above the mode
    one = reachable_probability_split(np.array([1.0]), np.array([0.0]), np.array([0.5]), 1.85,
                                      truncate_at_zero=False)[0]
    assert one == pytest.approx(2 * stats.norm.cdf(0.85 / 0.5) - 1, rel=1e-12)
    assert np.all(reachable_probability_gaussian(z[:4], s[:4], None) == 1.0)


def test_bad_errors_null_the_columns_and_flag_the_row(tmp_path):
    table = pa.table({
        "z": pa.array([0.5, 0.5, 0.5, 0.5, None, 1.0, 0.0], type=pa.float64()),
        "zerr": pa.array([0.01, -0.01, np.nan, None, 0.01, 0.0, 0.01], type=pa.float64()),
    })
    out, counts, plan = _run_pipeline(tmp_path, table)
    assert plan.column_mapping["redshift_error"] == ("zerr", "detected")
    assert out.num_rows == 7
    flags = out.column("annotation_flags").to_pylist()
    for name in ERR_COLUMNS + ["reachable_probability"]:
        col = out.column(name).to_pylist()
        assert col[0] is not None and col[5] is not None, name
        assert col[1] is None and col[2] is None and col[3] is None and col[4] is None, name
    assert [("redshift_error_invalid" in f) for f in flags] == \
        [False, True, True, True, False, False, False]
    assert counts["redshift_error_invalid"] == 3
    # zero error: zero propagated errors, probability exactly 1 below the horizon
    assert out.column("comoving_distance_err_mpc")[5].as_py() == 0.0
    assert out.column("reachable_probability")[5].as_py() == 1.0
    # z = 0: D_L = 0, the distance modulus is -inf and has no finite error
    assert out.column("distance_modulus_err_mag")[6].as_py() is None
    assert out.column("comoving_distance_err_mpc")[6].as_py() > 0


def test_no_error_column_no_annotator(tmp_path):
    out, _, plan = _run_pipeline(tmp_path, pa.table({"z": [0.5, 1.0]}))
    assert "uncertainties" in dict(plan.skipped)
    assert "reachable_probability" not in out.column_names
    with pytest.raises(ConfigError, match="uncertainties"):
        _run_pipeline(tmp_path, pa.table({"z": [0.5, 1.0]}),
                      annotators={"uncertainties": True})


def test_asymmetric_errors(tmp_path):
    z = np.array([0.4, 1.7, 2.5])
    lo = np.array([0.02, 0.1, 0.3])
    hi = np.array([0.05, 0.3, 0.1])
    table = pa.table({"z": z, "zlo": lo, "zhi": hi})
    cols = {"redshift_error_lower": "zlo", "redshift_error_upper": "zhi"}
    out, _, _ = _run_pipeline(tmp_path, table, columns=cols)
    cosmo = preset("planck2018")
    ddc = cosmo.dcomoving_distance_dz_mpc(z)
    dt = cosmo.dlookback_time_dz_gyr(z)
    np.testing.assert_allclose(_col(out, "comoving_distance_err_lower_mpc"), ddc * lo, rtol=1e-13)
    np.testing.assert_allclose(_col(out, "comoving_distance_err_upper_mpc"), ddc * hi, rtol=1e-13)
    # the age decreases with z: its lower error comes from the upper redshift error
    np.testing.assert_allclose(_col(out, "age_at_emission_err_lower_gyr"), dt * hi, rtol=1e-13)
    np.testing.assert_allclose(_col(out, "age_at_emission_err_upper_gyr"), dt * lo, rtol=1e-13)
    assert "comoving_distance_err_mpc" not in out.column_names
    z_eh = cosmo.derived()["event_horizon_redshift"]
    np.testing.assert_allclose(_col(out, "reachable_probability"),
                               reachable_probability_split(z, lo, hi, z_eh), rtol=1e-15)
    # a detected pair wins over a detected symmetric error
    table2 = pa.table({"z": z, "z_err": lo, "z_err_lo": lo, "z_err_hi": hi})
    out2, _, _ = _run_pipeline(tmp_path, table2)
    assert "luminosity_distance_err_upper_mpc" in out2.column_names


def test_error_settings_are_validated(tmp_path):
    table = pa.table({"z": [0.5], "a": [0.1], "b": [0.2]})
    with pytest.raises(ConfigError, match=r"\[columns\].redshift_error_upper: missing"):
        _run_pipeline(tmp_path, table, columns={"redshift_error_lower": "a"})
    with pytest.raises(ConfigError, match="not both"):
        _run_pipeline(tmp_path, table, columns={"redshift_error": "a",
                                                "redshift_error_lower": "a",
                                                "redshift_error_upper": "b"})
    with pytest.raises(ConfigError, match=r"\[annotators.uncertainties\].truncate_at_zero"):
        _run_pipeline(tmp_path, table, columns={"redshift_error": "a"},
                      annotators={"uncertainties": {"truncate_at_zero": "yes"}})
    out, _, _ = _run_pipeline(tmp_path, table, columns={"redshift_error": "a"},
                              annotators={"uncertainties": {"truncate_at_zero": False}})
    z_eh = preset("planck2018").derived()["event_horizon_redshift"]
    assert out.column("reachable_probability")[0].as_py() == pytest.approx(
        stats.norm.cdf(z_eh, loc=0.5, scale=0.1), rel=1e-12)


def test_heliocentric_errors_go_through_the_conversion(tmp_path):
    from annotator_plugins.redshift_frames import heliocentric_to_cmb

    table = pa.table({"z": [0.8, 1.9], "ra": [170.0, 350.0], "dec": [-7.0, 7.0],
                      "z_err": [0.05, 0.05]})
    out, _, _ = _run_pipeline(tmp_path, table, columns={"redshift_frame": "heliocentric"})
    z = np.array([0.8, 1.9])
    z_cmb = heliocentric_to_cmb(z, [170.0, 350.0], [-7.0, 7.0])
    sigma_cmb = 0.05 * (1 + z_cmb) / (1 + z)
    np.testing.assert_allclose(_col(out, "redshift_cmb_err"), sigma_cmb, rtol=1e-14)
    cosmo = preset("planck2018")
    np.testing.assert_allclose(_col(out, "comoving_distance_err_mpc"),
                               cosmo.dcomoving_distance_dz_mpc(z_cmb) * sigma_cmb, rtol=1e-13)
    z_eh = cosmo.derived()["event_horizon_redshift"]
    np.testing.assert_allclose(_col(out, "reachable_probability"),
                               reachable_probability_gaussian(z_cmb, sigma_cmb, z_eh), rtol=1e-13)


def test_nullable_arrays_equal_the_pyarrow_conversion():
    from annotator_plugins.uncertainties import as_nullable_float64

    # reference: pyarrow's own NaN-as-null conversion (pa.array(..., from_pandas=True))
    rng = np.random.default_rng(9)
    for n in (0, 1, 7, 64, 1001):
        v = rng.normal(size=n)
        v[rng.random(n) < 0.3] = np.nan
        got = as_nullable_float64(v)
        assert got.equals(pa.array(v, type=pa.float64(), from_pandas=True))
        assert got.null_count == int(np.isnan(v).sum())
