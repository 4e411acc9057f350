"""numpy <-> Arrow for the columns annotator computes, without waking pyarrow's pandas shim.

pyarrow imports pandas (about 0.2-0.3 s, most of a small run's start-up) the first time any
of ``pa.array``, ``pa.scalar``, ``Array.to_numpy`` or ``np.asarray(arrow_array)`` runs:
``pa.array`` asks ``pandas_api.is_categorical`` / ``is_series`` of its argument
(``pyarrow/array.pxi``), a scalar conversion asks whether it is a pandas value, and
``to_numpy`` goes through ``ConvertArrayToPandas``, which initialises pandas' static data.
A Parquet-only run needs none of pandas, so the hot path builds and reads arrays from their
buffers instead (``pa.Array.from_buffers``, ``np.frombuffer``), which touch no shim.

The results are those of ``pa.array(values, type=..., mask=..., from_pandas=...)`` and
``arr.to_numpy(zero_copy_only=False)`` (tested against them in
``tests/core/test_arrow_numpy.py``); anything else (strings to numpy, booleans with nulls,
nested types) is handed to pyarrow itself.
"""

from __future__ import annotations

import numpy as np
import pyarrow as pa

#: Arrow type -> numpy dtype, for the fixed-width types converted here
_NUMPY = {pa.int8(): np.int8, pa.int16(): np.int16, pa.int32(): np.int32, pa.int64(): np.int64,
          pa.uint8(): np.uint8, pa.uint16(): np.uint16, pa.uint32(): np.uint32,
          pa.uint64(): np.uint64, pa.float16(): np.float16, pa.float32(): np.float32,
          pa.float64(): np.float64}
_ARROW = {np.dtype(v): k for k, v in _NUMPY.items()}
_ARROW[np.dtype(bool)] = pa.bool_()


def _bits(buf: pa.Buffer, offset: int, n: int) -> np.ndarray:
    """Arrow's little-endian bitmap as booleans."""
    raw = np.frombuffer(buf, dtype=np.uint8)
    return np.unpackbits(raw, count=offset + n, bitorder="little")[offset:].view(bool)


def to_numpy(arr: pa.Array | pa.ChunkedArray) -> np.ndarray:
    """``arr.to_numpy(zero_copy_only=False)``: a read-only view where pyarrow gives one
    (numbers without nulls), else a copy; floats NaN where null, integers with nulls as
    float64 with NaN (as pyarrow does)."""
    if isinstance(arr, pa.ChunkedArray):
        if arr.num_chunks != 1:
            arr = arr.combine_chunks()
        else:
            arr = arr.chunk(0)
    typ, n, offset = arr.type, len(arr), arr.offset
    dtype = _NUMPY.get(typ)
    if dtype is not None:
        validity, data = arr.buffers()[:2]
        values = np.frombuffer(data, dtype=dtype, count=offset + n)[offset:] if n else \
            np.empty(0, dtype=dtype)
        if not arr.null_count:
            return values
        null = ~_bits(validity, offset, n)
        out = values.astype(np.float64) if values.dtype.kind in "iu" else values.copy()
        out[null] = np.nan
        return out
    if typ == pa.bool_() and not arr.null_count:
        return _bits(arr.buffers()[1], offset, n).copy() if n else np.empty(0, dtype=bool)
    return arr.to_numpy(zero_copy_only=False)  # not on a Parquet-only run's path


def null_mask(arr: pa.Array | pa.ChunkedArray) -> np.ndarray:
    """``arr.is_null()`` as numpy booleans, from the validity bitmap (``Array.is_null``
    imports pyarrow.compute, ~40 ms of start-up)."""
    if isinstance(arr, pa.ChunkedArray):
        arr = arr.chunk(0) if arr.num_chunks == 1 else arr.combine_chunks()
    n = len(arr)
    if not arr.null_count:
        return np.zeros(n, dtype=bool)
    validity = arr.buffers()[0]
    if validity is None:  # null type, or a union / run-end type: no bitmap, ask pyarrow
        return to_numpy(arr.is_null())
    return ~_bits(validity, arr.offset, n)


def from_numpy(values, type: pa.DataType | None = None, *, mask=None,
               nan_is_null: bool = False) -> pa.Array:
    """``pa.array(values, type=type, mask=mask, from_pandas=nan_is_null)`` for a 1-D numpy
    array of booleans or numbers (zero copy where pyarrow is zero copy: the array keeps
    ``values`` alive, so do not change them afterwards). As in ``pa.array``, ``mask`` wins
    over ``nan_is_null``: with a mask, NaN stays a value."""
    values = np.asarray(values)
    native = _ARROW.get(values.dtype.newbyteorder("=")) if values.dtype.kind in "biuf" else None
    if values.ndim != 1 or native is None or (type is not None and type not in _NUMPY
                                              and type != pa.bool_()):
        return pa.array(values, type=type, mask=mask, from_pandas=nan_is_null)
    if not values.dtype.isnative:
        values = values.astype(values.dtype.newbyteorder("="))
    values = np.ascontiguousarray(values)
    n = len(values)
    null = None
    if mask is not None:
        null = np.asarray(mask)
        if null.dtype != bool:
            raise TypeError("Mask must be boolean dtype")
        if null.shape != values.shape:
            raise ValueError("Mask is a different length from sequence being converted")
    if nan_is_null and null is None and values.dtype.kind == "f":
        null = np.isnan(values)  # with a mask, pa.array keeps NaN a value: so here too
    null_count = 0 if null is None else int(np.count_nonzero(null))
    validity = pa.py_buffer(np.packbits(~null, bitorder="little")) if null_count else None
    if native == pa.bool_():
        data = pa.py_buffer(np.packbits(values, bitorder="little"))
    else:
        data = pa.py_buffer(values)
    arr = pa.Array.from_buffers(native, n, [validity, data], null_count=null_count)
    if type is not None and type != native:
        arr = arr.cast(type)  # what pa.array does (a safe cast)
    return arr


def string_array(texts: list[str]) -> pa.Array:
    """``pa.array(texts, type=pa.string())`` for a list of str (no nulls)."""
    encoded = [t.encode("utf-8") for t in texts]
    offsets = np.zeros(len(encoded) + 1, dtype=np.int32)
    np.cumsum([len(b) for b in encoded], out=offsets[1:])
    return pa.Array.from_buffers(pa.string(), len(encoded),
                                 [None, pa.py_buffer(offsets), pa.py_buffer(b"".join(encoded))])
