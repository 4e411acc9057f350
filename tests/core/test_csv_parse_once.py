"""The CSV reader parses each block once: the typing pass keeps its parsed rows (on disk) and
the main pass reads them back when the whole file's types are those it parsed with.

References: pyarrow.csv's own reading of a clean file (an outside reader), and the same
reader with keeping turned off (``ANNOTATOR_CSV_SPILL=0``: every block parsed again in the
main pass, the path the reader had before), which must give identical chunks, row order,
rows set aside (line numbers, reasons, raw text), types and row counts on messy files too.
"""

from __future__ import annotations

import numpy as np
import pyarrow as pa
import pyarrow.csv as pacsv
import pytest

import annotator.io.csv as csvmod
from annotator.io.csv import CsvReader
from annotator.io.readers import expand_inputs

BLOCK, SAMPLE = 4096, 2048  # small, so a file of a few hundred lines has many blocks
NUMERIC = {"z"}


def _clean_rows(n: int, seed: int = 3) -> list[str]:
    rng = np.random.default_rng(seed)
    return [f"{i},{rng.uniform(0, 360):.12g},{rng.gamma(2, .35):.10g},G{i % 7},"
            f"{rng.normal(22, 1):.6f}" for i in range(n)]


def _read(path, *, spill: bool, monkeypatch, chunk_rows: int = 97, **opts):
    monkeypatch.setenv("ANNOTATOR_CSV_SPILL", "1" if spill else "0")
    csvmod._keep_parsed(None, None)
    reader = CsvReader(expand_inputs([path])[0], block_bytes=BLOCK, sample_bytes=SAMPLE,
                       **opts)
    schema = reader.resolve_types(NUMERIC)
    kept = reader._kept_blocks(schema)
    chunks = [(c.index, c.table, c.rejected) for c in reader.chunks(chunk_rows, target=schema)]
    return schema, reader.exact_rows, kept is not None, chunks


def _same(a, b):
    schema_a, rows_a, _, chunks_a = a
    schema_b, rows_b, _, chunks_b = b
    assert schema_a.equals(schema_b)
    assert rows_a == rows_b
    assert len(chunks_a) == len(chunks_b)
    for (ia, ta, ra), (ib, tb, rb) in zip(chunks_a, chunks_b):
        assert ia == ib
        assert ta.equals(tb), ia  # values, nulls, row order
        assert ra == rb, ia


def test_clean_file_matches_pyarrow_and_is_parsed_once(tmp_path, monkeypatch):
    lines = ["id,ra,z,field,mag"] + _clean_rows(900)
    path = tmp_path / "clean.csv"
    path.write_text("\n".join(lines) + "\n")
    calls = []
    real = CsvReader.parse_block
    monkeypatch.setattr(CsvReader, "parse_block",
                        lambda self, *a, **k: calls.append(1) or real(self, *a, **k))
    kept = _read(path, spill=True, monkeypatch=monkeypatch)
    schema, rows, used, chunks = kept
    assert used and not calls  # the main pass read the kept rows, parsed no text
    assert rows == 900
    assert [i for i, _, _ in chunks] == list(range(10))
    assert all(not r for _, _, r in chunks)
    ours = pa.concat_tables(t for _, t, _ in chunks)
    reference = pacsv.read_csv(path, convert_options=pacsv.ConvertOptions(
        column_types={f.name: f.type for f in schema}))
    assert ours.equals(reference)
    assert dict(zip(schema.names, map(str, schema.types))) == {
        "id": "int64", "ra": "double", "z": "double", "field": "string", "mag": "double"}
    _same(kept, _read(path, spill=False, monkeypatch=monkeypatch))


MESSY = {
    # rows set aside anywhere: wrong field counts, bad quotes, text in the numeric input,
    # empty lines and CRLF: the kept rows still serve the main pass
    "set aside": lambda rows: (rows[:300] + ["5,6", "", '7,1.0,"0.3,G1,20', "\r"]
                               + rows[300:600] + ["9,1,2,3,4,5"]
                               + [r + "\r" for r in rows[600:]]),
    # text in the numeric input: its row set aside (the kept rows are dropped, parsed again)
    "text in a number": lambda rows: rows[:300] + ["8,1,0.5x,G2,21"] + rows[300:],
    # a type widens after the sample: kept rows dropped, parsed again
    "int then float": lambda rows: rows[:500] + ["501.5,1.5,0.2,G1,20.5"] + rows[500:],
    "float then text": lambda rows: rows[:700] + ["701,1.5,0.2,G1,bright"] + rows[700:],
    "int beyond int64": lambda rows: rows[:650] + ["99999999999999999999,1,0.2,G1,20"]
    + rows[650:],
    # a column empty in the sample gains values late
    "empty then values": lambda rows: [",".join(r.split(",")[:4]) + "," for r in rows[:400]]
    + rows[400:],
    # a quote opened mid-field and a quoted field with the delimiter
    "quotes": lambda rows: rows[:350] + ['2,x"y,"z,0.2', '3,1,0.4,"G,3",20'] + rows[350:],
    # bytes that are not UTF-8 late in the file
    "bad bytes": lambda rows: rows[:800] + ["4,1,0.3,Se\udcf1or,20"] + rows[800:],
}


@pytest.mark.parametrize("case", sorted(MESSY))
def test_messy_file_reads_as_when_parsed_again(tmp_path, monkeypatch, case):
    lines = MESSY[case](_clean_rows(900))
    data = ("id,ra,z,field,mag\n" + "\n".join(lines) + "\n").encode("utf-8", "surrogateescape")
    path = tmp_path / "messy.csv"
    path.write_bytes(data)
    kept = _read(path, spill=True, monkeypatch=monkeypatch)
    again = _read(path, spill=False, monkeypatch=monkeypatch)
    _same(kept, again)
    assert not again[2]
    assert kept[2] == (case in ("set aside", "bad bytes"))
    if case in ("set aside", "text in a number", "quotes", "bad bytes"):
        assert any(r for _, _, r in kept[3])


def test_kept_rows_serve_only_their_file_and_types(tmp_path, monkeypatch):
    path = tmp_path / "c.csv"
    path.write_text("\n".join(["id,ra,z,field,mag"] + _clean_rows(600)) + "\n")
    monkeypatch.setenv("ANNOTATOR_CSV_SPILL", "1")
    first = CsvReader(expand_inputs([path])[0], block_bytes=BLOCK, sample_bytes=SAMPLE)
    schema = first.resolve_types(NUMERIC)
    reader = CsvReader(expand_inputs([path])[0], block_bytes=BLOCK, sample_bytes=SAMPLE)
    other = pa.schema([pa.field(f.name, pa.float64() if f.name == "id" else f.type)
                       for f in schema])
    assert reader._kept_blocks(other) is None  # other types: parsed again
    assert reader._kept_blocks(schema) is not None  # another reader of the same file
    assert CsvReader(expand_inputs([path])[0], block_bytes=BLOCK, sample_bytes=SAMPLE,
                     missing_tokens=["NA"])._kept_blocks(schema) is None  # other options
    list(reader.chunks(100, target=schema))
    assert reader._kept_blocks(schema) is None  # read in full: freed
    first.resolve_types(NUMERIC)
    path.write_text(path.read_text() + "\n".join(_clean_rows(3, seed=9)) + "\n")
    assert reader._kept_blocks(schema) is None  # the file changed


def test_kept_rows_dropped_when_the_disk_would_fill(tmp_path, monkeypatch):
    """Past its share of the spill directory's free space the first pass stops keeping rows;
    the main pass parses the text again and gives the same chunks."""
    path = tmp_path / "c.csv"
    path.write_text("\n".join(["id,ra,z,field,mag"] + _clean_rows(900)) + "\n")
    monkeypatch.setattr(csvmod.ParsedBlocks, "MAX_FREE_SHARE", 1e-15)  # a few bytes at most
    small = _read(path, spill=True, monkeypatch=monkeypatch)
    assert not small[2]  # not kept
    monkeypatch.undo()
    _same(small, _read(path, spill=False, monkeypatch=monkeypatch))


def test_no_kept_rows_on_a_file_system_in_memory(tmp_path, monkeypatch):
    """Rows kept on a tmpfs would be memory growing with the file: they are not kept."""
    mounts = tmp_path / "mounts"
    mounts.write_text("/dev/vda / ext4 rw 0 0\n"
                      f"tmpfs {tmp_path}/ram tmpfs rw,size=1024k 0 0\n"
                      f"/dev/vdb {tmp_path}/ram/disk ext4 rw 0 0\n")
    assert csvmod._in_memory_fs(str(tmp_path / "ram"), str(mounts))
    assert csvmod._in_memory_fs(str(tmp_path / "ram" / "sub"), str(mounts))
    assert not csvmod._in_memory_fs(str(tmp_path / "ram" / "disk"), str(mounts))
    assert not csvmod._in_memory_fs(str(tmp_path / "ramx"), str(mounts))
    assert not csvmod._in_memory_fs(str(tmp_path), str(tmp_path / "no-such-file"))
    schema = pa.schema([pa.field("a", pa.int64())])
    monkeypatch.setenv("ANNOTATOR_CSV_SPILL", "1")
    monkeypatch.setenv("ANNOTATOR_CSV_SPILL_DIR", str(tmp_path))
    kept = csvmod.ParsedBlocks.create(schema)
    assert kept is not None
    kept.close()
    monkeypatch.setattr(csvmod, "_in_memory_fs", lambda directory: True)
    assert csvmod.ParsedBlocks.create(schema) is None


def test_default_blocks_match_pyarrow_on_a_clean_file(tmp_path, monkeypatch):
    """At the reader's own block and sample sizes (several 8 MiB blocks), a clean file reads
    as pyarrow.csv reads it with the same types, in the same row order, parsed once."""
    n = 240_000
    rng = np.random.default_rng(11)
    table = pa.table({"id": np.arange(n, dtype=np.int64) * 7919,
                      "ra": rng.uniform(0, 360, n), "z": rng.gamma(2, .35, n),
                      "field": pa.array([f"F{i % 13}" for i in range(n)]),
                      "mag": rng.normal(22, 1, n), "flag": rng.integers(0, 2, n) == 1})
    path = tmp_path / "big.csv"
    pacsv.write_csv(table, path, pacsv.WriteOptions(quoting_style="none"))
    assert path.stat().st_size > 2 * csvmod.CSV_BLOCK_BYTES
    monkeypatch.setenv("ANNOTATOR_CSV_SPILL", "1")
    csvmod._keep_parsed(None, None)
    reader = CsvReader(expand_inputs([path])[0])
    schema = reader.resolve_types(NUMERIC)
    assert reader._kept_blocks(schema) is not None
    chunks = list(reader.chunks(100_000, target=schema))
    assert [c.index for c in chunks] == [0, 1, 2] and not any(c.rejected for c in chunks)
    ours = pa.concat_tables(c.table for c in chunks)
    reference = pacsv.read_csv(path, convert_options=pacsv.ConvertOptions(
        column_types={f.name: f.type for f in schema}))
    assert ours.equals(reference)
    assert ours.column("id").equals(table.column("id"))
    assert dict(zip(schema.names, map(str, schema.types))) == {
        "id": "int64", "ra": "double", "z": "double", "field": "string", "mag": "double",
        "flag": "bool"}
