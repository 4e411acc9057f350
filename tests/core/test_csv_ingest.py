"""CSV ingest end to end (``annotator run``): types from the job, missing tokens, sentinels,
quotes, encodings, line ends. Each case of issue 12 that concerns CSV is a regression test here.

Sources: quoting rules are RFC 4180 (2005), section 2 (fields may be enclosed in double quotes;
a quote inside a quoted field is doubled). Missing-value tokens and sentinel values (-99 for a
non-detection) are common practice in survey exports, not a standard. Everything else checks
the reader against the text the test wrote (counts, line numbers, values): consistency checks
against the input itself.
"""

from __future__ import annotations

import json

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

import annotator.io.csv as csvmod
from annotator.cli import main
from annotator.cosmology import preset


@pytest.fixture
def small_blocks(monkeypatch):
    """Small blocks and a small type sample, so 'late in the file' needs few rows."""
    monkeypatch.setattr(csvmod, "CSV_BLOCK_BYTES", 4096)
    monkeypatch.setattr(csvmod, "SAMPLE_BYTES", 2048)


def _run(tmp_path, data: bytes, *, input_opts: str = "", name: str = "c.csv",
         chunk_rows: int = 1000, extra: str = ""):
    src = tmp_path / name
    src.write_bytes(data)
    job = tmp_path / "job.toml"
    job.write_text(f'[input]\npaths = ["{name}"]\n{input_opts}\n'
                   f'[output]\ndir = "out"\nchunk_rows = {chunk_rows}\n{extra}')
    rc = main(["run", "--config", str(job), "--quiet"])
    return rc, tmp_path / "out"


def _outputs(out):
    manifest = json.loads((out / "manifest.json").read_text())
    table = pa.concat_tables(pq.read_table(p) for p in sorted(out.glob("part-*.parquet")))
    rej = sorted((out / "rejected").glob("*.parquet")) if (out / "rejected").is_dir() else []
    rejected = pa.concat_tables(pq.read_table(p) for p in rej).to_pylist() if rej else []
    return manifest, table, rejected


def _reconciles(data: bytes, manifest, rejected) -> None:
    """rows_read = rows_written + rows_rejected, and every physical line is the header, a
    row read (written or set aside) or an empty line."""
    assert manifest["rows_read"] == manifest["rows_written"] + manifest["rows_rejected"]
    assert manifest["rows_rejected"] == len(rejected)
    lines = data.split(b"\n")
    if lines[-1] == b"":
        lines.pop()
    empty = sum(1 for ln in lines[1:] if not ln.rstrip(b"\r"))
    assert 1 + manifest["rows_read"] + empty == len(lines)


def test_integral_looking_early_values_then_decimals(tmp_path, small_blocks):
    # The redshift (read by the annotators) and a pass-through column both look integral in
    # the first blocks; decimals come much later. Nothing is refused or set aside.
    rows = ["id,z,flux"] + [f"{i},{['150.0', '1.0', '1e11', '0'][i % 4]},{i}"
                            for i in range(600)]
    rows += [f"{i},0.5,{i}.25" for i in range(600, 700)]
    data = ("\n".join(rows) + "\n").encode()
    rc, out = _run(tmp_path, data)
    assert rc == 0
    manifest, table, rejected = _outputs(out)
    _reconciles(data, manifest, rejected)
    assert manifest["rows_rejected"] == 0 and manifest["rows_written"] == 700
    assert table.schema.field("z").type == pa.float64()
    assert table.schema.field("flux").type == pa.float64()  # widened int64 -> float64
    assert table.schema.field("id").type == pa.int64()
    assert table.column("flux").to_pylist()[-1] == 699.25
    assert table.column("z").to_pylist()[:3] == [150.0, 1.0, 1e11]


def test_many_zero_redshifts_then_galaxies(tmp_path, small_blocks):
    # Scaled-down issue 12 case (200 000 stars at z = 0 before the galaxies): with a 2 KiB type
    # sample, 2 000 zeros fill every early block.
    rng = np.random.default_rng(5)
    z_gal = rng.uniform(0.05, 2.0, 500)
    rows = ["objid,z"] + [f"{i},0" for i in range(2000)] + \
        [f"{2000 + i},{z:.17g}" for i, z in enumerate(z_gal)]
    data = ("\n".join(rows) + "\n").encode()
    rc, out = _run(tmp_path, data)
    assert rc == 0
    manifest, table, rejected = _outputs(out)
    _reconciles(data, manifest, rejected)
    assert manifest["rows_written"] == 2500 and manifest["rows_rejected"] == 0
    dc = table.column("comoving_distance_mpc").to_numpy(zero_copy_only=False)[2000:]
    # consistency check against the project's own cosmology on the same redshifts
    np.testing.assert_allclose(dc, preset("planck2018").comoving_distance_mpc(z_gal),
                               rtol=1e-12)


def test_text_in_a_numeric_input_sets_aside_only_that_row(tmp_path, small_blocks):
    rows = ["id,z"] + [f"{i},{0.001 * (i + 1)}" for i in range(800)]
    rows[700] = "699,0.5x"  # physical line 701
    data = ("\n".join(rows) + "\n").encode()
    rc, out = _run(tmp_path, data)
    assert rc == 0
    manifest, table, rejected = _outputs(out)
    _reconciles(data, manifest, rejected)
    assert [(r["row"], r["raw"]) for r in rejected] == [(701, "699,0.5x")]
    assert rejected[0]["reason"] == "column 'z': text where a double belongs"


def test_unterminated_quote_sets_aside_its_line_and_reading_resumes(tmp_path):
    # Issue 12: 1 000 rows once read as 501, the rest swallowed into one field.
    rows = ["id,name,z"] + [f'{i},"obj {i}",0.{i % 9 + 1}' for i in range(1000)]
    rows[501] = '500,"obj 500,0.3'  # physical line 502: the quote never closes
    data = ("\n".join(rows) + "\n").encode()
    rc, out = _run(tmp_path, data)
    assert rc == 0
    manifest, table, rejected = _outputs(out)
    _reconciles(data, manifest, rejected)
    assert manifest["rows_read"] == 1000
    assert manifest["rows_written"] == 999
    assert [r["row"] for r in rejected] == [502]
    assert rejected[0]["reason"].startswith("line 502: a quoted field is not closed")
    assert rejected[0]["raw"] == '500,"obj 500,0.3'
    assert table.column("name").to_pylist()[500] == "obj 501"
    # RFC 4180 section 2.7: a doubled quote inside a quoted field is one quote
    assert "\n" not in "".join(table.column("name").to_pylist())


def test_quote_opened_mid_field_cannot_swallow_the_file(tmp_path):
    # Two quotes on the line (an even count) but the second opens a field that never closes.
    rows = ["id,name,z", '1,"a ""b"" c",0.1', '2,x"y,"z,0.2', "3,ok,0.3", "4,ok,0.4"]
    data = ("\n".join(rows) + "\n").encode()
    rc, out = _run(tmp_path, data)
    assert rc == 0
    manifest, table, rejected = _outputs(out)
    _reconciles(data, manifest, rejected)
    assert table.column("id").to_pylist() == [1, 3, 4]
    assert table.column("name").to_pylist()[0] == 'a "b" c'  # RFC 4180 section 2.7
    assert [r["row"] for r in rejected] == [3]


def test_quoted_field_spanning_lines_is_set_aside_line_by_line(tmp_path):
    rows = ["id,note,z", '1,"first\nsecond",0.1', "2,plain,0.2"]
    data = ("\n".join(rows) + "\n").encode()
    rc, out = _run(tmp_path, data)
    assert rc == 0
    manifest, table, rejected = _outputs(out)
    _reconciles(data, manifest, rejected)
    assert table.column("id").to_pylist() == [2]
    assert [r["row"] for r in rejected] == [2, 3]


@pytest.mark.parametrize("late", [False, True])
def test_latin1_bytes_set_aside_their_row_with_the_right_line(tmp_path, small_blocks, late):
    rows = [b"id,name,z"] + [f"{i},star{i},0.{i % 9 + 1}".encode() for i in range(900)]
    line = 850 if late else 3  # physical line numbers; 850 is well past the type sample
    rows[line - 1] = f"{line - 2},".encode() + "Se\xf1or".encode("latin-1") + b",0.4"
    data = b"\n".join(rows) + b"\n"
    rc, out = _run(tmp_path, data)
    assert rc == 0
    manifest, table, rejected = _outputs(out)
    _reconciles(data, manifest, rejected)
    assert [r["row"] for r in rejected] == [line]
    assert "not valid in utf-8" in rejected[0]["reason"]
    assert rejected[0]["reason"].startswith(f"line {line}:")
    assert rejected[0]["raw"] == f"{line - 2},Se\\xf1or,0.4"  # raw bytes kept, escaped
    # the same file, read as Latin-1: every row kept, the name decoded
    rc, out2 = _run(tmp_path, data, input_opts='encoding = "latin-1"',
                    extra="overwrite = true")
    assert rc == 0
    manifest, table, rejected = _outputs(out2)
    assert manifest["rows_rejected"] == 0
    assert table.column("name").to_pylist()[line - 2] == "Se\xf1or"


def test_int64_overflow_widens_the_column_or_sets_aside_only_its_row(tmp_path, small_blocks):
    big = "99999999999999999999"  # > 2**63 - 1
    rows = ["objid,z"] + [f"{i},0.{i % 9 + 1}" for i in range(700)]
    rows[650] = f"{big},0.3"  # line 651
    data = ("\n".join(rows) + "\n").encode()
    rc, out = _run(tmp_path, data)
    assert rc == 0
    manifest, table, rejected = _outputs(out)
    _reconciles(data, manifest, rejected)
    assert manifest["rows_rejected"] == 0
    assert table.schema.field("objid").type == pa.string()  # widened; no digit lost
    assert table.column("objid").to_pylist()[648:650] == ["648", big]
    # forced to int64 by column_types: only that row is set aside
    rc, out2 = _run(tmp_path, data, input_opts='column_types = { objid = "int64" }',
                    extra="overwrite = true")
    assert rc == 0
    manifest, table, rejected = _outputs(out2)
    _reconciles(data, manifest, rejected)
    assert [r["row"] for r in rejected] == [651]
    assert "int64" in rejected[0]["reason"]


def test_header_without_newline_is_a_header(tmp_path):
    data = b"id,z"
    rc, out = _run(tmp_path, data)
    assert rc == 0
    manifest, table, rejected = _outputs(out)
    assert (manifest["rows_read"], manifest["rows_rejected"]) == (0, 0)
    assert table.column_names[:2] == ["id", "z"]


def test_last_line_without_newline_is_a_row(tmp_path):
    data = b"id,z\n1,0.5\n2,0.7"
    rc, out = _run(tmp_path, data)
    assert rc == 0
    manifest, table, rejected = _outputs(out)
    _reconciles(data, manifest, rejected)
    assert table.column("z").to_pylist() == [0.5, 0.7]


def test_crlf_line_ends(tmp_path):
    data = b"id,name,z\r\n1,alpha,0.5\r\n\r\n2,beta,abc\r\n3,gamma,0.7\r\n"
    rc, out = _run(tmp_path, data)
    assert rc == 0
    manifest, table, rejected = _outputs(out)
    _reconciles(data, manifest, rejected)
    assert table.column("name").to_pylist() == ["alpha", "gamma"]  # no stray \r
    assert table.column("z").to_pylist() == [0.5, 0.7]
    assert [(r["row"], r["raw"]) for r in rejected] == [(4, "2,beta,abc")]


def test_default_missing_tokens_are_null_and_flagged_by_the_annotators(tmp_path):
    # common practice: empty, NA, N/A, null, NaN, nan and - mean "no value"
    tokens = ["", "NA", "N/A", "null", "NaN", "nan", "-"]
    rows = ["id,z,name"] + [f"{i},{t},{t}" for i, t in enumerate(tokens)] + ["99,0.5,x"]
    data = ("\n".join(rows) + "\n").encode()
    rc, out = _run(tmp_path, data)
    assert rc == 0
    manifest, table, rejected = _outputs(out)
    _reconciles(data, manifest, rejected)
    assert manifest["rows_rejected"] == 0
    assert table.column("z").to_pylist() == [None] * 7 + [0.5]
    assert table.column("name").to_pylist() == [None] * 7 + ["x"]
    assert table.column("annotation_flags").to_pylist() == ["redshift_missing"] * 7 + [""]


def test_missing_tokens_are_configurable(tmp_path):
    data = b"id,z\n1,?\n2,NA\n3,0.5\n"
    rc, out = _run(tmp_path, data, input_opts='missing_tokens = ["", "?"]')
    assert rc == 0
    manifest, table, rejected = _outputs(out)
    _reconciles(data, manifest, rejected)
    assert table.column("z").to_pylist() == [None, 0.5]
    assert [r["row"] for r in rejected] == [3]  # "NA" is text now


def test_sentinels_on_csv_are_null_and_flagged(tmp_path):
    data = b"id,z,mag_r\n1,0.5,-99\n2,-1,21.5\n3,0.7,99.0\n4,0.9,20.0\n"
    rc, out = _run(tmp_path, data,
                   input_opts="sentinels = { mag_r = [-99, 99], z = -1 }")
    assert rc == 0
    manifest, table, rejected = _outputs(out)
    _reconciles(data, manifest, rejected)
    assert table.column("mag_r").to_pylist() == [None, 21.5, None, 20.0]
    assert table.column("z").to_pylist() == [0.5, None, 0.7, 0.9]
    flags = table.column("annotation_flags").to_pylist()
    assert flags[0] == "sentinel_mag_r"
    assert set(flags[1].split(";")) == {"sentinel_z", "redshift_missing"}
    assert flags[3] == ""
    # a sentinel redshift never becomes a distance
    assert table.column("comoving_distance_mpc").to_pylist()[1] is None
    assert manifest["flags"]["counts"]["sentinel_mag_r"] == 2


def test_sentinels_on_parquet_input(tmp_path):
    src = tmp_path / "c.parquet"
    pq.write_table(pa.table({"id": pa.array([1, 2, 3], pa.int64()),
                             "z": [0.5, -99.0, 0.3],
                             "mag_r": pa.array([-999, 20, 21], pa.int32())}), src)
    job = tmp_path / "job.toml"
    job.write_text('[input]\npaths = ["c.parquet"]\n'
                   'sentinels = { z = -99, mag_r = [-999, -99] }\n[output]\ndir = "out"\n')
    assert main(["run", "--config", str(job), "--quiet"]) == 0
    manifest, table, rejected = _outputs(tmp_path / "out")
    assert table.column("z").to_pylist() == [0.5, None, 0.3]
    assert table.column("mag_r").to_pylist() == [None, 20, 21]
    assert table.schema.field("mag_r").type == pa.int32()  # type kept
    assert table.column("annotation_flags").to_pylist()[0] == "sentinel_mag_r"
    assert "sentinel_z" in table.column("annotation_flags").to_pylist()[1]
    assert table.column("luminosity_distance_mpc").to_pylist()[1] is None


@pytest.mark.parametrize("opts, key", [
    ("sentinels = { z = true }", "[input].sentinels.z"),
    ("sentinels = { nope = -99 }", "[input].sentinels.nope"),
    ('sentinels = { z = "x" }', "[input].sentinels.z"),
    ('encoding = "utf-16"', "[input].encoding"),
    ('encoding = "no-such-codec"', "[input].encoding"),
    ('missing_tokens = "NA"', "[input].missing_tokens"),
])
def test_bad_settings_name_the_key(tmp_path, capsys, opts, key):
    rc, _ = _run(tmp_path, b"id,z\n1,0.5\n", input_opts=opts)
    assert rc == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and key in err[0] and "Traceback" not in err[0]


def test_text_column_mapped_as_a_number_is_refused_in_one_line(tmp_path, capsys):
    rc, _ = _run(tmp_path, b"id,name\n1,alpha\n2,beta\n",
                 extra='[columns]\nredshift = "name"\n')
    assert rc == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "'name'" in err[0] and "holds no number" in err[0]


def test_utf8_byte_order_mark_is_not_part_of_the_first_name(tmp_path):
    # The UTF-8 byte-order mark (Unicode Standard, section 23.8) that some spreadsheet
    # programs write before the header.
    data = b"\xef\xbb\xbfid,z\r\n1,0.5\r\n"
    rc, out = _run(tmp_path, data)
    assert rc == 0
    manifest, table, rejected = _outputs(out)
    assert table.column_names[:2] == ["id", "z"]
    assert table.column("id").to_pylist() == [1]


def test_csv_after_a_parquet_input_takes_the_parquet_types(tmp_path):
    # The first input's types rule: a CSV read second is cast to them, and a cell that cannot
    # be cast sets its row aside (the Parquet rows keep their types).
    pq.write_table(pa.table({"id": pa.array([1, 2], pa.int64()), "z": [0.1, 0.2]}),
                   tmp_path / "a.parquet")
    data = b"id,z\n3,0.3\nQDS-4,0.4\n5,0.5\n"
    (tmp_path / "b.csv").write_bytes(data)
    job = tmp_path / "job.toml"
    job.write_text('[input]\npaths = ["a.parquet", "b.csv"]\n[output]\ndir = "out"\n')
    assert main(["run", "--config", str(job), "--quiet"]) == 0
    manifest, table, rejected = _outputs(tmp_path / "out")
    assert table.schema.field("id").type == pa.int64()
    assert table.column("id").to_pylist() == [1, 2, 3, 5]
    assert [(r["row"], r["raw"]) for r in rejected] == [(3, "QDS-4,0.4")]
    assert manifest["rows_read"] == manifest["rows_written"] + manifest["rows_rejected"] == 5


def test_a_column_without_any_value_is_text_and_keeps_every_row(tmp_path, small_blocks):
    rows = ["id,z,note"] + [f"{i},0.{i % 9 + 1}," for i in range(600)]
    data = ("\n".join(rows) + "\n").encode()
    rc, out = _run(tmp_path, data)
    assert rc == 0
    manifest, table, rejected = _outputs(out)
    _reconciles(data, manifest, rejected)
    assert table.schema.field("note").type == pa.string()
    assert table.column("note").null_count == 600
