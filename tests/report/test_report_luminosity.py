"""The report's luminosity-function figure (annotator/report/luminosity.py), drawn from the
V_max columns of an output."""

from __future__ import annotations

import base64
import io
import re
import sys
from pathlib import Path

import numpy as np
import pyarrow.parquet as pq
import pytest

sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "kcorrection"))
import _schechter  # noqa: E402

from annotator.config import job_from_mapping  # noqa: E402
from annotator.cosmology import preset  # noqa: E402
from annotator.report import build_report  # noqa: E402
from annotator.report.data import open_output  # noqa: E402
from annotator.report.luminosity import luminosity_function, vmax_bands  # noqa: E402
from annotator.runner import run_job  # noqa: E402


@pytest.fixture(scope="module")
def lf_output(tmp_path_factory):
    base = tmp_path_factory.mktemp("lf")
    table, area, _ = _schechter.draw(preset("planck2018"), n_expected=25_000, m_lim=21.5,
                                     seed=4)
    pq.write_table(table, base / "cat.parquet")
    out = base / "out"
    job = job_from_mapping({
        "input": {"paths": [str(base / "cat.parquet")]},
        "output": {"dir": str(out), "chunk_rows": 1000},
        "bands": {"r": {"magnitude": "mag_r", "limit_mag": 21.5,
                        "kcorrection": {"method": "power_law", "alpha": -2.0}}},
        "annotators": {"kcorrection": {"area_deg2": area,
                                       "sample_redshift_range": [0.02, 0.6]}}},
        base_dir=base)
    run_job(job)
    return out


def test_luminosity_function_sums_every_row(lf_output):
    # Consistency check: the DuckDB aggregate over all parts equals numpy on the whole column
    # (phi = sum 1/V_max / dM, error sqrt(sum 1/V_max^2) / dM, Schmidt 1968).
    out = open_output(lf_output)
    assert len(out.parts) > 1 and vmax_bands(out) == ["r"]
    lf = luminosity_function(out, "r", 0.25)
    t = pq.read_table(sorted(lf_output.glob("part-*.parquet")))
    m = t.column("absolute_magnitude_r_mag").to_numpy(zero_copy_only=False).astype(float)
    v = t.column("vmax_r_mpc3").to_numpy(zero_copy_only=False).astype(float)
    ok = np.isfinite(m) & (v > 0)
    k = np.floor(m[ok] / 0.25)
    keys, inv = np.unique(k, return_inverse=True)
    np.testing.assert_allclose(lf.centres, (keys + 0.5) * 0.25)
    np.testing.assert_allclose(lf.phi, np.bincount(inv, 1 / v[ok]) / 0.25, rtol=1e-12)
    np.testing.assert_allclose(lf.error, np.sqrt(np.bincount(inv, 1 / v[ok] ** 2)) / 0.25,
                               rtol=1e-12)
    assert lf.counts.sum() == lf.objects == ok.sum()


def test_report_shows_the_figure(lf_output, tmp_path):
    from PIL import Image

    result = build_report(lf_output, tmp_path / "r.html", sample_rows=500)
    assert "luminosity-function" in result.figures
    text = (tmp_path / "r.html").read_text(encoding="utf-8")
    src = re.search(r'data-figure="luminosity-function"[^>]*src="data:image/png;base64,'
                    r'([^"]+)"', text)
    with Image.open(io.BytesIO(base64.b64decode(src.group(1)))) as im:
        grey = np.asarray(im.convert("L"), dtype=float)
    assert grey.min() < 60 and grey.std() > 10  # ink on the page
    n = open_output(lf_output)
    lf = luminosity_function(n, "r")
    assert f"⟨V/V_max⟩ = {lf.mean_v_over_vmax:.4f}" in text
    # Schmidt (1968): <V/V_max> = 1/2 within 3 / sqrt(12 N) for this uniform sample
    assert abs(lf.mean_v_over_vmax - 0.5) < 3 / np.sqrt(12 * lf.objects)
