"""Lookback time and the age of the universe when the light left each object."""

from __future__ import annotations

import pyarrow as pa

from annotator import ColumnSpec, hookimpl

from ._redshift import CosmologicalAnnotator


class Times(CosmologicalAnnotator):
    name = "times"
    version = "1.1"
    summary = "Lookback time and age of the universe at emission."
    position = 20
    provides = (
        ColumnSpec("lookback_time_gyr", pa.float64(), "Gyr", "time.age;phys.cosmology",
                   "Time since the light we see left the object (lookback time)."),
        ColumnSpec("age_at_emission_gyr", pa.float64(), "Gyr", "time.age",
                   "Age of the universe when the light we see left the object."),
    )

    def compute(self, z):
        # The age comes from its own table: age today minus the lookback time cancels at
        # high z (5 % wrong at z = 1e9, where the age is 1e-13 of today's).
        return {
            "lookback_time_gyr": self.cosmology.lookback_time_gyr(z),
            "age_at_emission_gyr": self.cosmology.age_at_emission_gyr(z),
        }


@hookimpl
def register_annotators():
    return [Times]
