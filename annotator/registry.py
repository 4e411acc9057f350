"""The plugin manager: entry-point discovery, validation, the catalogue of annotators.

Built-in annotators live in ``plugins/`` (installed as ``annotator_plugins``) and are found
through the same ``annotator`` entry-point group as any third-party package. Set
``ANNOTATOR_BUILTINS_ONLY=1`` to load only the built-ins.
"""

from __future__ import annotations

import os
from dataclasses import dataclass

import pluggy

from . import hookspecs
from .entry_points import entry_points
from .api import Annotator
from .errors import PluginError

ENTRY_POINT_GROUP = "annotator"
BUILTIN_DISTRIBUTION = "annotator"
AUTOLOAD_ENV = "ANNOTATOR_BUILTINS_ONLY"


@dataclass(frozen=True)
class RegisteredAnnotator:
    """An annotator class and where it came from."""

    cls: type[Annotator]
    plugin: str  # entry-point or registration name
    distribution: str  # "annotator (built-in)", "my-package 1.2", or "registered in code"


def load_registry(*, extra_plugins=(), autoload: bool | None = None) -> pluggy.PluginManager:
    """A fresh plugin manager with the hook specs, the entry points and ``extra_plugins``.

    :param extra_plugins: modules or objects to register directly (tests, embedding).
    :param autoload: load third-party entry points; default: unless the env switch is set.
    """
    pm = pluggy.PluginManager("annotator")
    pm.add_hookspecs(hookspecs)
    origins: dict[str, str] = {}
    pm.annotator_origins = origins  # plugin name -> "distribution version", for listings
    if autoload is None:
        autoload = os.environ.get(AUTOLOAD_ENV, "") in ("", "0")
    # read from the metadata files without importlib.metadata (its import is ~40 ms of every
    # run's start-up): annotator/entry_points.py, the same entry points in the same order
    for ep in entry_points(ENTRY_POINT_GROUP):
        dist, dist_version = ep.dist_name or "", ep.dist_version or ""
        if not autoload and dist != BUILTIN_DISTRIBUTION:
            continue
        if pm.get_plugin(ep.name) is not None:
            continue
        try:
            plugin = ep.load()
        except Exception as exc:  # a broken third-party plugin must say who it is
            raise PluginError(
                f"plugin {ep.name!r} ({ep.value}, from {dist or 'unknown distribution'}) "
                f"failed to load: {exc}"
            ) from exc
        pm.register(plugin, name=ep.name)
        origins[ep.name] = f"{dist} {dist_version}" if ep.dist_name is not None else "unknown"

    for plugin in extra_plugins:
        pm.register(plugin)
    try:
        pm.check_pending()
    except pluggy.PluginValidationError as exc:
        raise PluginError(f"a plugin implements a hook that does not exist: {exc}") from exc
    return pm


def plugin_origin(pm: pluggy.PluginManager, plugin_name: str) -> str:
    origins = getattr(pm, "annotator_origins", {})
    if plugin_name in origins:
        dist = origins[plugin_name]
        if dist.split(" ")[0] == BUILTIN_DISTRIBUTION:
            return f"{dist} (built-in)"
        return dist
    return "registered in code"


def collect_annotators(pm: pluggy.PluginManager) -> dict[str, RegisteredAnnotator]:
    """All annotator classes by name; duplicates and non-annotators are refused."""
    found: dict[str, RegisteredAnnotator] = {}
    for impl in pm.hook.register_annotators.get_hookimpls():
        plugin_name = pm.get_name(impl.plugin) or repr(impl.plugin)
        result = impl.function() or []
        for cls in result:
            if not (isinstance(cls, type) and issubclass(cls, Annotator)):
                raise PluginError(
                    f"plugin {plugin_name!r} registered {cls!r}, which is not an Annotator subclass"
                )
            if not cls.name:
                raise PluginError(f"plugin {plugin_name!r}: annotator {cls.__qualname__} has no name")
            if cls.name in found:
                other = found[cls.name]
                raise PluginError(
                    f"annotator name {cls.name!r} is registered twice: by plugin {other.plugin!r} "
                    f"({other.cls.origin()}) and by plugin {plugin_name!r} ({cls.origin()})"
                )
            found[cls.name] = RegisteredAnnotator(cls, plugin_name, plugin_origin(pm, plugin_name))
    return found
