"""The per-object K-curve API (``Method.shape`` / ``Method.k_at``) that z_max and V_max use:
K of each object's own SED at redshifts other than its own."""

from __future__ import annotations

import numpy as np
import pytest

from _kcorr_helpers import band_response, configure, early_sed, young_sed
from _kcorr_reference import ab_magnitude_direct, kcorrection_direct, mixture

RED = lambda lam: band_response(lam, 6200.0, 1400.0)  # noqa: E731
BLUE = lambda lam: band_response(lam, 4700.0, 1300.0)  # noqa: E731
SUPPORT = {"red": (4700.0, 7700.0), "blue": (3300.0, 6100.0)}


def _bands():
    mix = {"method": "template_mix", "seds": ["seds/early.csv", "seds/young.csv"],
           "colour": ["b", "r"], "z_max": 1.2}
    return {
        "b": {"magnitude": "mag_b", "filter": "filters/blue.csv"},
        "r": {"magnitude": "mag_r", "filter": "filters/red.csv", "kcorrection": mix},
        "r_tpl": {"magnitude": "mag_r", "filter": "filters/red.csv",
                  "kcorrection": {"method": "template", "sed": "seds/early.csv", "z_max": 1.2}},
        "r_pl": {"magnitude": "mag_r", "kcorrection": {"method": "power_law", "alpha": -1.5}},
        "r_plc": {"magnitude": "mag_r", "filter": "filters/red.csv",
                  "kcorrection": {"method": "power_law_colour", "colour": ["b", "r_plc"]}},
        "r_poly": {"magnitude": "mag_r", "kcorrection": {
            "method": "polynomial", "colour": ["b", "r_poly"], "z_max": 1.0,
            "coefficients": [[0.0, 0.0], [0.3, 1.1], [-0.2, 0.4]]}},
    }


def test_k_at_own_redshift_is_evaluate(tmp_path, curves):
    # Consistency check (against the project's own evaluate): k_at(z, shape(z, c)) is K.
    instance = configure(tmp_path, _bands())
    rng = np.random.default_rng(3)
    z = rng.uniform(0.0, 1.0, 200)
    colour = rng.uniform(0.0, 1.6, 200)
    colour[5] = np.nan
    for b in instance.bands:
        if b.method is None:
            continue
        c = colour if b.method.colour else None
        k, _ = b.method.evaluate(z, c)
        shape = b.method.shape(z, c)
        np.testing.assert_allclose(b.method.k_at(z, shape), k, rtol=0, atol=1e-12,
                                   err_msg=b.name)
        # (n, m): each row's curve at several redshifts equals the (n,) call column by column
        grid = np.stack([z, 0.5 * z, np.full_like(z, 0.9)], axis=1)
        many = b.method.k_at(grid, shape)
        assert many.shape == grid.shape
        for j in range(grid.shape[1]):
            np.testing.assert_allclose(many[:, j], b.method.k_at(grid[:, j], shape),
                                       atol=1e-12, err_msg=b.name)
        # outside the method's redshift range: NaN, never a clamped value
        if np.isfinite(b.method.z_max):
            assert np.isnan(b.method.k_at(np.full(3, b.method.z_max + 0.1), shape[:3]
                                          if shape is not None else None)).all()


def test_template_mix_curve_is_the_objects_own_sed(tmp_path, curves):
    # Outside reference: an object whose SED is wa early + wb young, seen at z with the colour
    # b - r it has there (quad, Hogg et al. 2002 eq. 2); its K at other redshifts z' must be
    # that same SED's K_RR(z') by Hogg et al. (2002) eq. 8 (quad), within 2e-3 mag.
    instance = configure(tmp_path, _bands())
    k = next(b.method for b in instance.bands if b.name == "r")
    for wa, wb, z in ((0.3, 0.7, 0.25), (0.8, 0.2, 0.6)):
        obj = mixture(early_sed, young_sed, wa, wb)
        colour = (ab_magnitude_direct(obj, BLUE, SUPPORT["blue"], z)
                  - ab_magnitude_direct(obj, RED, SUPPORT["red"], z))
        shape = k.shape(np.array([z]), np.array([colour]))
        z_new = np.array([[0.05, 0.45, 0.9, 1.15]])
        got = k.k_at(z_new, shape)[0]
        ref = [kcorrection_direct(obj, RED, RED, zz, SUPPORT["red"], SUPPORT["red"])
               for zz in z_new[0]]
        np.testing.assert_allclose(got, ref, atol=2e-3)


def test_power_law_colour_curve_is_closed_form(tmp_path, curves):
    # Hogg et al. (2002): f_nu ~ nu^alpha has K = -2.5 (1 + alpha) log10(1 + z) at any z;
    # the colour fixes alpha once, and the curve must follow the closed form.
    instance = configure(tmp_path, _bands())
    k = next(b.method for b in instance.bands if b.name == "r_plc")
    colour = np.array([0.2, 0.9])
    alpha = k.shape(np.array([0.3, 0.3]), colour)
    z_new = np.array([[0.1, 2.0], [0.7, 4.0]])
    expected = -2.5 * (1 + alpha[:, None]) * np.log10(1 + z_new)
    np.testing.assert_allclose(k.k_at(z_new, alpha), expected, atol=1e-12)


def test_polynomial_holds_the_colour_fixed(tmp_path, curves):
    # Documented approximation (common practice when only K(z, c) is known): the observed
    # colour is held fixed; K(z') is then the polynomial itself, evaluated by hand here.
    instance = configure(tmp_path, _bands())
    k = next(b.method for b in instance.bands if b.name == "r_poly")
    c = np.array([0.5])
    shape = k.shape(np.array([0.2]), c)
    zp = 0.7
    expected = 0.3 * zp + 1.1 * zp * 0.5 - 0.2 * zp ** 2 + 0.4 * zp ** 2 * 0.5
    assert k.k_at(np.array([zp]), shape)[0] == pytest.approx(expected, abs=1e-12)
