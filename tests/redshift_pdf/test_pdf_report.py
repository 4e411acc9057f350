"""The report's posterior section: the probability histogram counts every row, the example
posteriors are drawn from the recorded grid (counts against pyarrow/numpy, common practice)."""

from __future__ import annotations

import json
import re

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
from _pdf_helpers import Z_EH, list_column
from scipy.stats import norm

from annotator.cli import main

pytest.importorskip("matplotlib")


def test_report_shows_the_probability_distribution_and_example_posteriors(tmp_path):
    grid = np.linspace(0.0, 4.0, 161)
    rng = np.random.default_rng(4)
    centres = rng.uniform(0.5, 3.0, 300)
    dens = norm.pdf(grid, centres[:, None], 0.1 * (1 + centres[:, None]))
    dens[:40] += 0.4 * norm.pdf(grid, 2.5, 0.15)  # secondary peaks beyond the horizon
    dens[7] = -1.0  # set aside
    pq.write_table(pa.table({"z": centres, "pz": list_column(dens)}), tmp_path / "c.parquet")
    (tmp_path / "job.toml").write_text(
        '[input]\npaths = ["c.parquet"]\n[output]\ndir = "out"\n[columns]\nredshift = "z"\n'
        '[redshift_pdf]\nkind = "gridded"\ncolumn = "pz"\n'
        'grid = { start = 0.0, stop = 4.0, count = 161 }\n')
    assert main(["run", "--config", str(tmp_path / "job.toml"), "--quiet"]) == 0
    manifest = json.loads((tmp_path / "out" / "manifest.json").read_text())
    record = [r for r in manifest["annotators"] if r["name"] == "redshift_pdf"][0]
    assert record["settings"]["kind"] == "gridded" and len(record["settings"]["grid"]) == 161
    assert main(["report", str(tmp_path / "out"), "--to", str(tmp_path / "r.html")]) == 0
    html = (tmp_path / "r.html").read_text()
    assert 'data-figure="reachability-probability"' in html
    assert 'data-figure="example-posteriors"' in html
    p = pq.read_table(next((tmp_path / "out").glob("part-*.parquet"))).column(
        "reachable_probability").to_numpy(zero_copy_only=False)
    undecided = int(((p > 0.05) & (p < 0.95)).sum())
    text = re.sub(r"<[^>]+>", "", html)
    assert f"{int(np.isfinite(p).sum()):,} of 300; null for 1" in text
    assert f"{undecided:,} objects are undecided" in text
    assert f"z_EH = {Z_EH:.4f}" in text
