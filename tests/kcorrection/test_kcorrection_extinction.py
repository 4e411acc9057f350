"""Galactic extinction per band from a per-object E(B-V) (plugins/kcorrection/extinction.py).

Outside references: the closed forms of Cardelli, Clayton & Mathis (1989, ApJ 345, 245) eqs.
2-5, evaluated independently here; the anchor values of Fitzpatrick (1999, PASP 111, 63)
Table 4 and the FM90 ultraviolet form with F99's coefficients (from memory); the
dust_extinction package (CCM89 and F99 classes); values of CCM89 Table 3 (from memory); scipy
quadrature of the photon-weighted band average.
"""

from __future__ import annotations

import math

import numpy as np
import pyarrow as pa
import pytest
from scipy.integrate import quad

import pyarrow.parquet as pq

from _kcorr_helpers import band_response, column, configure, filter_table, write_curve
from annotator.config import job_from_mapping
from annotator.pipeline import Pipeline
from annotator.plan import build_plan
from annotator.errors import ConfigError
from annotator_plugins.kcorrection.extinction import (
    a_lambda_over_ebv, band_coefficient, ccm89_a_b, f99_a_over_ebv)
from annotator_plugins.kcorrection.tables import Filter
from annotator_plugins.kcorrection.synthetic import filter_support, pivot_wavelength


def _ccm89_by_hand(x: float, r_v: float) -> float:
    """A_lambda / A_V from CCM89 eqs. 2-5, written out term by term (scalar)."""
    if 0.3 <= x < 1.1:
        a, b = 0.574 * x ** 1.61, -0.527 * x ** 1.61
    elif x < 3.3:
        y = x - 1.82
        a = (1 + 0.17699 * y - 0.50447 * y ** 2 - 0.02427 * y ** 3 + 0.72085 * y ** 4
             + 0.01979 * y ** 5 - 0.77530 * y ** 6 + 0.32999 * y ** 7)
        b = (1.41338 * y + 2.28305 * y ** 2 + 1.07233 * y ** 3 - 5.38434 * y ** 4
             - 0.62251 * y ** 5 + 5.30260 * y ** 6 - 2.09002 * y ** 7)
    elif x < 8.0:
        fa = fb = 0.0
        if x >= 5.9:
            fa = -0.04473 * (x - 5.9) ** 2 - 0.009779 * (x - 5.9) ** 3
            fb = 0.2130 * (x - 5.9) ** 2 + 0.1207 * (x - 5.9) ** 3
        a = 1.752 - 0.316 * x - 0.104 / ((x - 4.67) ** 2 + 0.341) + fa
        b = -3.090 + 1.825 * x + 1.206 / ((x - 4.62) ** 2 + 0.263) + fb
    else:
        a = -1.073 - 0.628 * (x - 8) + 0.137 * (x - 8) ** 2 - 0.070 * (x - 8) ** 3
        b = 13.670 + 4.257 * (x - 8) - 0.420 * (x - 8) ** 2 + 0.374 * (x - 8) ** 3
    return a + b / r_v


@pytest.mark.parametrize("r_v", [2.5, 3.1, 5.0])
def test_law_matches_ccm89_equations(r_v):
    # CCM89 eqs. 2-5 evaluated independently, over the whole range 0.3 <= x <= 10 / micron.
    x = np.linspace(0.3, 10.0, 400)
    a, b = ccm89_a_b(x)
    expected = [_ccm89_by_hand(v, r_v) for v in x]
    np.testing.assert_allclose(a + b / r_v, expected, rtol=1e-12, atol=1e-12)
    # A_V / E(B-V) = R_V: at x = 1.82 (5495 A) a = 1, b = 0 exactly (CCM89 sect. 3).
    assert a_lambda_over_ebv(np.array([1e4 / 1.82]), r_v)[0] == pytest.approx(r_v, abs=1e-12)
    # outside the law's range: NaN, not an extrapolation
    assert np.isnan(ccm89_a_b(np.array([0.29, 10.01]))[0]).all()


def test_law_matches_dust_extinction_package():
    # Outside library: dust_extinction (PyPI), parameter_averages.CCM89, R_V = 3.1 and 4.0.
    units = pytest.importorskip("astropy.units")
    models = pytest.importorskip("dust_extinction.parameter_averages")
    x = np.linspace(0.31, 9.99, 300)
    for r_v in (3.1, 4.0):
        a, b = ccm89_a_b(x)
        ref = models.CCM89(Rv=r_v)(x / units.micron)
        np.testing.assert_allclose(a + b / r_v, ref, rtol=1e-6, atol=1e-9)


@pytest.mark.parametrize("r_v", [2.5, 3.1, 5.0])
def test_f99_matches_its_anchors_and_uv_form(r_v):
    # F99 Table 4 (from memory): the curve passes through A/E(B-V) = 0.265 R_V/3.1 at 2.65
    # micron, 0.829 R_V/3.1 at 1.22 micron, -0.426 + 1.0044 R_V at 6000 A, -0.050 + 1.0016 R_V
    # at 5470 A, 0.701 + 1.0016 R_V at 4670 A, 1.208 + 1.0032 R_V - 0.00033 R_V^2 at 4110 A.
    lam = np.array([26500.0, 12200.0, 6000.0, 5470.0, 4670.0, 4110.0])
    table = [0.265 * r_v / 3.1, 0.829 * r_v / 3.1, -0.426 + 1.0044 * r_v,
             -0.050 + 1.0016 * r_v, 0.701 + 1.0016 * r_v,
             1.208 + 1.0032 * r_v - 0.00033 * r_v ** 2]
    np.testing.assert_allclose(f99_a_over_ebv(1e4 / lam, r_v), table, atol=1e-12)
    # Ultraviolet: R_V + c1 + c2 x + c3 D(x) + c4 F(x) (Fitzpatrick & Massa 1990 form, F99
    # sect. 3 coefficients), written out here at x = 4, 5, 6.5, 9 per micron.
    c2 = -0.824 + 4.717 / r_v
    c1 = 2.030 - 3.007 * c2
    for x in (4.0, 5.0, 6.5, 9.0):
        drude = x ** 2 / ((x ** 2 - 4.596 ** 2) ** 2 + x ** 2 * 0.99 ** 2)
        far = 0.5392 * (x - 5.9) ** 2 + 0.05644 * (x - 5.9) ** 3 if x >= 5.9 else 0.0
        expected = r_v + c1 + c2 * x + 3.23 * drude + 0.41 * far
        assert f99_a_over_ebv(np.array([x]), r_v)[0] == pytest.approx(expected, abs=1e-12)


def test_f99_matches_dust_extinction_package():
    # Outside library: dust_extinction (PyPI), parameter_averages.F99 gives A/A_V.
    units = pytest.importorskip("astropy.units")
    models = pytest.importorskip("dust_extinction.parameter_averages")
    x = np.linspace(0.31, 9.99, 300)
    for r_v in (2.5, 3.1, 4.0, 5.5):
        np.testing.assert_allclose(f99_a_over_ebv(x, r_v) / r_v,
                                   models.F99(Rv=r_v)(x / units.micron), rtol=1e-9)


def test_law_matches_ccm89_table_values():
    # CCM89 Table 3, <A(lambda)/A(V)> for R_V = 3.1 (from memory): U 1.569, B 1.337,
    # R 0.751, I 0.479, J 0.282, K 0.114, at 0.365, 0.44, 0.70, 0.90, 1.25, 2.2 micron.
    # The table's broad-band values differ from the law at one wavelength by ~0.01 in U and B.
    lam = np.array([3650.0, 4400.0, 7000.0, 9000.0, 12500.0, 22000.0])
    table = np.array([1.569, 1.337, 0.751, 0.479, 0.282, 0.114])
    np.testing.assert_allclose(a_lambda_over_ebv(lam, 3.1) / 3.1, table, atol=0.015)


def _filter(centre, width, edge=60.0, step=2.0) -> Filter:
    wave, resp = filter_table(centre, width, edge, step)
    return Filter(wave, resp, "f.csv", "k", support=filter_support(wave, resp),
                  pivot_A=pivot_wavelength(wave, resp))


@pytest.mark.parametrize("centre", [3000.0, 4500.0, 6200.0, 9000.0, 16000.0])
def test_narrow_filter_is_the_law_at_its_wavelength(centre):
    # Closed form: a filter 4 A wide at lambda_0 gives R_band = R_V a(x0) + b(x0), CCM89
    # eqs. 2-5 at x0 = 1e4 / lambda_0, to 1e-4 mag per unit E(B-V).
    filt = _filter(centre, 2.0, edge=1.0, step=0.25)
    x0 = 1e4 / centre
    assert band_coefficient(filt, 3.1) == pytest.approx(3.1 * _ccm89_by_hand(x0, 3.1), abs=1e-4)


def test_broad_filter_is_the_photon_weighted_average():
    # R_band = R_V int (A/A_V) S R lambda dlambda / int S R lambda dlambda with S ~ lambda^-2
    # (flat f_nu), by scipy quad on the analytic response (common practice; law from eqs 2-5).
    centre, width = 6200.0, 1400.0
    filt = _filter(centre, width, step=1.0)

    def resp(lam):
        return float(band_response(np.array([lam]), centre, width)[0])

    lo, hi = filt.support
    num = quad(lambda l: 3.1 * _ccm89_by_hand(1e4 / l, 3.1) * resp(l) / l, lo, hi,
               limit=200, points=[centre - width / 2, centre + width / 2])[0]
    den = quad(lambda l: resp(l) / l, lo, hi, limit=200,
               points=[centre - width / 2, centre + width / 2])[0]
    assert band_coefficient(filt, 3.1) == pytest.approx(num / den, abs=2e-4)
    # sampling: 8 points per table interval is converged (a halved table step changes < 1e-5)
    fine = _filter(centre, width, step=0.5)
    assert band_coefficient(fine, 3.1) == pytest.approx(band_coefficient(filt, 3.1), abs=1e-5)


def _run(tmp_path, table, bands, name):
    """Plan and annotate ``table`` (written as <name>.parquet) with these bands."""
    path = tmp_path / f"{name}.parquet"
    pq.write_table(table, path)
    job = job_from_mapping({"input": {"paths": [str(path)]}, "bands": bands,
                            "output": {"dir": str(tmp_path / f"out_{name}")}},
                           base_dir=tmp_path)
    out, counts, _ = Pipeline.from_plan(build_plan(job)).annotate(table)
    return out, counts


def _catalogue(ebv):
    n = len(ebv)
    return pa.table({"z": np.linspace(0.05, 0.5, n), "z_err": np.full(n, 0.01),
                     "mag_b": np.full(n, 21.0), "mag_r": np.full(n, 20.0),
                     "mag_d": np.full(n, 19.8), "err_b": np.full(n, 0.05),
                     "err_r": np.full(n, 0.05), "ebv": pa.array(ebv, pa.float64())})


def test_pipeline_subtracts_extinction_and_flags_bad_ebv(tmp_path, curves):
    # Consistency checks on a run: A = R_band E(B-V); M with ebv = M without - A; a missing or
    # negative E(B-V) gives null A and M with its own flag; no row is lost.
    bands = {"r": {"magnitude": "mag_r", "filter": "filters/red.csv",
                   "kcorrection": {"method": "template", "sed": "seds/early.csv",
                                   "z_max": 1.0}}}
    ebv = [0.0, 0.05, 0.3, None, -0.01, 0.1]
    out, counts = _run(tmp_path, _catalogue(ebv), bands, "with_ebv")
    a = column(out, "extinction_r_mag")
    plain, _ = _run(tmp_path, _catalogue(ebv).drop(["ebv"]), bands, "plain")
    coefficient = configure(tmp_path, bands, schema=_catalogue(ebv).schema).extinction \
        .coefficients["r"]
    assert 2.0 < coefficient < 3.0  # a red band: between R and V (F99, R_V = 3.1)
    assert coefficient == pytest.approx(band_coefficient(
        configure(tmp_path, bands).bands[0].filter, 3.1, law="f99"), abs=1e-12)  # default
    ccm = configure(tmp_path, bands, {"extinction_law": "ccm89"}, schema=_catalogue(ebv).schema)
    assert ccm.extinction.coefficients["r"] == pytest.approx(band_coefficient(
        ccm.bands[0].filter, 3.1, law="ccm89"), abs=1e-12)  # the option selects the law
    np.testing.assert_allclose(a[[0, 1, 2, 5]], coefficient * np.array([0.0, 0.05, 0.3, 0.1]),
                               rtol=1e-12)
    assert np.isnan(a[[3, 4]]).all()
    m_ext = column(out, "absolute_magnitude_r_mag")
    m_plain = column(plain, "absolute_magnitude_r_mag")
    np.testing.assert_allclose(m_ext[[0, 1, 2, 5]], (m_plain - a)[[0, 1, 2, 5]], atol=1e-12)
    assert np.isnan(m_ext[[3, 4]]).all()
    assert counts["ebv_missing"] == 1 and counts["ebv_negative"] == 1
    assert out.num_rows == len(ebv)
    spec = next(c for c in configure(tmp_path, bands, schema=_catalogue(ebv).schema).provides
                if c.name == "extinction_r_mag")
    assert spec.unit == "mag" and spec.ucd.startswith("phys.absorption.gal")


def test_colours_are_dereddened_before_k(tmp_path, curves):
    # A colour-based K must see the extinction-corrected colour: the run with ebv equals a run
    # without ebv on magnitudes from which A was subtracted by hand (consistency check).
    mix = {"method": "template_mix", "seds": ["seds/early.csv", "seds/young.csv"],
           "colour": ["b", "r"], "z_max": 1.0}
    bands = {"b": {"magnitude": "mag_b", "filter": "filters/blue.csv"},
             "r": {"magnitude": "mag_r", "filter": "filters/red.csv", "kcorrection": mix}}
    ebv = np.array([0.0, 0.1, 0.25, 0.4])
    cat = _catalogue(list(ebv)).set_column(2, "mag_b", pa.array([21.0, 21.2, 21.5, 21.7]))
    out, _ = _run(tmp_path, cat, bands, "with_ebv")
    inst = configure(tmp_path, bands, schema=cat.schema)
    r_b, r_r = inst.extinction.coefficients["b"], inst.extinction.coefficients["r"]
    assert r_b > r_r  # bluer band, more extinction
    manual = cat.drop(["ebv"])
    manual = manual.set_column(2, "mag_b", pa.array(column(cat, "mag_b") - r_b * ebv))
    manual = manual.set_column(3, "mag_r", pa.array(column(cat, "mag_r") - r_r * ebv))
    ref, _ = _run(tmp_path, manual, bands, "by_hand")
    np.testing.assert_allclose(column(out, "kcorrection_r_mag"),
                               column(ref, "kcorrection_r_mag"), atol=1e-12)
    np.testing.assert_allclose(column(out, "absolute_magnitude_r_mag"),
                               column(ref, "absolute_magnitude_r_mag"), atol=1e-12)


def test_configuration_errors_name_the_key(tmp_path, curves):
    schema = _catalogue([0.1]).schema
    k = {"method": "template", "sed": "seds/early.csv", "z_max": 1.0}
    bands = {"r": {"magnitude": "mag_r", "filter": "filters/red.csv", "kcorrection": k}}
    with pytest.raises(ConfigError, match="extinction_r_v"):
        configure(tmp_path, bands, {"extinction_r_v": 9.0}, schema=schema)
    with pytest.raises(ConfigError, match="extinction_law"):
        configure(tmp_path, bands, {"extinction_law": "somebody2000"}, schema=schema)
    no_filter = {"r": {"magnitude": "mag_r", "kcorrection": {"method": "power_law",
                                                             "alpha": -1.0}}}
    with pytest.raises(ConfigError, match=r"\[bands\.r\]\.filter"):
        configure(tmp_path, no_filter, schema=schema)
    # without an ebv column: no extinction, no error for the filterless band
    assert configure(tmp_path, no_filter).extinction is None
    # a filter beyond the law's range (here 3.3-3.7 micron) is refused naming the band
    write_curve(tmp_path / "filters" / "far.csv", *filter_table(35000.0, 3000.0))
    far = {"r": {"magnitude": "mag_r", "filter": "filters/far.csv", "kcorrection": {
        "method": "power_law", "alpha": -1.0}}}
    with pytest.raises(ConfigError, match=r"\[bands\.r\]\.filter.*Fitzpatrick"):
        configure(tmp_path, far, schema=schema)
    assert not math.isnan(band_coefficient(_filter(6000.0, 500.0)))


def test_ebv_column_found_by_name_or_mapping(tmp_path, curves):
    # The E(B-V) input is found under the usual names (any case) or through [columns] ebv.
    from annotator.api import Setup
    from annotator.cosmology import preset
    from annotator_plugins.kcorrection import KCorrection

    k = {"method": "template", "sed": "seds/early.csv", "z_max": 1.0}
    bands = {"r": {"magnitude": "mag_r", "filter": "filters/red.csv", "kcorrection": k}}

    def setup(names, columns):
        schema = pa.schema([("z", pa.float64()), ("mag_r", pa.float64())]
                           + [(n, pa.float64()) for n in names])
        return Setup(annotator_name="kcorrection", options={}, sections={"bands": bands},
                     columns=columns, catalogue_schema=schema, cosmology=preset("planck2018"),
                     base_dir=tmp_path)

    assert KCorrection.configure(setup(["EBV_SFD"], {})).extinction is not None
    assert KCorrection.configure(setup(["dust"], {})).extinction is None
    mapped = KCorrection.configure(setup(["dust"], {"ebv": "dust"}))
    assert mapped.extinction is not None and "ebv" in mapped.requires
