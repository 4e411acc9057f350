"""Progress of a run: a percentage and ETA for CSV and CSV.gz (from bytes of the file on disk),
log lines on a terminal of zero columns, an ETA not skewed by the first part.

Consistency checks of the progress contract (common practice for progress meters: fraction
done from bytes consumed, rate smoothed by an exponential moving average); no timing is
asserted -- the ETA test runs on a fake clock, the terminal tests on a pseudo-terminal.
"""

from __future__ import annotations

import fcntl
import gzip
import os
import pty
import struct
import subprocess
import sys
import termios
import time

import pytest

from annotator.config import load_job
from annotator.engines import common
from annotator.runner import run_job


@pytest.fixture
def catalogue_csv_gz(tmp_path, catalogue_table):
    path = tmp_path / "catalogue.csv.gz"
    with gzip.open(path, "wt", compresslevel=1) as fh:
        catalogue_table.to_pandas().to_csv(fh, index=False)
    return path


@pytest.mark.parametrize("kind", ["csv", "csv.gz", "parquet"])
def test_every_input_kind_reports_a_growing_fraction(tmp_path, kind, catalogue_csv,
                                                     catalogue_csv_gz, catalogue_parquet):
    path = {"csv": catalogue_csv, "csv.gz": catalogue_csv_gz, "parquet": catalogue_parquet}[kind]
    seen = []
    job = load_job(None, inputs=[str(path)], output_dir=str(tmp_path / "out"), chunk_rows=1000)
    manifest = run_job(job, progress=seen.append)
    assert manifest["rows_read"] == 5_000
    fractions = [p.fraction for p in seen]
    assert len(fractions) == 5 and None not in fractions
    assert all(b > a for a, b in zip(fractions, fractions[1:]))
    assert 0.15 < fractions[0] < 0.25  # the first of five parts: about a fifth, by bytes
    assert fractions[-1] == 1.0


class _Clock:
    def __init__(self):
        self.now = 0.0

    def __call__(self):
        return self.now


def test_eta_ignores_the_slow_first_part_and_is_smoothed(monkeypatch, tmp_path):
    clock = _Clock()
    monkeypatch.setattr(common.time, "perf_counter", clock)

    class Log:
        def append(self, record):
            pass

    seen = []
    commits = common.CommitLog(Log(), [], 1000, seen.append, total_bytes=1000)
    clock.now = 3.0  # the first part: start-up plus an unpipelined part, 3x the steady time
    commits.commit({"rows_read": 100}, (0, 100))
    assert seen[-1].fraction == pytest.approx(0.1) and seen[-1].eta_s is None
    for k in range(2, 6):  # then one part (10 %) per second
        clock.now = 3.0 + (k - 1)
        commits.commit({"rows_read": 100}, (0, 100 * k))
        assert seen[-1].eta_s == pytest.approx(10 - k)  # steady rate: 10 % per second
    # an average from the start would have said (elapsed / done) * left: 3x too long at first
    naive = seen[1].elapsed_s / seen[1].fraction * (1 - seen[1].fraction)
    assert naive > 1.4 * seen[1].eta_s
    clock.now += 4.0  # one slow interval moves the ETA by the smoothing weight only
    commits.commit({"rows_read": 100}, (0, 600))
    assert seen[-1].eta_s == pytest.approx(0.4 / (0.3 * 0.025 + 0.7 * 0.1))


def _run_on_pty(args, cwd, columns: int) -> str:
    master, slave = pty.openpty()
    fcntl.ioctl(slave, termios.TIOCSWINSZ, struct.pack("HHHH", 24, columns, 0, 0))
    env = dict(os.environ, COLUMNS="", LINES="")
    env.pop("COLUMNS")
    env.pop("LINES")
    proc = subprocess.Popen([sys.executable, "-m", "annotator.cli", *args], cwd=cwd,
                            stdin=slave, stdout=subprocess.DEVNULL, stderr=slave, env=env)
    os.close(slave)
    chunks = []
    deadline = time.monotonic() + 120
    while time.monotonic() < deadline:
        try:
            data = os.read(master, 65536)
        except OSError:  # the child closed the terminal
            break
        if not data:
            break
        chunks.append(data)
    os.close(master)
    assert proc.wait(timeout=60) == 0, b"".join(chunks).decode(errors="replace")
    return b"".join(chunks).decode(errors="replace")


def test_a_terminal_of_zero_columns_gets_log_lines(tmp_path, catalogue_csv_gz):
    text = _run_on_pty(["run", str(catalogue_csv_gz), "--out", str(tmp_path / "out"),
                        "--chunk-rows", "1000"], tmp_path, columns=0)
    assert "annotator: 1000 rows (" in text and "%), 1 parts" in text
    assert "read 5000 rows, wrote 5000" in text


def test_a_terminal_gets_a_bar_with_the_percentage(tmp_path, catalogue_csv_gz):
    text = _run_on_pty(["run", str(catalogue_csv_gz), "--out", str(tmp_path / "out"),
                        "--chunk-rows", "1000"], tmp_path, columns=100)
    assert "annotating 100%" in text and "5,000 rows, 5 parts" in text
    assert "annotator: 1000 rows (" not in text
