"""Streaming readers: exact chunk counts, resumable chunk positions, rejected CSV lines."""

from __future__ import annotations

import gzip

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from annotator.errors import InputError
from annotator.io.csv import CsvReader
from annotator.io.readers import ParquetReader, expand_inputs, open_reader


def _source(path, fmt="auto"):
    return expand_inputs([path], fmt)[0]


def test_parquet_chunks_are_exact_across_row_groups(catalogue_parquet, catalogue_table):
    # row groups of 1500 rows, chunks of 2000: chunks must cut across row groups exactly
    reader = ParquetReader(_source(catalogue_parquet))
    chunks = list(reader.chunks(2000))
    assert [c.table.num_rows for c in chunks] == [2000, 2000, 1000]
    assert [c.index for c in chunks] == [0, 1, 2]
    assert pa.concat_tables([c.table for c in chunks]).equals(catalogue_table)


def test_parquet_start_chunk_gives_the_same_rows(catalogue_parquet):
    reader = ParquetReader(_source(catalogue_parquet))
    whole = list(reader.chunks(1200))
    resumed = list(reader.chunks(1200, start_chunk=2))
    assert [c.index for c in resumed] == [c.index for c in whole[2:]]
    for a, b in zip(resumed, whole[2:]):
        assert a.table.equals(b.table)


def test_unreadable_parquet_names_the_file(tmp_path):
    bad = tmp_path / "broken.parquet"
    bad.write_bytes(b"PAR1 this is not parquet")
    with pytest.raises(InputError, match="broken.parquet"):
        ParquetReader(_source(bad))


def test_folder_expands_to_sorted_parquet_files(tmp_path, catalogue_table):
    folder = tmp_path / "drop"
    folder.mkdir()
    for name in ("b.parquet", "a.parquet"):
        pq.write_table(catalogue_table.slice(0, 10), folder / name)
    (folder / "_SUCCESS").write_text("")
    sources = expand_inputs([folder])
    assert [s.path.name for s in sources] == ["a.parquet", "b.parquet"]
    assert [s.index for s in sources] == [0, 1]


def test_missing_input_names_it(tmp_path):
    with pytest.raises(InputError, match="nowhere.parquet"):
        expand_inputs([tmp_path / "nowhere.parquet"])


CSV_TEXT = (
    "id,z,mag\n"          # line 1
    "1,0.5,20.1\n"        # 2
    "2,0.7\n"             # 3: too few fields
    "3,abc,20.3\n"        # 4: text where a number belongs
    "\n"                  # 5: blank line, not a row
    "4,0.9,20.4,9\n"      # 6: too many fields
    "5,1.1,20.5\n"        # 7
)


@pytest.mark.parametrize("gz", [False, True])
def test_csv_sets_aside_bad_lines_with_their_line_numbers(tmp_path, gz):
    path = tmp_path / ("c.csv.gz" if gz else "c.csv")
    if gz:
        with gzip.open(path, "wt") as fh:
            fh.write(CSV_TEXT * 1)
    else:
        path.write_text(CSV_TEXT)
    reader = CsvReader(_source(path), column_types={"z": "float64"})
    chunks = list(reader.chunks(1000))
    assert len(chunks) == 1
    chunk = chunks[0]
    assert chunk.table.column("id").to_pylist() == [1, 5]
    assert chunk.table.schema.field("z").type == pa.float64()
    rejected = {r["row"]: r for r in chunk.rejected}
    assert sorted(rejected) == [3, 4, 6]
    assert "wrong number of fields" in rejected[3]["reason"]
    assert rejected[3]["raw"] == "2,0.7"
    assert rejected[4]["reason"] == "column 'z': text where a double belongs"
    assert rejected[4]["raw"] == "3,abc,20.3"
    assert rejected[6]["raw"] == "4,0.9,20.4,9"
    assert chunk.rows_read == 5


def test_csv_numeric_input_sets_aside_a_stray_bad_value(tmp_path):
    # A column the job reads as a number is float64; a cell that is not a number sets its
    # row aside. The same column, not read as a number, keeps every row: it widens to text.
    lines = ["id,z"] + [f"{i},{0.001 * i}" for i in range(1, 3000)] + ["3000,oops"]
    path = tmp_path / "c.csv"
    path.write_text("\n".join(lines) + "\n")
    reader = CsvReader(_source(path), numeric={"z"})
    assert reader.schema.field("z").type == pa.float64()
    assert reader.schema.field("id").type == pa.int64()
    chunks = list(reader.chunks(1000))
    assert sum(c.table.num_rows for c in chunks) == 2999
    assert [r["row"] for c in chunks for r in c.rejected] == [3001]
    untyped = CsvReader(_source(path))
    assert untyped.schema.field("z").type == pa.string()
    assert sum(c.table.num_rows for c in untyped.chunks(1000)) == 3000


def test_csv_chunks_are_exact_and_resumable(tmp_path):
    n = 10_500
    path = tmp_path / "c.csv"
    path.write_text("id,z\n" + "".join(f"{i},{i * 1e-4}\n" for i in range(n)))
    reader = CsvReader(_source(path), block_bytes=20_000)  # many blocks
    chunks = list(reader.chunks(3000))
    assert [c.table.num_rows for c in chunks] == [3000, 3000, 3000, 1500]
    ids = np.concatenate([c.table.column("id").to_numpy() for c in chunks])
    assert np.array_equal(ids, np.arange(n))
    resumed = list(reader.chunks(3000, start_chunk=2))
    assert [c.index for c in resumed] == [2, 3]
    assert resumed[0].table.equals(chunks[2].table)


def test_csv_header_mismatch_names_the_file(tmp_path):
    a = tmp_path / "a.csv"
    a.write_text("id,z\n1,0.1\n")
    b = tmp_path / "b.csv"
    b.write_text("id,redshift\n1,0.1\n")
    target = CsvReader(_source(a)).schema
    with pytest.raises(InputError, match="b.csv"):
        list(open_reader(_source(b)).chunks(1000, target=target))


def test_empty_csv_is_refused(tmp_path):
    path = tmp_path / "empty.csv"
    path.write_text("")
    with pytest.raises(InputError, match="empty.csv"):
        CsvReader(_source(path))


def test_parquet_reading_does_not_accumulate_memory(tmp_path):
    # Regression: with pyarrow's default pre_buffer, every row group read so far stayed
    # allocated while iter_batches ran, so memory grew with the file.
    n_groups, rows = 40, 20_000
    path = tmp_path / "long.parquet"
    table = pa.table({f"c{i}": np.random.default_rng(i).random(rows) for i in range(8)})
    with pq.ParquetWriter(path, table.schema) as w:
        for _ in range(n_groups):
            w.write_table(table)
    reader = ParquetReader(_source(path))
    allocated = []
    for chunk in reader.chunks(rows):
        allocated.append(pa.total_allocated_bytes())
        del chunk
    assert len(allocated) == n_groups
    one_chunk = table.nbytes
    assert allocated[-1] - allocated[4] < 3 * one_chunk
