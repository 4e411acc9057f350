"""FITS binary tables, read in deterministic row ranges with bounded memory.

What reads what
---------------
* The headers (which HDU, its columns, their TFORM/TSCAL/TZERO/TNULL/TUNIT/TDISP/TDIM, where
  the data starts) are parsed by ``astropy.io.fits`` (the ``fits`` extra), opened lazily so
  no table data is loaded.
* The rows of chunk ``k`` are rows ``[k * n, (k + 1) * n)``: their bytes are read from the
  data section (``NAXIS1`` bytes a row, at a known offset) and decoded here, vectorised, with
  numpy, by the rules of the FITS Standard 4.0 (Chen et al. 2018, sect. 7.3). Only one chunk
  of rows is ever in memory, so a 10^9-row table costs what a 250 000-row one does; for
  ``.fits.gz`` the bytes come from a streaming decompressor (resuming at chunk ``k``
  decompresses the rows before it, nothing is kept).

Decoding rules (FITS Standard 4.0, sect. 7.3.1 Table 18, 7.3.2, 7.3.3)
---------------------------------------------------------------------
* ``L`` logical: ``T`` -> true, ``F`` -> false, a zero byte -> null (sect. 7.3.3.1).
* ``B``/``I``/``J``/``K`` integers: with ``TZEROn`` = 2^7 ... 2^63 and ``TSCALn`` = 1, the
  signed byte / unsigned 16/32/64-bit convention (sect. 7.3.2, Table 19): read as int8,
  uint16, uint32, uint64. Other ``TSCALn``/``TZEROn``: ``physical = TZERO + TSCAL * stored``
  as float64 (sect. 7.3.2, eq. 7). ``TNULLn`` compares the *stored* integer, before scaling
  (sect. 7.3.2): such values are null.
* ``E``/``D`` floats: scaled likewise when ``TSCALn``/``TZEROn`` are given; NaN is null
  (sect. 7.3.3: IEEE NaN is the undefined value of floating-point columns).
* ``A`` characters: a string, trailing blanks and NUL bytes trimmed (sect. 7.3.3.1: a NUL ends
  the string); an all-blank field is an empty string, not null.
* ``X`` bits: converted to a fixed-size list of ``r`` booleans, most significant bit first.
* A repeat count ``r > 1`` on a numeric or logical column: an Arrow fixed-size list of ``r``
  values; with ``TDIMn`` of several axes, nested fixed-size lists, the last FITS axis
  outermost (``TDIMn = (3,2)`` -> 2 lists of 3).
* Refused, with a one-line message naming the column: complex ``C``/``M``, variable-length
  arrays ``P``/``Q`` (their bytes live in the heap), string arrays (``A`` with a ``TDIMn`` of
  several axes), and tile-compressed tables (``ZTABLE``, as ``fpack`` writes ``.fz``).

Units and descriptions: ``TUNITn`` becomes the Arrow field's ``unit`` metadata, the comment of
``TTYPEn`` its ``description`` and ``TDISPn`` its ``fits.tdisp``; the VOParquet header of every
output part carries the unit and the description (annotator/provenance.py).
"""

from __future__ import annotations

import gzip
import math
import re
import warnings
from collections.abc import Iterator
from pathlib import Path

import numpy as np
import pyarrow as pa

from ..errors import ConfigError, InputError
from .hashing import HashingFile

FITS_SUFFIXES = (".fits", ".fit", ".fts", ".fits.gz", ".fit.gz", ".fz")

#: Bytes per stored element, by TFORM code (FITS Standard 4.0, Table 18).
_WIDTH = {"L": 1, "X": None, "B": 1, "I": 2, "J": 4, "K": 8, "A": 1, "E": 4, "D": 8,
          "C": 8, "M": 16, "P": 8, "Q": 16}
_RAW_DTYPE = {"L": "u1", "B": "u1", "I": ">i2", "J": ">i4", "K": ">i8", "E": ">f4", "D": ">f8"}
#: (TFORM code, TZERO) of the unsigned / signed-byte conventions (Standard 4.0, Table 19).
_OFFSET_TYPES = {("B", -128): np.int8, ("I", 32768): np.uint16, ("J", 2147483648): np.uint32,
                 ("K", 9223372036854775808): np.uint64}
_TFORM = re.compile(r"^\s*(\d*)\s*([LXBIJKAEDCMPQ])(.*)$")


def _astropy_fits(path=None):
    try:
        from astropy.io import fits
    except ImportError as exc:
        where = f"input {path}: " if path is not None else ""
        raise InputError(f"{where}FITS input needs astropy: pip install 'annotator[fits]'") \
            from exc
    return fits


class _Column:
    """One column of the table: where its bytes are and how they become Arrow values."""

    def __init__(self, path: Path, n: int, header, offset: int):
        self.n = n
        key = f"TTYPE{n}"
        self.name = str(header.get(key, f"col{n}")).strip()
        self.comment = header.comments[key] if key in header else ""
        tform = str(header[f"TFORM{n}"]).strip()
        m = _TFORM.match(tform.upper())
        if not m:
            raise InputError(f"input {path}: column {self.name!r}: TFORM{n} = {tform!r} is not "
                             f"a binary-table format (FITS Standard 4.0, Table 18)")
        self.repeat = int(m.group(1)) if m.group(1) else 1
        self.code = m.group(2)
        self.offset = offset
        if self.code == "X":
            self.width = (self.repeat + 7) // 8
        else:
            self.width = _WIDTH[self.code] * self.repeat
        self.scale = header.get(f"TSCAL{n}")
        self.zero = header.get(f"TZERO{n}")
        self.null = header.get(f"TNULL{n}")
        self.unit = str(header.get(f"TUNIT{n}", "")).strip() or None
        self.tdisp = str(header.get(f"TDISP{n}", "")).strip() or None
        tdim = header.get(f"TDIM{n}")
        self.dims = None
        if tdim is not None:
            try:
                self.dims = [int(v) for v in str(tdim).strip().strip("()").split(",")]
            except ValueError:
                raise InputError(f"input {path}: column {self.name!r}: TDIM{n} = {tdim!r} is "
                                 f"not a list of axis lengths") from None
        self.problem = self._refusal()

    def _refusal(self) -> str | None:
        if self.code in "CM":
            return "complex numbers (TFORM C/M) have no Arrow type here"
        if self.code in "PQ":
            return ("variable-length arrays (TFORM P/Q) are not read; drop the column or "
                    "convert it to a fixed length")
        if self.code == "A" and self.dims and len(self.dims) > 1:
            return "arrays of strings (TFORM A with a TDIM of several axes) are not read"
        if self.dims and math.prod(self.dims) != self.repeat and self.code not in "AX":
            return f"TDIM{self.n} = {self.dims} does not multiply to the repeat {self.repeat}"
        return None

    # -- types ----------------------------------------------------------------------
    @property
    def offset_type(self):
        """int8/uint16/uint32/uint64 when TZERO/TSCAL are the offset-integer convention."""
        if self.zero is None or self.scale not in (None, 1, 1.0):
            return None
        try:
            zero = int(self.zero)
        except (TypeError, ValueError):
            return None
        if zero != self.zero:
            return None
        return _OFFSET_TYPES.get((self.code, zero))

    @property
    def scaled(self) -> bool:
        if self.offset_type is not None:
            return False
        return (self.scale not in (None, 1, 1.0)) or (self.zero not in (None, 0, 0.0))

    def element_type(self) -> pa.DataType:
        if self.code in "LX":
            return pa.bool_()
        if self.code == "A":
            return pa.string()
        if self.offset_type is not None:
            return pa.from_numpy_dtype(np.dtype(self.offset_type))
        if self.scaled:
            return pa.float64()
        return pa.from_numpy_dtype(np.dtype(_RAW_DTYPE[self.code]).newbyteorder("="))

    def shape(self) -> list[int]:
        """Axes of one cell, outermost first ([] for a scalar)."""
        if self.code == "A":
            return []
        if self.code == "X":
            return [self.repeat]
        if self.dims and len(self.dims) > 1:
            return list(reversed(self.dims))
        return [self.repeat] if self.repeat != 1 else []

    def arrow_field(self) -> pa.Field:
        typ = self.element_type()
        for size in reversed(self.shape()):
            typ = pa.list_(typ, size)
        meta = {}
        if self.unit:
            meta[b"unit"] = self.unit.encode()
        if self.comment:
            meta[b"description"] = self.comment.encode()
        if self.tdisp:
            meta[b"fits.tdisp"] = self.tdisp.encode()
        return pa.field(self.name, typ, metadata=meta or None)

    def raw_dtype(self):
        if self.code == "A":
            return f"S{self.repeat}"
        if self.code == "X":
            return ("u1", (self.width,))
        base = _RAW_DTYPE[self.code]
        return (base, (self.repeat,)) if self.repeat != 1 else base

    # -- decoding -------------------------------------------------------------------
    def decode(self, raw: np.ndarray) -> pa.Array:
        """Arrow values of this column from its stored values (one row per entry)."""
        rows = raw.shape[0]
        if self.code in "ALX":  # byte-wise decoding wants the bytes contiguous
            raw = np.ascontiguousarray(raw)
        if self.code == "A":
            # NUL ends a string, trailing blanks are not significant (sect. 7.3.3.1)
            if self.repeat and rows:
                b = raw.view(np.uint8).reshape(rows, self.repeat)
                ended = np.cumsum(b == 0, axis=1, dtype=np.int32) > 0
                if ended.any():  # clear what follows a NUL; numpy drops trailing NULs
                    b = b.copy()
                    b[ended] = 0
                    raw = b.reshape(-1).view(raw.dtype)
            values = np.char.rstrip(raw, b" ")
            try:
                return pa.array(values, type=pa.binary()).cast(pa.string())
            except pa.ArrowInvalid as exc:
                raise InputError(f"column {self.name!r}: bytes that are not ASCII or UTF-8 "
                                 f"text") from exc
        if self.code == "X":
            bits = np.unpackbits(raw.reshape(rows, self.width), axis=1)[:, : self.repeat]
            return _nest(pa.array(bits.reshape(-1).astype(bool)), self.shape())
        if self.code == "L":
            flat = raw.reshape(-1)
            values = pa.array(flat == ord("T"), mask=(flat == 0))
            return _nest(values, self.shape())
        # one copy: strided big-endian field -> contiguous native values
        flat = raw.astype(raw.dtype.newbyteorder("=")).reshape(-1)
        null = None
        if self.code in "BIJK" and self.null is not None:
            null = flat == int(self.null)
        if self.offset_type is not None:
            typ = np.dtype(self.offset_type)
            if self.code == "B":
                values = (flat.astype(np.int16) - 128).astype(np.int8)
            else:
                # stored = physical - 2^(b-1): flipping the sign bit adds 2^(b-1) (mod 2^b)
                values = flat.view(typ) ^ typ.type(1 << (8 * typ.itemsize - 1))
        elif self.scaled:
            values = flat.astype(np.float64)
            if self.scale not in (None, 1, 1.0):
                values *= float(self.scale)
            if self.zero not in (None, 0, 0.0):
                values += float(self.zero)
        else:
            values = flat
        if self.code in "ED":  # NaN is null: pyarrow's from_pandas conversion does exactly it
            return _nest(pa.array(values, from_pandas=True), self.shape())
        return _nest(pa.array(values, mask=null), self.shape())


def _nest(flat: pa.Array, shape: list[int]) -> pa.Array:
    for size in reversed(shape):
        flat = pa.FixedSizeListArray.from_arrays(flat, size)
    return flat


def _choose_hdu(path: Path, hdul, hdu) -> int:
    fits = _astropy_fits()
    tables = [i for i, h in enumerate(hdul) if isinstance(h, fits.BinTableHDU)]
    if hdu is None:
        if not tables:
            kinds = ", ".join(f"{i}: {type(h).__name__}" for i, h in enumerate(hdul))
            raise InputError(f"input {path}: holds no binary table (HDUs {kinds})")
        return tables[0]
    if isinstance(hdu, int):
        if not 0 <= hdu < len(hdul):
            raise ConfigError(f"[input].hdu: {hdu} is not an HDU of {path} (it has HDUs 0 to "
                              f"{len(hdul) - 1})")
        index = hdu
    else:
        names = [str(h.name).strip().upper() for h in hdul]
        if str(hdu).strip().upper() not in names:
            known = ", ".join(repr(n) for n in names if n)
            raise ConfigError(f"[input].hdu: {path} has no HDU named {hdu!r} (names: {known})")
        index = names.index(str(hdu).strip().upper())
    if index not in tables:
        raise ConfigError(f"[input].hdu: HDU {hdu!r} of {path} is a "
                          f"{type(hdul[index]).__name__}, not a binary table")
    return index


class FitsReader:
    """Chunks of one binary-table HDU of a FITS file (see the module docstring).

    :param checksum: hash the file (as on disk, compressed for ``.gz``) while the chunks
        read it (:meth:`sha256`); ``False`` for a reader of one chunk (a Dask worker).
    """

    def __init__(self, source, *, hdu: int | str | None = None, checksum: bool = True):
        self.source = source
        self._checksum = checksum
        self._hashing: HashingFile | None = None
        path = Path(source.path)
        if path.name.lower().endswith(".fz"):
            raise InputError(f"input {path}: tile-compressed FITS (.fz) is not read; "
                             f"decompress it first (e.g. funpack) and give the .fits file")
        fits = _astropy_fits(path)
        try:
            with warnings.catch_warnings(), \
                    fits.open(path, memmap=False, lazy_load_hdus=True) as hdul:
                # astropy warns of e.g. truncation; the reader says it itself, on one line
                warnings.simplefilter("ignore")
                index = _choose_hdu(path, hdul, hdu)
                header = hdul[index].header.copy()
                info = hdul.fileinfo(index)
        except (ConfigError, InputError):
            raise
        except Exception as exc:  # astropy raises OSError, ValueError, VerifyError ...
            raise InputError(f"input {path}: not a readable FITS file: "
                             f"{type(exc).__name__}: {exc}") from exc
        self.hdu_index = index
        if header.get("ZTABLE"):
            raise InputError(f"input {path}: HDU {index} is a tile-compressed table (ZTABLE); "
                             f"decompress it first (e.g. funpack)")
        self.row_bytes = int(header["NAXIS1"])
        self.num_rows = int(header["NAXIS2"])
        self.data_offset = int(info["datLoc"])
        self.gzipped = path.name.lower().endswith(".gz")
        columns, offset = [], 0
        for n in range(1, int(header["TFIELDS"]) + 1):
            col = _Column(path, n, header, offset)
            offset += col.width
            columns.append(col)
        if offset != self.row_bytes:
            raise InputError(f"input {path}: HDU {index}: the TFORMs add up to {offset} bytes a "
                             f"row, NAXIS1 says {self.row_bytes}")
        seen: dict[str, int] = {}
        for col in columns:
            if col.name in seen:
                raise InputError(f"input {path}: column name {col.name!r} appears twice "
                                 f"(TTYPE{seen[col.name]} and TTYPE{col.n}); rename one")
            seen[col.name] = col.n
        for col in columns:
            if col.problem:
                raise InputError(f"input {path}: column {col.name!r} (TFORM{col.n}): "
                                 f"{col.problem}")
        self.columns = [c for c in columns if c.width > 0]
        self._dtype = np.dtype({
            "names": [c.name for c in self.columns],
            "formats": [c.raw_dtype() for c in self.columns],
            "offsets": [c.offset for c in self.columns],
            "itemsize": self.row_bytes,
        })
        self.schema = pa.schema([c.arrow_field() for c in self.columns])

    def estimate_rows(self) -> int:
        return self.num_rows

    def chunk_count(self, chunk_rows: int) -> int:
        return math.ceil(self.num_rows / chunk_rows)

    def sha256(self) -> str:
        """The SHA-256 of the whole file: the bytes the chunks read were hashed as they were
        read; the rest (headers of other HDUs, rows a resumed run skipped) is read now."""
        if not self._checksum:
            raise ValueError("a reader opened with checksum=False has no checksum")
        if self._hashing is None:  # no chunk was asked for
            self._hashing = HashingFile(self.source.path)
        return self._hashing.sha256()

    def _open(self):
        if self._checksum:
            self._hashing = raw = HashingFile(self.source.path)
        else:
            raw = open(self.source.path, "rb")
        # the decompressor does not close ``raw``: sha256() reads what it left, then closes
        return gzip.GzipFile(fileobj=raw, mode="rb") if self.gzipped else raw

    def read_rows(self, fh, start: int, count: int) -> pa.Table:
        """Rows ``[start, start + count)`` as an Arrow table (``fh`` from ``_open``)."""
        want = count * self.row_bytes
        fh.seek(self.data_offset + start * self.row_bytes)
        data = fh.read(want)
        if len(data) != want:
            raise InputError(f"input {self.source.path}: truncated: rows {start + 1} to "
                             f"{start + count} are announced (NAXIS2 = {self.num_rows}) but the "
                             f"file ends before them")
        raw = np.frombuffer(data, dtype=self._dtype, count=count)
        arrays = [c.decode(raw[c.name]) for c in self.columns]
        return pa.Table.from_arrays(arrays, schema=self.schema)

    def chunks(self, chunk_rows: int, start_chunk: int = 0, target: pa.Schema | None = None
               ) -> Iterator:
        from .readers import Chunk

        with self._open() as fh:
            for k in range(start_chunk, self.chunk_count(chunk_rows)):
                start = k * chunk_rows
                count = min(chunk_rows, self.num_rows - start)
                try:
                    table = self.read_rows(fh, start, count)
                except InputError:
                    raise
                except (OSError, EOFError, ValueError) as exc:
                    raise InputError(f"input {self.source.path}: unreadable rows {start + 1} "
                                     f"to {start + count}: {exc}") from exc
                yield Chunk(self.source, k, self._conform(table, target))

    def _conform(self, table: pa.Table, target: pa.Schema | None) -> pa.Table:
        if target is None or table.schema.equals(target, check_metadata=False):
            return table
        try:
            return table.select(target.names).cast(target)
        except Exception as exc:
            raise InputError(f"input {self.source.path}: columns do not match the first "
                             f"input's types ({exc})") from exc
