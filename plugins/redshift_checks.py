"""Flags rows whose redshift cannot be used, before any cosmology is applied."""

from __future__ import annotations

import numpy as np

from annotator import Annotator, hookimpl

from ._redshift import REDSHIFT_HINTS


class RedshiftChecks(Annotator):
    name = "redshift_checks"
    version = "1.0"
    documentation = "docs/output.md"
    summary = "Flags rows with a missing, non-finite or negative (blueshifted) redshift."
    position = 5
    input_hints = {"redshift": REDSHIFT_HINTS}
    requires = ("redshift",)
    flags = {
        "redshift_missing": "The redshift is null.",
        "redshift_not_finite": "The redshift is NaN or infinite.",
        "redshift_negative": "The redshift is negative (a blueshift): no cosmological distance.",
    }

    def annotate(self, batch):
        arr = batch.array("redshift")
        missing = arr.is_null().to_numpy(zero_copy_only=False)
        z = batch.values("redshift")
        batch.flag("redshift_missing", missing)
        batch.flag("redshift_not_finite", ~missing & ~np.isfinite(z))
        with np.errstate(invalid="ignore"):
            batch.flag("redshift_negative", z < 0)
        return {}


@hookimpl
def register_annotators():
    return [RedshiftChecks]
