"""A standalone DuckDB database of an annotated output, for other tools.

Tables: ``catalogue`` (every part file), ``rejected`` (rows set aside), ``provenance`` (key,
value: the manifest, one row per top-level key, value as JSON text) and ``catalogue_columns``
(name, type, unit, ucd, description, origin). Every column of ``catalogue`` carries a comment
(``COMMENT ON COLUMN``) with its description, unit and UCD, readable with
``SELECT column_name, comment FROM duckdb_columns()``.

The file is written under a temporary name beside the target and renamed when complete.
"""

from __future__ import annotations

import os
from pathlib import Path

import duckdb

from ..errors import OutputError
from . import quote_identifier
from .metadata import REJECTED_COLUMNS, REJECTED_DESCRIPTIONS, OutputFolder
from .session import _literal, _path_list, _within, load_small_tables, query_error


def column_comment(col: dict) -> str:
    """``"Description. Unit: Mpc. UCD: pos.distance;phys.cosmology."``"""
    text = (col.get("description") or "").strip()
    if text and not text.endswith("."):
        text += "."
    if col.get("unit"):
        text += f" Unit: {col['unit']}."
    if col.get("ucd"):
        text += f" UCD: {col['ucd']}."
    return text.strip()


def export_duckdb(folder: str | Path, target: str | Path, *, overwrite: bool = False) -> dict:
    """Write the database; return ``{"path", "rows", "rejected", "columns"}``."""
    out = OutputFolder.open(folder)
    target = Path(target).expanduser().resolve()
    if _within(target, out.path):
        raise OutputError(f"--duckdb {target}: inside the output folder {out.path}; the "
                          f"output is never modified (write the database elsewhere)")
    if not target.parent.is_dir():
        raise OutputError(f"--duckdb {target}: folder {target.parent} does not exist")
    if target.exists() and not overwrite:
        raise OutputError(f"--duckdb {target}: exists (add --overwrite to replace it)")
    tmp = target.with_name(f".{target.name}.{os.getpid()}.tmp")
    for p in (tmp, Path(str(tmp) + ".wal")):
        p.unlink(missing_ok=True)
    columns = out.columns()
    try:
        con = duckdb.connect(str(tmp))
        try:
            con.execute(f"CREATE TABLE catalogue AS SELECT * FROM read_parquet("
                        f"{_path_list(out.parts)})")
            if out.rejected_parts:
                con.execute(f"CREATE TABLE rejected AS SELECT * FROM read_parquet("
                            f"{_path_list(out.rejected_parts)})")
            else:
                cols = ", ".join(f"{quote_identifier(n)} {t}" for n, t in REJECTED_COLUMNS)
                con.execute(f"CREATE TABLE rejected ({cols})")
            load_small_tables(con, "main", out)

            cosmo = out.cosmology_name
            about = (f"Survey catalogue annotated by annotator under cosmology {cosmo}; "
                     f"exported from {out.path}.")
            con.execute(f"COMMENT ON TABLE catalogue IS {_literal(about)}")
            con.execute("COMMENT ON TABLE rejected IS 'Input rows set aside, with the reason.'")
            con.execute("COMMENT ON TABLE provenance IS 'The manifest of the output: one row "
                        "per top-level key, value as JSON text.'")
            con.execute("COMMENT ON TABLE catalogue_columns IS 'Unit, UCD and description of "
                        "every column of catalogue.'")
            for col in columns:
                con.execute(f"COMMENT ON COLUMN catalogue.{quote_identifier(col['name'])} IS "
                            f"{_literal(column_comment(col))}")
            for name, desc in REJECTED_DESCRIPTIONS.items():
                con.execute(f"COMMENT ON COLUMN rejected.{quote_identifier(name)} IS "
                            f"{_literal(desc)}")
            rows = con.execute("SELECT count(*) FROM catalogue").fetchone()[0]
            rejected = con.execute("SELECT count(*) FROM rejected").fetchone()[0]
            con.execute("CHECKPOINT")
        finally:
            con.close()
    except duckdb.Error as exc:
        tmp.unlink(missing_ok=True)
        raise query_error(exc, f"export to {target}") from None
    except BaseException:
        tmp.unlink(missing_ok=True)
        raise
    Path(str(tmp) + ".wal").unlink(missing_ok=True)
    os.replace(tmp, target)
    return {"path": str(target), "rows": int(rows), "rejected": int(rejected),
            "columns": len(columns)}
