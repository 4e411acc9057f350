"""End to end through ``annotator run``: a job file mapping ra/dec/redshift_error with
redshift_frame = "heliocentric"; every cosmological column must use the CMB-frame redshift.

Outside references: the Planck 2018 dipole (Planck Collaboration 2020, A&A 641, A1; from
memory) recomputed here with astropy.coordinates for the apex direction; the cosmology's own
functions evaluated at the CMB-frame redshift.
"""

from __future__ import annotations

import json
import math

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from annotator.cli import main
from annotator.cosmology import preset

C_KM_S = 299_792.458  # exact (SI 2019)


def _read(out):
    return pa.concat_tables(pq.read_table(p) for p in sorted(out.glob("part-*.parquet")))


def test_run_with_heliocentric_redshifts(tmp_path, catalogue_table):
    coords = pytest.importorskip("astropy.coordinates")
    u = pytest.importorskip("astropy.units")
    table = catalogue_table.rename_columns(
        ["objid", "alpha", "delta", "z_helio", "sigma_zh", "mag_g", "mag_r", "magerr_r"])
    # three positions out of range (rows kept, flagged, nulls)
    alpha = table.column("alpha").to_numpy().copy()
    delta = table.column("delta").to_numpy().copy()
    alpha[10], delta[11], alpha[12] = -3.0, 91.0, np.nan
    table = table.set_column(1, "alpha", pa.array(alpha, from_pandas=True))
    table = table.set_column(2, "delta", pa.array(delta))
    src = tmp_path / "survey.parquet"
    pq.write_table(table, src, row_group_size=1_500)
    job = tmp_path / "job.toml"
    job.write_text(
        '[input]\npaths = ["survey.parquet"]\n'
        '[output]\ndir = "annotated"\nchunk_rows = 2000\n'
        '[columns]\nredshift = "z_helio"\nra = "alpha"\ndec = "delta"\n'
        'redshift_error = "sigma_zh"\nredshift_frame = "heliocentric"\n')
    assert main(["run", "--config", str(job), "--quiet"]) == 0
    out_dir = tmp_path / "annotated"
    out = _read(out_dir)
    manifest = json.loads((out_dir / "manifest.json").read_text())
    n = table.num_rows
    assert manifest["rows_read"] == n == manifest["rows_written"] + manifest["rows_rejected"]
    assert manifest["rows_rejected"] == 0

    # redshift_cmb against an independent evaluation: the apex from astropy, the exact
    # composition (1 + z_cmb) = (1 + z) / (gamma (1 - beta cos theta)) (module docstring).
    z = table.column("z_helio").to_numpy(zero_copy_only=False)
    apex = coords.SkyCoord(l=264.021 * u.deg, b=48.253 * u.deg, frame="galactic").icrs
    target = coords.SkyCoord(ra=np.nan_to_num(alpha) * u.deg,
                             dec=np.clip(delta, -90, 90) * u.deg, frame="icrs")
    mu = np.cos(target.separation(apex).rad)
    beta = 369.82 / C_KM_S
    gamma = 1 / math.sqrt(1 - beta**2)
    expected = (1 + z) / (gamma * (1 - beta * mu)) - 1
    z_cmb = out.column("redshift_cmb").to_numpy(zero_copy_only=False)
    rows = np.arange(n)
    good = np.isfinite(z) & ((rows < 10) | (rows > 12))
    np.testing.assert_allclose(z_cmb[good], expected[good], rtol=0, atol=1e-9)
    assert np.all(np.isnan(z_cmb[10:13]))

    # every cosmological column uses redshift_cmb
    cosmo = preset("planck2018")
    usable = good & (z_cmb >= 0)
    dc = out.column("comoving_distance_mpc").to_numpy(zero_copy_only=False)
    np.testing.assert_array_equal(dc[usable], cosmo.comoving_distance_mpc(z_cmb[usable]))
    lb = out.column("lookback_time_gyr").to_numpy(zero_copy_only=False)
    np.testing.assert_array_equal(lb[usable], cosmo.lookback_time_gyr(z_cmb[usable]))
    reach = out.column("reachable").to_numpy(zero_copy_only=False)
    assert np.array_equal(reach[usable].astype(bool), cosmo.reachable(z_cmb[usable]))
    # and the errors use the CMB-frame redshift and error
    sig = table.column("sigma_zh").to_numpy() * (1 + z_cmb) / (1 + z)
    err = out.column("comoving_distance_err_mpc").to_numpy(zero_copy_only=False)
    np.testing.assert_allclose(err[usable], cosmo.dcomoving_distance_dz_mpc(z_cmb[usable])
                               * sig[usable], rtol=1e-13)
    # the bad positions are flagged and counted in the manifest
    flags = out.column("annotation_flags").to_pylist()
    assert all("position_invalid" in flags[i] for i in (10, 11, 12))
    assert manifest["flags"]["counts"]["position_invalid"] == 3
    assert "position_invalid" in manifest["flags"]["descriptions"]
    names = [c["name"] for c in manifest["columns_added"]]
    assert names[:2] == ["redshift_cmb", "redshift_cmb_err"]
    assert "reachable_probability" in names
    assert [a["name"] for a in manifest["annotators"]][0] == "redshift_frames"


def test_bad_setting_is_one_line_exit_2(tmp_path, catalogue_parquet, capsys):
    job = tmp_path / "job.toml"
    job.write_text(f'[input]\npaths = ["{catalogue_parquet}"]\n[output]\ndir = "o"\n'
                   '[columns]\nredshift_frame = "galactic"\n')
    assert main(["run", "--config", str(job), "--quiet"]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "[columns].redshift_frame" in err[0] and "heliocentric" in err[0]
