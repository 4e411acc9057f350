"""Recession velocities (Davis & Lineweaver 2004, PASA 21, 97): v = H D_proper."""

from __future__ import annotations

import pyarrow as pa

from annotator import Annotator, ColumnSpec, hookimpl

from ._redshift import REDSHIFT_HINTS, usable_redshift


class Velocities(Annotator):
    name = "velocities"
    version = "1.0"
    summary = "Recession velocity now and at emission, in units of c."
    position = 30
    input_hints = {"redshift": REDSHIFT_HINTS}
    requires = ("redshift",)
    provides = (
        ColumnSpec("recession_velocity_now_c", pa.float64(), "c", "phys.veloc;phys.cosmology",
                   "Recession velocity today, H0 times the proper distance today, in units of c."),
        ColumnSpec("recession_velocity_at_emission_c", pa.float64(), "c",
                   "phys.veloc;phys.cosmology",
                   "Recession velocity when the light left, H(z) times the proper distance "
                   "then, in units of c."),
    )

    def __init__(self, cosmology=None):
        self.cosmology = cosmology

    @classmethod
    def configure(cls, setup):
        setup.reject_unknown_options(())
        return cls(setup.cosmology)

    def annotate(self, batch):
        z = usable_redshift(batch.values("redshift"))
        return {
            "recession_velocity_now_c": self.cosmology.recession_velocity_now_c(z),
            "recession_velocity_at_emission_c":
                self.cosmology.recession_velocity_at_emission_c(z),
        }


@hookimpl
def register_annotators():
    return [Velocities]
