"""The Dask engine on FITS input (chunks read on the workers) and under the output-folder lock.

Consistency checks: the Dask engine's parts are compared with the local engine's, bit for bit.
"""

from __future__ import annotations

import numpy as np
import pyarrow.parquet as pq
import pytest

distributed = pytest.importorskip("distributed")
fits = pytest.importorskip("astropy.io.fits")

from annotator.config import job_from_mapping  # noqa: E402
from annotator.engines import dask as dask_engine  # noqa: E402
from annotator.errors import OutputError  # noqa: E402
from annotator.io.lock import output_lock  # noqa: E402
from annotator.plan import build_plan  # noqa: E402
from annotator.runner import run_plan  # noqa: E402

ROWS = 2_600


@pytest.fixture(scope="module")
def cluster():
    with distributed.LocalCluster(n_workers=1, processes=True, threads_per_worker=1,
                                  dashboard_address=":0") as c:
        yield c


@pytest.fixture(scope="module")
def fits_input(tmp_path_factory):
    rng = np.random.default_rng(21)
    z = rng.uniform(0.01, 3.0, ROWS)
    z[7] = np.nan
    cols = [
        fits.Column(name="objid", format="J", bzero=2147483648,
                    array=np.arange(ROWS, dtype=np.uint32) + np.uint32(3_000_000_000)),
        fits.Column(name="ra", format="D", unit="deg", array=rng.uniform(150, 160, ROWS)),
        fits.Column(name="dec", format="D", unit="deg", array=rng.uniform(-5, 5, ROWS)),
        fits.Column(name="z", format="D", array=z),
        fits.Column(name="label", format="10A", array=np.array(["violet"] * ROWS)),
    ]
    path = tmp_path_factory.mktemp("fits") / "quillfield.fits"
    hdu = fits.BinTableHDU.from_columns(cols, name="DEEP")
    fits.HDUList([fits.PrimaryHDU(), hdu]).writeto(path)
    return path


def _plan(src, out):
    return build_plan(job_from_mapping(
        {"input": {"paths": [str(src)], "hdu": "DEEP"},
         "output": {"dir": str(out), "chunk_rows": 1000}}, base_dir=out.parent))


def test_fits_chunks_are_read_on_workers_and_match_the_local_engine(fits_input, cluster,
                                                                    tmp_path):
    local = tmp_path / "local"
    run_plan(_plan(fits_input, local), engine="local")
    plan = _plan(fits_input, tmp_path / "dask")
    work = list(dask_engine.pending_work(plan, {}))
    assert [type(w).__name__ for w in work] == ["FitsChunkTask"] * 3  # descriptors, no rows
    m = run_plan(plan, engine="dask", engine_options={"scheduler": cluster.scheduler_address})
    assert m["rows_read"] == ROWS == m["rows_written"] + m["rows_rejected"]
    for part in sorted(local.glob("part-*.parquet")):
        a, b = pq.read_table(part), pq.read_table(tmp_path / "dask" / part.name)
        assert dask_engine.first_differing_column(a, b) is None, part.name


def test_a_dask_run_is_refused_while_another_run_holds_the_folder(fits_input, cluster,
                                                                  tmp_path):
    out = tmp_path / "held"
    with output_lock(out):
        with pytest.raises(OutputError, match="another annotator run \\(PID \\d+\\)"):
            run_plan(_plan(fits_input, out), engine="dask",
                     engine_options={"scheduler": cluster.scheduler_address})
    assert [p.name for p in out.iterdir()] == [".annotator.lock"]  # nothing else touched
