"""Native SQL functions: piecewise polynomials DuckDB evaluates itself (annotator/sql/native.py).

Every built-in SQL function of the cosmology is checked, through DuckDB, against the engine's
own Python function (the function the columns are written with) in several cosmologies, at
dense random and log-spaced arguments, including NULL, NaN, negative and infinite ones and
arguments past the fitted domain; and against closed forms and astropy where they exist.
"""

from __future__ import annotations

import math

import duckdb
import numpy as np
import pyarrow as pa
import pytest

from annotator.cosmology import Cosmology, preset
from annotator.sql import SqlApproximation
from annotator.sql.native import fit, macro_body
from annotator.sql.session import QuerySession, arrow_udf, native_body
from annotator_plugins.sql_functions import MU_ATOL, RTOL, Z_NATIVE, register_sql_functions

COSMOLOGIES = {
    "planck2018": preset("planck2018"),
    # closed, with dark energy: D_M bends below D_C (sin), an event horizon
    "closed": Cosmology(h0=68.0, omega_m=0.35, omega_de=0.75, name="closed"),
    # open, matter only: no event horizon (every object reachable, horizon ages NULL)
    "open_matter": Cosmology(h0=65.0, omega_m=0.3, omega_de=0.0, name="open_matter"),
    # evolving dark energy with radiation and a massive neutrino
    "w0wa": Cosmology(h0=70.0, omega_m=0.31, omega_b=0.049, t_cmb=2.7255, m_nu=(0.06, 0.0, 0.0),
                      w0=-0.9, wa=-0.3, name="w0wa"),
}


def _arguments(hi: float, rng) -> np.ndarray:
    return np.concatenate([rng.uniform(0.0, hi, 40_000), np.geomspace(1e-9 * hi, hi, 8_000),
                           rng.uniform(hi, 3.0 * hi, 500),  # past the fitted domain
                           [0.0, -0.0, -1e-3, -5.0, np.nan, np.inf, -np.inf, hi, 1e30]])


def _through_duckdb(fn, values: np.ndarray) -> tuple[np.ndarray, str]:
    """(results of the native macro, of the Python function) in one DuckDB query; NULL = NaN."""
    con = duckdb.connect()
    con.create_function(fn.python_name, arrow_udf(fn), ["DOUBLE"], fn.return_type,
                        type="arrow", null_handling="special", side_effects=False)
    body, _ = native_body(fn)  # the very macro a QuerySession creates
    con.execute(f'CREATE MACRO f("{fn.parameters[0][0]}") AS ({body})')
    con.register("t", pa.table({"x": pa.array(values, mask=np.zeros(len(values), bool))}))
    cast = "::DOUBLE" if fn.return_type == "BOOLEAN" else ""
    got = con.sql(f"SELECT f(x){cast} AS a, {fn.python_name}(x){cast} AS b FROM t "
                  f"UNION ALL SELECT f(NULL){cast}, {fn.python_name}(NULL){cast}"
                  ).to_arrow_table()
    a = got.column("a").to_numpy(zero_copy_only=False).astype(float)
    b = got.column("b").to_numpy(zero_copy_only=False).astype(float)
    return a, b


@pytest.mark.parametrize("cosmology", sorted(COSMOLOGIES))
def test_every_function_matches_the_engine_through_duckdb(cosmology):
    """The native result is within RTOL of the engine everywhere the engine gives a number,
    NULL exactly where the engine gives NULL (common practice: the columns' accuracy promise
    is 1e-8 of quadrature, the engine holds 1e-10 and the native forms RTOL = 1e-9 more)."""
    cosmo = COSMOLOGIES[cosmology]
    rng = np.random.default_rng(11)
    for fn in register_sql_functions(cosmology=cosmo):
        assert fn.native, fn.name
        if fn.approximation is not None:
            hi = fn.approximation.domain[1]
        else:
            hi = Z_NATIVE
        x = _arguments(hi, rng)
        x = np.append(x, np.nan)  # the row of the NULL literal (UNION ALL)
        native, python = _through_duckdb(fn, x[:-1])
        assert len(native) == len(x)
        nulls = np.isnan(python)
        np.testing.assert_array_equal(np.isnan(native), nulls, err_msg=fn.name)
        same_inf = np.isinf(python)
        np.testing.assert_array_equal(native[same_inf], python[same_inf], err_msg=fn.name)
        ok = ~nulls & ~same_inf
        err = np.abs(native[ok] - python[ok])
        if fn.name == "distance_modulus_mag":
            bound = MU_ATOL * 1.01
        elif fn.return_type == "BOOLEAN":
            bound = 0.0
        else:
            bound = RTOL * 1.01 * np.abs(python[ok])
        assert np.all(err <= bound), (cosmology, fn.name, float(np.max(err - bound)))


def test_closed_forms_of_einstein_de_sitter():
    """Einstein-de Sitter (flat, matter only): D_C = 2 D_H (1 - 1/sqrt(1+z)) and
    t(z) = (2/3) t_H (1+z)^(-3/2) (Hogg 1999, eqs. 15-16 and 30 with Omega_M = 1), and the
    inverse D_C -> z, evaluated natively in DuckDB to 1e-9 of the closed forms."""
    eds = Cosmology(h0=70.0, omega_m=1.0, omega_de=0.0, name="eds")
    fns = {f.name: f for f in register_sql_functions(cosmology=eds)}
    z = np.concatenate([np.geomspace(1e-6, 25.0, 3000), np.linspace(0.0, 25.0, 3000)])
    dh = 299_792.458 / 70.0
    th = 977.792221 / 70.0  # 1/H0 in Gyr for H0 in km/s/Mpc (common practice: 977.8/H0)
    dc, _ = _through_duckdb(fns["comoving_distance_mpc"], z)
    np.testing.assert_allclose(dc[:-1], 2 * dh * (1 - 1 / np.sqrt(1 + z)), rtol=1e-9,
                               atol=0)
    age, _ = _through_duckdb(fns["age_at_emission_gyr"], z)
    np.testing.assert_allclose(age[:-1], 2 / 3 * th * (1 + z) ** -1.5, rtol=1e-6)
    d = 2 * dh * (1 - 1 / np.sqrt(1 + z[z > 0]))
    back, _ = _through_duckdb(fns["redshift_at_comoving_distance"], d)
    np.testing.assert_allclose(back[:-1], z[z > 0], rtol=1e-8)


def test_astropy_planck18_through_a_session(outputs):
    """The session's native functions against astropy's Planck18 (an outside reference,
    Planck Collaboration 2020 parameters; the project's planck2018 preset is that model)."""
    astropy_cosmology = pytest.importorskip("astropy.cosmology")
    z = np.geomspace(1e-4, 20.0, 400)
    values = ", ".join(f"({float(v)!r})" for v in z)
    with QuerySession(outputs.main) as s:
        rows = s.relation(f"SELECT comoving_distance_mpc(x), luminosity_distance_mpc(x), "
                          f"lookback_time_gyr(x) FROM (VALUES {values}) v(x)").fetchall()
    got = np.array(rows)
    p18 = astropy_cosmology.Planck18
    np.testing.assert_allclose(got[:, 0], p18.comoving_distance(z).value, rtol=1e-6)
    np.testing.assert_allclose(got[:, 1], p18.luminosity_distance(z).value, rtol=1e-6)
    np.testing.assert_allclose(got[:, 2], p18.lookback_time(z).value, rtol=1e-6)


def test_a_segment_is_kept_only_where_it_passes_and_the_rest_is_the_python_function():
    """A pole inside the domain: no polynomial passes next to it, so that stretch is left to
    the Python function (results there identical to it), the rest is fitted within tolerance."""
    calls = []

    def f(x):
        calls.append(len(x))
        return 1.0 / (x - 0.5) + x

    a = SqlApproximation((0.0, 1.0), rtol=1e-10, degree=10, max_segments=128)
    fitted = fit(f, a)
    assert fitted.fitted_segments <= 128
    fallback = [s for s in fitted.segments if s.coefficients is None]
    assert fallback and all(s.lo < 0.5 + 1e-6 and s.hi > 0.5 - 1e-6 for s in fallback)
    assert fitted.native_fraction > 0.999
    assert all(s.worst <= 1.0 for s in fitted.segments if s.coefficients)
    x = np.concatenate([np.linspace(0, 1, 20001), 0.5 + np.linspace(-1e-7, 1e-7, 51)])
    x = x[x != 0.5]
    got = fitted.evaluate(x, f)
    np.testing.assert_allclose(got, f(x), rtol=1e-10)
    near = np.abs(x - 0.5) < 1e-8
    np.testing.assert_array_equal(got[near], f(x[near]))


def test_nan_intervals_are_null_only_when_the_function_says_so():
    def f(x):
        return np.where(x < 0.3, np.exp(x), np.nan)

    strict = fit(f, SqlApproximation((0.0, 1.0), log=True))
    lenient = fit(f, SqlApproximation((0.0, 1.0), log=True, null_where_nan=True))
    assert any(s.coefficients == () for s in lenient.segments)
    assert not any(s.coefficients == () for s in strict.segments)
    # the NaN stretch is Python's in the strict fit: one fallback segment, not thousands
    assert len(strict.segments) < 40
    x = np.linspace(0.0, 0.999, 5001)
    for fitted in (strict, lenient):
        got = fitted.evaluate(x, f)
        np.testing.assert_array_equal(np.isnan(got), np.isnan(f(x)))


def test_the_sql_is_the_arithmetic_that_was_checked():
    """DuckDB evaluates the macro with the same operations as Fitted.evaluate (to rounding)."""
    def f(x):
        return np.sqrt(1.0 + x) * np.log1p(x) + 2.0

    fitted = fit(f, SqlApproximation((0.0, 50.0), rtol=1e-12, geometric_from=1.0, degree=12))
    assert fitted.fitted_segments > 1
    con = duckdb.connect()
    con.create_function("py", lambda c: pa.array(f(c.to_numpy(zero_copy_only=False))),
                        ["DOUBLE"], "DOUBLE", type="arrow", null_handling="special")
    con.execute(f"CREATE MACRO g(x) AS ({macro_body(fitted, 'x', 'py')})")
    x = np.concatenate([np.random.default_rng(3).uniform(-1, 60, 20_000), [50.0, 0.0]])
    con.register("t", pa.table({"x": x}))
    got = con.sql("SELECT g(x) FROM t").to_arrow_table().column(0).to_numpy()
    want = fitted.evaluate(x, f)
    np.testing.assert_allclose(got, want, rtol=1e-14, atol=0, equal_nan=True)
    np.testing.assert_allclose(got[~np.isnan(want)], f(x)[~np.isnan(want)], rtol=1e-12)


def test_a_string_argument_is_refused_naming_it(outputs):
    with QuerySession(outputs.main) as s:
        with pytest.raises(duckdb.Error, match="'far'"):
            s.relation("SELECT comoving_distance_mpc('far')").fetchall()


def test_nothing_is_fitted_until_a_statement_uses_it(outputs):
    with QuerySession(outputs.main) as s:
        assert s.fitted == {}
        s.relation("SELECT lookback_time_gyr(0.5)").fetchall()
        assert set(s.fitted) == {"lookback_time_gyr"}
        (t,), = s.relation("SELECT lookback_time_gyr(0.5)").fetchall()
        assert math.isclose(t, float(s.output.cosmology.lookback_time_gyr(0.5)), rel_tol=RTOL)
