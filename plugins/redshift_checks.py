"""Flags rows whose redshift cannot be used, before any cosmology is applied."""

from __future__ import annotations

import numpy as np

from annotator import Annotator, hookimpl
from annotator.arrow_numpy import null_mask

from ._redshift import REDSHIFT_HINTS


class RedshiftChecks(Annotator):
    name = "redshift_checks"
    version = "1.1"
    documentation = "docs/output.md"
    summary = ("Flags rows with a missing, non-finite or negative (blueshifted) redshift, or one "
               "beyond the cosmology tables.")
    position = 5
    input_hints = {"redshift": REDSHIFT_HINTS}
    requires = ("redshift",)
    flags = {
        "redshift_missing": "The redshift is null.",
        "redshift_not_finite": "The redshift is NaN or infinite.",
        "redshift_negative": "The redshift is negative (a blueshift): no cosmological distance.",
        "redshift_beyond_tables": "The redshift is above the cosmology's tabulated range "
                                  "(z_max_tabulated in the manifest, about 1e10): its "
                                  "cosmological columns are null.",
    }

    def __init__(self, cosmology=None):
        self.cosmology = cosmology
        # below half the tabulated range every valid redshift is inside the tables
        self.z_safe = None if cosmology is None else 0.5 * float(cosmology.z_max_tabulated)

    @classmethod
    def configure(cls, setup):
        setup.reject_unknown_options(())
        return cls(setup.cosmology)

    def annotate(self, batch):
        arr = batch.array("redshift")
        missing = null_mask(arr)
        z = batch.values("redshift")
        batch.flag("redshift_missing", missing)
        batch.flag("redshift_not_finite", ~missing & ~np.isfinite(z))
        with np.errstate(invalid="ignore"):
            batch.flag("redshift_negative", z < 0)
            if self.cosmology is not None:
                batch.flag("redshift_beyond_tables", self._beyond_tables(z))
        return {}

    def _beyond_tables(self, z):
        """Finite redshifts the tables do not cover: exactly those near or above
        z_max_tabulated whose comoving distance comes back null (the edge itself is
        decided by the engine, not re-derived here)."""
        with np.errstate(invalid="ignore"):
            out = np.isfinite(z) & (z > self.z_safe)
        if out.any():
            out[out] = np.isnan(self.cosmology.comoving_distance_mpc(z[out]))
        return out


@hookimpl
def register_annotators():
    return [RedshiftChecks]
