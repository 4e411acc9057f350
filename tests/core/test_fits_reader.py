"""FITS binary tables: every stored type decoded as the FITS Standard says, checked value by
value against astropy.io.fits reading the same file (an outside reference library), plus HDU
choice, chunking, resume and counts through ``annotator run``.

Sources: FITS Standard 4.0 (Chen et al. 2018, IAU FITS Working Group), sect. 7.3.1 Table 18
(TFORM codes), sect. 7.3.2 and Table 19 (TSCAL/TZERO, offset-integer convention for unsigned
integers), sect. 7.3.3 (TNULL, NaN, logical null, string termination).
"""

from __future__ import annotations

import gzip
import json
import shutil
import xml.etree.ElementTree as ET

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

fits = pytest.importorskip("astropy.io.fits")

from annotator.cli import main  # noqa: E402
from annotator.errors import ConfigError, InputError  # noqa: E402
from annotator.io.fits import FitsReader  # noqa: E402
from annotator.io.readers import expand_inputs, open_reader  # noqa: E402

N = 1_000


def _source(path):
    return expand_inputs([path])[0]


def _typed_columns(n: int = N, seed: int = 3):
    """Columns of every kind the reader handles, with nulls and edge values in place."""
    rng = np.random.default_rng(seed)
    z = rng.uniform(0.01, 2.5, n).astype(np.float64)
    z[[5, 17]] = np.nan
    flux = rng.normal(100.0, 10.0, n).astype(np.float32)
    flux[9] = np.nan
    counts = rng.integers(-1000, 1000, n).astype(np.int32)
    counts[[2, 40]] = -99
    u16 = rng.integers(0, 2**16, n, dtype=np.uint64).astype(np.uint16)
    u16[:2] = [0, 65535]
    u32 = rng.integers(0, 2**32, n, dtype=np.uint64).astype(np.uint32)
    u32[:2] = [0, 2**32 - 1]
    u64 = rng.integers(0, 2**63, n, dtype=np.uint64) * np.uint64(2) + np.uint64(1)
    u64[:2] = [0, 2**64 - 1]
    names = np.array([f"QDS-{i:05d}" if i % 7 else f"Q{i}" for i in range(n)])
    good = rng.random(n) < 0.5
    mags = rng.normal(22.0, 1.0, (n, 5)).astype(np.float32)  # violet .. infrared
    cells = np.arange(n * 6, dtype=np.int16).reshape(n, 2, 3)
    bits = rng.random((n, 11)) < 0.5
    mag_raw = rng.integers(-29999, 30000, n).astype(np.int16)
    mag_raw[[4, 8]] = -30000  # TNULL6, set below
    return [
        fits.Column(name="objid", format="K", array=np.arange(n, dtype=np.int64) + 7_000_000),
        fits.Column(name="ra", format="D", unit="deg", array=rng.uniform(150, 160, n)),
        fits.Column(name="z", format="D", array=z),
        fits.Column(name="flux", format="E", unit="uJy", array=flux),
        fits.Column(name="counts", format="J", null=-99, array=counts),
        fits.Column(name="mag_raw", format="I", array=mag_raw),
        fits.Column(name="u16", format="I", bzero=32768, array=u16),
        fits.Column(name="u32", format="J", bzero=2147483648, array=u32),
        fits.Column(name="u64", format="K", bzero=9223372036854775808, array=u64),
        fits.Column(name="name", format="12A", array=names),
        fits.Column(name="good", format="L", array=good),
        fits.Column(name="mags", format="5E", unit="mag", array=mags),
        fits.Column(name="cells", format="6I", dim="(3,2)", array=cells),
        fits.Column(name="bits", format="11X", array=bits),
    ]


def write_typed_fits(path, n: int = N, *, name: str = "QUILLFIELD") -> None:
    """A primary HDU, an image extension, then the table; TSCAL/TZERO/TNULL set on the
    stored integers of ``mag_raw`` after the fact (stored values stay as written)."""
    table = fits.BinTableHDU.from_columns(_typed_columns(n), name=name)
    table.header.comments["TTYPE2"] = "right ascension, ICRS"
    table.header["TDISP3"] = "F8.5"
    image = fits.ImageHDU(np.zeros((4, 4), dtype=np.float32), name="PREVIEW")
    fits.HDUList([fits.PrimaryHDU(), image, table]).writeto(path, overwrite=True)
    with fits.open(path, mode="update") as hdul:
        h = hdul[2].header
        h["TSCAL6"] = 0.001
        h["TZERO6"] = 20.0
        h["TNULL6"] = -30000


@pytest.fixture(scope="module")
def typed_fits(tmp_path_factory):
    path = tmp_path_factory.mktemp("fits") / "quillfield.fits"
    write_typed_fits(path)
    return path


def _ours(path, chunk_rows=N, **kw) -> pa.Table:
    reader = FitsReader(_source(path), **kw)
    return pa.concat_tables(c.table for c in reader.chunks(chunk_rows))


def _astropy(path, hdu=2):
    with fits.open(path) as hdul:
        return hdul[hdu].data.copy(), hdul[hdu].header.copy()


def test_every_column_matches_astropy_value_by_value(typed_fits):
    ours = _ours(typed_fits, chunk_rows=300)
    ref, header = _astropy(typed_fits)
    assert ours.num_rows == N and ours.column_names == list(ref.names)

    def col(name):
        return ours.column(name).combine_chunks()

    # integers without scaling: as stored
    assert col("objid").type == pa.int64()
    np.testing.assert_array_equal(col("objid").to_numpy(), ref["objid"])
    # floats: NaN is the null of E/D columns (Standard 4.0, sect. 7.3.3)
    for name in ("z", "flux"):
        values = ref[name]
        assert col(name).is_null().to_pylist() == list(np.isnan(values))
        kept = ~np.isnan(values)
        np.testing.assert_array_equal(col(name).to_numpy(zero_copy_only=False)[kept],
                                      values[kept])
    assert col("flux").type == pa.float32()
    # TNULL compares the stored integer (sect. 7.3.2): -99 is null, everything else as stored
    raw_counts = ref["counts"]
    assert col("counts").is_null().to_pylist() == list(raw_counts == -99)
    assert col("counts").fill_null(-99).to_pylist() == raw_counts.tolist()
    # TSCAL/TZERO: physical = TZERO + TSCAL * stored (sect. 7.3.2, eq. 7); TNULL before scaling
    physical = ref["mag_raw"]  # astropy applies TSCAL/TZERO itself
    assert col("mag_raw").type == pa.float64()
    mag = col("mag_raw").to_numpy(zero_copy_only=False)
    nulls = col("mag_raw").is_null().to_numpy(zero_copy_only=False)
    assert list(np.flatnonzero(nulls)) == [4, 8]
    np.testing.assert_allclose(mag[~nulls], physical[~nulls], rtol=0, atol=1e-12)
    np.testing.assert_allclose(physical[nulls], 20.0 + 0.001 * -30000, atol=1e-9)
    # unsigned through TZERO = 2^15, 2^31, 2^63 (Table 19): exact unsigned values
    for name, typ in (("u16", pa.uint16()), ("u32", pa.uint32()), ("u64", pa.uint64())):
        assert col(name).type == typ
        np.testing.assert_array_equal(col(name).to_numpy(), ref[name])
        assert ref[name].dtype.kind == "u"
    assert col("u64").to_pylist()[:2] == [0, 2**64 - 1]
    # strings trimmed of trailing blanks (sect. 7.3.3.1); astropy trims the same way
    assert col("name").to_pylist() == [str(s) for s in ref["name"]]
    # logical as bool
    assert col("good").type == pa.bool_()
    assert col("good").to_pylist() == ref["good"].tolist()
    # vector and two-axis columns: fixed-size lists, same element order as astropy's arrays
    assert col("mags").type == pa.list_(pa.float32(), 5)
    np.testing.assert_array_equal(np.stack(col("mags").to_numpy(zero_copy_only=False)),
                                  ref["mags"])
    assert col("cells").type == pa.list_(pa.list_(pa.int16(), 3), 2)
    assert col("cells").to_pylist() == ref["cells"].tolist()
    # bits: a list of booleans, most significant bit first (astropy's order too)
    assert col("bits").to_pylist() == ref["bits"].tolist()
    assert header["TFORM14"] == "11X"


def test_logical_null_and_nul_terminated_strings(tmp_path):
    """Raw bytes patched into the data: a zero byte in an L column is null (sect. 7.3.3.1)
    and a NUL ends a string even with bytes after it."""
    path = tmp_path / "edge.fits"
    hdu = fits.BinTableHDU.from_columns([
        fits.Column(name="ok", format="L", array=np.array([True, False, True])),
        fits.Column(name="label", format="6A", array=np.array(["violet", "cyan", "amber"])),
    ])
    fits.HDUList([fits.PrimaryHDU(), hdu]).writeto(path)
    with fits.open(path) as hdul:
        offset = hdul.fileinfo(1)["datLoc"]
    data = bytearray(path.read_bytes())
    data[offset + 7 * 2] = 0  # row 3, column ok
    data[offset + 7 * 0 + 1: offset + 7 * 0 + 7] = b"vi\x00let"  # row 1, label
    path.write_bytes(bytes(data))
    t = _ours(path)
    assert t.column("ok").to_pylist() == [True, False, None]
    assert t.column("label").to_pylist() == ["vi", "cyan", "amber"]


def test_units_descriptions_and_tdisp_are_kept(typed_fits):
    schema = FitsReader(_source(typed_fits)).schema
    assert schema.field("ra").metadata[b"unit"] == b"deg"
    assert schema.field("ra").metadata[b"description"] == b"right ascension, ICRS"
    assert schema.field("z").metadata[b"fits.tdisp"] == b"F8.5"
    assert schema.field("mags").metadata[b"unit"] == b"mag"
    assert schema.field("objid").metadata is None


def test_hdu_by_number_and_name_and_clear_errors(typed_fits):
    default = FitsReader(_source(typed_fits))
    assert default.hdu_index == 2  # the first binary table, past the image extension
    assert FitsReader(_source(typed_fits), hdu=2).hdu_index == 2
    assert FitsReader(_source(typed_fits), hdu="quillfield").hdu_index == 2
    with pytest.raises(ConfigError, match=r"\[input\].hdu: 7 is not an HDU of .*HDUs 0 to 2"):
        FitsReader(_source(typed_fits), hdu=7)
    with pytest.raises(ConfigError, match="no HDU named 'CATALOG'.*'QUILLFIELD'"):
        FitsReader(_source(typed_fits), hdu="CATALOG")
    with pytest.raises(ConfigError, match="HDU 'PREVIEW' .* is a ImageHDU, not a binary table"):
        FitsReader(_source(typed_fits), hdu="PREVIEW")


def test_refusals_name_the_file_and_the_column(tmp_path):
    only_image = tmp_path / "image.fits"
    fits.HDUList([fits.PrimaryHDU(np.zeros(3))]).writeto(only_image)
    with pytest.raises(InputError, match="image.fits: holds no binary table"):
        FitsReader(_source(only_image))
    varlen = tmp_path / "varlen.fits"
    col = fits.Column(name="spectrum", format="PE()",
                      array=np.array([np.ones(3), np.ones(5)], dtype=object))
    fits.HDUList([fits.PrimaryHDU(), fits.BinTableHDU.from_columns([col])]).writeto(varlen)
    with pytest.raises(InputError, match="varlen.fits: column 'spectrum' .*variable-length"):
        FitsReader(_source(varlen))
    cplx = tmp_path / "complex.fits"
    col = fits.Column(name="phase", format="C", array=np.ones(2, dtype=np.complex64))
    fits.HDUList([fits.PrimaryHDU(), fits.BinTableHDU.from_columns([col])]).writeto(cplx)
    with pytest.raises(InputError, match="column 'phase' .*complex"):
        FitsReader(_source(cplx))
    twice = tmp_path / "twice.fits"
    hdu = fits.BinTableHDU.from_columns([
        fits.Column(name="z", format="D", array=np.ones(2)),
        fits.Column(name="zz", format="D", array=np.ones(2))])
    fits.HDUList([fits.PrimaryHDU(), hdu]).writeto(twice)
    with fits.open(twice, mode="update") as hdul:
        hdul[1].header["TTYPE2"] = "z"
    with pytest.raises(InputError, match="twice.fits: column name 'z' appears twice"):
        FitsReader(_source(twice))
    garbage = tmp_path / "garbage.fits"
    garbage.write_bytes(b"SIMPLE  = nonsense" + b" " * 100)
    with pytest.raises(InputError, match="garbage.fits: not a readable FITS file"):
        FitsReader(_source(garbage))


def test_truncated_table_names_the_rows(typed_fits, tmp_path):
    cut = tmp_path / "cut.fits"
    data = typed_fits.read_bytes()
    cut.write_bytes(data[: len(data) - 2880 * 3])
    reader = FitsReader(_source(cut))
    with pytest.raises(InputError, match=r"cut.fits: truncated: rows \d+ to 1000"):
        list(reader.chunks(400))


def test_chunks_are_deterministic_row_ranges_and_gzip_reads_the_same(typed_fits, tmp_path):
    reader = FitsReader(_source(typed_fits))
    whole = list(reader.chunks(300))
    assert [c.table.num_rows for c in whole] == [300, 300, 300, 100]
    resumed = list(reader.chunks(300, start_chunk=2))
    assert [c.index for c in resumed] == [2, 3]
    for a, b in zip(resumed, whole[2:]):
        assert a.table.equals(b.table)
    gz = tmp_path / "quillfield.fits.gz"
    with open(typed_fits, "rb") as src, gzip.open(gz, "wb") as dst:
        shutil.copyfileobj(src, dst)
    zipped = list(FitsReader(_source(gz)).chunks(300, start_chunk=1))
    for a, b in zip(zipped, whole[1:]):
        assert a.table.equals(b.table)


def test_open_reader_and_the_dask_task_read_the_same_chunk(typed_fits):
    from annotator.engines.dask import FitsChunkTask

    reader = open_reader(_source(typed_fits), hdu="QUILLFIELD")
    third = list(reader.chunks(250))[2]
    task = FitsChunkTask(_source(typed_fits), 2, 250, reader.schema, "QUILLFIELD")
    assert task.read().table.equals(third.table)


def _catalogue_fits(path, n=2_500):
    rng = np.random.default_rng(11)
    z = rng.uniform(0.01, 3.0, n)
    z[:3] = np.nan
    cols = [
        fits.Column(name="objid", format="K", array=np.arange(n, dtype=np.int64)),
        fits.Column(name="ra", format="D", unit="deg", array=rng.uniform(150, 160, n)),
        fits.Column(name="dec", format="D", unit="deg", array=rng.uniform(-5, 5, n)),
        fits.Column(name="z", format="D", array=z),
        fits.Column(name="mag_amber", format="E", unit="mag",
                    array=rng.normal(21, 1, n).astype(np.float32)),
        fits.Column(name="mags", format="5E", unit="mag",
                    array=rng.normal(21, 1, (n, 5)).astype(np.float32)),
    ]
    hdu = fits.BinTableHDU.from_columns(cols, name="CATALOGUE")
    fits.HDUList([fits.PrimaryHDU(), hdu]).writeto(path)
    return n


def test_run_on_fits_reconciles_carries_units_and_resumes(tmp_path):
    src = tmp_path / "quillfield_deep.fits"
    n = _catalogue_fits(src)
    out = tmp_path / "out"
    args = ["run", str(src), "--out", str(out), "--chunk-rows", "1000", "--quiet"]
    assert main(args) == 0
    m = json.loads((out / "manifest.json").read_text())
    assert m["rows_read"] == n == m["rows_written"] + m["rows_rejected"]
    assert m["inputs"][0]["format"] == "fits"
    parts = sorted(out.glob("part-*.parquet"))
    assert len(parts) == 3
    table = pa.concat_tables(pq.read_table(p) for p in parts)
    with fits.open(src) as hdul:
        ref = hdul[1].data
        np.testing.assert_array_equal(table.column("objid").to_numpy(), ref["objid"])
        np.testing.assert_array_equal(table.column("mag_amber").to_numpy(), ref["mag_amber"])
    assert table.column("z").null_count == 3
    # TUNITn reaches the VOParquet header of every part (VOParquet 1.0: FIELD unit)
    content = pq.read_metadata(parts[0]).metadata[b"IVOA.VOTable-Parquet.content"]
    ns = {"v": "http://www.ivoa.net/xml/VOTable/v1.3"}
    units = {f.get("name"): f.get("unit")
             for f in ET.fromstring(content).iterfind(".//v:FIELD", ns)}
    assert units["ra"] == "deg" and units["mag_amber"] == "mag"
    assert units["comoving_distance_mpc"] == "Mpc"
    fields = {f.get("name"): f for f in ET.fromstring(content).iterfind(".//v:FIELD", ns)}
    assert fields["mags"].get("datatype") == "float" and fields["mags"].get("arraysize") == "5"
    # resume: drop the last part and its checkpoint record, as a crash after part 2 leaves it
    reference = table
    log = out / "_state" / "checkpoint.jsonl"
    lines = log.read_text().splitlines(keepends=True)
    log.write_text("".join(lines[:2]))
    parts[2].unlink()
    (out / "manifest.json").unlink()
    assert main(args[:-1] + ["--resume", "--quiet"]) == 0
    again = pa.concat_tables(pq.read_table(p) for p in sorted(out.glob("part-*.parquet")))
    assert again.equals(reference)
    m2 = json.loads((out / "manifest.json").read_text())
    assert m2["rows_read"] == n == m2["rows_written"] + m2["rows_rejected"]


def test_hdu_from_the_job_file_and_a_wrong_one_is_one_line(tmp_path, capsys):
    src = tmp_path / "cat.fits"
    _catalogue_fits(src, n=50)
    job = tmp_path / "job.toml"
    job.write_text(f'[input]\npaths = ["{src}"]\nhdu = "CATALOGUE"\n[output]\ndir = "o"\n')
    assert main(["run", "--config", str(job), "--quiet"]) == 0
    assert json.loads((tmp_path / "o" / "manifest.json").read_text())["rows_written"] == 50
    job.write_text(f'[input]\npaths = ["{src}"]\nhdu = 5\n[output]\ndir = "o2"\n')
    assert main(["run", "--config", str(job), "--quiet"]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert err[-1].startswith("annotator: error: [input].hdu: 5 is not an HDU of")
    assert "Traceback" not in "\n".join(err)


def test_without_astropy_a_fits_input_is_one_line(typed_fits, monkeypatch, capsys, tmp_path):
    import sys

    monkeypatch.setitem(sys.modules, "astropy.io.fits", None)  # import now raises ImportError
    monkeypatch.setitem(sys.modules, "astropy.io", None)
    assert main(["run", str(typed_fits), "--out", str(tmp_path / "o"), "--quiet"]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert err == [f"annotator: error: input {typed_fits}: FITS input needs astropy: "
                   f"pip install 'annotator[fits]'"]
