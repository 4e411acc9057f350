"""``annotator export DIR --duckdb FILE``: a standalone DuckDB database of an annotated output
(tables catalogue, rejected, provenance, catalogue_columns; column comments with unit, UCD and
description)."""

from __future__ import annotations

import sys

from ..errors import ConfigError


def add_arguments(p) -> None:
    p.add_argument("folder", metavar="DIR", help="annotated output folder")
    p.add_argument("--duckdb", metavar="FILE", required=True, help="the DuckDB database file to write")
    p.add_argument("--overwrite", action="store_true", help="replace an existing FILE")


def main(args) -> int:
    from ..sql.export import export_duckdb

    if not args.duckdb:
        raise ConfigError("--duckdb FILE is required (the database to write)")
    result = export_duckdb(args.folder, args.duckdb, overwrite=args.overwrite)
    print(f"annotator: wrote {result['path']}: catalogue ({result['rows']} rows, "
          f"{result['columns']} columns, each with a comment), rejected "
          f"({result['rejected']} rows), provenance, catalogue_columns", file=sys.stderr)
    return 0
