"""``annotator query DIR "SQL"``: read-only SQL (DuckDB) over an annotated output.

Views: ``catalogue``, ``rejected``, ``provenance``, ``catalogue_columns``; with
``--attach NAME=DIR`` the same views as ``NAME.catalogue`` ...; with ``--selection NAME`` a
view ``selection``. SQL functions of the output's cosmology: see ``--list-functions``.
"""

from __future__ import annotations

import sys

from ..errors import ConfigError

DEFAULT_MAX_ROWS = 40


def add_arguments(p) -> None:
    p.add_argument("folder", metavar="DIR", help="annotated output folder")
    p.add_argument("sql", nargs="?", metavar="SQL",
                   help="one SELECT statement ('-' reads it from stdin); default with "
                        "--selection: SELECT * FROM selection")
    p.add_argument("--format", choices=("table", "csv", "json", "parquet"),
                   help="table (default on stdout), csv, json (JSON Lines) or parquet (--to "
                        "only); with --to the default comes from the file extension")
    p.add_argument("--to", metavar="FILE",
                   help="write the whole result to FILE (.parquet, .csv, .json) with DuckDB")
    p.add_argument("--overwrite", action="store_true", help="replace an existing --to FILE")
    p.add_argument("--attach", action="append", default=[], metavar="NAME=DIR",
                   help="another annotated output, queried as NAME.catalogue, NAME.rejected")
    p.add_argument("--read", action="append", default=[], metavar="PATH",
                   help="a further file or folder SQL may read (e.g. read_csv('PATH'))")
    p.add_argument("--selection", metavar="NAME",
                   help="a ready-made selection (see --list-selections), as the view "
                        "'selection'")
    p.add_argument("--param", action="append", default=[], metavar="KEY=VALUE",
                   help="a parameter of the selection (e.g. --param zmin=0.5)")
    p.add_argument("--list-selections", action="store_true",
                   help="list the selections available for DIR, each with its SQL")
    p.add_argument("--list-functions", action="store_true",
                   help="list the SQL functions (cosmology of DIR's manifest)")
    p.add_argument("--show-sql", action="store_true",
                   help="print the SQL that would run (with the selection) and stop")
    p.add_argument("--max-rows", type=int, default=DEFAULT_MAX_ROWS, metavar="N",
                   help=f"rows shown in table format (default {DEFAULT_MAX_ROWS})")


def take_extra(args, extra: list[str]) -> bool:
    """Accept the SQL after the options (``query DIR --selection x "SQL"``)."""
    if args.sql is None and len(extra) == 1 and not extra[0].startswith("-"):
        args.sql = extra[0]
        return True
    return False


def _pairs(items: list[str], option: str) -> dict[str, str]:
    out: dict[str, str] = {}
    for item in items:
        key, sep, value = item.partition("=")
        if not sep or not key.strip():
            raise ConfigError(f"{option} {item!r}: expected KEY=VALUE")
        key = key.strip()
        if key in out:
            raise ConfigError(f"{option} {key}: given twice")
        out[key] = value.strip()
    return out


def _list_selections(session, out) -> None:
    if not session.selections:
        out.write("no selections for this output\n")
    for name, (sel, plugin) in sorted(session.selections.items()):
        out.write(f"{name}  [{plugin}]\n    {sel.summary}\n")
        for p in sel.parameters:
            if p.default is not None:
                extra = f" (default {p.default})"
            elif p.default_sql is not None:
                extra = " (default: estimated, see note)"
            else:
                extra = " (required)"
            if p.choices:
                extra += f"; one of {', '.join(p.choices)}"
            out.write(f"    --param {p.name}=...  {p.description}{extra}\n")
        out.write("    SQL:\n")
        for ln in sel.template().splitlines():
            out.write(f"      {ln}\n")
        if sel.note:
            out.write(f"    note: {sel.note}\n")
        out.write("\n")


def _list_functions(session, out) -> None:
    cosmo = session.output.cosmology
    out.write(f"cosmology {session.output.cosmology_name} (from {session.output.path}): "
              f"{cosmo.to_dict()}\n")
    for name, (fn, plugin) in sorted(session.functions.items()):
        unit = f" [{fn.unit}]" if fn.unit else ""
        how = ""
        if fn.approximation is not None:
            lo, hi = fn.approximation.domain
            how = (f"    native: DuckDB evaluates it on all threads for {lo:g} <= "
                   f"{fn.parameters[0][0]} < {hi:g} (fitted to the function, checked within "
                   f"rtol {fn.approximation.rtol:g}, atol {fn.approximation.atol:g}); "
                   f"{fn.python_name}() is the function itself\n")
        elif fn.native_sql is not None:
            how = f"    native: exact SQL, {fn.native_sql}\n"
        out.write(f"{fn.signature}{unit}  ({plugin})\n    {fn.description}\n{how}")


def main(args) -> int:
    import duckdb
    import pyarrow as pa

    from ..sql.output import write_csv, write_json_lines, write_table
    from ..sql.session import (QuerySession, output_format, query_error,
                               read_only_statement)

    if args.max_rows < 1:
        raise ConfigError(f"--max-rows {args.max_rows}: must be at least 1")
    fmt = output_format(args.to, args.format)
    attach = _pairs(args.attach, "--attach")
    params = _pairs(args.param, "--param")
    if params and not args.selection:
        raise ConfigError("--param is for a --selection")
    sql = args.sql
    if sql == "-":
        sql = sys.stdin.read()

    kind = None
    if sql and sql.strip():
        _, kind = read_only_statement(sql)  # refuse a writing statement before opening anything

    with QuerySession(args.folder, attach=attach, read_paths=args.read,
                      write_to=args.to) as session:
        for note in session.cosmology_notes():
            print(f"annotator: note: {note}", file=sys.stderr)
        if args.list_selections:
            _list_selections(session, sys.stdout)
            return 0
        if args.list_functions:
            _list_functions(session, sys.stdout)
            return 0
        selection_sql = None
        if args.selection:
            selection_sql = session.use_selection(args.selection, params)
            sql = sql or "SELECT * FROM selection"
        if not sql or not sql.strip():
            raise ConfigError("give a SQL statement (or --selection NAME); e.g. "
                              "annotator query DIR \"SELECT count(*) FROM catalogue\"")
        if args.show_sql:
            if selection_sql is not None:
                print(f"CREATE VIEW selection AS\n{selection_sql};")
            print(sql.strip().rstrip(";") + ";")
            return 0

        if args.to:
            rows = session.copy_to(sql, fmt, overwrite=args.overwrite)
            print(f"annotator: wrote {rows} rows to {session.write_to} ({fmt})",
                  file=sys.stderr)
            return 0
        reader = session.reader(sql)
        try:
            if fmt == "table" and kind == "EXPLAIN":
                for batch in reader:  # the plan drawing, as DuckDB renders it
                    for key, plan in zip(*(c.to_pylist() for c in batch.columns)):
                        print(f"{key}:\n{plan}")
            elif fmt == "table":
                shown, more = write_table(reader, sys.stdout, args.max_rows)
                if more:
                    print(f"result: first {shown} rows shown, more not shown (raise --max-rows, or "
                          f"use --format csv / --to FILE for all)")
                else:
                    print(f"result: {shown} row{'s' if shown != 1 else ''}")
            elif fmt == "csv":
                sys.stdout.flush()
                write_csv(reader, sys.stdout.buffer)
                sys.stdout.buffer.flush()
            else:
                write_json_lines(reader, sys.stdout)
        except (duckdb.Error, pa.ArrowException) as exc:
            raise query_error(exc) from None
        finally:
            try:
                reader.close()
            except Exception:  # already closed / exhausted
                pass
    return 0
