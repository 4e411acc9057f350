"""z_max, V_max, V/V_max (plugins/kcorrection/vmax.py) and the 1/V_max luminosity function.

Outside references: the Einstein-de Sitter closed forms of D_L and V_C (Hogg 1999, eqs. 16,
21, 29 with Omega_m = 1), scipy.optimize.brentq per object, Schmidt (1968, ApJ 151, 393) for
<V/V_max> = 1/2 with error 1/sqrt(12 N), and a Schechter (1976, ApJ 203, 297) population
recovered by a scipy fit.
"""

from __future__ import annotations

import math

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
from scipy.optimize import brentq

import _schechter
from _kcorr_helpers import column, configure
from annotator.config import job_from_mapping
from annotator.cosmology import preset
from annotator.errors import ConfigError
from annotator.pipeline import Pipeline
from annotator.plan import build_plan
from annotator.runner import run_job
from annotator.sql.session import QuerySession

C_KM_S = 299792.458
EDS = {"h0": 70.0, "omega_m": 1.0, "t_cmb": 0.0}


def _run(tmp_path, table, bands, options, cosmology=None, name="c"):
    path = tmp_path / f"{name}.parquet"
    pq.write_table(table, path)
    mapping = {"input": {"paths": [str(path)]}, "output": {"dir": str(tmp_path / f"o_{name}")},
               "bands": bands, "annotators": {"kcorrection": options}}
    if cosmology:
        mapping["cosmology"] = cosmology
    plan = build_plan(job_from_mapping(mapping, base_dir=tmp_path))
    out, counts, _ = Pipeline.from_plan(plan).annotate(table)
    return out, counts


def _eds_dm(z):
    """Einstein-de Sitter: D_M = 2 (c/H0) (1 - 1/sqrt(1 + z)) (Hogg 1999, Omega_m = 1)."""
    return 2.0 * C_KM_S / EDS["h0"] * (1.0 - 1.0 / np.sqrt(1.0 + z))


def _eds_mu(z):
    return 5.0 * np.log10((1.0 + z) * _eds_dm(z) * 1e6 / 10.0)


def test_zmax_and_vmax_in_einstein_de_sitter(tmp_path):
    # K = 0 (f_nu ~ nu^-1): z_max solves mu(z_max) = m_lim - M, here with the EdS closed form
    # by brentq; V_max = (Omega / 4 pi) (4 pi / 3) [D_M(z_max)^3 - D_M(z_lo)^3] (Hogg eq. 29).
    m_lim, area, z_lo, z_hi = 22.0, 10.0, 0.01, 3.0
    z = np.array([0.05, 0.2, 0.5, 1.0, 1.5])
    m_abs = np.array([-18.0, -20.0, -21.5, -23.0, -31.0])
    m = m_abs + _eds_mu(z)
    bands = {"r": {"magnitude": "mag_r", "limit_mag": m_lim,
                   "kcorrection": {"method": "power_law", "alpha": -1.0}}}
    options = {"area_deg2": area, "sample_redshift_range": [z_lo, z_hi]}
    out, counts = _run(tmp_path, pa.table({"z": z, "mag_r": m}), bands, options, EDS)
    zmax = column(out, "zmax_r")
    ref = np.array([brentq(lambda x: _eds_mu(x) - (m_lim - ma), zz, 9.9, xtol=1e-14)
                    if _eds_mu(9.9) > m_lim - ma else np.nan for zz, ma in zip(z, m_abs)])
    np.testing.assert_allclose(zmax[:4], ref[:4], rtol=1e-8)
    # the last object stays brighter than the limit out to z = 10 (the search's end): no
    # z_max, flagged, V_max to the sample's upper redshift
    assert np.isnan(zmax[4]) and counts["zmax_r_beyond_search"] == 1
    frac = area / _schechter.FULL_SKY_DEG2
    top = np.minimum(np.where(np.isnan(ref), z_hi, ref), z_hi)
    vmax = frac * 4.0 * math.pi / 3.0 * (_eds_dm(top) ** 3 - _eds_dm(z_lo) ** 3)
    np.testing.assert_allclose(column(out, "vmax_r_mpc3"), vmax, rtol=1e-7)
    v = frac * 4.0 * math.pi / 3.0 * (_eds_dm(z) ** 3 - _eds_dm(z_lo) ** 3)
    np.testing.assert_allclose(column(out, "v_over_vmax_r"), v / vmax, rtol=1e-7)


def test_bright_limit_and_flags(tmp_path):
    # With a bright limit the object would leave the sample when moved closer: z_min solves
    # mu(z_min) = m_bright - M (EdS, K = 0, brentq); rows outside the limits or the redshift
    # range, and rows without an absolute magnitude, are null with their own flag.
    m_lim, bright, z_lo, z_hi = 22.0, 18.0, 0.01, 2.0
    z = np.array([0.3, 0.6, 0.3, 2.5, np.nan, 0.4])
    m_abs = np.array([-22.0, -23.5, -10.0, -25.0, -22.0, -21.0])
    m = m_abs + _eds_mu(np.nan_to_num(z, nan=0.3))
    m[5] = np.nan
    bands = {"r": {"magnitude": "mag_r", "limit_mag": m_lim, "bright_limit_mag": bright,
                   "kcorrection": {"method": "power_law", "alpha": -1.0}}}
    options = {"area_deg2": 1.0, "sample_redshift_range": [z_lo, z_hi]}
    out, counts = _run(tmp_path, pa.table({"z": z, "mag_r": m}), bands, options, EDS)
    zmin = column(out, "zmin_r")
    for i in (0, 1):
        ref = brentq(lambda x: _eds_mu(x) - (bright - m_abs[i]), 1e-6, z[i], xtol=1e-14)
        assert zmin[i] == pytest.approx(ref, rel=1e-8)
    frac = 1.0 / _schechter.FULL_SKY_DEG2
    zmax1 = brentq(lambda x: _eds_mu(x) - (m_lim - m_abs[1]), z[1], 9.0, xtol=1e-14)
    vmax1 = frac * 4 * math.pi / 3 * (_eds_dm(min(zmax1, z_hi)) ** 3 - _eds_dm(zmin[1]) ** 3)
    assert column(out, "vmax_r_mpc3")[1] == pytest.approx(vmax1, rel=1e-7)
    assert np.isnan(column(out, "vmax_r_mpc3")[2:]).all()
    assert counts["vmax_r_outside_limits"] == 1  # row 2: fainter than 22
    assert counts["vmax_r_outside_redshift_range"] == 1  # row 3
    assert counts["magnitude_r_missing"] == 1  # row 5
    assert out.num_rows == 6


def test_template_mix_zmax_follows_each_objects_own_k(tmp_path, curves):
    # Each object's z_max is where its own K-curve (Method.k_at) brings it to the limit: the
    # batch solve equals a per-object brentq on m + mu(z') + K(z') - mu(z) - K(z) (scipy).
    mix = {"method": "template_mix", "seds": ["seds/early.csv", "seds/young.csv"],
           "colour": ["b", "r"], "z_max": 1.2}
    bands = {"b": {"magnitude": "mag_b", "filter": "filters/blue.csv"},
             "r": {"magnitude": "mag_r", "filter": "filters/red.csv", "kcorrection": mix,
                   "limit_mag": 23.0}}
    rng = np.random.default_rng(5)
    n = 40
    z = rng.uniform(0.05, 0.6, n)
    mag_r = rng.uniform(19.0, 22.9, n)
    mag_b = mag_r + rng.uniform(0.3, 1.6, n)
    table = pa.table({"z": z, "mag_r": mag_r, "mag_b": mag_b})
    options = {"area_deg2": 3.0, "sample_redshift_range": [0.0, 1.2]}
    out, _ = _run(tmp_path, table, bands, options)
    schema = pa.schema([("z", pa.float64()), ("mag_r", pa.float64()),
                        ("mag_b", pa.float64())])
    inst = configure(tmp_path, bands, options, schema=schema)
    meth = next(b.method for b in inst.bands if b.name == "r")
    cosmo = preset("planck2018")
    shape = meth.shape(z, mag_b - mag_r)
    k0 = meth.k_at(z, shape)
    zmax = column(out, "zmax_r")
    checked = 0
    for i in range(n):
        def g(x):
            return (mag_r[i] + cosmo.distance_modulus_mag(x) + meth.k_at(np.array([x]),
                    shape[i:i + 1])[0] - cosmo.distance_modulus_mag(z[i]) - k0[i] - 23.0)
        if g(1.2) > 0:
            assert zmax[i] == pytest.approx(brentq(g, z[i], 1.2, xtol=1e-13), abs=1e-8)
            checked += 1
        else:
            assert np.isnan(zmax[i])
    assert checked > 20


def test_configuration_errors(tmp_path, curves):
    k = {"method": "power_law", "alpha": -1.0}
    with pytest.raises(ConfigError, match="area_deg2"):
        configure(tmp_path, {"r": {"magnitude": "mag_r", "kcorrection": k, "limit_mag": 22}})
    with pytest.raises(ConfigError, match="bright_limit_mag"):
        configure(tmp_path, {"r": {"magnitude": "mag_r", "kcorrection": k, "limit_mag": 22,
                                   "bright_limit_mag": 23}}, {"area_deg2": 1})
    with pytest.raises(ConfigError, match="sample_redshift_range.*K-correction ends"):
        configure(tmp_path, {"r": {"magnitude": "mag_r", "filter": "filters/red.csv",
                                   "limit_mag": 22, "kcorrection": {
                                       "method": "template", "sed": "seds/early.csv",
                                       "z_max": 1.0}}},
                  {"area_deg2": 1, "sample_redshift_range": [0, 2]})
    with pytest.raises(ConfigError, match="only used with a flux limit"):
        configure(tmp_path, {"r": {"magnitude": "mag_r", "kcorrection": k}}, {"area_deg2": 1})
    with pytest.raises(ConfigError, match="area_deg2"):
        configure(tmp_path, {"r": {"magnitude": "mag_r", "kcorrection": k, "limit_mag": 22}},
                  {"area_deg2": 50000})


def test_luminosity_function_closed_loop(tmp_path):
    # A flux-limited sample (m <= 22) drawn from a known Schechter function (Schechter 1976),
    # uniform in comoving volume: the 1/V_max estimate from the luminosity_function selection
    # recovers phi*, M* and alpha within 3 of their fitted 1-sigma errors (scipy curve_fit),
    # and <V/V_max> = 1/2 within 3/sqrt(12 N) (Schmidt 1968). Fixed seed: deterministic.
    cosmo = preset("planck2018")
    table, area, _ = _schechter.draw(cosmo, n_expected=60_000, m_lim=22.0, seed=11)
    path = tmp_path / "schechter.parquet"
    pq.write_table(table, path)
    out = tmp_path / "out"
    job = job_from_mapping({
        "input": {"paths": [str(path)]}, "output": {"dir": str(out)},
        "bands": {"r": {"magnitude": "mag_r", "limit_mag": 22.0,
                        "kcorrection": {"method": "power_law", "alpha": -2.0}}},
        "annotators": {"kcorrection": {"area_deg2": area,
                                       "sample_redshift_range": [0.02, 0.6]}}},
        base_dir=tmp_path)
    run_job(job)
    width = 0.25
    with QuerySession(out) as s:
        s.use_selection("luminosity_function", {"band": "r", "bin_mag": width})
        rows = s.relation("SELECT * FROM selection").fetchall()
        (mean_ratio, n), = s.relation(
            "SELECT avg(v_over_vmax_r), count(v_over_vmax_r) FROM catalogue").fetchall()
    centres, counts, phi, err = (np.array([r[i] for r in rows], dtype=float)
                                 for i in range(4))
    use = counts >= 5
    fitted, sigma = _schechter.fit(centres[use], phi[use], err[use], width)
    for name in ("phi_star", "m_star", "alpha"):
        assert abs(fitted[name] - _schechter.TRUTH[name]) < 3 * sigma[name], (name, fitted,
                                                                              sigma)
    assert sigma["m_star"] < 0.1 and sigma["alpha"] < 0.05  # the test has power
    assert n == table.num_rows > 5_000
    assert abs(mean_ratio - 0.5) < 3.0 / math.sqrt(12 * n)


def test_luminosity_function_selection_is_offered_only_with_vmax_columns():
    from annotator_plugins.kcorrection.vmax import register_selections

    def manifest(*names):
        return {"columns_added": [{"name": n} for n in names]}

    assert register_selections(manifest("absolute_magnitude_r_mag")) == []
    (sel,) = register_selections(manifest("absolute_magnitude_r_mag", "vmax_r_mpc3",
                                          "absolute_magnitude_g_mag", "vmax_g_mpc3"))
    band = next(p for p in sel.parameters if p.name == "band")
    assert band.choices == ("g", "r")
    assert "must be above 0" in sel.check({"band": "r", "bin_mag": 0.0})
    sql = sel.render({"band": "r", "bin_mag": 0.5})
    assert '"vmax_r_mpc3"' in sql and "0.5" in sql
