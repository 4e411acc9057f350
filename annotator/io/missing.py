"""Missing values, whatever the input format.

Two rules, both common practice in survey exports (no single standard fixes them):

* **Missing tokens** (text formats): a cell whose whole text is one of the tokens is null.
  The default list is :data:`DEFAULT_MISSING_TOKENS`; ``[input].missing_tokens`` replaces it.
* **Sentinels** (every format: CSV, Parquet, and any other reader): per column, values that
  mean "not measured" (``-99`` for a magnitude non-detection). :func:`apply_sentinels` turns
  them into nulls and returns, per column, the mask of rows that held one, raised as the flag
  ``sentinel_<column>`` so such a row is kept, visibly, and never annotated from the sentinel.

The pipeline applies the sentinels to every batch before any annotator runs, so every engine
and every format shares this one code path.
"""

from __future__ import annotations

import math

import numpy as np
import pyarrow as pa

from ..errors import ConfigError

DEFAULT_MISSING_TOKENS = ("", "NA", "N/A", "null", "NaN", "nan", "-")
SENTINEL_FLAG_PREFIX = "sentinel_"


def sentinel_flag(column: str) -> str:
    """The flag raised on rows whose ``column`` held a sentinel value."""
    return SENTINEL_FLAG_PREFIX + column


def parse_missing_tokens(value, key: str = "[input].missing_tokens") -> tuple[str, ...]:
    if not isinstance(value, list) or not all(isinstance(v, str) for v in value):
        raise ConfigError(f"{key}: expected a list of strings (cell texts that mean "
                          f"\"no value\"), got {value!r}")
    return tuple(value)


def parse_sentinels(value, key: str = "[input].sentinels") -> dict[str, tuple]:
    """``{column: value or [values]}`` -> ``{column: (values…)}``; numbers or strings."""
    if not isinstance(value, dict):
        raise ConfigError(f"{key}: expected a table of column = value or [values], "
                          f"got {value!r}")
    out: dict[str, tuple] = {}
    for column, values in value.items():
        where = f"{key}.{column}"
        items = values if isinstance(values, list) else [values]
        if not items:
            raise ConfigError(f"{where}: expected a value or a list of values, got []")
        kinds = set()
        for v in items:
            if isinstance(v, bool) or not isinstance(v, (int, float, str)):
                raise ConfigError(f"{where}: expected numbers or strings, got {v!r}")
            if isinstance(v, float) and not math.isfinite(v):
                raise ConfigError(f"{where}: {v!r} is not a usable sentinel (NaN and "
                                  f"infinities are not values to compare with)")
            kinds.add(str if isinstance(v, str) else float)
        if len(kinds) > 1:
            raise ConfigError(f"{where}: mixes numbers and strings")
        out[column] = tuple(items)
    return out


def check_sentinels(sentinels: dict[str, tuple], schema: pa.Schema, where: str) -> None:
    """Each sentinel names a column of the catalogue, of a type its values can be."""
    for column, values in sentinels.items():
        key = f"[input].sentinels.{column}"
        if column not in schema.names:
            raise ConfigError(f"{key}: column {column!r} is not in the catalogue {where} "
                              f"(columns: {', '.join(schema.names)})")
        typ = schema.field(column).type
        numbers = not isinstance(values[0], str)
        if numbers and not (pa.types.is_integer(typ) or pa.types.is_floating(typ)
                            or pa.types.is_decimal(typ) or pa.types.is_null(typ)):
            raise ConfigError(f"{key}: column {column!r} has type {typ}; numeric sentinels "
                              f"need a numeric column")
        if not numbers and not (pa.types.is_string(typ) or pa.types.is_large_string(typ)):
            raise ConfigError(f"{key}: column {column!r} has type {typ}; text sentinels need "
                              f"a text column")


def apply_sentinels(table: pa.Table, sentinels: dict[str, tuple]
                    ) -> tuple[pa.Table, dict[str, np.ndarray]]:
    """Sentinel values -> null; returns the new table and ``{flag: rows that held one}``."""
    import pyarrow.compute as pc  # here: importing it costs a run without sentinels ~40 ms

    masks: dict[str, np.ndarray] = {}
    if not sentinels or table.num_rows == 0:
        return table, masks
    for column, values in sentinels.items():
        i = table.schema.get_field_index(column)
        if i < 0:
            continue
        col = table.column(i)
        typ = col.type
        if pa.types.is_null(typ):
            continue
        if isinstance(values[0], str):
            value_set = pa.array(values, type=typ)
        elif pa.types.is_integer(typ):
            whole = [int(v) for v in values if float(v).is_integer()]
            info = np.iinfo(typ.to_pandas_dtype())
            whole = [v for v in whole if info.min <= v <= info.max]
            if not whole:
                continue
            value_set = pa.array(whole, type=typ)
        else:
            value_set = pa.array([float(v) for v in values], type=pa.float64()).cast(typ)
        hit = pc.is_in(col, value_set=value_set)
        mask = np.asarray(hit.combine_chunks().to_numpy(zero_copy_only=False), dtype=bool) \
            if isinstance(hit, pa.ChunkedArray) else \
            np.asarray(hit.to_numpy(zero_copy_only=False), dtype=bool)
        if not mask.any():
            masks[sentinel_flag(column)] = mask
            continue
        nulled = pc.if_else(hit, pa.scalar(None, type=typ), col)
        table = table.set_column(i, table.schema.field(i), nulled)
        masks[sentinel_flag(column)] = mask
    return table, masks
