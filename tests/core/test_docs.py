"""The contributor guide's complete plugin example must keep working."""

from __future__ import annotations

import re
import subprocess
import sys
from pathlib import Path

import annotator.hookspecs as hookspecs

ROOT = Path(__file__).resolve().parents[2]


def test_guide_plugin_example_runs(tmp_path):
    text = (ROOT / "DEVELOPERS.md").read_text()
    blocks = re.findall(r"```python\n(.*?)```", text, re.S)
    plugin = next(b for b in blocks if "register_annotators" in b and "class " in b)
    test = next(b for b in blocks if b.lstrip().startswith("import types"))
    (tmp_path / "brightness_plugin.py").write_text(plugin)
    (tmp_path / "test_brightness_plugin.py").write_text(test)
    result = subprocess.run([sys.executable, "-m", "pytest", "-q", "-p", "no:cacheprovider",
                             "test_brightness_plugin.py"], cwd=tmp_path, capture_output=True,
                            text=True)
    assert result.returncode == 0, result.stdout + result.stderr


def test_every_hook_is_documented_in_the_guide():
    text = (ROOT / "DEVELOPERS.md").read_text()
    hooks = [n for n in dir(hookspecs) if n.startswith("register_") or n.startswith("prepare_")]
    assert hooks
    for name in hooks:
        assert f"`{name}(" in text, f"hook {name} missing from DEVELOPERS.md"
        assert getattr(hookspecs, name).__doc__, f"hook {name} has no docstring"
