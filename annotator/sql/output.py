"""Streaming a query result to a terminal (bounded table), or to stdout as CSV / JSON Lines.

Rows arrive as Arrow record batches from DuckDB; at most one batch is held at a time, so
``annotator query DIR "SELECT * FROM catalogue" --format csv > all.csv`` runs in bounded
memory on any size of output.
"""

from __future__ import annotations

import decimal
import io
import json
import math
from typing import BinaryIO, TextIO

import pyarrow as pa
import pyarrow.csv as pacsv

from . import QueryError

CELL_WIDTH = 40  # a wider text is cut, except in the last column (nothing to its right)
LAST_CELL_WIDTH = 200


def _cell(value, width: int = CELL_WIDTH) -> str:
    if value is None:
        return "NULL"
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, float):
        if math.isnan(value):
            return "NaN"
        return f"{value:.6g}"
    text = str(value).replace("\n", "\\n")
    return text if len(text) <= width else text[:width - 1] + "…"


def _numeric(typ: pa.DataType) -> bool:
    return pa.types.is_integer(typ) or pa.types.is_floating(typ) or pa.types.is_decimal(typ)


def write_table(reader: pa.RecordBatchReader, out: TextIO, max_rows: int) -> tuple[int, bool]:
    """Print at most ``max_rows`` rows as an aligned text table.

    :return: (rows shown, whether more rows exist). Stops reading once ``max_rows + 1`` rows
        are known, so a huge result costs only its first batch.
    """
    schema = reader.schema
    rows: list[list[str]] = []
    more = False
    for batch in reader:
        take = min(batch.num_rows, max_rows + 1 - len(rows))
        cols = [batch.column(i).slice(0, take).to_pylist() for i in range(batch.num_columns)]
        last = len(cols) - 1
        rows.extend([_cell(c[r], LAST_CELL_WIDTH if i == last else CELL_WIDTH)
                     for i, c in enumerate(cols)] for r in range(take))
        if len(rows) > max_rows:
            rows = rows[:max_rows]
            more = True
            break
    try:
        reader.close()
    except AttributeError:  # pragma: no cover - older pyarrow
        pass
    names = [f.name for f in schema]
    right = [_numeric(f.type) for f in schema]
    widths = [max([len(n)] + [len(r[i]) for r in rows]) for i, n in enumerate(names)]

    def line(cells: list[str]) -> str:
        return "  ".join(c.rjust(w) if rj else c.ljust(w)
                         for c, w, rj in zip(cells, widths, right)).rstrip()

    out.write(line(names) + "\n")
    out.write("  ".join("-" * w for w in widths) + "\n")
    for r in rows:
        out.write(line(r) + "\n")
    return len(rows), more


def write_csv(reader: pa.RecordBatchReader, out: BinaryIO) -> int:
    """Stream CSV (header once) to a binary stream; return the rows written."""
    rows = 0
    writer = None

    def write(batch=None):
        nonlocal writer
        try:
            if writer is None:
                writer = pacsv.CSVWriter(out, reader.schema)
            if batch is not None:
                writer.write_batch(batch)
        except (pa.ArrowNotImplementedError, pa.ArrowInvalid, pa.ArrowTypeError) as exc:
            raise QueryError(f"the result cannot be written as CSV ({exc}); use --format "
                             f"json or --to FILE.parquet") from None

    try:
        for batch in reader:  # errors of the query itself propagate unchanged
            write(batch)
            rows += batch.num_rows
        if writer is None:  # no batch at all: still the header
            write()
    finally:
        if writer is not None:
            writer.close()
    return rows


def _jsonable(value):
    if isinstance(value, float) and not math.isfinite(value):
        return None
    if isinstance(value, decimal.Decimal):  # SQL literals like 1.5 are DECIMAL
        return float(value) if value.is_finite() else None
    if isinstance(value, dict):
        return {k: _jsonable(v) for k, v in value.items()}
    if isinstance(value, list):
        return [_jsonable(v) for v in value]
    return value


def write_json_lines(reader: pa.RecordBatchReader, out: TextIO) -> int:
    """Stream one JSON object per row (JSON Lines); NaN and infinities become null."""
    rows = 0
    for batch in reader:
        buf = io.StringIO()
        for rec in batch.to_pylist():
            buf.write(json.dumps({k: _jsonable(v) for k, v in rec.items()}, default=str,
                                 allow_nan=False))
            buf.write("\n")
        out.write(buf.getvalue())
        rows += batch.num_rows
    return rows
