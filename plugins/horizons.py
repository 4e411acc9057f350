"""Whether each object lies inside our cosmic event horizon, and when that changes."""

from __future__ import annotations

import numpy as np
import pyarrow as pa

from annotator import Annotator, ColumnSpec, hookimpl

from ._redshift import REDSHIFT_HINTS, usable_redshift


class Horizons(Annotator):
    name = "horizons"
    version = "1.0"
    summary = "Reachability (inside our event horizon today), horizon-crossing age, " \
              "arrival age of a signal sent today."
    position = 40
    input_hints = {"redshift": REDSHIFT_HINTS}
    requires = ("redshift",)
    provides = (
        ColumnSpec("reachable", pa.bool_(), None, "meta.code;phys.cosmology",
                   "True if the object lies inside our cosmic event horizon today: a signal sent "
                   "now would reach it, and light it emits now will reach us."),
        ColumnSpec("horizon_crossing_age_gyr", pa.float64(), "Gyr", "time.epoch;phys.cosmology",
                   "Cosmic age at which the object crosses our event horizon (in the past for "
                   "unreachable objects, in the future for reachable ones); null if the model "
                   "has no event horizon."),
        ColumnSpec("signal_arrival_age_gyr", pa.float64(), "Gyr", "time.epoch;phys.cosmology",
                   "Cosmic age at which a light signal sent from us today would reach the "
                   "object; null when unreachable."),
    )

    def __init__(self, cosmology=None):
        self.cosmology = cosmology

    @classmethod
    def configure(cls, setup):
        setup.reject_unknown_options(())
        return cls(setup.cosmology)

    def annotate(self, batch):
        z = usable_redshift(batch.values("redshift"))
        reachable = self.cosmology.reachable(z)
        return {
            "reachable": np.ma.MaskedArray(reachable, mask=np.isnan(z)),
            "horizon_crossing_age_gyr": self.cosmology.horizon_crossing_age_gyr(z),
            "signal_arrival_age_gyr": self.cosmology.signal_arrival_age_gyr(z),
        }


@hookimpl
def register_annotators():
    return [Horizons]
