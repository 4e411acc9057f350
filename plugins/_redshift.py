"""Helpers the built-in cosmological annotators share (not a plugin itself)."""

from __future__ import annotations

import numpy as np

from annotator import Annotator

REDSHIFT_HINTS = ("z", "redshift", "zspec", "z_spec", "zphot", "z_phot", "z_best", "zbest",
                  "z_cmb", "zcmb")


def usable_redshift(z: np.ndarray) -> np.ndarray:
    """Redshifts the cosmology can take (finite, >= 0), NaN elsewhere."""
    with np.errstate(invalid="ignore"):
        ok = np.isfinite(z) & (z >= 0)
    return np.where(ok, z, np.nan)


class CosmologicalAnnotator(Annotator):
    """Shape shared by the built-ins that evaluate the job's cosmology at each redshift.

    Subclasses set ``name``, ``version``, ``summary``, ``position``, ``provides`` and implement
    :meth:`compute` on the usable redshifts (NaN where the row's redshift cannot be used).
    """

    input_hints = {"redshift": REDSHIFT_HINTS}
    requires = ("redshift",)

    def __init__(self, cosmology=None):
        self.cosmology = cosmology

    @classmethod
    def configure(cls, setup):
        setup.reject_unknown_options(())
        return cls(setup.cosmology)

    def annotate(self, batch):
        return self.compute(batch.derived("redshift", usable_redshift))

    def compute(self, z: np.ndarray) -> dict:
        raise NotImplementedError
