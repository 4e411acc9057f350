"""Absolute-magnitude posteriors: M = m - mu(z) - K(z, colour) over the posterior."""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np
import pyarrow as pa
import pytest
from _pdf_helpers import PLANCK, annotate, col, list_column
from scipy.stats import norm

SAMPLES = Path(__file__).resolve().parents[2] / "sample_catalogues"
ALPHA = -1.7
# The demo's K-correction: a template mixture driven by the amber - infrared colour.
DEMO_MIX_BANDS = {"bands": {
    "infrared": {"magnitude": "mag_ir", "filter": "filters/infrared.csv"},
    "amber": {"magnitude": "mag_amber", "filter": "filters/amber.csv",
              "kcorrection": {"method": "template_mix",
                              "seds": ["seds/early.csv", "seds/starforming.csv"],
                              "colour": ["amber", "infrared"], "z_max": 3.5}}}}


def _link_samples(tmp_path):
    """The bundled SEDs and filters, where the job file's relative paths look for them."""
    for name in ("seds", "filters"):
        (tmp_path / name).symlink_to(SAMPLES / name)


def _k_power_law(z):
    """K of f_nu ~ nu^alpha in any band: -2.5 (1 + alpha) log10(1 + z) (Hogg et al. 2002,
    eq. 13 for a power law)."""
    return -2.5 * (1.0 + ALPHA) * np.log10(1.0 + z)


def test_power_law_magnitude_posterior_against_monte_carlo(tmp_path):
    """Gridded posteriors: p16/p50/p84 of M against numpy.percentile of M over 400 000 draws
    from the same density (Monte Carlo, common practice; K closed form above); the mean
    against the draws' mean. Samples: M percentiles equal the Hazen percentiles
    (numpy.percentile method="hazen") of M at the draws."""
    grid = np.linspace(0.0, 4.0, 801)
    z0 = np.array([0.4, 1.1, 2.0])
    s0 = np.array([0.05, 0.15, 0.3])
    mag = np.array([21.0, 23.5, 24.2])
    dens = norm.pdf(grid, z0[:, None], s0[:, None])
    rng = np.random.default_rng(9)
    draws = [rng.normal(z, s, 400_000) for z, s in zip(z0, s0)]
    draws = [d[d > 0] for d in draws]
    bands = {"bands": {"r": {"magnitude": "mag_r",
                             "kcorrection": {"method": "power_law", "alpha": ALPHA,
                                             "z_max": 4.0}}}}
    table = pa.table({"z": z0, "mag_r": mag, "pz": list_column(dens, pa.float64())})
    out, flags, _ = annotate(tmp_path, table, {"kind": "gridded", "column": "pz",
                                               "grid": {"start": 0.0, "stop": 4.0,
                                                        "count": 801}}, bands)
    for i in range(3):
        m_draws = mag[i] - PLANCK.distance_modulus_mag(draws[i]) - _k_power_law(draws[i])
        ref = np.percentile(m_draws, [16, 50, 84])
        got = [col(out, f"absolute_magnitude_r_{t}_mag")[i] for t in ("p16", "p50", "p84")]
        np.testing.assert_allclose(got, ref, atol=0.01)  # MC noise ~1e-3, grid step 0.005
        assert col(out, "absolute_magnitude_r_mean_mag")[i] == pytest.approx(
            np.mean(m_draws), abs=0.01)
    # the percentile of M is not M at the redshift percentile: M(z) falls with z, so the 16th
    # percentile of M sits at the 84th of z (and the mean of M is not M at the mean of z)
    z84 = col(out, "redshift_p84")
    m_at_z84 = mag - PLANCK.distance_modulus_mag(z84) - _k_power_law(z84)
    np.testing.assert_allclose(col(out, "absolute_magnitude_r_p16_mag"), m_at_z84, atol=0.01)

    few = [d[:301] for d in draws]
    table = pa.table({"z": z0, "mag_r": mag, "s": list_column(few, pa.float64())})
    out, _, _ = annotate(tmp_path, table, {"kind": "samples", "column": "s"}, bands)
    for i in range(3):
        m_draws = mag[i] - PLANCK.distance_modulus_mag(few[i]) - _k_power_law(few[i])
        ref = np.percentile(m_draws, [16, 50, 84], method="hazen")
        got = [col(out, f"absolute_magnitude_r_{t}_mag")[i] for t in ("p16", "p50", "p84")]
        np.testing.assert_allclose(got, ref, rtol=1e-12)


def test_template_mixture_posterior_at_a_point_equals_the_kcorrection_annotator(tmp_path):
    """Consistency check with the demo's K-correction (a template mixture driven by the
    amber - infrared colour): a posterior of draws all at the catalogue redshift gives
    exactly the kcorrection annotator's absolute magnitude; beyond the K table's z_max the
    posterior is partial and flagged."""
    z = np.array([0.3, 0.8, 1.4])
    amber = np.array([21.2, 22.9, 23.8])
    infrared = np.array([20.1, 21.5, 22.0])
    bands = DEMO_MIX_BANDS
    draws = [[zi] * 5 for zi in z]
    draws[2] = [1.4, 1.4, 3.6, 1.4, 1.4]  # one draw beyond z_max = 3.5
    table = pa.table({"z": z, "mag_amber": amber, "mag_ir": infrared,
                      "s": list_column(draws, pa.float64())})
    _link_samples(tmp_path)
    out, flags, _ = annotate(tmp_path, table, {"kind": "samples", "column": "s"}, bands)
    direct = col(out, "absolute_magnitude_amber_mag")
    finite = np.isfinite(direct)  # the mixture refuses colours outside its range (row 0 may)
    assert finite[1:].all()
    np.testing.assert_allclose(col(out, "absolute_magnitude_amber_p50_mag")[finite],
                               direct[finite], rtol=1e-12)
    np.testing.assert_allclose(col(out, "absolute_magnitude_amber_mean_mag")[finite],
                               direct[finite], rtol=1e-12)
    flags_text = out.column("annotation_flags").to_pylist()
    assert "redshift_pdf_magnitude_partial" in flags_text[2]
    assert "redshift_pdf_magnitude_partial" not in flags_text[1]
    assert math.isfinite(col(out, "absolute_magnitude_amber_p84_mag")[2])


def test_magnitude_posterior_takes_the_galactic_extinction_of_the_kcorrection_run(tmp_path):
    """With an E(B-V) column the kcorrection annotator subtracts A from every magnitude it
    uses (the colour's bands too) before colours and M; a posterior of draws all at the
    catalogue redshift must then still give exactly its absolute magnitude (consistency
    check), and a row without E(B-V) a null M in both, without a partial-posterior flag."""
    z = np.array([0.3, 0.8, 1.4, 0.9])
    amber = np.array([21.2, 22.9, 23.8, 23.0])
    infrared = np.array([20.1, 21.5, 22.0, 21.6])
    ebv = pa.array([0.02, 0.15, 0.4, None], pa.float64())
    bands = DEMO_MIX_BANDS
    draws = [[zi] * 5 for zi in z]
    _link_samples(tmp_path)
    table = pa.table({"z": z, "mag_amber": amber, "mag_ir": infrared, "ebv": ebv,
                      "s": list_column(draws, pa.float64())})
    out, _, _ = annotate(tmp_path, table, {"kind": "samples", "column": "s"}, bands)
    a_amber = col(out, "extinction_amber_mag")
    a_ir = col(out, "extinction_infrared_mag")  # a colour-only band has its A column too
    assert (a_amber[:3] > a_ir[:3]).all() and (a_ir[:3] > 0).all()  # bluer band, larger A
    direct = col(out, "absolute_magnitude_amber_mag")
    assert np.isfinite(direct[1:3]).all() and np.isnan(direct[3])
    finite = np.isfinite(direct)
    np.testing.assert_allclose(col(out, "absolute_magnitude_amber_p50_mag")[finite],
                               direct[finite], rtol=1e-12)
    assert np.isnan(col(out, "absolute_magnitude_amber_p50_mag")[3])
    flags_text = out.column("annotation_flags").to_pylist()
    assert "redshift_pdf_magnitude_partial" not in (flags_text[3] or "")
    # without the E(B-V) column neither M is corrected: the posterior's differs from above
    plain, _, _ = annotate(tmp_path, table.drop(["ebv"]), {"kind": "samples", "column": "s"},
                           bands)
    diff = col(plain, "absolute_magnitude_amber_p50_mag") - \
        col(out, "absolute_magnitude_amber_p50_mag")
    assert (np.abs(diff[finite]) > 1e-3).all()
