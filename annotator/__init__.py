"""annotator: enrich survey catalogues with quantities of one stated cosmology.

The plugin API is re-exported here: ``hookimpl``, :class:`Annotator`, :class:`ColumnSpec`.
"""

__version__ = "0.1.0"

from .api import Annotator, Batch, Setup  # noqa: E402
from .columns import ColumnSpec  # noqa: E402
from .hookspecs import hookimpl  # noqa: E402

__all__ = ["Annotator", "Batch", "ColumnSpec", "Setup", "hookimpl", "__version__"]
