"""FITS binary table -> annotated Parquet: throughput and peak memory against the I/O floor.

One synthetic FITS table (Quillfield Deep Survey columns: ids, positions, redshift and error,
five magnitudes, a flag with TNULL, an unsigned id through TZERO), then, each in its own
process (peak RSS is that process's own):

1. ``annotator run`` FITS -> annotated Parquet, every built-in annotator;
2. I/O floors, no annotation: read the same FITS in chunks of ``--chunk-rows`` rows and write
   each chunk as a Parquet part with the project's writer settings
   (``annotator.io.writer.parquet_write_options``, zstd):
   a. **astropy**: ``astropy.io.fits`` alone, ``memmap=True``, ``data[a:b]`` row slices, each
      column converted by astropy (TSCAL/TZERO applied by it);
   b. **fitsio**: ``fitsio`` (cfitsio) alone, ``hdu[a:b]`` row-range reads (skipped when fitsio
      is not installed);
   c. **annotator's reader**: ``FitsReader`` (astropy-parsed header, rows read by byte range
      and decoded with numpy), the path ``annotator run`` uses.

The ratio ``annotate / floor`` is printed against each floor. With ``--repeat R`` the floors
run R times, interleaved (a, b, c, a, b, c, ...), and the best and the median time of each are
printed: on a shared machine a single run of each is mostly noise.

    python benchmarks/bench_fits.py                  # 10 M rows (~600 MB of FITS)
    python benchmarks/bench_fits.py --rows 200000    # quick
"""

from __future__ import annotations

import argparse
import os
import shutil
import sys
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent))

from _common import DATA, OUT, annotator_cmd, measured, python_cmd  # noqa: E402

BANDS = ("violet", "cyan", "amber", "crimson", "infrared")

WRITE_PART = r"""
import os, pyarrow as pa, pyarrow.parquet as pq
from annotator.io.writer import parquet_write_options
def write_part(table, dst, i):
    pq.write_table(table, os.path.join(dst, f"part-{i:06d}.parquet"),
                   row_group_size=table.num_rows,
                   **parquet_write_options(table.schema, "zstd"))
"""

FLOOR_ASTROPY = WRITE_PART + r"""
import sys, numpy as np
from astropy.io import fits
src, dst, n = sys.argv[1], sys.argv[2], int(sys.argv[3])
os.makedirs(dst, exist_ok=True)
with fits.open(src, memmap=True) as hdul:
    data = hdul[1].data
    for i, a in enumerate(range(0, len(data), n)):
        rows = data[a:a + n]
        cols = {name: np.asarray(rows[name]).astype(rows[name].dtype.newbyteorder("="))
                for name in rows.names}
        write_part(pa.table(cols), dst, i)
"""

FLOOR_FITSIO = WRITE_PART + r"""
import sys, numpy as np, fitsio
src, dst, n = sys.argv[1], sys.argv[2], int(sys.argv[3])
os.makedirs(dst, exist_ok=True)
with fitsio.FITS(src) as f:
    hdu = f[1]
    total = hdu.get_nrows()
    for i, a in enumerate(range(0, total, n)):
        rows = hdu[a:min(a + n, total)]
        cols = {name: rows[name].astype(rows[name].dtype.newbyteorder("="))
                for name in rows.dtype.names}
        write_part(pa.table(cols), dst, i)
"""

FLOOR_OURS = WRITE_PART + r"""
import sys
from pathlib import Path
from annotator.io.fits import FitsReader
from annotator.io.readers import Source
src, dst, n = sys.argv[1], sys.argv[2], int(sys.argv[3])
os.makedirs(dst, exist_ok=True)
reader = FitsReader(Source(0, Path(src), "fits", os.path.getsize(src)))
for chunk in reader.chunks(n):
    write_part(chunk.table, dst, chunk.index)
"""


def synthetic_fits(path: Path, rows: int, *, seed: int = 1, chunk: int = 1_000_000) -> Path:
    """Write the table in chunks (bounded memory): astropy makes the header, rows are appended
    as big-endian records, the data padded to a 2880-byte block (FITS Standard 4.0, sect. 3.3)."""
    from astropy.io import fits

    if path.exists():
        return path
    path.parent.mkdir(parents=True, exist_ok=True)
    fmts = [("objid", "K", None), ("ra", "D", "deg"), ("dec", "D", "deg"), ("z", "D", None),
            ("z_err", "E", None)] + [(f"mag_{b}", "E", "mag") for b in BANDS] + \
        [("quality", "J", None), ("tile", "I", None)]
    template = fits.BinTableHDU.from_columns(
        [fits.Column(name=n, format=f, unit=u, array=np.zeros(1)) for n, f, u in fmts])
    header = template.header
    header["NAXIS2"] = rows
    header["TNULL11"] = -1
    header["TZERO12"] = 32768  # tile: uint16 through TZERO (Standard 4.0, Table 19)
    dtype = np.dtype([("objid", ">i8"), ("ra", ">f8"), ("dec", ">f8"), ("z", ">f8"),
                      ("z_err", ">f4")] + [(f"mag_{b}", ">f4") for b in BANDS] +
                     [("quality", ">i4"), ("tile", ">i2")])
    assert dtype.itemsize == header["NAXIS1"]
    rng = np.random.default_rng(seed)
    tmp = path.with_name(path.name + ".tmp")
    with open(tmp, "wb") as fh:
        fh.write(fits.PrimaryHDU().header.tostring().encode("ascii"))
        fh.write(header.tostring().encode("ascii"))
        for start in range(0, rows, chunk):
            n = min(chunk, rows - start)
            rec = np.empty(n, dtype=dtype)
            rec["objid"] = np.arange(start, start + n)
            rec["ra"] = rng.uniform(30.0, 40.0, n)
            rec["dec"] = rng.uniform(-2.0, 2.0, n)
            z = rng.gamma(2.0, 0.35, n)
            rec["z"] = z
            rec["z_err"] = 0.03 * (1 + z)
            for b in BANDS:
                rec[f"mag_{b}"] = rng.normal(22.0, 1.2, n)
            rec["quality"] = np.where(rng.random(n) < 0.01, -1, rng.integers(0, 100, n))
            rec["tile"] = (rng.integers(0, 65536, n) - 32768).astype(np.int16)
            fh.write(rec.tobytes())
        fh.write(b"\0" * (-(rows * dtype.itemsize) % 2880))
    os.replace(tmp, path)
    return path


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--rows", type=int, default=10_000_000)
    ap.add_argument("--chunk-rows", type=int, default=250_000)
    ap.add_argument("--repeat", type=int, default=2, help="interleaved rounds of the floors")
    args = ap.parse_args()
    rows, n = args.rows, args.chunk_rows
    src = synthetic_fits(DATA / f"bench_{rows}.fits", rows)
    print(f"FITS table: {rows:,} rows, {src.stat().st_size / 1e6:.0f} MB; chunks of {n:,} rows; "
          f"load average {os.getloadavg()[0]:.2f}")

    out = OUT / f"fits_{rows}"
    shutil.rmtree(out, ignore_errors=True)
    t_ann, peak_ann = measured(annotator_cmd("run", str(src), "--out", str(out), "--quiet",
                                             "--chunk-rows", str(n)))
    shutil.rmtree(out, ignore_errors=True)
    print(f"{'':<34} {'s':>8} {'rows/s':>12} {'peak MiB':>9} {'annotate/this':>14}")
    print(f"{'annotator run (FITS -> annotated)':<34} {t_ann:>8.2f} {rows / t_ann:>12,.0f} "
          f"{peak_ann:>9.0f} {1.0:>14.2f}", flush=True)

    floors = [("floor: astropy.io.fits alone", FLOOR_ASTROPY),
              ("floor: fitsio alone", FLOOR_FITSIO),
              ("floor: annotator's FITS reader", FLOOR_OURS)]
    try:
        import fitsio  # noqa: F401
    except ImportError:
        print(f"{'floor: fitsio alone':<34} skipped (pip install fitsio)")
        floors = [f for f in floors if "fitsio" not in f[0]]
    times: dict[str, list[float]] = {label: [] for label, _ in floors}
    peaks: dict[str, float] = {label: 0.0 for label, _ in floors}
    for _ in range(max(args.repeat, 1)):
        for label, code in floors:
            dst = OUT / f"fits_{rows}_floor"
            shutil.rmtree(dst, ignore_errors=True)
            t, peak = measured(python_cmd(code, str(src), str(dst), str(n)))
            shutil.rmtree(dst, ignore_errors=True)
            times[label].append(t)
            peaks[label] = max(peaks[label], peak)
    print(f"floors, {args.repeat} interleaved round(s): best (median) seconds")
    for label, _ in floors:
        best, median = min(times[label]), float(np.median(times[label]))
        print(f"{label:<34} {best:>8.2f} {rows / best:>12,.0f} {peaks[label]:>9.0f} "
              f"{t_ann / best:>14.2f}   (median {median:.2f} s)", flush=True)
    print(f"load average after: {os.getloadavg()[0]:.2f}")


if __name__ == "__main__":
    main()
