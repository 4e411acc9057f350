"""Small numeric tables that plugins need (filter curves, SEDs, coefficients).

Plugins never open files themselves; they call :meth:`annotator.api.Setup.read_table`, which
lands here. Errors name what the table is for and the file.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np

from ..errors import ConfigError


def read_numeric_table(path: Path, *, what: str, min_columns: int = 2) -> np.ndarray:
    """Read a comma- or whitespace-separated numeric table; '#' starts a comment.

    A first line that is not numeric is taken as a header and skipped. A ``.parquet`` file is
    read with pyarrow: its numeric columns, in order, become the table's columns.
    """
    if not path.is_file():
        raise ConfigError(f"{what}: file {path} does not exist")
    if path.suffix.lower() == ".parquet":
        return _read_parquet_table(path, what=what, min_columns=min_columns)
    rows: list[list[float]] = []
    try:
        text = path.read_text()
    except (OSError, UnicodeDecodeError) as exc:
        raise ConfigError(f"{what}: cannot read {path}: {exc}") from exc
    width = None
    for lineno, line in enumerate(text.splitlines(), start=1):
        line = line.split("#", 1)[0].strip()
        if not line:
            continue
        fields = [f for f in line.replace(",", " ").replace(";", " ").split() if f]
        try:
            values = [float(f) for f in fields]
        except ValueError:
            if not rows and width is None:
                width = -1  # header line
                continue
            raise ConfigError(f"{what}: {path} line {lineno}: not a number in {line!r}") from None
        if len(values) < min_columns:
            raise ConfigError(
                f"{what}: {path} line {lineno}: expected at least {min_columns} columns, "
                f"got {len(values)}"
            )
        if width not in (None, -1) and len(values) != width:
            raise ConfigError(
                f"{what}: {path} line {lineno}: expected {width} columns like the lines above, "
                f"got {len(values)}"
            )
        width = len(values)
        rows.append(values)
    if not rows:
        raise ConfigError(f"{what}: {path} holds no numeric rows")
    table = np.asarray(rows, dtype=np.float64)
    if not np.all(np.isfinite(table)):
        bad = int(np.argwhere(~np.isfinite(table))[0][0])
        raise ConfigError(f"{what}: {path} data row {bad + 1} holds a NaN or infinite value")
    return table


def _read_parquet_table(path: Path, *, what: str, min_columns: int) -> np.ndarray:
    import pyarrow as pa
    import pyarrow.parquet as pq

    try:
        table = pq.read_table(path)
    except (OSError, pa.ArrowException) as exc:
        raise ConfigError(f"{what}: cannot read {path} as Parquet: {exc}") from exc
    numeric = [name for name, typ in zip(table.column_names, table.schema.types)
               if pa.types.is_integer(typ) or pa.types.is_floating(typ)]
    if len(numeric) < min_columns:
        raise ConfigError(f"{what}: {path}: expected at least {min_columns} numeric columns, "
                          f"got {len(numeric)} ({', '.join(table.column_names) or 'none'})")
    if table.num_rows == 0:
        raise ConfigError(f"{what}: {path} holds no rows")
    cols = []
    for name in numeric:
        col = table.column(name)
        if col.null_count:
            raise ConfigError(f"{what}: {path} column {name!r} holds nulls")
        cols.append(col.to_numpy().astype(np.float64))
    out = np.column_stack(cols)
    if not np.all(np.isfinite(out)):
        bad = int(np.argwhere(~np.isfinite(out))[0][0])
        raise ConfigError(f"{what}: {path} data row {bad + 1} holds a NaN or infinite value")
    return out
