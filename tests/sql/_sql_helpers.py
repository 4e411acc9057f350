"""Helpers of the SQL tests: the CLI, folder checksums, a test-only magnitudes plugin."""

from __future__ import annotations

import hashlib
import importlib.util
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

from annotator import Annotator, ColumnSpec, hookimpl
from annotator.cli import main as cli_main

def _root_conftest():
    """tests/conftest.py (the shared fixtures) loaded under its own name: its
    ``make_catalogue`` is needed here at session scope."""
    path = Path(__file__).resolve().parents[1] / "conftest.py"
    spec = importlib.util.spec_from_file_location("_annotator_tests_root_conftest", path)
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


make_catalogue = _root_conftest().make_catalogue

ROWS = 5_000


def run_cli(*argv) -> int:
    return cli_main([str(a) for a in argv])


def folder_digest(folder: Path) -> dict[str, str]:
    """sha256 of every file below ``folder`` (names included), to prove nothing changed."""
    return {str(p.relative_to(folder)): hashlib.sha256(p.read_bytes()).hexdigest()
            for p in sorted(folder.rglob("*")) if p.is_file()}


def read_output(folder: Path) -> pa.Table:
    return pa.concat_tables(pq.read_table(p) for p in sorted(folder.glob("part-*.parquet")))


# ---------------------------------------------------------------- absolute magnitudes
class FlatSpectrumMagnitudes(Annotator):
    """Test-only: K and M in band r for a source with f_nu independent of frequency.

    For f_nu = constant the K-correction is K = -2.5 log10(1 + z) (Hogg et al. 2002,
    astro-ph/0210394, eq. 13 with the same band at both ends: only the bandwidth term).
    """

    name = "test_flat_spectrum_magnitudes"
    version = "test"
    summary = "test only"
    position = 60
    requires = ("redshift", "distance_modulus_mag", "magnitude_r")
    provides = (
        ColumnSpec("kcorrection_r_mag", pa.float64(), "mag", "phot.mag", "K in r (test)."),
        ColumnSpec("absolute_magnitude_r_mag", pa.float64(), "mag", "phys.magAbs",
                   "M in r (test)."),
    )
    input_hints = {"redshift": ("z",), "magnitude_r": ("mag_r",)}

    def annotate(self, batch):
        z = batch.values("redshift")
        with np.errstate(invalid="ignore", divide="ignore"):
            k = np.where(z >= 0, -2.5 * np.log10(1 + z), np.nan)
        m = batch.values("magnitude_r")
        return {"kcorrection_r_mag": k,
                "absolute_magnitude_r_mag": m - batch.values("distance_modulus_mag") - k}


class MagnitudesTestPlugin:
    @hookimpl
    def register_annotators(self):
        return [FlatSpectrumMagnitudes]
