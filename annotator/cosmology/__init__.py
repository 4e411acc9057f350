"""Background cosmology engine: FLRW distances, times, horizons and their inverses.

Pure numpy/scipy, no I/O.  A :class:`Cosmology` tabulates its integrals once (lazily,
on first use) and then evaluates every quantity by vectorised cubic Hermite
interpolation; DEVELOPERS.md ("The cosmology engine") documents the API and accuracy.
"""

from . import constants
from .errors import CosmologyError
from .model import DICT_KEYS, PARAMETERS, Cosmology
from .presets import PRESET_SOURCES, PRESETS, preset

__all__ = [
    "Cosmology", "CosmologyError", "preset", "PRESETS", "PRESET_SOURCES", "constants",
    "PARAMETERS", "DICT_KEYS",
]
