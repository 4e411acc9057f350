"""Fixtures of the K-correction tests."""

from __future__ import annotations

import pytest

from _kcorr_helpers import write_curves


@pytest.fixture
def curves(tmp_path):
    """Invented filter and SED files in tmp_path/filters and tmp_path/seds."""
    return write_curves(tmp_path)
