"""Streaming readers: one interface, one batch type (Arrow tables of at most ``chunk_rows``).

Every reader yields :class:`Chunk` objects in a deterministic sequence: chunk ``k`` of a source
always holds the same rows, so a resumed run can skip exactly the chunks already committed.

The formats, by file name (:data:`FORMATS`; ``[input].format`` overrides), one module each:

* Parquet: :mod:`annotator.io.parquet` (``ParquetFile.iter_batches``, bounded memory, re-cut
  to exactly ``chunk_rows``; page checksums verified where present).
* CSV and CSV.gz: :mod:`annotator.io.csv` (rows that cannot be read are set aside with their
  physical line number, a reason and the raw text; see that module).
* FITS binary tables: :mod:`annotator.io.fits` (rows ``[k * n, (k + 1) * n)`` read by byte
  range).

Each reader hashes its file while reading it (``sha256()``, :mod:`annotator.io.hashing`):
the manifest's checksum costs no second read of the input.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path

import pyarrow as pa

from ..errors import InputError
from .fits import FITS_SUFFIXES
from .parquet import PARQUET_SUFFIXES, ParquetReader

CSV_SUFFIXES = (".csv", ".csv.gz", ".tsv", ".tsv.gz", ".txt", ".txt.gz")
#: format -> the file-name endings that select it (``[input].format = "auto"``)
FORMATS = {"parquet": PARQUET_SUFFIXES, "csv": CSV_SUFFIXES, "fits": FITS_SUFFIXES}


@dataclass(frozen=True)
class Source:
    """One input file."""

    index: int
    path: Path
    format: str  # a key of FORMATS: "parquet", "csv" or "fits"
    size_bytes: int


@dataclass
class Chunk:
    """Rows of one source, in order: the accepted ones and the ones set aside."""

    source: Source
    index: int
    table: pa.Table
    rejected: list[dict] = field(default_factory=list)
    # Progress (issue 16): bytes of the source file consumed once this chunk was read -- of the
    # compressed file for .gz, so a CSV.gz run shows a percentage and an ETA. None when the
    # reader does not tell; the local engine then estimates it from the row count.
    bytes_read: int | None = None

    @property
    def rows_read(self) -> int:
        return self.table.num_rows + len(self.rejected)


def _format_of(path: Path, fmt: str) -> str | None:
    if fmt != "auto":
        return fmt
    name = path.name.lower()
    for kind, suffixes in FORMATS.items():
        if name.endswith(suffixes):
            return kind
    return None


def expand_inputs(paths: list[Path], fmt: str = "auto") -> list[Source]:
    """Files stay as given; folders give their Parquet, CSV or FITS files, sorted by path."""
    sources: list[Source] = []
    for path in paths:
        path = Path(path)
        if path.is_dir():
            files = sorted(
                p for p in path.rglob("*")
                if p.is_file() and not p.name.startswith((".", "_")) and _format_of(p, fmt)
            )
            if not files:
                raise InputError(f"input folder {path}: holds no Parquet, CSV or FITS files")
        elif path.is_file():
            files = [path]
        else:
            raise InputError(f"input {path}: no such file or folder")
        for f in files:
            kind = _format_of(f, fmt)
            if kind is None:
                raise InputError(
                    f"input {f}: cannot tell the format from the name "
                    f"(use .parquet, .csv, .csv.gz, .fits or .fits.gz, or set [input].format)"
                )
            sources.append(Source(len(sources), f.resolve(), kind, f.stat().st_size))
    return sources


def open_reader(source: Source, *, delimiter: str = ",", column_types: dict | None = None,
                encoding: str = "utf-8", missing_tokens=None, numeric=(),
                hdu: int | str | None = None, checksum: bool = True):
    """The reader for a source's format.

    Options a format has no use for are ignored (Parquet and FITS carry their own types and
    nulls). ``hdu`` chooses a FITS file's table (see ``FitsReader``).
    ``numeric`` names the columns the job reads as numbers (see ``CsvReader``).
    Every reader has ``sha256()``: the SHA-256 of the whole file as on disk, hashed while its
    chunks read it (``annotator.io.hashing``); ``checksum=False`` (a Dask worker reading one
    chunk of Parquet or FITS) reads without hashing. CSV is always read from the start, so
    it always hashes.
    """
    if source.format == "parquet":
        return ParquetReader(source, checksum=checksum)  # Parquet carries its own types
    if source.format == "csv":
        from .csv import CsvReader
        from .missing import DEFAULT_MISSING_TOKENS

        return CsvReader(source, delimiter=delimiter, column_types=column_types,
                         encoding=encoding, numeric=numeric,
                         missing_tokens=DEFAULT_MISSING_TOKENS if missing_tokens is None
                         else missing_tokens)
    if source.format == "fits":
        from .fits import FitsReader

        return FitsReader(source, hdu=hdu, checksum=checksum)
    raise InputError(f"input {source.path}: unknown format {source.format!r} "
                     f"({', '.join(FORMATS)})")


def source_sha256(reader) -> str:
    """``reader.sha256()``, with a read error as one line naming the file."""
    try:
        return reader.sha256()
    except OSError as exc:
        raise InputError(f"input {reader.source.path}: cannot read it to the end for its "
                         f"checksum: {exc.strerror or exc}") from exc
