"""Failures a run can meet, each one line with exit status 2 and nothing left half-written:
a full disk (injected, and for real on a small tmpfs when the test may mount one) and an
unexpected internal exception (injected). Common practice: ENOSPC is the errno of a write to a
full filesystem (write(2)); no published source for the behaviour wanted here.
"""

from __future__ import annotations

import errno
import json
import subprocess
import sys
import tempfile

import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from annotator.cli import main
from annotator.io import writer
from catalogue_factory import make_catalogue

ROWS = 6_000


def _parts(out):
    return pa.concat_tables(pq.read_table(p) for p in sorted(out.glob("part-*.parquet")))


def _last_line(capsys):
    err = capsys.readouterr().err
    assert "Traceback" not in err
    return err.strip().splitlines()[-1]


@pytest.fixture
def catalogue(tmp_path):
    src = tmp_path / "cat.parquet"
    pq.write_table(make_catalogue(ROWS), src)
    clean = tmp_path / "clean"
    assert main(["run", str(src), "--out", str(clean), "--chunk-rows", "1000", "--quiet"]) == 0
    return src, _parts(clean)


def test_injected_disk_full_is_one_line_leaves_no_temporaries_and_resume_completes(
        catalogue, tmp_path, monkeypatch, capsys):
    src, reference = catalogue
    capsys.readouterr()
    real_write = writer.pq.write_table
    calls = {"n": 0}

    def write_until_full(table, where, **kwargs):
        calls["n"] += 1
        if calls["n"] > 2:  # the third part: some bytes reach the temporary, then ENOSPC
            where.write(b"PAR1 partial")
            raise OSError(errno.ENOSPC, "No space left on device")
        return real_write(table, where, **kwargs)

    monkeypatch.setattr(writer.pq, "write_table", write_until_full)
    out = tmp_path / "out"
    args = ["run", str(src), "--out", str(out), "--chunk-rows", "1000", "--quiet"]
    assert main(args) == 2
    line = _last_line(capsys)
    assert line.startswith(f"annotator: error: output {out}: no space left on the device")
    assert "MB (its uncompressed size)" in line and line.endswith("rerun with --resume")
    assert not list(out.rglob("*.tmp"))
    assert not (out / "manifest.json").exists()
    monkeypatch.setattr(writer.pq, "write_table", real_write)  # space is back
    assert main(args + ["--resume"]) == 0
    m = json.loads((out / "manifest.json").read_text())
    assert m["rows_read"] == ROWS == m["rows_written"] + m["rows_rejected"]
    assert _parts(out).equals(reference)  # consistency check against the uninterrupted run


def _mount_tmpfs(where, size):
    where.mkdir()
    r = subprocess.run(["mount", "-t", "tmpfs", "-o", f"size={size}", "tmpfs", str(where)],
                       capture_output=True, text=True)
    return r.returncode == 0


@pytest.mark.skipif(sys.platform != "linux", reason="tmpfs is a Linux filesystem")
def test_a_really_full_filesystem_then_space_back(catalogue, tmp_path, capsys):
    """Optional: needs root and the right to mount (CAP_SYS_ADMIN); skipped otherwise."""
    import os

    if os.geteuid() != 0:
        pytest.skip("needs root to mount a small tmpfs")
    src, reference = catalogue
    capsys.readouterr()
    disk = tmp_path / "small-disk"
    if not _mount_tmpfs(disk, "300k"):
        pytest.skip("this container may not mount a tmpfs")
    try:
        out = disk / "out"
        args = ["run", str(src), "--out", str(out), "--chunk-rows", "1000", "--quiet"]
        assert main(args) == 2
        line = _last_line(capsys)
        assert line.startswith(f"annotator: error: output {out}")
        assert "no space left on the device" in line
        assert not list(out.rglob("*.tmp"))
        subprocess.run(["mount", "-o", "remount,size=64m", str(disk)], check=True)
        assert main(args + ["--resume"]) == 0
        m = json.loads((out / "manifest.json").read_text())
        assert m["rows_read"] == ROWS == m["rows_written"] + m["rows_rejected"]
        assert _parts(out).equals(reference)
    finally:
        subprocess.run(["umount", "-l", str(disk)], capture_output=True)


def test_an_internal_error_is_one_line_with_the_traceback_in_a_file(
        catalogue, tmp_path, monkeypatch, capsys):
    src, _ = catalogue
    capsys.readouterr()
    from annotator.pipeline import Pipeline

    def broken(self, table):
        raise ZeroDivisionError("injected for the test")

    monkeypatch.setattr(Pipeline, "annotate", broken)
    monkeypatch.setattr(tempfile, "tempdir", str(tmp_path))
    monkeypatch.delenv("ANNOTATOR_DEBUG", raising=False)
    out = tmp_path / "out"
    assert main(["run", str(src), "--out", str(out), "--quiet"]) == 2
    line = _last_line(capsys)
    assert line.startswith("annotator: internal error: ZeroDivisionError: injected for the "
                           "test (a bug; traceback written to ")
    dumps = list(tmp_path.glob("annotator-traceback-*.txt"))
    assert len(dumps) == 1 and str(dumps[0]) in line
    text = dumps[0].read_text()
    assert "Traceback (most recent call last)" in text
    assert "ZeroDivisionError: injected for the test" in text
    monkeypatch.undo()  # the failed run released the folder: resuming it works
    assert main(["run", str(src), "--out", str(out), "--quiet", "--resume"]) == 0
