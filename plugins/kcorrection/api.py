"""A small public entry to the K-correction configuration, for other annotators.

Another annotator that needs K at many candidate redshifts (a redshift posterior's absolute
magnitudes) declares ``"bands"`` in its own ``sections`` and calls :func:`configured_bands`
with its ``Setup``: it gets the same band methods the ``kcorrection`` annotator builds from
the job's ``[bands.<band>]`` tables (same files, same checks, same errors naming the key),
without touching that annotator's internals.
"""

from __future__ import annotations

import dataclasses
from dataclasses import dataclass

import numpy as np

__all__ = ["KBand", "configured_bands"]


@dataclass(frozen=True)
class KBand:
    """One band with a K-correction method.

    :ivar name: the band name (``[bands.<name>]``).
    :ivar magnitude_column: catalogue column of its observed AB magnitude.
    :ivar colour: ``None``, or the two band names whose magnitude difference the method reads.
    :ivar colour_columns: the catalogue columns of those two bands (``None`` without colour).
    :ivar method: the method object, with ``evaluate(z, colour) -> (K, {flag: mask})``;
        z and colour are 1-D arrays of equal length (broadcast candidate redshifts yourself).
    """

    name: str
    magnitude_column: str
    colour: tuple[str, str] | None
    colour_columns: tuple[str, str] | None
    method: object

    def kcorrection(self, z: np.ndarray, colour: np.ndarray | None) -> np.ndarray:
        """K at each (z, colour) pair, any equal shapes (NaN where the method has none)."""
        z = np.asarray(z, dtype=np.float64)
        flat_c = None if colour is None else np.broadcast_to(colour, z.shape).ravel()
        k, _ = self.method.evaluate(z.ravel(), flat_c)
        return np.asarray(k, dtype=np.float64).reshape(z.shape)


def configured_bands(setup) -> list[KBand]:
    """The bands of this job that have a K-correction, as the kcorrection annotator sees them.

    ``setup.sections`` must hold ``"bands"``; returns ``[]`` when it does not. Errors are the
    kcorrection annotator's own (``ConfigError`` naming the ``[bands.<band>]`` key or file).
    The ``[annotators.kcorrection]`` options are not visible here, so tables use the default
    ``tolerance_mag``.
    """
    from . import KCorrection

    if "bands" not in setup.sections:
        return []
    own = dataclasses.replace(setup, annotator_name="kcorrection", options={},
                              sections={"bands": setup.sections["bands"]})
    inst = KCorrection.configure(own)
    if inst is None:
        return []
    by_name = {b.name: b for b in inst.bands}
    out = []
    for b in inst.bands:
        if b.method is None:
            continue
        colour = tuple(b.method.colour) if b.method.colour is not None else None
        cols = None if colour is None else (by_name[colour[0]].magnitude_column,
                                            by_name[colour[1]].magnitude_column)
        out.append(KBand(b.name, b.magnitude_column, colour, cols, b.method))
    return out
