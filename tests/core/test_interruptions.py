"""Ctrl-C and SIGTERM on a real ``annotator run`` process: the run stops cleanly and says how
to continue, and the printed ``--resume`` command finishes it with every row exactly once.

Synchronised on files, never on sleeps: a test-only plugin (installed for the child process
through a ``dist-info`` folder on ``PYTHONPATH``) writes ``waiting`` when it starts annotating
the second chunk and holds that chunk until the test writes ``go``; every wait is bounded.
(Consistency checks of the tool's own resume contract: rows_read = rows_written +
rows_rejected, each object once.)
"""

from __future__ import annotations

import json
import os
import shlex
import signal
import subprocess
import sys
import time
from pathlib import Path

import pyarrow.parquet as pq
import pytest

WAIT_S = 60.0
CHUNK_ROWS = 1_000

PLUGIN = '''
import os
import time
from pathlib import Path

from annotator import Annotator, hookimpl

CALLS = [0]


class HoldSecondChunk(Annotator):
    name = "hold_second_chunk"
    version = "1.0"
    summary = "test only: holds the second chunk until the test says go"
    requires = ("redshift",)
    flags = {"never_raised": "Never raised."}

    @classmethod
    def configure(cls, setup):
        return cls()

    def annotate(self, batch):
        CALLS[0] += 1
        sync = os.environ.get("HOLD_SYNC_DIR")
        if sync and CALLS[0] == 2:
            Path(sync, "waiting").write_text("")
            deadline = time.monotonic() + 60
            while not Path(sync, "go").exists() and time.monotonic() < deadline:
                time.sleep(0.02)
        return {}


@hookimpl
def register_annotators():
    return [HoldSecondChunk]
'''


def _wait_for(predicate, what: str) -> None:
    deadline = time.monotonic() + WAIT_S
    while not predicate():
        if time.monotonic() > deadline:
            raise AssertionError(f"timed out waiting for {what}")
        time.sleep(0.02)


@pytest.fixture
def plugin_path(tmp_path) -> Path:
    site = tmp_path / "site"
    site.mkdir()
    (site / "hold_plugin.py").write_text(PLUGIN)
    info = site / "hold_plugin-1.0.dist-info"
    info.mkdir()
    (info / "METADATA").write_text("Metadata-Version: 2.1\nName: hold-plugin\nVersion: 1.0\n")
    (info / "entry_points.txt").write_text("[annotator]\nhold = hold_plugin\n")
    return site


def _env(site: Path, sync: Path | None) -> dict:
    env = dict(os.environ)
    env["PYTHONPATH"] = str(site) + os.pathsep + env.get("PYTHONPATH", "")
    env.pop("ANNOTATOR_BUILTINS_ONLY", None)
    env.pop("ANNOTATOR_DEBUG", None)
    if sync is not None:
        env["HOLD_SYNC_DIR"] = str(sync)
    else:
        env.pop("HOLD_SYNC_DIR", None)
    return env


def _annotator(args: list[str]) -> list[str]:
    return [sys.executable, "-m", "annotator.cli", *args]


def _start(tmp_path, catalogue_parquet, site):
    sync = tmp_path / "sync"
    sync.mkdir()
    out = tmp_path / "out"
    err = open(tmp_path / "stderr.txt", "w")
    args = ["run", str(catalogue_parquet), "--out", str(out), "--chunk-rows", str(CHUNK_ROWS)]
    proc = subprocess.Popen(_annotator(args), cwd=tmp_path, env=_env(site, sync),
                            stdout=subprocess.DEVNULL, stderr=err, stdin=subprocess.DEVNULL)
    err.close()
    _wait_for(lambda: (sync / "waiting").exists() or proc.poll() is not None,
              "the second chunk")
    assert proc.poll() is None, (tmp_path / "stderr.txt").read_text()
    return proc, sync, out, args


def _resume_command(stderr: str) -> list[str]:
    line = next(ln for ln in stderr.splitlines() if "Continue with: " in ln)
    words = shlex.split(line.split("Continue with: ", 1)[1])
    assert words[0] == "annotator" and words[-1] == "--resume"
    return words[1:]


def _finish_with_resume(tmp_path, site, out, resume_args, total_rows):
    done = subprocess.run(_annotator(resume_args), cwd=tmp_path, env=_env(site, None),
                          capture_output=True, text=True, timeout=WAIT_S)
    assert done.returncode == 0, done.stderr
    manifest = json.loads((out / "manifest.json").read_text())
    assert manifest["rows_read"] == total_rows
    assert manifest["rows_read"] == manifest["rows_written"] + manifest["rows_rejected"]
    ids = pq.read_table(sorted(out.glob("part-*.parquet")), columns=["objid"]).column(0)
    assert len(ids) == total_rows and len(set(ids.to_pylist())) == total_rows


@pytest.mark.parametrize("sig", [signal.SIGTERM, signal.SIGINT], ids=["SIGTERM", "SIGINT"])
def test_one_signal_finishes_the_part_in_progress_and_prints_the_resume_command(
        tmp_path, catalogue_parquet, plugin_path, sig):
    total = pq.read_metadata(catalogue_parquet).num_rows
    proc, sync, out, args = _start(tmp_path, catalogue_parquet, plugin_path)
    proc.send_signal(sig)
    _wait_for(lambda: "received" in (tmp_path / "stderr.txt").read_text(), "the handler")
    (sync / "go").write_text("")
    rc = proc.wait(timeout=WAIT_S)
    stderr = (tmp_path / "stderr.txt").read_text()
    assert rc == 128 + int(sig), stderr
    assert "Traceback" not in stderr
    assert f"stopped by {sig.name} after finishing the part in progress" in stderr
    parts = sorted(out.glob("part-*.parquet"))
    assert 2 <= len(parts) < total / CHUNK_ROWS  # the held chunk was finished, not the rest
    assert not (out / "manifest.json").exists()

    # the same command again suggests --resume first, with the exact command
    again = subprocess.run(_annotator(args), cwd=tmp_path, env=_env(plugin_path, None),
                           capture_output=True, text=True, timeout=WAIT_S)
    assert again.returncode == 2
    lines = again.stderr.strip().splitlines()
    assert len(lines) == 1 and "interrupted run of this job" in lines[0], again.stderr
    assert lines[0].split("continue it with: ")[1].startswith(
        shlex.join(["annotator", *_resume_command(stderr)]))

    _finish_with_resume(tmp_path, plugin_path, out, _resume_command(stderr), total)


def test_a_second_signal_abandons_the_part_in_progress(tmp_path, catalogue_parquet,
                                                       plugin_path):
    total = pq.read_metadata(catalogue_parquet).num_rows
    proc, sync, out, _ = _start(tmp_path, catalogue_parquet, plugin_path)
    proc.send_signal(signal.SIGINT)
    _wait_for(lambda: "received" in (tmp_path / "stderr.txt").read_text(), "the handler")
    proc.send_signal(signal.SIGTERM)
    rc = proc.wait(timeout=WAIT_S)
    stderr = (tmp_path / "stderr.txt").read_text()
    assert rc == 128 + int(signal.SIGINT), stderr
    assert "Traceback" not in stderr
    assert "the part in progress was abandoned" in stderr
    assert len(list(out.glob("part-*.parquet"))) < total / CHUNK_ROWS
    _finish_with_resume(tmp_path, plugin_path, out, _resume_command(stderr), total)
