"""Fixtures for the cosmology engine tests."""

from __future__ import annotations

import os
import sys

import pytest

_HERE = os.path.dirname(os.path.abspath(__file__))
if _HERE not in sys.path:
    sys.path.insert(0, _HERE)  # for _cosmo_reference and _cosmo_models

from _cosmo_models import MODELS, built  # noqa: E402


@pytest.fixture(params=sorted(MODELS))
def model(request):
    return built(request.param)
