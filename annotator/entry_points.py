"""Entry points and distribution versions read from the installed metadata files, without
:mod:`importlib.metadata`.

Importing :mod:`importlib.metadata` (it brings ``email``, ``csv``, ``zipfile`` and
``importlib.resources``) and parsing the METADATA files with ``email`` cost about 50 ms of
CPU, a tenth of a small run's start-up, to learn a few entry points and version numbers. This
module finds the same distributions the same way importlib.metadata's path finder does:

* ``sys.path`` in order (``""`` is the working folder), each folder's ``*.dist-info`` and
  ``*.egg-info`` entries, named by the part of the folder name before the first ``-``,
  normalised as in PEP 503 with ``_`` (``Prepared.normalize``);
* one distribution per normalised name, the first found (as ``importlib.metadata.
  entry_points()`` and ``version()`` choose);
* ``entry_points.txt`` parsed as importlib.metadata parses it (``[group]`` sections,
  ``name = value`` lines, blank and ``#`` lines skipped); ``Name`` and ``Version`` from the
  header of ``METADATA`` (``PKG-INFO`` for ``.egg-info``).

Wherever that search could differ from importlib.metadata's (an entry of ``sys.path`` that is
not a folder, such as a zip file or an ``.egg``; another import hook on ``sys.path_hooks`` or
``sys.meta_path`` that finds distributions; a metadata file this reader does not understand),
it answers with importlib.metadata itself. ``tests/core/test_entry_points.py`` compares both.
"""

from __future__ import annotations

import importlib
import os
import re
import sys
from dataclasses import dataclass


@dataclass(frozen=True)
class EntryPoint:
    """What the registry needs of an entry point (the fields of importlib.metadata's)."""

    name: str
    value: str
    group: str
    dist_name: str | None  # None: the distribution is unknown
    dist_version: str | None

    def load(self):
        """The object the entry point names (``module`` or ``module:attr.attr``)."""
        match = _VALUE.match(self.value)
        if match is None:
            raise ValueError(f"malformed entry point value {self.value!r}")
        obj = importlib.import_module(match["module"])
        for attr in filter(None, (match["attr"] or "").split(".")):
            obj = getattr(obj, attr)
        return obj


# importlib.metadata.EntryPoint.pattern
_VALUE = re.compile(r"(?P<module>[\w.]+)\s*(:\s*(?P<attr>[\w.]+)\s*)?((?P<extras>\[.*\])\s*)?$")


class _Unsupported(Exception):
    """A layout this reader leaves to importlib.metadata."""


def _normalize(name: str) -> str:
    return re.sub(r"[-_.]+", "-", name).lower().replace("-", "_")


def _plain_search() -> bool:
    """True when importlib.metadata would search only the folders of ``sys.path``."""
    from importlib.machinery import PathFinder

    for finder in sys.meta_path:
        if getattr(finder, "find_distributions", None) is not None and finder is not PathFinder:
            return False
    return True


def _distributions() -> list[tuple[str, str]]:
    """(info folder, its kind) of each distribution on ``sys.path``, first of each name."""
    if not _plain_search():
        raise _Unsupported("another finder of distributions is installed")
    seen: set[str] = set()
    found = []
    for root in sys.path:
        if not isinstance(root, str):
            raise _Unsupported(f"sys.path entry {root!r}")
        folder = root or "."
        try:
            children = os.listdir(folder)
        except FileNotFoundError:
            continue
        except NotADirectoryError as exc:  # a zip file: importlib.metadata reads inside it
            raise _Unsupported(root) from exc
        except OSError:
            continue  # unreadable: importlib.metadata skips it too
        if os.path.basename(folder).lower().endswith(".egg"):
            raise _Unsupported(root)
        by_name: dict[str, list[str]] = {}  # importlib.metadata groups a folder's by name
        for child in children:
            low = child.lower()
            if low.endswith((".dist-info", ".egg-info")):
                name = _normalize(low.rpartition(".")[0].partition("-")[0])
                by_name.setdefault(name, []).append(child)
        for name, infos in by_name.items():
            for child in infos:
                if not child.endswith((".dist-info", ".egg-info")):
                    raise _Unsupported(child)  # importlib.metadata then names it by METADATA
                if name not in seen:
                    seen.add(name)
                    found.append((os.path.join(root, child), name))
    return found


def _read(path: str) -> str | None:
    try:
        with open(path, encoding="utf-8") as f:
            return f.read()
    except (FileNotFoundError, NotADirectoryError, IsADirectoryError, PermissionError):
        return None


def _name_and_version(info: str) -> tuple[str | None, str | None]:
    """``Name`` and ``Version`` from the header of the distribution's metadata file."""
    text = _read(os.path.join(info, "METADATA" if info.endswith(".dist-info") else "PKG-INFO"))
    if text is None:
        raise _Unsupported(f"{info}: no metadata file")
    fields: dict[str, str] = {}
    for line in text.splitlines():
        if not line.strip():
            break  # the end of the header
        if line[0] in " \t":
            continue  # a continuation line (Name and Version have none)
        key, sep, value = line.partition(":")
        if not sep:
            raise _Unsupported(f"{info}: header line {line!r}")
        fields.setdefault(key.strip().lower(), value.strip())
    return fields.get("name"), fields.get("version")


def _parse_entry_points(text: str, group: str, dist: tuple) -> list[EntryPoint]:
    out = []
    section = None
    for line in map(str.strip, text.splitlines()):
        if not line or line.startswith("#"):
            continue
        if line.startswith("[") and line.endswith("]"):
            section = line.strip("[]")  # as importlib.metadata: "[ x ]" is " x ", not "x"
            continue
        if section != group:
            continue
        name, sep, value = line.partition("=")
        if not sep:
            raise _Unsupported(f"entry point line {line!r}")
        out.append(EntryPoint(name.strip(), value.strip(), group, *dist))
    return out


def _via_importlib_entry_points(group: str) -> list[EntryPoint]:
    import importlib.metadata as md

    out = []
    named: dict[int, tuple] = {}
    for ep in md.entry_points(group=group):
        if ep.dist is None:
            dist = (None, None)
        else:
            if id(ep.dist) not in named:  # each ask parses the METADATA file again
                meta = ep.dist.metadata
                named[id(ep.dist)] = (meta["Name"], meta["Version"])
            dist = named[id(ep.dist)]
        out.append(EntryPoint(ep.name, ep.value, group, *dist))
    return out


def entry_points(group: str) -> list[EntryPoint]:
    """The entry points of ``group``, in the order ``importlib.metadata.entry_points(
    group=group)`` gives them, each with its distribution's name and version."""
    try:
        out = []
        for info, _ in _distributions():
            text = _read(os.path.join(info, "entry_points.txt"))
            if text is None or group not in text:
                continue  # most distributions have none of ours: no metadata read for them
            out += _parse_entry_points(text, group, _name_and_version(info))
        return out
    except _Unsupported:
        return _via_importlib_entry_points(group)


def version(name: str) -> str | None:
    """``importlib.metadata.version(name)``, or ``None`` where it raises
    ``PackageNotFoundError``."""
    try:
        wanted = _normalize(name)
        for info, found in _distributions():
            if found == wanted:
                return _name_and_version(info)[1]
        return None
    except _Unsupported:
        import importlib.metadata as md

        try:
            return md.version(name)
        except md.PackageNotFoundError:
            return None
