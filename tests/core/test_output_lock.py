"""One writer per output folder, proven with real processes: a run held open after its first
part (a hook in the child process, no timing), then a second run, ``--resume`` and
``--overwrite`` on the same folder, then ``kill -9`` of the holder. Synchronised on files with
bounded waits; nothing depends on how long anything takes. (Common practice: ``flock(2)``
locks are released by the kernel when the holding process ends, however it ends.)
"""

from __future__ import annotations

import json
import os
import signal
import subprocess
import sys
import textwrap
import time

import pyarrow.parquet as pq
import pytest

from annotator.errors import OutputError
from annotator.io.lock import LOCK_FILE, output_lock
from catalogue_factory import make_catalogue

ROWS = 4_000
WAIT_S = 60.0

HOLDER = textwrap.dedent("""
    import pathlib, sys, time
    from annotator.cli import main
    from annotator.engines import local
    ready, release = pathlib.Path(sys.argv[1]), pathlib.Path(sys.argv[2])
    commit = local.write_chunk

    def held(*args, **kwargs):  # commit the part, say so, then wait to be released
        record = commit(*args, **kwargs)
        ready.touch()
        deadline = time.monotonic() + 60
        while not release.exists() and time.monotonic() < deadline:
            time.sleep(0.01)
        return record

    local.write_chunk = held
    sys.exit(main(sys.argv[3:]))
""")


def _cli(*args, env=None):
    return subprocess.run([sys.executable, "-m", "annotator", *map(str, args)],
                          capture_output=True, text=True, timeout=120, env=env)


def _wait_for(path, proc):
    deadline = time.monotonic() + WAIT_S
    while not path.exists():
        if proc.poll() is not None:
            raise AssertionError(f"holder ended early: {proc.stderr.read()}")
        if time.monotonic() > deadline:
            raise AssertionError("holder never committed its first part")
        time.sleep(0.01)


@pytest.fixture
def held_run(tmp_path):
    src = tmp_path / "cat.parquet"
    pq.write_table(make_catalogue(ROWS), src)
    out = tmp_path / "out"
    ready, release = tmp_path / "ready", tmp_path / "release"
    proc = subprocess.Popen(
        [sys.executable, "-c", HOLDER, str(ready), str(release), "run", str(src), "--out",
         str(out), "--chunk-rows", "1000", "--quiet"],
        stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    try:
        _wait_for(ready, proc)
        yield src, out, proc, release
    finally:
        if proc.poll() is None:
            proc.kill()
        proc.wait(timeout=WAIT_S)


def test_second_run_resume_and_overwrite_are_refused_naming_the_holder(held_run):
    src, out, proc, release = held_run
    for extra in ([], ["--resume"], ["--overwrite"]):
        r = _cli("run", src, "--out", out, "--chunk-rows", 1000, "--quiet", *extra)
        assert r.returncode == 2, r.stderr
        lines = r.stderr.strip().splitlines()  # notes on detected columns, then the error
        assert lines[-1] == (f"annotator: error: output {out}: another annotator run "
                             f"(PID {proc.pid}) is writing there; wait for it to end, or "
                             f"choose another --out")
        assert "Traceback" not in r.stderr
        assert not any(line.startswith("annotator: error") for line in lines[:-1])
    release.touch()
    assert proc.wait(timeout=WAIT_S) == 0
    m = json.loads((out / "manifest.json").read_text())
    # the refused runs changed nothing: one run's rows, counted once
    assert m["rows_read"] == ROWS == m["rows_written"] + m["rows_rejected"]
    assert len(m["parts"]) == 4
    assert not list(out.rglob("*.tmp"))


def test_kill_9_never_leaves_the_folder_locked(held_run):
    src, out, proc, _ = held_run
    os.kill(proc.pid, signal.SIGKILL)
    proc.wait(timeout=WAIT_S)
    assert (out / LOCK_FILE).exists()  # the file stays; the lock went with the process
    r = _cli("run", src, "--out", out, "--chunk-rows", 1000, "--quiet", "--resume")
    assert r.returncode == 0, r.stderr
    m = json.loads((out / "manifest.json").read_text())
    assert m["rows_read"] == ROWS == m["rows_written"] + m["rows_rejected"]
    assert sorted(p["part"] for p in m["parts"]) == [
        f"part-00000-{k:06d}.parquet" for k in range(4)]


def test_two_holders_in_one_process_exclude_each_other(tmp_path):
    """flock locks belong to the open file, so the service's threads exclude each other."""
    with output_lock(tmp_path / "o"):
        with pytest.raises(OutputError, match=f"PID {os.getpid()}"):
            with output_lock(tmp_path / "o"):
                pass
    with output_lock(tmp_path / "o"):  # released on exit
        pass


def test_the_lock_file_does_not_make_a_folder_foreign(tmp_path, catalogue_parquet):
    out = tmp_path / "o"
    with output_lock(out):
        pass
    # only the lock file is there: a fresh run uses the folder, --overwrite keeps working
    assert _cli("run", catalogue_parquet, "--out", out, "--quiet").returncode == 0
    assert _cli("run", catalogue_parquet, "--out", out, "--quiet",
                "--overwrite").returncode == 0
