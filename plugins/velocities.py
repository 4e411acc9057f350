"""Recession velocities (Davis & Lineweaver 2004, PASA 21, 97): v = H D_proper."""

from __future__ import annotations

import pyarrow as pa

from annotator import ColumnSpec, hookimpl

from ._redshift import CosmologicalAnnotator


class Velocities(CosmologicalAnnotator):
    name = "velocities"
    version = "1.0"
    summary = "Recession velocity now and at emission, in units of c."
    position = 30
    provides = (
        ColumnSpec("recession_velocity_now_c", pa.float64(), "c", "phys.veloc;phys.cosmology",
                   "Recession velocity today, H0 times the proper distance today, in units of c."),
        ColumnSpec("recession_velocity_at_emission_c", pa.float64(), "c",
                   "phys.veloc;phys.cosmology",
                   "Recession velocity when the light left, H(z) times the proper distance "
                   "then, in units of c."),
    )

    def compute(self, z):
        return {
            "recession_velocity_now_c": self.cosmology.recession_velocity_now_c(z),
            "recession_velocity_at_emission_c":
                self.cosmology.recession_velocity_at_emission_c(z),
        }


@hookimpl
def register_annotators():
    return [Velocities]
