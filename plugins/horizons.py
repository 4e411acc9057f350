"""Whether each object lies inside our cosmic event horizon, and when that changes."""

from __future__ import annotations

import numpy as np
import pyarrow as pa

from annotator import ColumnSpec, hookimpl
from annotator.arrow_numpy import from_numpy

from ._redshift import CosmologicalAnnotator, usable_redshift


class Horizons(CosmologicalAnnotator):
    name = "horizons"
    version = "1.1"
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
    flags = {
        "horizon_crossing_beyond_tables": "The model has an event horizon but the object "
                                          "crosses it later than the tabulated future reaches "
                                          "(very small z with w close to -1/3): the crossing "
                                          "age is null.",
    }

    def annotate(self, batch):
        z = batch.derived("redshift", usable_redshift)
        out = self.compute(z)
        if self.cosmology.event_horizon_mpc < np.inf:
            cross_null = np.isnan(out["horizon_crossing_age_gyr"])
            if cross_null.any():
                # rows inside the redshift tables (beyond them redshift_checks flags the row)
                inside = np.isfinite(self.cosmology.comoving_distance_mpc(z))
                batch.flag("horizon_crossing_beyond_tables", inside & cross_null)
        return out

    def compute(self, z):
        reachable = self.cosmology.reachable(z)
        return {
            # an Arrow array, null where z is: a numpy.ma.MaskedArray would import numpy.ma
            # (~20 ms of every run's start-up)
            "reachable": from_numpy(reachable, pa.bool_(), mask=np.isnan(z)),
            "horizon_crossing_age_gyr": self.cosmology.horizon_crossing_age_gyr(z),
            "signal_arrival_age_gyr": self.cosmology.signal_arrival_age_gyr(z),
        }


@hookimpl
def register_annotators():
    return [Horizons]
