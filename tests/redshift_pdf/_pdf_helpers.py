"""Shared helpers of the redshift-posterior tests: run the real plan and pipeline on a table."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

from annotator.config import job_from_mapping
from annotator.cosmology import preset
from annotator.pipeline import Pipeline
from annotator.plan import build_plan
from annotator.registry import load_registry

PLANCK = preset("planck2018")
Z_EH = PLANCK.derived()["event_horizon_redshift"]


def annotate(tmp_path: Path, table: pa.Table, pdf: dict, extra: dict | None = None):
    """Annotate ``table`` with ``[redshift_pdf] = pdf``; returns (output table, flag counts,
    plan)."""
    src = tmp_path / "catalogue.parquet"
    pq.write_table(table, src)
    job = job_from_mapping({"input": {"paths": [src.name]}, "cosmology": {"preset": "planck2018"},
                            "redshift_pdf": pdf, **(extra or {})}, base_dir=tmp_path)
    plan = build_plan(job, load_registry())
    out, flags, _ = Pipeline.from_plan(plan).annotate(pq.read_table(src))
    return out, flags, plan


def col(table: pa.Table, name: str) -> np.ndarray:
    return np.array(table.column(name).to_pylist(), dtype=float)


def list_column(rows, typ=pa.float32()):
    return pa.array([None if r is None else list(r) for r in rows], type=pa.list_(typ))
