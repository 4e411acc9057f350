"""The one exception type of the cosmology engine."""

from __future__ import annotations


class CosmologyError(ValueError):
    """Invalid cosmological parameters, an unknown preset, or an unsupported model.

    ``parameter`` names the offending parameter (or ``None`` when the model as a
    whole is refused, e.g. because it recollapses).
    """

    def __init__(self, message: str, parameter: str | None = None):
        super().__init__(message)
        self.parameter = parameter
