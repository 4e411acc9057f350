"""The input checksum, computed while the reader reads the file (issue 17: no work done twice).

Outside reference: ``hashlib.sha256`` of the file's bytes, i.e. the plain SHA-256 of FIPS
180-4 that ``sha256sum`` prints, which is what users verify the manifest with. "Read once":
every byte read through the readers' HashingFile is counted, and the count must be the file's
size (the Parquet footer is read on its own, before, as it always was); the old second read
(``provenance.file_sha256``) is made to fail.
"""

from __future__ import annotations

import gzip
import hashlib
import json
import random

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

import annotator.provenance
from annotator.cli import main
from annotator.io.checkpoint import CheckpointLog
from annotator.io.hashing import HashingFile


def _sha(path) -> str:
    return hashlib.sha256(path.read_bytes()).hexdigest()


@pytest.fixture
def hashing_files(monkeypatch):
    """Every HashingFile opened in the test, and the old second read made to fail."""
    opened: list[HashingFile] = []
    init = HashingFile.__init__

    def record(self, *args, **kwargs):
        init(self, *args, **kwargs)
        opened.append(self)

    def no_second_read(*args, **kwargs):
        raise AssertionError("the input was read a second time for its checksum")

    monkeypatch.setattr(HashingFile, "__init__", record)
    monkeypatch.setattr(annotator.provenance, "file_sha256", no_second_read)
    return opened


def _run_and_check(path, out, hashing_files, *extra):
    assert main(["run", str(path), "--out", str(out), "--quiet", *map(str, extra)]) == 0
    manifest = json.loads((out / "manifest.json").read_text())
    assert manifest["inputs"][0]["sha256"] == _sha(path)
    hashed = [h for h in hashing_files if h._digest is not None]
    assert len(hashed) == 1  # one file, hashed by the reader that read its rows
    assert hashed[0].bytes_read == path.stat().st_size  # every byte read once
    return manifest


# -- the wrapper on its own ------------------------------------------------------------

def test_any_pattern_of_reads_gives_the_whole_files_sha256(tmp_path):
    data = np.random.default_rng(5).bytes(300_000)
    path = tmp_path / "blob"
    path.write_bytes(data)
    rng = random.Random(11)
    for trial in range(40):
        h = HashingFile(path)
        for _ in range(rng.randrange(0, 12)):
            pos = rng.randrange(0, len(data) + 10)
            n = rng.randrange(0, 70_000)
            h.seek(pos)
            assert h.read(n) == data[pos:pos + n]  # served unchanged, whatever was hashed
        if trial % 2:
            h.close()  # the reader may close it first: the rest is read on a fresh handle
        assert h.sha256() == hashlib.sha256(data).hexdigest()
        assert h.closed


def test_hashed_in_a_thread_of_its_own_in_order_even_from_a_reused_buffer(tmp_path,
                                                                           monkeypatch):
    """The hashing thread gets the buffers in file order, at most QUEUED waiting; a buffer
    the caller owns (readinto, then overwritten at once, as io.BufferedReader does) is
    copied before it is queued."""
    import threading

    import annotator.io.hashing as hashing

    monkeypatch.setattr(hashing, "BLOCK", 4096)  # many gap blocks
    data = np.random.default_rng(6).bytes(200_000)
    path = tmp_path / "blob"
    path.write_bytes(data)
    h = HashingFile(path)
    buf = bytearray(1000)
    for pos in range(0, 60_000, 1000):
        assert h.readinto(buf) == 1000 and bytes(buf) == data[pos:pos + 1000]
        buf[:] = b"x" * 1000  # the caller reuses its buffer at once
    h.seek(150_000)  # a gap of many blocks, queued in order
    assert bytes(h.read(10)) == data[150_000:150_010]
    assert h._hasher is not None and h._hasher.name == "annotator-input-hash"
    assert h._hasher is not threading.current_thread()
    assert h.sha256() == hashlib.sha256(data).hexdigest()
    assert h._hasher is None  # ended by sha256()
    assert h.bytes_read == len(data)


def test_close_ends_the_hashing_thread(tmp_path):
    path = tmp_path / "blob"
    path.write_bytes(b"abc" * 10_000)
    h = HashingFile(path)
    h.read(100)
    thread = h._hasher
    h.close()
    assert not thread.is_alive() and h._hasher is None
    assert h.sha256() == hashlib.sha256(path.read_bytes()).hexdigest()


def test_forward_reads_and_gaps_read_each_byte_once(tmp_path):
    data = bytes(range(256)) * 1000
    path = tmp_path / "blob"
    path.write_bytes(data)
    h = HashingFile(path)
    h.seek(1000)
    h.read(500)  # the gap [0, 1000) is read and hashed first
    assert h.bytes_read == 1500
    h.seek(100_000)
    h.read(10)
    h.seek(0)
    h.read(20)  # behind: served, not hashed again
    assert h.sha256() == hashlib.sha256(data).hexdigest()
    assert h.bytes_read == len(data) + 20


def test_a_held_range_serves_reads_in_any_order_from_one_read(tmp_path):
    """What the Parquet reader does per row group: hold its bytes, let pyarrow's threads read
    its column chunks in any order."""
    data = np.random.default_rng(8).bytes(50_000)
    path = tmp_path / "blob"
    path.write_bytes(data)
    h = HashingFile(path)
    h.hold(100, 30_000)  # [0, 100) is a gap: read and hashed first
    for pos in (20_000, 100, 5_000, 29_990):
        h.seek(pos)
        assert bytes(h.read(10)) == data[pos:pos + 10]
    h.release()
    h.seek(29_995)
    assert bytes(h.read(10)) == data[29_995:30_005]  # across the end: from the file
    assert h.sha256() == hashlib.sha256(data).hexdigest()
    assert h.bytes_read == len(data) + 5  # only the 5 bytes behind, read again


def test_a_column_subset_read_through_pyarrow(tmp_path, catalogue_table):
    """pyarrow reads only some column chunks; the gaps between them are hashed in order
    (in one thread, as the reader does: pyarrow's threads would read chunks out of order)."""
    path = tmp_path / "c.parquet"
    pq.write_table(catalogue_table, path, row_group_size=700)
    for columns in (None, ["z"], ["ra", "mag_r"]):
        h = HashingFile(path)
        f = pq.ParquetFile(h, metadata=pq.read_metadata(path), pre_buffer=False)
        got = pa.Table.from_batches(list(f.iter_batches(batch_size=500, columns=columns,
                                                            use_threads=False)))
        assert got.equals(catalogue_table.select(columns or catalogue_table.column_names))
        assert h.sha256() == _sha(path)
        assert h.bytes_read == path.stat().st_size


# -- through annotator run, one format at a time ------------------------------------------

def test_parquet(catalogue_parquet, tmp_path, hashing_files):
    _run_and_check(catalogue_parquet, tmp_path / "out", hashing_files, "--chunk-rows", 1000)


def test_csv_plain_and_gzip(catalogue_table, tmp_path, hashing_files, monkeypatch):
    import pyarrow.csv as pacsv

    import annotator.io.csv as csvmod

    monkeypatch.setattr(csvmod, "CSV_BLOCK_BYTES", 64 << 10)  # several blocks per file
    plain = tmp_path / "c.csv"
    pacsv.write_csv(catalogue_table, plain)
    packed = tmp_path / "c.csv.gz"
    packed.write_bytes(gzip.compress(plain.read_bytes()))
    for path in (plain, packed):
        hashing_files.clear()
        _run_and_check(path, tmp_path / f"out_{path.name}", hashing_files, "--chunk-rows", 1200)


def test_fits_plain_and_gzip(catalogue_table, tmp_path, hashing_files):
    fits = pytest.importorskip("astropy.io.fits")
    cols = [fits.Column(name=n, format="K" if n == "objid" else "D",
                        array=catalogue_table.column(n).to_numpy(zero_copy_only=False))
            for n in catalogue_table.column_names]
    plain = tmp_path / "c.fits"
    fits.HDUList([fits.PrimaryHDU(), fits.BinTableHDU.from_columns(cols)]).writeto(plain)
    packed = tmp_path / "c.fits.gz"
    packed.write_bytes(gzip.compress(plain.read_bytes()))
    for path in (plain, packed):
        hashing_files.clear()
        _run_and_check(path, tmp_path / f"out_{path.name}", hashing_files, "--chunk-rows", 1200)


@pytest.mark.parametrize("fmt", ["parquet", "csv", "fits"])
def test_after_resume_the_checksum_is_still_the_whole_files(fmt, catalogue_table,
                                                             catalogue_parquet, tmp_path,
                                                             hashing_files):
    """Resumed, the reader starts at the first chunk not committed: what it skips is still
    read (once) and hashed in order, so the digest is the whole file's."""
    if fmt == "parquet":
        path = catalogue_parquet
    elif fmt == "csv":
        import pyarrow.csv as pacsv

        path = tmp_path / "c.csv"
        pacsv.write_csv(catalogue_table, path)
    else:
        fits = pytest.importorskip("astropy.io.fits")
        path = tmp_path / "c.fits"
        cols = [fits.Column(name=n, format="D",
                            array=catalogue_table.column(n).to_numpy(zero_copy_only=False))
                for n in catalogue_table.column_names]
        fits.HDUList([fits.PrimaryHDU(), fits.BinTableHDU.from_columns(cols)]).writeto(path)
    out = tmp_path / "out"
    assert main(["run", str(path), "--out", str(out), "--quiet", "--chunk-rows", "1000"]) == 0
    # keep the first 2 of 5 parts and the 4th (so the resumed reader skips both ways)
    log = CheckpointLog(out)
    kept = [r for i, r in enumerate(log.records()) if i in (0, 1, 3)]
    log.path.write_text("".join(json.dumps(r) + "\n" for r in kept))
    (out / "manifest.json").unlink()
    hashing_files.clear()
    m = _run_and_check(path, out, hashing_files, "--chunk-rows", 1000, "--resume")
    assert m["rows_read"] == 5000 and len(m["parts"]) == 5


def test_a_resumed_run_with_every_chunk_committed_still_hashes_the_file(catalogue_parquet,
                                                                        tmp_path,
                                                                        hashing_files):
    out = tmp_path / "out"
    assert main(["run", str(catalogue_parquet), "--out", str(out), "--quiet"]) == 0
    (out / "manifest.json").unlink()
    hashing_files.clear()
    _run_and_check(catalogue_parquet, out, hashing_files, "--resume")


def test_a_file_gone_before_its_checksum_is_one_line_naming_it(catalogue_parquet, tmp_path,
                                                               capsys, monkeypatch):
    """Unreadable at the end (here: removed once its rows were read): a user error naming
    the file, not a traceback."""
    from annotator.io.parquet import ParquetReader

    sha256 = ParquetReader.sha256

    def gone(self):
        self._hashing.close()
        catalogue_parquet.unlink()
        self._hashing._hashed = 0  # nothing hashed yet: the file must be opened again
        return sha256(self)

    monkeypatch.setattr(ParquetReader, "sha256", gone)
    out = tmp_path / "out"
    assert main(["run", str(catalogue_parquet), "--out", str(out), "--quiet"]) == 2
    err = capsys.readouterr().err.strip().splitlines()[-1]  # after the plan's notes
    assert err.startswith("annotator: error: input ") and str(catalogue_parquet) in err
    assert "checksum" in err and "Traceback" not in capsys.readouterr().err
