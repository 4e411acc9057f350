"""annotator.entry_points: the entry points and versions importlib.metadata would give, read
without importing it (a tenth of a small run's start-up).

Outside reference: ``importlib.metadata`` itself (the standard library's implementation of
the packaging specifications for installed distributions' metadata), asked in the same
interpreter with the same ``sys.path``.
"""

from __future__ import annotations

import importlib.metadata as md
import sys

import pytest

from annotator import entry_points as ours


def _reference(group: str) -> list[tuple]:
    out = []
    for ep in md.entry_points(group=group):
        meta = ep.dist.metadata
        out.append((ep.name, ep.value, meta["Name"], meta["Version"]))
    return out


def _ours(group: str) -> list[tuple]:
    return [(ep.name, ep.value, ep.dist_name, ep.dist_version)
            for ep in ours.entry_points(group)]


@pytest.mark.parametrize("group", ["annotator", "console_scripts", "pytest11", "no_such_group"])
def test_the_installed_environment(group):
    assert _ours(group) == _reference(group)


def test_tool_versions_are_importlib_metadatas():
    for name in ("numpy", "scipy", "pyarrow", "pandas", "pluggy", "duckdb", "annotator",
                 "Annotator", "no-such-distribution-xyz"):
        try:
            expected = md.version(name)
        except md.PackageNotFoundError:
            expected = None
        assert ours.version(name) == expected, name


def _dist(site, folder, name, version, eps=None, metadata="METADATA"):
    info = site / folder
    info.mkdir(parents=True)
    (info / metadata).write_text(f"Metadata-Version: 2.1\nName: {name}\nVersion: {version}\n"
                                 "Summary: a line\n  continued\n\nName: not-this\n")
    if eps is not None:
        (info / "entry_points.txt").write_text(eps)


def test_shadowing_order_comments_and_egg_info(tmp_path, monkeypatch):
    """The first distribution of a name on sys.path wins (as pip's user site over the
    system's); names normalised (``My.Plugin`` = ``my_plugin``); ``.egg-info`` read from
    PKG-INFO; comments, blank lines and other groups skipped."""
    first, second = tmp_path / "first", tmp_path / "second"
    _dist(first, "My.Plugin-2.0.dist-info", "My.Plugin", "2.0",
          "# a comment\n[console_scripts]\nx = y:z\n\n[annotator]\n  b = pkg_b : obj.attr \n"
          "a = pkg_a\n")
    _dist(second, "my_plugin-1.0.dist-info", "my_plugin", "1.0", "[annotator]\nold = old_mod\n")
    _dist(second, "other.egg-info", "other", "0.3", "[ annotator ]\nc = pkg_c [extra]\n",
          metadata="PKG-INFO")
    _dist(second, "no_eps-1.dist-info", "no-eps", "1")
    (second / "not-a-folder.txt").write_text("x")
    monkeypatch.setattr(sys, "path", [str(first), str(tmp_path / "missing"), str(second),
                                      *sys.path])
    md.FastPath.__new__.cache_clear()  # importlib.metadata caches folder listings
    got = _ours("annotator")
    assert got == _reference("annotator")
    assert ("b", "pkg_b : obj.attr", "My.Plugin", "2.0") in got
    assert not any(name == "old" for name, *_ in got)
    assert ours.version("my-plugin") == md.version("my-plugin") == "2.0"
    assert ours.version("other") == "0.3"


def test_load_follows_the_attribute_path(tmp_path, monkeypatch):
    (tmp_path / "ep_target_mod.py").write_text("class A:\n    class B:\n        x = 1\n")
    monkeypatch.syspath_prepend(str(tmp_path))
    ep = ours.EntryPoint("n", "ep_target_mod:A.B", "annotator", None, None)
    assert ep.load().x == 1
    assert ours.EntryPoint("n", "ep_target_mod", "g", None, None).load().__name__ == \
        "ep_target_mod"
    with pytest.raises(ValueError, match="malformed"):
        ours.EntryPoint("n", "not a value!", "g", None, None).load()


def test_a_zip_on_sys_path_is_left_to_importlib_metadata(tmp_path, monkeypatch):
    import zipfile

    archive = tmp_path / "plugins.zip"
    with zipfile.ZipFile(archive, "w") as z:
        z.writestr("zipped-1.0.dist-info/METADATA", "Name: zipped\nVersion: 1.0\n")
        z.writestr("zipped-1.0.dist-info/entry_points.txt", "[annotator]\nz = zipped_mod\n")
    monkeypatch.setattr(sys, "path", [str(archive), *sys.path])
    md.FastPath.__new__.cache_clear()
    got = _ours("annotator")
    assert got == _reference("annotator")
    assert ("z", "zipped_mod", "zipped", "1.0") in got
    assert ours.version("zipped") == "1.0"
