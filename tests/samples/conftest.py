"""Fixtures for the sample-catalogue tests: the generator module and one shared model."""

from __future__ import annotations

import sys
from pathlib import Path

import pytest

REPO = Path(__file__).resolve().parents[2]
if str(REPO) not in sys.path:  # sample_catalogues/ is not installed; import it from the checkout
    sys.path.insert(0, str(REPO))

SAMPLES = REPO / "sample_catalogues"


@pytest.fixture(scope="session")
def survey_model():
    from sample_catalogues.generate import SurveyModel

    return SurveyModel("planck2018")
