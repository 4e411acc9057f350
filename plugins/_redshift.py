"""Helpers the built-in cosmological annotators share (not a plugin itself)."""

from __future__ import annotations

import numpy as np

REDSHIFT_HINTS = ("z", "redshift", "zspec", "z_spec", "zphot", "z_phot", "z_best", "zbest",
                  "z_cmb", "zcmb")


def usable_redshift(z: np.ndarray) -> np.ndarray:
    """Redshifts the cosmology can take (finite, >= 0), NaN elsewhere."""
    with np.errstate(invalid="ignore"):
        ok = np.isfinite(z) & (z >= 0)
    return np.where(ok, z, np.nan)
