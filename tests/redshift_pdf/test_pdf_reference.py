"""Redshift posteriors against outside references (each named beside its check)."""

from __future__ import annotations

import numpy as np
import pyarrow as pa
import pytest
from _pdf_helpers import PLANCK, Z_EH, annotate, col, list_column
from scipy import integrate, interpolate, optimize
from scipy.stats import norm

from annotator_plugins.redshift_pdf import posterior as post
from annotator_plugins.uncertainties import reachable_probability_gaussian

GRID = np.linspace(0.0, 6.0, 1201)
GRID_CFG = {"start": 0.0, "stop": 6.0, "count": 1201}


def _gaussian_rows(z, sigma, grid=GRID):
    return norm.pdf(grid[None, :], np.asarray(z)[:, None], np.asarray(sigma)[:, None])


def test_gaussian_pdf_reproduces_the_gaussian_probability_and_first_order_errors(tmp_path):
    """A gridded Gaussian: reachable_probability against scipy.stats.norm.cdf (truncated at
    z = 0 as the grid starts there) and against the uncertainties annotator's Gaussian
    probability (consistency check); in the small-error limit (sigma = 2e-3) the half width
    (p84 - p16)/2 of every quantity equals the first-order error |df/dz| sigma of the
    uncertainties annotator, and p50 the value at the catalogue redshift (first-order
    propagation, e.g. Taylor 1997, An Introduction to Error Analysis, eq. 3.23). The 16th and
    84th percentiles of a normal lie Phi^-1(0.84) = 0.9945 sigma from its median, so the
    half width is compared with that multiple of the first-order error."""
    z = np.array([0.3, 1.2, 1.80, 1.85, 1.9, 2.6])
    sigma = np.array([0.05, 0.2, 0.1, 0.05, 0.08, 0.3])
    table = pa.table({"z": z, "z_err": sigma, "pz": list_column(_gaussian_rows(z, sigma),
                                                                pa.float64())})
    out, flags, plan = annotate(tmp_path, table, {"kind": "gridded", "column": "pz",
                                                  "grid": GRID_CFG})
    p = col(out, "reachable_probability")
    f0 = norm.cdf(0.0, z, sigma)
    reference = (norm.cdf(Z_EH, z, sigma) - f0) / (1.0 - f0)  # scipy.stats, truncated at 0
    # linear interpolation on a 0.005 grid: error ~ h^2/8 |p''| h (common practice bound)
    np.testing.assert_allclose(p, reference, atol=2e-4)
    np.testing.assert_allclose(p, reachable_probability_gaussian(z, sigma, Z_EH), atol=2e-4)
    # the Gaussian one was replaced, not written twice, and the manifest says so
    records = {r["name"]: r for r in plan.annotator_records()}
    assert records["uncertainties"]["columns_replaced"] == {"reachable_probability":
                                                            "redshift_pdf"}
    assert "reachable_probability" in records["redshift_pdf"]["columns"]
    assert out.column_names.count("reachable_probability") == 1
    assert flags == {}
    # small-error limit, on a grid 20 times finer than sigma
    z = np.array([0.7, 1.6, 3.1])
    sigma = np.array([0.004, 0.004, 0.004])
    fine = np.linspace(0.0, 4.0, 20001)
    table = pa.table({"z": z, "z_err": sigma, "pz": list_column(_gaussian_rows(z, sigma, fine),
                                                                pa.float64())})
    out, flags, _ = annotate(tmp_path, table, {"kind": "gridded", "column": "pz",
                                               "grid": {"start": 0.0, "stop": 4.0,
                                                        "count": 20001}})
    small = slice(0, 3)
    for stem, unit in (("comoving_distance", "mpc"), ("luminosity_distance", "mpc"),
                       ("distance_modulus", "mag"), ("lookback_time", "gyr"),
                       ("age_at_emission", "gyr")):
        half = 0.5 * np.abs(col(out, f"{stem}_p84_{unit}") - col(out, f"{stem}_p16_{unit}"))
        first_order = col(out, f"{stem}_err_{unit}") * norm.ppf(0.84)
        np.testing.assert_allclose(half[small], first_order[small], rtol=2e-3)
        np.testing.assert_allclose(col(out, f"{stem}_p50_{unit}")[small],
                                   col(out, f"{stem}_{unit}")[small], rtol=1e-5)
    # the quantiles of z: z -/+ sigma Phi^-1(0.84) (scipy.stats.norm.ppf)
    np.testing.assert_allclose(col(out, "redshift_p84")[small],
                               norm.ppf(0.84, z[small], sigma[small]), atol=2e-6)


def test_two_component_mixture_against_its_closed_form_cdf(tmp_path):
    """p(z) = w N(m1, s1) + (1 - w) N(m2, s2): P(z < z_EH) = w Phi((z_EH - m1)/s1) + (1 - w)
    Phi((z_EH - m2)/s2) (closed form); quantiles solve the same CDF with scipy.optimize.brentq.
    The catastrophic peak beyond the event horizon is counted and flagged."""
    w = np.array([0.85, 0.6, 0.95, 0.5])
    m1 = np.array([0.8, 1.2, 0.5, 1.0])
    s1 = np.array([0.08, 0.1, 0.05, 0.1])
    m2 = np.array([2.6, 3.0, 2.2, 1.7])
    s2 = np.array([0.2, 0.25, 0.15, 0.15])
    dens = (w[:, None] * norm.pdf(GRID, m1[:, None], s1[:, None])
            + (1 - w[:, None]) * norm.pdf(GRID, m2[:, None], s2[:, None]))
    table = pa.table({"z": m1, "pz": list_column(dens)})
    out, flags, _ = annotate(tmp_path, table, {"kind": "gridded", "column": "pz",
                                               "grid": GRID_CFG})

    def cdf(x, i):
        return w[i] * norm.cdf(x, m1[i], s1[i]) + (1 - w[i]) * norm.cdf(x, m2[i], s2[i])

    reference = np.array([cdf(Z_EH, i) for i in range(4)])
    np.testing.assert_allclose(col(out, "reachable_probability"), reference, atol=3e-4)
    for tag, level in (("p16", 0.16), ("p50", 0.5), ("p84", 0.84)):
        ref = [optimize.brentq(lambda x: cdf(x, i) - level, 0.0, 6.0, xtol=1e-12)
               for i in range(4)]
        np.testing.assert_allclose(col(out, f"redshift_{tag}"), ref, atol=2e-3)
        # monotone: a quantile of z maps to a quantile of D_C (the cosmology's own function)
        np.testing.assert_allclose(col(out, f"comoving_distance_{tag}_mpc"),
                                   PLANCK.comoving_distance_mpc(col(out, f"redshift_{tag}")),
                                   rtol=1e-12)
    # mean of D_C: integral of p D_C by scipy.integrate.quad of the closed-form density
    for i in range(4):
        ref, _ = integrate.quad(lambda x: (w[i] * norm.pdf(x, m1[i], s1[i])
                                           + (1 - w[i]) * norm.pdf(x, m2[i], s2[i]))
                                * PLANCK.comoving_distance_mpc(x), 0, 6, limit=200, points=[
                                    m1[i], m2[i]])
        assert col(out, "comoving_distance_mean_mpc")[i] == pytest.approx(ref, rel=1e-4)
    # two separate peaks where the smaller one's height is >= 5 % of the larger's (the
    # default threshold): (1 - w)/s2 against w/s1 is 0.094, 0.44, 0.018, 0.67, so row 2 has
    # one peak. The smaller holds 1 - w (its basin: the gap split at the density minimum)
    modes = col(out, "redshift_pdf_modes")
    second = col(out, "redshift_pdf_secondary_mass")
    assert list(modes) == [2, 2, 1, 2]
    np.testing.assert_allclose(second, [0.15, 0.4, 0.0, 0.5], atol=2e-3)
    # > 10 % flagged: rows 0, 1 and 3 (0.15, 0.4, 0.5), not row 2 (0.05)
    assert flags["redshift_pdf_secondary_peak"] == 3
    assert out.column("annotation_flags").to_pylist()[2] == ""


def test_sample_percentiles_match_numpy_percentile(tmp_path):
    """Posterior draws (rows of different lengths): p16/p50/p84 equal numpy.percentile on the
    same draws (its default linear method), the probability is the fraction of draws below
    z_EH, means are numpy.mean of the cosmology at the draws. A monotone quantity's percentile
    is the quantity at the redshift percentile (consistency check: interpolating between two
    draws in z, not in D_L)."""
    rng = np.random.default_rng(7)
    rows = [rng.gamma(4.0, 0.3, size=n) for n in (1, 2, 5, 100, 377, 2000)]
    rows += [np.concatenate([rng.normal(0.6, 0.05, 300), rng.normal(2.4, 0.1, 100)])]
    table = pa.table({"z": [r[0] for r in rows], "draws": list_column(rows, pa.float64())})
    out, flags, _ = annotate(tmp_path, table, {"kind": "samples", "column": "draws"})
    for tag, q in (("p16", 16), ("p50", 50), ("p84", 84)):
        ref = [np.percentile(r, q) for r in rows]  # numpy.percentile, method="linear"
        np.testing.assert_allclose(col(out, f"redshift_{tag}"), ref, rtol=1e-14, atol=0)
        ref_dl = [PLANCK.luminosity_distance_mpc(np.percentile(r, q)) for r in rows]
        np.testing.assert_allclose(col(out, f"luminosity_distance_{tag}_mpc"), ref_dl,
                                   rtol=1e-12)
    np.testing.assert_allclose(col(out, "reachable_probability"),
                               [np.mean(r < Z_EH) for r in rows], rtol=0, atol=1e-15)
    np.testing.assert_allclose(col(out, "lookback_time_mean_gyr"),
                               [np.mean(PLANCK.lookback_time_gyr(r)) for r in rows], rtol=1e-12)
    # the bimodal row has two peaks; its smaller one holds 1/4 of the draws
    assert col(out, "redshift_pdf_modes")[-1] == 2
    assert col(out, "redshift_pdf_secondary_mass")[-1] == pytest.approx(0.25, abs=0.03)


def test_quantile_columns_against_the_gridded_input_of_the_same_distribution(tmp_path):
    """Quantile columns of N(m, s) at 13 levels (scipy.stats.norm.ppf) against the gridded
    N(m, s): the interpolated CDF passes through every given quantile, so p16/p50/p84 agree to
    the density's resampling error, and the probability to the CDF interpolation's."""
    levels = np.array([0.5, 1, 2.5, 5, 10, 16, 30, 50, 70, 84, 90, 97.5, 99.5])
    m = np.array([0.4, 1.3, 1.75, 1.95, 2.8])
    s = np.array([0.04, 0.15, 0.2, 0.1, 0.3])
    q = {f"zq_{i}": norm.ppf(lv / 100, m, s) for i, lv in enumerate(levels)}
    table = pa.table({"z": m, **q, "pz": list_column(_gaussian_rows(m, s), pa.float64())})
    by_q, fq, _ = annotate(tmp_path, table, {"kind": "quantiles", "quantile_levels":
                                             list(levels), "quantile_columns": list(q)})
    by_g, fg, _ = annotate(tmp_path, table, {"kind": "gridded", "column": "pz",
                                             "grid": GRID_CFG})
    for tag in ("p16", "p50", "p84"):
        np.testing.assert_allclose(col(by_q, f"redshift_{tag}"), col(by_g, f"redshift_{tag}"),
                                   atol=2e-3 * s.max())
    np.testing.assert_allclose(col(by_q, "reachable_probability"),
                               col(by_g, "reachable_probability"), atol=5e-3)
    np.testing.assert_allclose(col(by_q, "comoving_distance_mean_mpc"),
                               col(by_g, "comoving_distance_mean_mpc"), rtol=2e-3)
    assert fq == fg == {}


def test_pchip_slopes_match_scipy():
    """The vectorised monotone cubic slopes equal scipy.interpolate.PchipInterpolator's
    (Fritsch & Carlson 1980; Fritsch & Butland 1984), row by row."""
    rng = np.random.default_rng(3)
    x = np.cumsum(rng.uniform(0.05, 1.0, size=(20, 9)), axis=1)
    y = np.cumsum(rng.uniform(0.0, 1.0, size=(20, 9)), axis=1)
    y[3, 4] = y[3, 3]  # a flat step
    d = post._pchip_slopes(x, y)
    for i in range(20):
        ref = interpolate.PchipInterpolator(x[i], y[i]).derivative()(x[i])
        np.testing.assert_allclose(d[i], ref, rtol=1e-12, atol=1e-14)


def test_probability_weights_integrate_the_linear_density():
    """weights_below(x) . p = integral from z_0 to x of the linear interpolant of p
    (scipy.integrate.quad of numpy.interp)."""
    rng = np.random.default_rng(5)
    z = np.sort(rng.uniform(0, 5, 40))
    p = rng.uniform(0, 1, 40)
    for x in (-1.0, z[0], 0.77, z[10], 2.345, z[-1], 9.0):
        ref, _ = integrate.quad(lambda t: np.interp(t, z, p), z[0], min(max(x, z[0]), z[-1]),
                                limit=400, points=z[1:-1])
        assert post.weights_below(z, x) @ p == pytest.approx(ref, rel=1e-10, abs=1e-12)


def test_weighted_quantiles_of_equal_weights_are_hazen_quantiles():
    """Equal weights: quantile q at position n q - 1/2 (Hazen 1914; Hyndman & Fan 1996
    definition 5), i.e. numpy.percentile(method="hazen")."""
    rng = np.random.default_rng(11)
    v = rng.normal(size=(6, 50))
    got = post.weighted_quantiles(v, np.ones_like(v), np.array([0.16, 0.5, 0.84]))
    ref = np.percentile(v, [16, 50, 84], axis=1, method="hazen").T
    np.testing.assert_allclose(got, ref, rtol=1e-12)
