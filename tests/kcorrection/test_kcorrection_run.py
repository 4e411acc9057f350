"""End to end through ``annotator run`` with a job file holding [bands.*] tables."""

from __future__ import annotations

import json
import math
import xml.etree.ElementTree as ET

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from _kcorr_helpers import band_response, column, early_sed, run_pipeline, sed_table
from _kcorr_reference import kcorrection_direct
from annotator.cli import main
from annotator.cosmology import preset
from annotator_plugins.kcorrection.synthetic import kcorrection_curve

Z = [np.nan, -0.002, 0.0, 0.02, 0.1, 0.35, 0.6, 0.9, 1.2, 1.49, 1.8, 2.6]
JOB = """
[input]
paths = ["catalogue.parquet"]
[output]
dir = "annotated"
overwrite = true
[cosmology]
preset = "planck2018"

[bands.b]
magnitude = "mag_b"
error = "err_b"
filter = "filters/blue.csv"
kcorrection = {{ method = "power_law", alpha = -1.0 }}

[bands.r]
magnitude = "mag_r"
error = "err_r"
filter = "filters/red.csv"
kcorrection = {{ method = "template", sed = "seds/early.csv", z_max = 1.5 }}
{extra}
"""


def _catalogue(n_repeat: int = 1) -> pa.Table:
    z = np.tile(Z, n_repeat)
    n = z.size
    rng = np.random.default_rng(5)
    mag_r = rng.uniform(17.0, 23.0, n)
    mag_r_col = pa.array(np.where(np.arange(n) == 6, np.nan, mag_r), from_pandas=True)  # null
    return pa.table({
        "objid": np.arange(n, dtype=np.int64),
        "z": pa.array(z, from_pandas=True),
        "z_err": np.full(n, 0.01),
        "mag_b": mag_r + 0.8,
        "mag_r": mag_r_col,
        "err_b": np.full(n, 0.03),
        "err_r": np.full(n, 0.05),
    })


def _run(tmp_path, extra: str = "") -> pa.Table:
    pq.write_table(_catalogue(), tmp_path / "catalogue.parquet")
    (tmp_path / "job.toml").write_text(JOB.format(extra=extra))
    assert main(["run", "--config", str(tmp_path / "job.toml"), "--quiet"]) == 0
    out = tmp_path / "annotated"
    return pa.concat_tables(pq.read_table(p) for p in sorted(out.glob("part-*.parquet")))


def test_run_adds_kcorrected_absolute_magnitudes(tmp_path, curves):
    table = _run(tmp_path)
    for band in ("b", "r"):
        for name in (f"kcorrection_{band}_mag", f"absolute_magnitude_{band}_mag",
                     f"absolute_magnitude_{band}_err_mag"):
            assert table.schema.field(name).type == pa.float64()
    z = np.array(Z)
    k_r = column(table, "kcorrection_r_mag")
    m_abs = column(table, "absolute_magnitude_r_mag")
    mag_r = column(table, "mag_r")
    mu = column(table, "distance_modulus_mag")  # from the distances annotator, same cosmology

    # K against eq. 8 of Hogg et al. (2002) by direct quadrature on the analytic curves.
    red = lambda lam: band_response(lam, 6200.0, 1400.0)  # noqa: E731
    for i in (3, 5, 8, 9):
        ref = kcorrection_direct(early_sed, red, red, z[i], (4700.0, 7700.0), (4700.0, 7700.0))
        assert k_r[i] == pytest.approx(ref, abs=1e-3)
    # M = m - mu(z) - K (Hogg et al. 2002 eq. 1 rearranged), with mu of the job's cosmology.
    good = np.isfinite(m_abs)
    assert good.tolist() == [False, False, False, True, True, True, False, True, True, True,
                             False, False]
    np.testing.assert_allclose(m_abs[good], (mag_r - mu - k_r)[good], rtol=0, atol=1e-12)
    # Power law with alpha = -1 (flat in nu f_nu): K = 0 at every redshift (Hogg et al. 2002).
    k_b = column(table, "kcorrection_b_mag")
    assert np.all(k_b[2:] == 0.0) and np.isnan(k_b[:2]).all()

    flags = table.column("annotation_flags").to_pylist()
    assert "kcorrection_r_outside_redshift_range" in flags[10]
    assert "kcorrection_r_outside_redshift_range" in flags[11]
    assert np.isnan(k_r[10:]).all() and np.isfinite(k_r[2:10]).all()
    assert "magnitude_r_missing" in flags[6] and np.isfinite(k_r[6]) and np.isnan(m_abs[6])
    assert "absolute_magnitude_no_distance" in flags[2]  # z = 0: mu = -inf, no M
    assert k_r[2] == pytest.approx(0.0, abs=1e-12)
    assert flags[4] == ""


def test_error_column_propagates_magnitude_and_redshift_errors(tmp_path, curves):
    # First-order propagation (common practice): sigma_M^2 = sigma_m^2
    # + (dmu/dz + dK/dz)^2 sigma_z^2, the derivatives here by central differences of the
    # cosmology's distance modulus and of K by direct synthetic photometry.
    table = _run(tmp_path)
    cosmo = preset("planck2018")
    err = column(table, "absolute_magnitude_r_err_mag")
    w, f = sed_table(early_sed)
    fw, fr = np.loadtxt(tmp_path / "filters/red.csv", delimiter=",", skiprows=1).T
    for i in (4, 5, 8):
        z, h = Z[i], 1e-4
        dmu = (cosmo.distance_modulus_mag(z + h) - cosmo.distance_modulus_mag(z - h)) / (2 * h)
        k_lo, k_hi = kcorrection_curve(w, f, fw, fr, [z - h, z + h])
        expect = math.sqrt(0.05 ** 2 + ((dmu + (k_hi - k_lo) / (2 * h)) * 0.01) ** 2)
        assert err[i] == pytest.approx(expect, rel=2e-3)
    assert np.isnan(err[6])  # missing magnitude
    # Without the redshift-error term only the magnitude error remains.
    table = _run(tmp_path, extra="[annotators.kcorrection]\nuse_redshift_error = false\n")
    err = column(table, "absolute_magnitude_r_err_mag")
    np.testing.assert_allclose(err[[3, 4, 5, 7, 8, 9]], 0.05, rtol=1e-15)


def test_colour_error_terms(tmp_path, curves):
    # M_r = m_r - mu - K(z, m_b - m_r): dM/dm_r = 1 + dK/dc, dM/dm_b = -dK/dc (first-order
    # propagation, common practice). Checked with the polynomial K = z (1 + 0.5 c), whose
    # derivative is known in closed form.
    extra = """
[bands.rp]
magnitude = "mag_r"
error = "err_r"
[bands.rp.kcorrection]
method = "polynomial"
coefficients = [[0, 0], [1.0, 0.5]]
colour = ["b", "rp"]
z_max = 1.5
[annotators.kcorrection]
use_redshift_error = false
"""
    table = _run(tmp_path, extra=extra)
    z = np.array(Z)
    err = column(table, "absolute_magnitude_rp_err_mag")
    dkdc = 0.5 * z
    expect = np.sqrt(((1 + dkdc) * 0.05) ** 2 + (dkdc * 0.03) ** 2)
    ok = [3, 4, 5, 7, 8, 9]
    np.testing.assert_allclose(err[ok], expect[ok], rtol=1e-12)
    k = column(table, "kcorrection_rp_mag")
    np.testing.assert_allclose(k[ok], z[ok] * (1 + 0.5 * 0.8), rtol=1e-12)


def test_units_and_ucds_reach_voparquet_and_manifest(tmp_path, curves):
    _run(tmp_path)
    out = tmp_path / "annotated"
    meta = pq.read_schema(next(out.glob("part-*.parquet"))).metadata
    # VOParquet 1.0 (IVOA Note): a VOTable header with one FIELD per column, unit and ucd.
    root = ET.fromstring(meta[b"IVOA.VOTable-Parquet.content"])
    ns = {"v": "http://www.ivoa.net/xml/VOTable/v1.3"}
    fields = {f.get("name"): f for f in root.iterfind(".//v:FIELD", ns)}
    # UCD1+ words from the IVOA list (v1.5): the invented red band (pivot ~ 620 nm) is em.opt.R
    # (600-750 nm), the blue one (~ 470 nm) em.opt.B (400-500 nm).
    assert fields["absolute_magnitude_r_mag"].get("ucd") == "phys.magAbs;em.opt.R"
    assert fields["absolute_magnitude_b_mag"].get("ucd") == "phys.magAbs;em.opt.B"
    assert fields["absolute_magnitude_r_err_mag"].get("ucd") == "stat.error;phys.magAbs;em.opt.R"
    assert fields["kcorrection_r_mag"].get("ucd") == "phot.mag;arith.diff;em.opt.R"
    for name in ("kcorrection_r_mag", "absolute_magnitude_r_mag", "absolute_magnitude_r_err_mag"):
        assert fields[name].get("unit") == "mag"
        assert fields[name].find("v:DESCRIPTION", ns).text
    manifest = json.loads((out / "manifest.json").read_text())
    assert manifest["rows_read"] == len(Z) == manifest["rows_written"] + manifest["rows_rejected"]
    added = {c["name"]: c for c in manifest["columns_added"]}
    assert added["absolute_magnitude_r_mag"]["unit"] == "mag"
    assert manifest["flags"]["counts"]["kcorrection_r_outside_redshift_range"] == 3
    assert manifest["flags"]["counts"]["magnitude_r_missing"] == 1
    assert "kcorrection_r_outside_redshift_range" in manifest["flags"]["descriptions"]


def test_votable_header_parses_with_astropy(tmp_path, curves):
    votable = pytest.importorskip("astropy.io.votable")  # outside reference: VOTable parser
    import io

    _run(tmp_path)
    meta = pq.read_schema(next((tmp_path / "annotated").glob("part-*.parquet"))).metadata
    doc = votable.parse(io.BytesIO(meta[b"IVOA.VOTable-Parquet.content"]), verify="exception")
    fields = {f.name: f for f in doc.get_first_table().fields}
    assert str(fields["absolute_magnitude_r_mag"].unit) == "mag"
    assert fields["absolute_magnitude_r_mag"].ucd == "phys.magAbs;em.opt.R"


def test_bad_filter_is_one_line_exit_2(tmp_path, curves, capsys):
    (tmp_path / "filters/red.csv").write_text("wavelength,response\n6000,0.5\n5900,0.6\n")
    pq.write_table(_catalogue(), tmp_path / "catalogue.parquet")
    (tmp_path / "job.toml").write_text(JOB.format(extra=""))
    assert main(["run", "--config", str(tmp_path / "job.toml"), "--quiet"]) == 2
    err = capsys.readouterr().err
    assert "[bands.r].filter" in err and "red.csv" in err and "not sorted" in err
    assert "Traceback" not in err
    assert not (tmp_path / "annotated").exists() or not list(
        (tmp_path / "annotated").glob("part-*.parquet"))


def test_pipeline_keeps_row_order_across_batches(tmp_path, curves):
    # Rows keep their place: the same rows give the same values whichever batch they are in.
    bands = {"r": {"magnitude": "mag_r", "filter": "filters/red.csv",
                   "kcorrection": {"method": "template", "sed": "seds/early.csv",
                                   "z_max": 1.5}}}
    table = _catalogue(n_repeat=3)
    out, counts = run_pipeline(tmp_path, table, bands)
    k = column(out, "kcorrection_r_mag").reshape(3, len(Z))
    np.testing.assert_array_equal(k[0], k[1])
    np.testing.assert_array_equal(k[0], k[2])
    assert counts["kcorrection_r_outside_redshift_range"] == 9


def test_configured_annotator_pickles_for_dask_workers(tmp_path, curves):
    # Instances are shipped to Dask workers by pickle (annotator/api.py): the tables travel
    # with them and give identical values.
    import pickle

    from _kcorr_helpers import configure

    bands = {"b": {"magnitude": "mag_b", "filter": "filters/blue.csv"},
             "r": {"magnitude": "mag_r", "filter": "filters/red.csv",
                   "kcorrection": {"method": "template_mix", "colour": ["b", "r"],
                                   "seds": ["seds/early.csv", "seds/young.csv"],
                                   "z_max": 1.0}}}
    inst = configure(tmp_path, bands)
    clone = pickle.loads(pickle.dumps(inst))
    z, c = np.linspace(0, 1, 7), np.linspace(0.2, 1.5, 7)
    a = inst.bands[1].method.evaluate(z, c)[0]
    b = clone.bands[1].method.evaluate(z, c)[0]
    np.testing.assert_array_equal(a, b)
    assert len(pickle.dumps(inst)) < 2_000_000


def test_k_takes_the_observed_redshift_and_mu_the_cmb_frame_one(tmp_path, curves):
    """With a heliocentric catalogue, mu uses the CMB-frame redshift but K the observed one:
    the spectrum is shifted by the redshift we see (Hogg et al. 2002, sect. 2)."""
    z = np.array([0.01, 0.03, 0.1, 0.5, 1.0])
    n = z.size
    pq.write_table(pa.table({
        "objid": np.arange(n, dtype=np.int64), "z": z, "ra": np.full(n, 168.0),
        "dec": np.full(n, -7.0), "mag_b": np.full(n, 21.0),
    }), tmp_path / "catalogue.parquet")
    (tmp_path / "job.toml").write_text(
        '[input]\npaths = ["catalogue.parquet"]\n[output]\ndir = "annotated"\n'
        '[columns]\nredshift = "z"\nra = "ra"\ndec = "dec"\nredshift_frame = "heliocentric"\n'
        '[bands.b]\nmagnitude = "mag_b"\nfilter = "filters/blue.csv"\n'
        'kcorrection = { method = "power_law", alpha = 0.0 }\n')
    assert main(["run", "--config", str(tmp_path / "job.toml"), "--quiet"]) == 0
    out = tmp_path / "annotated"
    table = pa.concat_tables(pq.read_table(p) for p in sorted(out.glob("part-*.parquet")))
    z_cmb = column(table, "redshift_cmb")
    assert np.all(np.abs(z_cmb - z) > 1e-4)  # the frame change is visible at this position
    # Power law alpha = 0 (flat f_nu): K = -2.5 log10(1 + z) (Hogg et al. 2002, eq. 13)
    k = column(table, "kcorrection_b_mag")
    np.testing.assert_allclose(k, -2.5 * np.log10(1 + z), rtol=0, atol=1e-9)
    mu = preset("planck2018").distance_modulus_mag(z_cmb)
    np.testing.assert_allclose(column(table, "distance_modulus_mag"), mu, rtol=1e-12)
    np.testing.assert_allclose(column(table, "absolute_magnitude_b_mag"), 21.0 - mu - k,
                               rtol=0, atol=1e-12)
