"""Whether each object lies inside our cosmic event horizon, and when that changes."""

from __future__ import annotations

import numpy as np
import pyarrow as pa

from annotator import ColumnSpec, hookimpl

from ._redshift import CosmologicalAnnotator


class Horizons(CosmologicalAnnotator):
    name = "horizons"
    version = "1.0"
    summary = "Reachability (inside our event horizon today), horizon-crossing age, " \
              "arrival age of a signal sent today."
    position = 40
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

    def compute(self, z):
        reachable = self.cosmology.reachable(z)
        return {
            "reachable": np.ma.MaskedArray(reachable, mask=np.isnan(z)),
            "horizon_crossing_age_gyr": self.cosmology.horizon_crossing_age_gyr(z),
            "signal_arrival_age_gyr": self.cosmology.signal_arrival_age_gyr(z),
        }


@hookimpl
def register_annotators():
    return [Horizons]
