"""Lookback time and the age of the universe when the light left each object."""

from __future__ import annotations

import pyarrow as pa

from annotator import ColumnSpec, hookimpl

from ._redshift import CosmologicalAnnotator


class Times(CosmologicalAnnotator):
    name = "times"
    version = "1.0"
    summary = "Lookback time and age of the universe at emission."
    position = 20
    provides = (
        ColumnSpec("lookback_time_gyr", pa.float64(), "Gyr", "time.age;phys.cosmology",
                   "Time since the light we see left the object (lookback time)."),
        ColumnSpec("age_at_emission_gyr", pa.float64(), "Gyr", "time.age",
                   "Age of the universe when the light we see left the object."),
    )

    def compute(self, z):
        lookback = self.cosmology.lookback_time_gyr(z)
        return {
            "lookback_time_gyr": lookback,
            "age_at_emission_gyr": self.cosmology.age_today_gyr - lookback,
        }


@hookimpl
def register_annotators():
    return [Times]
