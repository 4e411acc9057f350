"""Shared fixtures: small invented catalogues written on the fly (exact, named row counts)."""

from __future__ import annotations

import pyarrow as pa
import pyarrow.parquet as pq
import pytest
from catalogue_factory import SMALL_ROWS, make_catalogue  # noqa: F401


@pytest.fixture
def catalogue_table() -> pa.Table:
    return make_catalogue()


@pytest.fixture
def catalogue_parquet(tmp_path, catalogue_table):
    path = tmp_path / "catalogue.parquet"
    pq.write_table(catalogue_table, path, row_group_size=1_500)
    return path


@pytest.fixture
def catalogue_csv(tmp_path, catalogue_table):
    path = tmp_path / "catalogue.csv"
    catalogue_table.to_pandas().to_csv(path, index=False)
    return path
