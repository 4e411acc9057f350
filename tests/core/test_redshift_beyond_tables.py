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
