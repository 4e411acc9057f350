"""The committed Quillfield sample and the demo, end to end through the real CLI.

Expected counts come from reading the sample files independently here (pyarrow for the
Parquet file, Python's csv module for the CSV one); the rule checked is the product's
(rows_read = rows_written + rows_rejected, rejected rows carry their line number, header =
line 1).  Sources: common practice for the CSV checks; the reconciliation rule is the
project's own requirement.
"""

from __future__ import annotations

import contextlib
import csv
import gzip
import io
import json
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

REPO = Path(__file__).resolve().parents[2]
SAMPLES = REPO / "sample_catalogues"

PARQUET = SAMPLES / "quillfield_sample.parquet"
CSV_GZ = SAMPLES / "quillfield_sample.csv.gz"
# The documented commands (DEVELOPERS.md, "Regenerating the committed samples").
PARQUET_COMMAND = ("python sample_catalogues/generate.py --rows 20000 --seed 20260101 "
                   "--out sample_catalogues/quillfield_sample.parquet")
CSV_COMMAND = ("python sample_catalogues/generate.py --rows 4000 --seed 20260102 "
               "--first-id 20001 --out sample_catalogues/quillfield_sample.csv.gz")
NUMERIC_TEXT = {"z_type", "sed_type"}


def scan_csv(path):
    """Independent reading of the CSV sample: (good rows as dicts, bad line numbers)."""
    text = gzip.decompress(path.read_bytes()).decode()
    rows = list(csv.reader(io.StringIO(text)))
    header = rows[0]
    good, bad = [], []
    for offset, fields in enumerate(rows[1:]):
        line = offset + 2
        if len(fields) != len(header):
            bad.append(line)
            continue
        record = dict(zip(header, fields))
        try:
            for name, value in record.items():
                if name in NUMERIC_TEXT or value == "":
                    continue
                if name == "photoz_pdf":  # a ';'-separated list of numbers
                    [float(v) for v in value.split(";")]
                    continue
                int(value) if name == "object_id" else float(value)
        except ValueError:
            bad.append(line)
            continue
        good.append(record)
    return header, good, bad


def test_sample_files_are_small_and_as_documented():
    assert PARQUET.stat().st_size + CSV_GZ.stat().st_size <= 5 * 1024 * 1024
    docs = (REPO / "DEVELOPERS.md").read_text()
    assert PARQUET_COMMAND in docs and CSV_COMMAND in docs


def _assert_same_table(a, b):
    assert a.column_names == b.column_names and a.num_rows == b.num_rows
    for name in a.column_names:
        x, y = a.column(name), b.column(name)
        if pa.types.is_list(x.type):  # the photo-z PDFs: same nulls, offsets and values
            x, y = x.combine_chunks(), y.combine_chunks()
            assert x.is_null().equals(y.is_null()) and x.offsets.equals(y.offsets), name
            x, y = x.values, y.values
        x, y = x.to_numpy(zero_copy_only=False), y.to_numpy(zero_copy_only=False)
        if x.dtype.kind == "f":
            # one unit in the last written decimal: a cosmology change at the 1e-9 level may
            # flip a rounding, nothing more
            np.testing.assert_allclose(x, y, rtol=0, atol=1.5e-4, equal_nan=True, err_msg=name)
        else:
            assert (x == y).all(), name


def test_committed_samples_regenerate_from_the_documented_commands(tmp_path, survey_model):
    from sample_catalogues.generate import generate

    generate(20000, tmp_path / "p.parquet", seed=20260101, model=survey_model)
    _assert_same_table(pq.read_table(PARQUET), pq.read_table(tmp_path / "p.parquet"))
    summary = generate(4000, tmp_path / "c.csv.gz", seed=20260102, first_id=20001,
                       model=survey_model)
    header, good, bad = scan_csv(CSV_GZ)
    _, good_new, bad_new = scan_csv(tmp_path / "c.csv.gz")
    assert bad == bad_new == [m["line"] for m in summary["malformed_lines"]]
    assert len(good) == len(good_new) == 4000 - len(bad)
    for old, new in zip(good, good_new):
        for name in header:
            if name in NUMERIC_TEXT or name in ("object_id", "photoz_pdf") or old[name] == "":
                assert old[name] == new[name]
            else:
                assert float(old[name]) == pytest.approx(float(new[name]), abs=1.5e-4)


@pytest.fixture(scope="module")
def demo_run(tmp_path_factory):
    """``sample_catalogues/demo.py --out DIR`` (what ``make demo`` runs), stdout captured."""
    import importlib.util

    spec = importlib.util.spec_from_file_location("quillfield_demo", SAMPLES / "demo.py")
    demo = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(demo)
    out = tmp_path_factory.mktemp("demo") / "demo_output"
    buffer = io.StringIO()
    with contextlib.redirect_stdout(buffer):
        status = demo.main(["--out", str(out)])
    return status, out, buffer.getvalue()


def test_demo_annotates_the_sample_with_counts_reconciling(demo_run):
    status, out, stdout = demo_run
    assert status == 0
    manifest = json.loads((out / "manifest.json").read_text())
    parquet = pq.read_table(PARQUET)
    header, good, bad = scan_csv(CSV_GZ)
    assert len(bad) == 8
    rows_in = parquet.num_rows + len(good) + len(bad)
    assert manifest["rows_read"] == rows_in == 24000
    assert manifest["rows_rejected"] == len(bad)
    assert manifest["rows_written"] + manifest["rows_rejected"] == manifest["rows_read"]
    written = sum(pq.ParquetFile(p).metadata.num_rows for p in out.glob("*.parquet"))
    assert written == manifest["rows_written"]

    z_parquet = parquet.column("z").to_numpy(zero_copy_only=False)
    missing = int(np.isnan(z_parquet).sum()) + sum(r["z"] == "" for r in good)
    negative = int((z_parquet < 0).sum()) + sum(r["z"] != "" and float(r["z"]) < 0 for r in good)
    assert missing > 0 and negative > 0
    counts = manifest["flags"]["counts"]
    assert counts["redshift_missing"] == missing
    assert counts["redshift_negative"] == negative
    assert f"rows read 24000 = written {24000 - len(bad)} + set aside {len(bad)}" in stdout
    assert str(out) in stdout.splitlines()[-1]


def test_malformed_csv_lines_are_set_aside_with_line_numbers(demo_run):
    _, out, _ = demo_run
    _, _, bad = scan_csv(CSV_GZ)
    rejected = pq.read_table(out / "rejected").to_pandas().sort_values("row")
    assert rejected["row"].tolist() == bad
    assert all(s.endswith("quillfield_sample.csv.gz") for s in rejected["source"])
    assert rejected["reason"].str.len().min() > 0
    text = gzip.decompress(CSV_GZ.read_bytes()).decode().splitlines()
    for line, raw in zip(rejected["row"], rejected["raw"]):
        # the raw text kept is the line's own text (fields may be re-joined by the reader)
        assert raw.split(",")[0] == text[line - 1].split(",")[0]
