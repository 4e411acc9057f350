"""Invented catalogues for tests, importable by any test module as ``catalogue_factory``.

(Test folders have their own conftest.py files, so ``from conftest import ...`` would be
ambiguous; this module has a unique name.)
"""

from __future__ import annotations

import numpy as np
import pyarrow as pa

SMALL_ROWS = 5_000


def make_catalogue(n: int = SMALL_ROWS, seed: int = 7) -> pa.Table:
    """An invented catalogue: ids, positions, redshifts with errors, two magnitudes.

    Rows 0-2 have a missing redshift, rows 3-4 a small negative (blueshifted) one.
    """
    rng = np.random.default_rng(seed)
    z = rng.uniform(0.01, 3.0, n)
    z_err = 0.01 * (1 + z)
    z[3:5] = [-0.0004, -0.001]
    z_col = pa.array(np.where(np.arange(n) < 3, np.nan, z), from_pandas=True)  # nulls
    return pa.table({
        "objid": pa.array(np.arange(n, dtype=np.int64) + 1_000_000),
        "ra": rng.uniform(150.0, 160.0, n),
        "dec": rng.uniform(-5.0, 5.0, n),
        "z": z_col,
        "z_err": z_err,
        "mag_g": rng.normal(22.0, 1.0, n),
        "mag_r": rng.normal(21.0, 1.0, n),
        "magerr_r": np.full(n, 0.05),
    })
