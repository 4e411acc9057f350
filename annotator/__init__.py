"""annotator: enrich survey catalogues with quantities of one stated cosmology.

The plugin API is re-exported here: ``hookimpl``, :class:`Annotator`, :class:`ColumnSpec`.
They are imported on first use (PEP 562), so that importing the package alone imports no
numpy: the command line (``annotator.cli``) sets its environment defaults for numpy's BLAS
before numpy loads.
"""

__version__ = "0.1.0"

_EXPORTS = {"Annotator": "api", "Batch": "api", "Setup": "api", "ColumnSpec": "columns",
            "hookimpl": "hookspecs"}

__all__ = ["Annotator", "Batch", "ColumnSpec", "Setup", "hookimpl", "__version__"]


def __getattr__(name):
    if name in _EXPORTS:
        import importlib

        value = getattr(importlib.import_module(f".{_EXPORTS[name]}", __name__), name)
        globals()[name] = value  # asked once
        return value
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")


def __dir__():
    return sorted(set(globals()) | set(_EXPORTS))
