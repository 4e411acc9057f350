"""A redshift beyond the cosmology tables is flagged with its own reason (issue 13)."""

from __future__ import annotations

import json

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

from annotator.cli import main
from annotator.cosmology import preset


def test_redshift_beyond_tables_is_flagged(tmp_path):
    zmax = preset("planck2018").z_max_tabulated  # about 1.005e10 (engine's table range)
    z = [0.5, 1e9, 0.99 * zmax, zmax, 1e11, 1e300, float("inf"), float("nan"), -1.0]
    pq.write_table(pa.table({"objid": list(range(len(z))), "z": z}), tmp_path / "c.parquet")
    out = tmp_path / "out"
    assert main(["run", str(tmp_path / "c.parquet"), "--out", str(out), "--quiet"]) == 0
    t = pa.concat_tables(pq.read_table(p) for p in sorted(out.glob("part-*.parquet")))
    flags = t.column("annotation_flags").to_pylist()
    assert flags == ["", "", "", "redshift_beyond_tables", "redshift_beyond_tables",
                     "redshift_beyond_tables", "redshift_not_finite", "redshift_not_finite",
                     "redshift_negative"]
    # every null distance has a reason, every flagged row has a null distance
    dc = t.column("comoving_distance_mpc").to_numpy(zero_copy_only=False)
    assert np.all(np.isnan(dc) == np.array([f != "" for f in flags]))
    m = json.loads((out / "manifest.json").read_text())
    assert m["flags"]["counts"]["redshift_beyond_tables"] == 3
    assert m["rows_flagged"] == 6


def test_crossing_age_beyond_the_tabulated_future_is_flagged(tmp_path):
    # w0 = -0.36: the event horizon converges so slowly that objects at z < ~1e-5 cross
    # it after the end of the tabulated future (x = ln a = 400): their crossing age is
    # null, and the row says why (a known limit, docs/cosmology-accuracy.md)
    z = [1e-6, 1e-4, 0.5]
    pq.write_table(pa.table({"objid": [0, 1, 2], "z": z}), tmp_path / "c.parquet")
    job = tmp_path / "job.toml"
    job.write_text(f'[input]\npaths = ["{tmp_path / "c.parquet"}"]\n'
                   f'[output]\ndir = "{tmp_path / "out"}"\n'
                   '[cosmology]\nh0 = 70\nomega_m = 0.3\nw0 = -0.36\n')
    assert main(["run", "--config", str(job), "--quiet"]) == 0
    t = pa.concat_tables(pq.read_table(p) for p in sorted((tmp_path / "out").glob("part-*")))
    assert t.column("annotation_flags").to_pylist() == [
        "horizon_crossing_beyond_tables", "", ""]
    cross = t.column("horizon_crossing_age_gyr").to_pylist()
    assert cross[0] is None and cross[1] > 1e100 and cross[2] > 0
