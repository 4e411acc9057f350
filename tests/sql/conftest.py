"""Annotated outputs made once per test session by the real command line (`annotator run`)."""

from __future__ import annotations

import contextlib
import io
from functools import cached_property

import pyarrow.parquet as pq
import pytest
from _sql_helpers import MagnitudesTestPlugin, make_catalogue
from _sql_helpers import run_cli as _run_cli

ROWS = 5_000


def run_cli(*argv) -> int:
    """Make an output quietly: an output made lazily inside a test must not add its
    printed folder to what that test captures from stdout."""
    with contextlib.redirect_stdout(io.StringIO()):
        return _run_cli(*argv)


class Outputs:
    """Annotated outputs, each made on first use: ``main`` (planck2018, Parquet, 3 parts),
    ``csv`` (a CSV with two rows set aside) and ``eds`` (an Einstein-de Sitter universe, flat
    and matter only, with closed-form distances)."""

    def __init__(self, base):
        self.base = base
        self.catalogue = base / "catalogue.parquet"
        pq.write_table(make_catalogue(ROWS), self.catalogue, row_group_size=1_500)
        self.main = base / "out_planck"
        assert run_cli("run", self.catalogue, "--out", self.main, "--chunk-rows", 2_000,
                       "--quiet") == 0

    @cached_property
    def csv(self):
        csv = self.base / "catalogue.csv"
        lines = ["objid,z,mag_r"] + [f"{i},{0.02 + i * 4e-4},{19 + i * 1e-3}"
                                     for i in range(3000)]
        lines.insert(10, "bad,line")
        lines.insert(20, "77,notanumber,20.0")
        csv.write_text("\n".join(lines) + "\n")
        out = self.base / "out_csv"
        assert run_cli("run", csv, "--out", out, "--chunk-rows", 1_000, "--quiet") == 0
        return out

    @cached_property
    def eds(self):
        job = self.base / "eds.toml"
        job.write_text('[cosmology]\nname = "einstein-de-sitter"\nh0 = 70.0\nomega_m = 1.0\n'
                       't_cmb = 0.0\n')
        out = self.base / "out_eds"
        assert run_cli("run", self.catalogue, "--out", out, "--config", job, "--quiet") == 0
        return out


@pytest.fixture(scope="session")
def outputs(tmp_path_factory):
    return Outputs(tmp_path_factory.mktemp("sql"))


@pytest.fixture(scope="session")
def output_with_magnitudes(outputs):
    from annotator.config import load_job
    from annotator.registry import load_registry
    from annotator.runner import run_job

    pm = load_registry(extra_plugins=[MagnitudesTestPlugin()])
    out = outputs.base / "out_mags"
    job = load_job(None, inputs=[str(outputs.catalogue)], output_dir=str(out), chunk_rows=2_500)
    run_job(job, pm=pm)
    return out
