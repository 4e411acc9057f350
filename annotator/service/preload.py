"""Imported by the workers' fork server only: what every job needs, loaded once.

Each worker process is forked from the fork server, so what is imported here is already in
memory when a job starts: numpy, pyarrow, the engine, and the annotator plugins, found through
their entry points exactly as a worker finds them (so a job starts in milliseconds, not the
second a fresh interpreter spends on imports). The plugin manager is built here too, once,
and each worker uses its own copy. A plugin that fails to import is skipped here, and the
worker then builds its own plugin manager, which reports the plugin by name.
"""

from __future__ import annotations

import importlib
import importlib.metadata
import os

CORE_MODULES = ("numpy", "pandas", "scipy", "duckdb", "pyarrow.parquet", "pyarrow.csv",
                "pyarrow.compute", "importlib.metadata", "email.parser",
                "annotator.runner", "annotator.engines.local", "annotator.plan",
                "annotator.pipeline", "annotator.provenance", "annotator.registry",
                "annotator.cosmology", "annotator.service.workers")


def warm() -> list[str]:
    """Import the core modules and every plugin module; return those that failed."""
    from annotator.registry import AUTOLOAD_ENV, BUILTIN_DISTRIBUTION, ENTRY_POINT_GROUP

    failed = []
    for name in CORE_MODULES:
        try:
            importlib.import_module(name)
        except Exception:
            failed.append(name)
    autoload = os.environ.get(AUTOLOAD_ENV, "") in ("", "0")
    for ep in importlib.metadata.entry_points(group=ENTRY_POINT_GROUP):
        dist = ep.dist.name if ep.dist is not None else ""
        if not autoload and dist != BUILTIN_DISTRIBUTION:
            continue
        try:
            importlib.import_module(ep.module)
        except Exception:  # the worker reports it, naming the plugin
            failed.append(ep.module)
    if not failed:
        global plugin_manager
        from annotator.registry import load_registry

        plugin_manager = load_registry()
    return failed


#: built by :func:`warm` in the fork server; None when a plugin failed to import
plugin_manager = None

try:
    warm()
except Exception:  # never take the fork server down
    pass
