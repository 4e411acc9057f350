"""Helpers for the K-correction tests: invented analytic filters and SEDs written to files, and
short ways to configure the plugin and run it on a table (fixtures are in conftest.py)."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

from annotator.api import Setup
from annotator.config import job_from_mapping
from annotator.cosmology import preset
from annotator.pipeline import Pipeline
from annotator.plan import build_plan
from annotator_plugins.kcorrection import KCorrection

# ---------------------------------------------------------------- analytic curves (invented)


def band_response(lam, centre: float, width: float, edge: float = 60.0):
    """A smooth top-hat with logistic edges: an invented filter, not any instrument's."""
    lam = np.asarray(lam, dtype=np.float64)
    rise = 1.0 / (1.0 + np.exp(-(lam - (centre - width / 2)) / edge))
    fall = 1.0 / (1.0 + np.exp((lam - (centre + width / 2)) / edge))
    return 0.9 * rise * fall


def filter_table(centre: float, width: float, edge: float = 60.0, step: float = 2.0):
    lo = centre - width / 2 - 12 * edge
    hi = centre + width / 2 + 12 * edge
    lam = np.arange(lo, hi + step / 2, step)
    resp = band_response(lam, centre, width, edge)
    resp[0] = resp[-1] = 0.0
    return lam, resp


def early_sed(lam):
    """An invented red spectrum: a smooth break at 4000 A on a declining continuum."""
    lam = np.asarray(lam, dtype=np.float64)
    step = 1.0 / (1.0 + np.exp(-(lam - 4000.0) / 80.0))
    return (lam / 5000.0) ** -1.2 * (0.25 + step) * 1e-17


def young_sed(lam):
    """An invented blue spectrum: a steep continuum with one emission line at 6563 A."""
    lam = np.asarray(lam, dtype=np.float64)
    line = 0.6 * np.exp(-0.5 * ((lam - 6563.0) / 30.0) ** 2)
    return ((lam / 5000.0) ** -2.4 + line) * 1e-17


def sed_table(func, lo: float = 900.0, hi: float = 25000.0, n: int = 6000):
    lam = np.geomspace(lo, hi, n)
    return lam, func(lam)


def write_curve(path: Path, wave, value, header: str = "wavelength_angstrom,value") -> Path:
    path.parent.mkdir(parents=True, exist_ok=True)
    lines = [header] + [f"{w:.6f},{v:.10e}" for w, v in zip(wave, value)]
    path.write_text("\n".join(lines) + "\n")
    return path


FILTERS = {  # invented bands: centre, width (Angstrom)
    "blue": (4700.0, 1300.0),
    "red": (6200.0, 1400.0),
    "deep": (7600.0, 1500.0),
}


def write_curves(folder: Path) -> dict[str, Path]:
    """Invented filter and SED files in folder/filters and folder/seds."""
    out = {}
    for name, (c, w) in FILTERS.items():
        out[name] = write_curve(folder / "filters" / f"{name}.csv", *filter_table(c, w))
    out["early"] = write_curve(folder / "seds" / "early.csv", *sed_table(early_sed),
                               header="wavelength_angstrom,flambda")
    out["young"] = write_curve(folder / "seds" / "young.csv", *sed_table(young_sed),
                               header="wavelength_angstrom,flambda")
    return out


# ----------------------------------------------------------------------- plugin helpers

def catalogue_schema() -> pa.Schema:
    return pa.schema([("z", pa.float64()), ("z_err", pa.float64()), ("mag_b", pa.float64()),
                      ("mag_r", pa.float64()), ("mag_d", pa.float64()),
                      ("err_b", pa.float64()), ("err_r", pa.float64())])


def configure(tmp_path: Path, bands: dict, options: dict | None = None,
              schema: pa.Schema | None = None) -> KCorrection:
    """KCorrection.configure on a Setup like the planner's (paths relative to tmp_path)."""
    setup = Setup(annotator_name="kcorrection", options=dict(options or {}),
                  sections={"bands": bands}, columns={},
                  catalogue_schema=schema or catalogue_schema(),
                  cosmology=preset("planck2018"), base_dir=tmp_path)
    return KCorrection.configure(setup)


def run_pipeline(tmp_path: Path, table: pa.Table, bands: dict, **extra) -> tuple:
    """Plan a job with these bands on ``table`` and annotate it once: (output, flag counts)."""
    path = tmp_path / "catalogue.parquet"
    pq.write_table(table, path)
    mapping = {"input": {"paths": [str(path)]}, "output": {"dir": str(tmp_path / "out")},
               "bands": bands, **extra}
    job = job_from_mapping(mapping, base_dir=tmp_path)
    plan = build_plan(job)
    out, counts, _ = Pipeline.from_plan(plan).annotate(table)
    return out, counts


def column(table: pa.Table, name: str) -> np.ndarray:
    return table.column(name).to_numpy(zero_copy_only=False).astype(np.float64)
