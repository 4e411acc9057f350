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

    A first line that is not numeric is taken as a header and skipped.
    """
    if not path.is_file():
        raise ConfigError(f"{what}: file {path} does not exist")
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
