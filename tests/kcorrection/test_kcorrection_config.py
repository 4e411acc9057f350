"""Bad [bands] tables and bad filter/SED files: clear errors before any row is read.

Common practice (no outside source): each error must name the band's key, the file and, for
coverage, the redshift range that fails.
"""

from __future__ import annotations

import numpy as np
import pytest

from _kcorr_helpers import configure, filter_table, write_curve
from annotator.errors import ConfigError, UserError

TEMPLATE = {"method": "template", "sed": "seds/early.csv"}


def _r(**kw):
    band = {"magnitude": "mag_r", "filter": "filters/red.csv", "kcorrection": TEMPLATE}
    band.update(kw)
    return {"r": band}


def _error(tmp_path, bands, options=None) -> str:
    with pytest.raises(ConfigError) as info:
        configure(tmp_path, bands, options)
    assert isinstance(info.value, UserError)
    return str(info.value)


def test_no_bands_table_means_not_applicable(tmp_path):
    from annotator.api import Setup
    from annotator.cosmology import preset
    from annotator_plugins.kcorrection import KCorrection

    from _kcorr_helpers import catalogue_schema

    setup = Setup("kcorrection", {}, {}, {}, catalogue_schema(), preset("planck2018"), tmp_path)
    assert KCorrection.configure(setup) is None


def test_malformed_filter_names_band_and_file(tmp_path, curves):
    (tmp_path / "filters/bad.csv").write_text("wavelength,response\n5000,0.1\n5100,abc\n")
    msg = _error(tmp_path, _r(filter="filters/bad.csv"))
    assert "[bands.r].filter" in msg and "bad.csv" in msg and "line 3" in msg


def test_three_columns_is_malformed(tmp_path, curves):
    (tmp_path / "filters/wide.csv").write_text("5000,0.1,1\n5100,0.2,1\n5200,0.1,1\n")
    msg = _error(tmp_path, _r(filter="filters/wide.csv"))
    assert "[bands.r].filter" in msg and "wide.csv" in msg and "3 columns" in msg


def test_unsorted_filter(tmp_path, curves):
    w, r = filter_table(6200.0, 1400.0)
    w = w.copy()
    w[[100, 101]] = w[[101, 100]]
    write_curve(tmp_path / "filters/shuffled.csv", w, r)
    msg = _error(tmp_path, _r(filter="filters/shuffled.csv"))
    assert "[bands.r].filter" in msg and "shuffled.csv" in msg and "not sorted" in msg
    assert "data row 102" in msg


def test_negative_response(tmp_path, curves):
    w, r = filter_table(6200.0, 1400.0)
    r = r.copy()
    r[50] = -0.01
    write_curve(tmp_path / "filters/negative.csv", w, r)
    msg = _error(tmp_path, _r(filter="filters/negative.csv"))
    assert "[bands.r].filter" in msg and "negative.csv" in msg and "negative" in msg
    assert "data row 51" in msg


def test_negative_sed(tmp_path, curves):
    lam = np.geomspace(900, 25000, 300)
    f = np.ones_like(lam)
    f[7] = -1.0
    write_curve(tmp_path / "seds/neg.csv", lam, f)
    msg = _error(tmp_path, _r(kcorrection={"method": "template", "sed": "seds/neg.csv"}))
    assert "[bands.r].kcorrection.sed" in msg and "neg.csv" in msg and "f_lambda" in msg


def test_missing_file(tmp_path, curves):
    msg = _error(tmp_path, _r(filter="filters/nowhere.csv"))
    assert "[bands.r].filter" in msg and "nowhere.csv" in msg and "does not exist" in msg


def test_sed_not_covering_the_redshifted_band(tmp_path, curves):
    # An SED starting at 3000 A covers the red filter (from 4780 A) only up to z = 0.593.
    lam = np.geomspace(3000, 25000, 400)
    write_curve(tmp_path / "seds/short.csv", lam, 1 / lam)
    msg = _error(tmp_path, _r(kcorrection={"method": "template", "sed": "seds/short.csv",
                                           "z_max": 1.5}))
    assert "[bands.r].kcorrection" in msg and "short.csv" in msg and "red.csv" in msg
    assert "z = 0 to 1.5" in msg and "z > 0.593" in msg


def test_sed_too_short_even_at_zero_redshift(tmp_path, curves):
    lam = np.geomspace(900, 6000, 400)
    write_curve(tmp_path / "seds/blue_only.csv", lam, 1 / lam)
    msg = _error(tmp_path, _r(kcorrection={"method": "template", "sed": "seds/blue_only.csv",
                                           "z_max": 0.5}))
    assert "blue_only.csv" in msg and "red.csv" in msg and "fails for z < 0.27" in msg


def test_sed_not_covering_the_rest_frame_band(tmp_path, curves):
    lam = np.geomspace(4000, 25000, 400)
    write_curve(tmp_path / "seds/red_only.csv", lam, 1 / lam)
    msg = _error(tmp_path, _r(rest_filter="filters/blue.csv",
                              kcorrection={"method": "template", "sed": "seds/red_only.csv",
                                           "z_max": 0.1}))
    assert "red_only.csv" in msg and "rest frame" in msg


def test_sed_with_a_gap_gives_no_flux(tmp_path, curves):
    lam = np.geomspace(900, 25000, 2000)
    f = np.where((lam > 2000) & (lam < 3600), 0.0, 1 / lam)
    write_curve(tmp_path / "seds/gap.csv", lam, f)
    msg = _error(tmp_path, _r(kcorrection={"method": "template", "sed": "seds/gap.csv",
                                           "z_max": 2.0}))
    assert "gap.csv" in msg and "no flux" in msg and "z = " in msg


@pytest.mark.parametrize("bands, needle", [
    ({"R": {"magnitude": "mag_r"}}, "[bands.R]: band names"),
    ({"r": {"magnitude": "mag_r", "kcorection": {}}}, "[bands.r].kcorection: unknown key"),
    ({"r": {"filter": "filters/red.csv", "kcorrection": TEMPLATE}}, "[bands.r].magnitude"),
    ({"r": {"magnitude": "mag_x", "kcorrection": {"method": "power_law", "alpha": 0}}},
     "column 'mag_x' is not in the catalogue"),
    ({"r": {"magnitude": "mag_r", "kcorrection": {"method": "simple"}}},
     "[bands.r].kcorrection.method: expected one of"),
    ({"r": {"magnitude": "mag_r", "kcorrection": {"method": "power_law"}}},
     "[bands.r].kcorrection.alpha: missing"),
    ({"r": {"magnitude": "mag_r", "kcorrection": {"method": "power_law", "alpha": "x"}}},
     "[bands.r].kcorrection.alpha: expected a number"),
    ({"r": {"magnitude": "mag_r", "kcorrection": {"method": "power_law", "alpha": 1,
                                                   "sed": "x"}}},
     "[bands.r].kcorrection.sed: unknown key for method 'power_law'"),
    ({"r": {"magnitude": "mag_r", "kcorrection": TEMPLATE}}, "[bands.r].filter: missing"),
    ({"r": {"magnitude": "mag_r", "rest_filter": "filters/blue.csv",
            "kcorrection": {"method": "power_law", "alpha": 1}}},
     "[bands.r].rest_filter: a rest-frame band different"),
    ({"r": {"magnitude": "mag_r", "kcorrection": {
        "method": "polynomial", "coefficients": [[0, 0], [1, 1]], "colour": ["g", "r"],
        "z_max": 0.5}}}, "'g' is not a configured band"),
    ({"b": {"magnitude": "mag_b"},
      "r": {"magnitude": "mag_r", "kcorrection": {
          "method": "polynomial", "coefficients": [[0.1, 0], [1, 1]], "colour": ["b", "r"],
          "z_max": 0.5}}}, "row 0) must all be 0"),
    ({"b": {"magnitude": "mag_b"},
      "r": {"magnitude": "mag_r", "kcorrection": {
          "method": "polynomial", "coefficients": [[0, 0], [1]], "colour": ["b", "r"],
          "z_max": 0.5}}}, "row 1 has 1 coefficients"),
    ({"b": {"magnitude": "mag_b"},
      "r": {"magnitude": "mag_r", "kcorrection": {
          "method": "polynomial", "coefficients": [[0, 0], [1, 1]], "colour": ["b", "r"]}}},
     "[bands.r].kcorrection.z_max: missing"),
    ({"b": {"magnitude": "mag_b"},
      "r": {"magnitude": "mag_r", "filter": "filters/red.csv", "kcorrection": {
          "method": "power_law_colour", "colour": ["b", "r"]}}},
     "band 'b' needs a filter"),
    ({"b": {"magnitude": "mag_b", "filter": "filters/blue.csv"},
      "r": {"magnitude": "mag_r", "kcorrection": {"method": "power_law", "alpha": 1}}},
     "[bands.b]: has no kcorrection and no other band's colour uses it"),
    ({"r": {"magnitude": "mag_r", "filter": "filters/red.csv",
            "kcorrection": {"method": "template", "sed": "seds/early.csv", "z_max": -1}}},
     "[bands.r].kcorrection.z_max: expected a redshift > 0"),
])
def test_bad_band_tables(tmp_path, curves, bands, needle):
    assert needle in _error(tmp_path, bands)


def test_unknown_option(tmp_path, curves):
    msg = _error(tmp_path, _r(), {"tolerance": 1e-3})
    assert "[annotators.kcorrection].tolerance: unknown option" in msg


@pytest.mark.parametrize("key, value, needle", [
    ("max_kcorrection_spread_mag", 0, "expected > 0"),
    ("max_kcorrection_spread_mag", "wide", "a magnitude difference"),
    ("clip_tolerance_sigma", -1, "expected >= 0"),
    ("assumed_colour_error_mag", -0.1, "expected >= 0"),
])
def test_bad_template_mix_refusal_settings(tmp_path, curves, key, value, needle):
    # Common practice: the refusal thresholds of the mixture are checked like every key.
    mix = {"method": "template_mix", "seds": ["seds/early.csv", "seds/young.csv"],
           "colour": ["b", "r"], "z_max": 1.0, key: value}
    bands = {"b": {"magnitude": "mag_b", "filter": "filters/blue.csv"},
             "r": {"magnitude": "mag_r", "filter": "filters/red.csv", "kcorrection": mix}}
    msg = _error(tmp_path, bands)
    assert f"[bands.r].kcorrection.{key}" in msg and needle in msg
