"""Parquet integrity: page checksums verified on input and written on output; a damaged page
refuses the file naming its rows, never becomes changed values; a repeated column name is a
one-line refusal.

Source: Apache Parquet format specification, ``PageHeader.crc`` (CRC-32 of the page's
compressed bytes, optional; written by pyarrow with ``write_page_checksum``).
"""

from __future__ import annotations

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from annotator.cli import main
from annotator.errors import InputError
from annotator.io.parquet import ParquetReader
from annotator.io.readers import expand_inputs

N = 3_000
GROUP = 1_000


def _table():
    rng = np.random.default_rng(5)
    return pa.table({"objid": np.arange(N, dtype=np.int64),
                     "z": rng.uniform(0.01, 2.0, N), "mag_cyan": rng.normal(22, 1, N)})


def _flip_inside_group(path, table, group: int, column="z"):
    """Flip one byte of a value stored in row group ``group`` (found by its exact bytes, so
    the byte is inside a data page, not a header): the page's CRC no longer matches."""
    row = group * GROUP + GROUP // 2
    pattern = np.float64(table.column(column)[row].as_py()).tobytes()
    data = bytearray(path.read_bytes())
    at = data.find(pattern)
    assert at > 0 and data.find(pattern, at + 1) < 0  # found once: the value's own bytes
    data[at + 2] ^= 0x5A
    path.write_bytes(bytes(data))
    return row


def _write(path, table, checksums=True):
    pq.write_table(table, path, row_group_size=GROUP, compression="none",
                   use_dictionary=False, write_page_checksum=checksums)


def test_flipped_byte_in_a_checksummed_page_refuses_the_file_naming_its_rows(tmp_path):
    table = _table()
    path = tmp_path / "damaged.parquet"
    _write(path, table)
    row = _flip_inside_group(path, table, group=1)
    # without verification the damage is silent: a changed value comes back (proves the flip)
    plain = pq.read_table(path).column("z")[row].as_py()
    assert plain != table.column("z")[row].as_py()
    reader = ParquetReader(expand_inputs([path])[0])
    chunks = reader.chunks(300)
    first = next(chunks)  # rows 1-300 lie in row group 0, which is intact
    assert first.table.equals(table.slice(0, 300))
    with pytest.raises(InputError, match=r"damaged.parquet: unreadable Parquet data in rows "
                                         r"1001 to 2000 \(row group 1: .*CRC"):
        list(chunks)


def test_a_damaged_input_never_reaches_the_output(tmp_path, capsys):
    table = _table()
    path = tmp_path / "damaged.parquet"
    _write(path, table)
    _flip_inside_group(path, table, group=2)
    out = tmp_path / "out"
    assert main(["run", str(path), "--out", str(out), "--chunk-rows", "1000", "--quiet"]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert err[-1].startswith("annotator: error: input ") and "rows 2001 to 3000" in err[-1]
    assert "Traceback" not in "\n".join(err)
    assert not (out / "manifest.json").exists()
    written = [pq.read_table(p) for p in sorted(out.glob("part-*.parquet"))]
    for part in written:  # whatever was committed is intact rows only
        ids = part.column("objid").to_numpy()
        assert ids.max() < 2000
        np.testing.assert_array_equal(part.column("z").to_numpy(),
                                      table.column("z").to_numpy()[ids])


def test_outputs_carry_page_checksums(tmp_path, catalogue_parquet):
    """Our parts are checked when read back: damage one, and annotator's reader refuses it."""
    out = tmp_path / "out"
    assert main(["run", str(catalogue_parquet), "--out", str(out), "--quiet",
                 "--config", str(_uncompressed_job(tmp_path))]) == 0
    part = sorted(out.glob("part-*.parquet"))[0]
    meta = pq.read_metadata(part)
    names = meta.schema.to_arrow_schema().names
    chunk = meta.row_group(0).column(names.index("comoving_distance_mpc"))
    # the middle of the column chunk's bytes: inside its (single) data page, past the header
    at = chunk.data_page_offset + chunk.total_compressed_size // 2
    data = bytearray(part.read_bytes())
    data[at] ^= 0x01
    part.write_bytes(bytes(data))
    assert pq.read_table(part).num_rows == meta.num_rows  # unverified: reads, values changed
    with pytest.raises(InputError, match="CRC"):
        list(ParquetReader(expand_inputs([part])[0]).chunks(10_000))


def _uncompressed_job(tmp_path):
    job = tmp_path / "job.toml"
    job.write_text('[output]\ncompression = "none"\n')
    return job


def test_a_repeated_column_name_is_one_line(tmp_path, capsys):
    path = tmp_path / "twice.parquet"
    schema = pa.schema([("objid", pa.int64()), ("z", pa.float64()), ("z", pa.float64())])
    table = pa.Table.from_arrays([pa.array([1, 2]), pa.array([0.1, 0.2]),
                                  pa.array([0.3, 0.4])], schema=schema)
    pq.write_table(table, path)
    with pytest.raises(InputError, match="twice.parquet: column name 'z' appears 2 times"):
        ParquetReader(expand_inputs([path])[0])
    assert main(["run", str(path), "--out", str(tmp_path / "o"), "--quiet"]) == 2
    err = capsys.readouterr().err
    assert "column name 'z' appears 2 times" in err and "Traceback" not in err
    assert len(err.strip().splitlines()) == 1
