"""A read-only DuckDB session over one annotated output folder (and others attached).

Read-only by four independent walls, because DuckDB itself has no "read-only files" switch:

1. the database is in memory; the output folder is only ever *read*, through views over its
   part files (``read_parquet`` of the files the manifest lists);
2. a statement runs only if DuckDB parses it as one ``SELECT`` (``WITH``, ``VALUES``, ``FROM``,
   ``DESCRIBE``, ``SHOW``, ``SUMMARIZE`` included) or an ``EXPLAIN`` of one;
3. its syntax tree (``json_serialize_sql``) may hold only read nodes: a ``COPY``, ``INSERT``,
   ``UPDATE`` or ``DELETE`` hidden in a common table expression is refused;
4. file access is switched off (``enable_external_access = false``) except for the folders
   being queried, the paths given with ``--read`` and the one temporary file a ``--to`` result
   is written to; the configuration is then locked, extension auto-install is off and DuckDB's
   spill directory is a private temporary folder, never the current directory.
"""

from __future__ import annotations

import json
import os
import re
import shutil
import tempfile
from collections.abc import Iterable, Mapping
from pathlib import Path

import duckdb
import numpy as np
import pyarrow as pa

from ..errors import ConfigError, OutputError, PluginError
from . import QueryError, Selection, SqlFunction, native, quote_identifier
from .metadata import COLUMN_FIELDS, REJECTED_COLUMNS, OutputFolder

RESERVED_SCHEMAS = {"main", "temp", "system", "memory", "information_schema", "pg_catalog"}
_NAME = re.compile(r"^[a-z_][a-z0-9_]*$")
_READ_NODES = {"SELECT_NODE", "SET_OPERATION_NODE", "RECURSIVE_CTE_NODE", "CTE_NODE"}
_LEADING_COMMENTS = re.compile(r"\A(?:\s+|--[^\n]*(?:\n|\Z)|/\*.*?\*/)+", re.S)
_EXPLAIN_PREFIX = re.compile(r"\AEXPLAIN\s+(?:ANALY[SZ]E\s+)?(?:\([^)]*\)\s*)?", re.I)
_TRAILING = re.compile(r"[\s;]+\Z")

FORMATS = ("table", "csv", "json", "parquet")
FILE_FORMATS = {".parquet": "parquet", ".pq": "parquet", ".csv": "csv", ".json": "json",
                ".jsonl": "json", ".ndjson": "json"}
COPY_OPTIONS = {"parquet": "FORMAT parquet, COMPRESSION zstd",
                "csv": "FORMAT csv, HEADER true",
                "json": "FORMAT json"}
SELECTION_VIEW = "selection"


# --------------------------------------------------------------------------- errors
def query_error(exc: BaseException, prefix: str = "SQL") -> QueryError:
    """DuckDB's message on one line: the error and its hints, without the caret drawing."""
    lines = [ln.strip() for ln in str(exc).strip().splitlines()]
    kept = [ln for ln in lines if ln and not ln.startswith("LINE ") and set(ln) - {"^", " "}]
    text = " ".join(kept) or type(exc).__name__
    return QueryError(f"{prefix}: {text}")


# --------------------------------------------------------------------------- statement checks
def _node_types(obj, found: set) -> set:
    if isinstance(obj, dict):
        typ = obj.get("type")
        if isinstance(typ, str) and typ.endswith("_NODE"):
            found.add(typ)
        for value in obj.values():
            _node_types(value, found)
    elif isinstance(obj, list):
        for value in obj:
            _node_types(value, found)
    return found


def _syntax_tree(select_text: str) -> dict:
    """DuckDB's syntax tree of a statement (``json_serialize_sql``), on a throwaway instance."""
    checker = duckdb.connect(":memory:")
    try:
        return json.loads(checker.execute("SELECT json_serialize_sql(?)",
                                          [select_text]).fetchone()[0])
    finally:
        checker.close()


def _only_read_nodes(select_text: str) -> None:
    """Refuse a SELECT whose syntax tree holds a writing node (COPY/INSERT/... in a CTE)."""
    try:
        tree = _syntax_tree(select_text)
    except duckdb.Error as exc:
        raise QueryError(f"SQL: cannot check that the statement only reads: {query_error(exc)}")
    if tree.get("error"):
        raise QueryError(f"SQL: cannot check that the statement only reads "
                         f"({tree.get('error_message', 'unknown reason')}); rewrite it as a "
                         f"plain SELECT")
    writing = sorted(_node_types(tree, set()) - _READ_NODES)
    if writing:
        what = ", ".join(w.replace("_QUERY_NODE", "").replace("_NODE", "") for w in writing)
        raise QueryError(f"SQL: the statement contains {what}: queries are read-only (write a "
                         f"result with --to FILE instead)")


def _names_in(obj, key: str, found: set) -> set:
    if isinstance(obj, dict):
        value = obj.get(key)
        if isinstance(value, str):
            found.add(value.lower())
        for v in obj.values():
            _names_in(v, key, found)
    elif isinstance(obj, list):
        for v in obj:
            _names_in(v, key, found)
    return found


def functions_and_tables(select_text: str) -> tuple[set[str], set[str]]:
    """The function names and table names a (checked) statement's syntax tree mentions."""
    try:
        tree = _syntax_tree(select_text)
    except duckdb.Error:
        return set(), set()
    return _names_in(tree, "function_name", set()), _names_in(tree, "table_name", set())


def read_only_statement(sql: str) -> tuple[str, str]:
    """Check that ``sql`` is one statement that only reads.

    :return: ``(text, kind)`` with kind ``"SELECT"`` or ``"EXPLAIN"``; text without the
        trailing semicolon.
    :raises QueryError: for a parse error, several statements or any writing statement.
    """
    try:
        statements = duckdb.extract_statements(sql)
    except duckdb.Error as exc:
        raise query_error(exc) from None
    if not statements:
        raise QueryError("SQL: no statement given")
    if len(statements) > 1:
        raise QueryError(f"SQL: give one statement at a time (found {len(statements)})")
    st = statements[0]
    kind = st.type.name
    text = _TRAILING.sub("", st.query)
    if kind == "SELECT":
        _only_read_nodes(text)
        return text, "SELECT"
    if kind == "EXPLAIN":
        body = _LEADING_COMMENTS.sub("", text, count=1)
        m = _EXPLAIN_PREFIX.match(body)
        inner = body[m.end():] if m else ""
        try:
            inner_st = duckdb.extract_statements(inner) if inner.strip() else []
        except duckdb.Error:
            inner_st = []
        if len(inner_st) == 1 and inner_st[0].type.name == "SELECT":
            _only_read_nodes(_TRAILING.sub("", inner_st[0].query))
            return text, "EXPLAIN"
        raise QueryError("SQL: EXPLAIN is allowed only of a SELECT (queries are read-only)")
    raise QueryError(f"SQL: {kind} statements are refused: queries are read-only (SELECT, "
                     f"WITH ... SELECT, DESCRIBE, SUMMARIZE, EXPLAIN SELECT); write a result "
                     f"with --to FILE")


# --------------------------------------------------------------------------- plugins
def _call_hook(pm, hook_name: str, **kwargs) -> list[tuple[str, object]]:
    """``(plugin name, item)`` for every item every implementation returned."""
    out = []
    for impl in getattr(pm.hook, hook_name).get_hookimpls():
        plugin_name = pm.get_name(impl.plugin) or repr(impl.plugin)
        args = {k: v for k, v in kwargs.items() if k in impl.argnames}
        try:
            result = impl.function(**args) or []
        except (ConfigError, OutputError, QueryError):
            raise
        except Exception as exc:
            raise PluginError(f"plugin {plugin_name!r}: {hook_name} failed: {exc}") from exc
        out.extend((plugin_name, item) for item in result)
    return out


def _collect_named(pm, hook_name: str, cls: type, what: str, **kwargs) -> dict:
    """``{name: (item, plugin)}`` from a hook; duplicates and items of the wrong kind are
    refused, naming the plugins."""
    found: dict = {}
    for plugin, item in _call_hook(pm, hook_name, **kwargs):
        if not isinstance(item, cls):
            raise PluginError(f"plugin {plugin!r}: {hook_name} returned {item!r}, "
                              f"not an annotator.sql.{cls.__name__}")
        if item.name in found:
            raise PluginError(f"{what} {item.name!r} is registered twice: by plugin "
                              f"{found[item.name][1]!r} and by plugin {plugin!r}")
        found[item.name] = (item, plugin)
    return found


def collect_sql_functions(pm, cosmology) -> dict[str, tuple[SqlFunction, str]]:
    """``{name: (function, plugin)}``; duplicates and non-functions are refused."""
    return _collect_named(pm, "register_sql_functions", SqlFunction, "SQL function",
                          cosmology=cosmology)


def collect_selections(pm, manifest: dict) -> dict[str, tuple[Selection, str]]:
    """``{name: (selection, plugin)}``; duplicates and non-selections are refused."""
    return _collect_named(pm, "register_selections", Selection, "selection", manifest=manifest)


# --------------------------------------------------------------------------- UDFs
def _as_float(col) -> np.ndarray:
    if isinstance(col, pa.ChunkedArray):
        col = col.combine_chunks() if col.num_chunks != 1 else col.chunk(0)
    if col.type != pa.float64():
        col = col.cast(pa.float64())
    return np.asarray(col.to_numpy(zero_copy_only=False), dtype=np.float64)


def _bitmap(flags: np.ndarray) -> pa.Buffer:
    return pa.py_buffer(np.packbits(flags, bitorder="little"))


def _to_arrow(data: np.ndarray, null: np.ndarray | None, boolean: bool) -> pa.Array:
    """An Arrow array from numpy values and a null mask, built from buffers (``pa.array``
    with a mask costs ten times more per vector)."""
    n = len(data)
    if boolean:
        values = _bitmap(np.asarray(data, dtype=bool))
        typ = pa.bool_()
    else:
        data = np.ascontiguousarray(data, dtype=np.float64)
        values = pa.py_buffer(data)
        typ = pa.float64()
    if null is None or not null.any():
        return pa.Array.from_buffers(typ, n, [None, values], null_count=0)
    return pa.Array.from_buffers(typ, n, [_bitmap(~null), values], null_count=int(null.sum()))


def arrow_udf(fn: SqlFunction):
    """Wrap a numpy function as a DuckDB Arrow UDF (one call per vector of rows).

    NULL out where the function returns NaN (or masks the value); a boolean result is also
    NULL wherever an argument is NULL or NaN.
    """
    boolean = fn.return_type.upper() == "BOOLEAN"

    def udf(*cols):
        args = [_as_float(c) for c in cols]
        n = len(args[0]) if args else 1
        with np.errstate(all="ignore"):
            out = fn.function(*args)
        mask = np.ma.getmaskarray(out) if isinstance(out, np.ma.MaskedArray) else None
        data = np.ma.getdata(out)
        if np.ndim(data) == 0:
            data = np.full(n, data)
        if boolean:
            null = np.zeros(n, dtype=bool) if mask is None else mask.copy()
            for a in args:
                null |= np.isnan(a)
        else:
            data = np.asarray(data, dtype=np.float64)
            null = np.isnan(data) if mask is None else (mask | np.isnan(data))
        return _to_arrow(data, null, boolean)

    udf.__name__ = fn.name
    return udf


def native_body(fn: SqlFunction) -> tuple[str, native.Fitted | None]:
    """The body of the macro ``fn.name(<its parameter>)`` of a native function, and the fit
    behind it (None for ``native_sql``). Its Python fallback is ``fn.python_name``."""
    if fn.native_sql is not None:
        return fn.native_sql, None
    # a cast, so a wrong argument is refused naming its value (as a typed function is)
    arg = f"CAST({quote_identifier(fn.parameters[0][0])} AS DOUBLE)"
    fitted = native.fit(fn.function, fn.approximation)
    return native.macro_body(fitted, arg, quote_identifier(fn.python_name)), fitted


# --------------------------------------------------------------------------- helpers
def _literal(text: str) -> str:
    return "'" + str(text).replace("'", "''") + "'"


def _path_list(paths: Iterable[Path]) -> str:
    return "[" + ", ".join(_literal(str(p)) for p in paths) + "]"


def _within(path: Path, folder: Path) -> bool:
    try:
        path.resolve().relative_to(folder.resolve())
        return True
    except ValueError:
        return False


def arrow_reader(relation, batch_rows: int):
    """A streaming RecordBatchReader over a relation (DuckDB 1.x and 2.x spellings)."""
    if hasattr(relation, "to_arrow_reader"):
        return relation.to_arrow_reader(batch_rows)
    return relation.fetch_record_batch(batch_rows)  # pragma: no cover - DuckDB 1.x


def output_format(to: str | Path | None, fmt: str | None) -> str:
    """The format of a result: ``--format``, else from the ``--to`` extension, else table."""
    if fmt is not None and fmt not in FORMATS:
        raise ConfigError(f"--format: {fmt!r} is not one of {', '.join(FORMATS)}")
    if to is None:
        if fmt == "parquet":
            raise ConfigError("--format parquet needs --to FILE.parquet (Parquet is written "
                              "only to a file, never to standard output)")
        return fmt or "table"
    if fmt == "table":
        raise ConfigError("--format table is for the terminal; with --to FILE choose csv, "
                          "json or parquet")
    if fmt:
        return fmt
    suffix = Path(to).suffix.lower()
    if suffix not in FILE_FORMATS:
        raise ConfigError(f"--to {to}: cannot tell the format from {suffix or 'no extension'!r}"
                          f" (use .parquet, .csv, .json, or give --format)")
    return FILE_FORMATS[suffix]


def load_small_tables(con, schema: str, out: OutputFolder) -> None:
    """Tables ``provenance`` (key, value) and ``catalogue_columns`` in ``schema``.

    A few dozen rows each, inserted as values (registering Arrow tables would import pandas,
    a second of start-up for every query)."""
    q = quote_identifier(schema)
    con.execute(f"CREATE TABLE {q}.provenance (key VARCHAR, value VARCHAR)")
    con.executemany(f"INSERT INTO {q}.provenance VALUES (?, ?)",
                    [[r["key"], r["value"]] for r in out.provenance_rows()])
    con.execute(f"CREATE TABLE {q}.catalogue_columns ("
                + ", ".join(f"{c} VARCHAR" for c in COLUMN_FIELDS) + ")")
    con.executemany(f"INSERT INTO {q}.catalogue_columns VALUES ("
                    + ", ".join("?" for _ in COLUMN_FIELDS) + ")",
                    [[c[k] for k in COLUMN_FIELDS] for c in out.columns()])


# --------------------------------------------------------------------------- the session
class QuerySession:
    """An in-memory DuckDB connection over an annotated output, read-only.

    Views in the main schema: ``catalogue`` (every part file), ``rejected`` (rows set aside;
    empty with the schema source, row, reason, raw when there are none), ``provenance``
    (key, value: one row per manifest key, value as JSON text) and ``catalogue_columns``
    (name, type, unit, ucd, description, origin). Each attached folder gets the same views in
    a schema of its own name (``deep.catalogue``). The SQL functions use the cosmology of
    the main folder.

    :param folder: the annotated output folder.
    :param attach: ``{name: folder}`` of further outputs.
    :param read_paths: further files or folders SQL may read (``read_csv('targets.csv')``).
    :param write_to: the file a ``--to`` result will be written to (the only writable path).
    :param pm: a plugin manager (default: the registered plugins).
    """

    def __init__(self, folder: str | Path, *, attach: Mapping[str, str | Path] | None = None,
                 read_paths: Iterable[str | Path] = (), write_to: str | Path | None = None,
                 pm=None):
        from ..registry import load_registry

        self.output = OutputFolder.open(folder)
        self.attached: dict[str, OutputFolder] = {}
        for name, path in (attach or {}).items():
            if not _NAME.match(name) or name in RESERVED_SCHEMAS:
                raise ConfigError(f"--attach {name}=...: the name must be a lower-case "
                                  f"identifier other than {', '.join(sorted(RESERVED_SCHEMAS))}")
            self.attached[name] = OutputFolder.open(path)
        self.read_paths = [Path(p).expanduser().resolve() for p in read_paths]
        for p in self.read_paths:
            if not p.exists():
                raise ConfigError(f"--read {p}: no such file or folder")
        folders = [self.output.path, *(o.path for o in self.attached.values())]
        self.write_to = None
        self._tmp_target = None
        if write_to is not None:
            target = Path(write_to).expanduser().resolve()
            for f in folders:
                if _within(target, f):
                    raise OutputError(f"--to {write_to}: inside the output folder {f}; queries "
                                      f"never write into an annotated output")
            if not target.parent.is_dir():
                raise OutputError(f"--to {write_to}: folder {target.parent} does not exist")
            self.write_to = target
            self._tmp_target = target.with_name(f".{target.name}.{os.getpid()}.tmp")

        self.pm = pm or load_registry()
        self.functions = collect_sql_functions(self.pm, self.output.cosmology)
        self.selections = collect_selections(self.pm, self.output.manifest)
        self._tmpdir = tempfile.mkdtemp(prefix="annotator-sql-")
        self._folders = folders
        self._selection_text: str | None = None
        self._serial = None
        self._native_bodies: dict[str, str] = {}
        self._made: dict[int, set[str]] = {}  # native macros created, per connection
        self.fitted: dict[str, native.Fitted] = {}  # the approximations fitted, by name
        self.con = duckdb.connect(":memory:")
        try:
            self._build(self.con)
        except BaseException:
            self.close()
            raise

    # ------------------------------------------------------------------ setup
    def _connection_for(self, text: str):
        """The DuckDB instance to run ``text`` on.

        A statement that calls one of the Python SQL functions (directly, or through the
        ``selection`` view) runs on a second, identical instance limited to one thread: DuckDB
        would call the function from every thread, and the interpreter lock makes those calls
        take turns at a high cost (benchmarks/bench_sql.py measures both). Native functions
        (``SqlFunction.native``: macros DuckDB evaluates itself, see :mod:`.native`) keep all
        threads: they call their Python function only for the few rows outside their
        fitted segments. Every other statement keeps all threads too.
        """
        functions, tables = functions_and_tables(text)
        named = self._native_named(text)
        if SELECTION_VIEW in tables and self._selection_text is not None:
            functions = functions | functions_and_tables(self._selection_text)[0]
        python = {fn.python_name for fn, _ in self.functions.values()}
        if not functions & python:
            self._ensure_native(self.con, named)
            return self.con
        if self._serial is None:
            serial = duckdb.connect(":memory:", config={"threads": 1})
            try:
                self._build(serial)
                if self._selection_text is not None:
                    self._ensure_native(serial, self._native_named(self._selection_text))
                    serial.execute(f"CREATE OR REPLACE VIEW {SELECTION_VIEW} AS\n"
                                   f"{self._selection_text}\n")
            except BaseException:
                serial.close()
                raise
            self._serial = serial
        self._ensure_native(self._serial, named)
        return self._serial

    def _native_named(self, text: str) -> set[str]:
        """The native functions whose name ``text`` calls (a textual superset of the syntax
        tree's, which EXPLAIN and DESCRIBE statements do not give)."""
        return {name for name, (fn, _) in self.functions.items()
                if fn.native and re.search(rf"\b{name}\s*\(", text, re.IGNORECASE)}

    def _ensure_native(self, con, names: set[str]) -> None:
        """Create the macros of the native functions among ``names`` on ``con`` (each fitted
        once per session, when a statement first uses it: opening a session fits nothing)."""
        made = self._made.setdefault(id(con), set())
        for name in sorted(names - made):
            entry = self.functions.get(name)
            if entry is None or not entry[0].native:
                continue
            fn, plugin = entry
            args = ", ".join(quote_identifier(a) for a, _ in fn.parameters)
            try:
                con.execute(f"CREATE MACRO {quote_identifier(fn.name)}({args}) AS "
                            f"({self._native_body(fn, plugin)})")
            except duckdb.Error as exc:
                raise PluginError(f"plugin {plugin!r}: SQL function {fn.name!r} cannot be "
                                  f"installed: {query_error(exc, 'DuckDB')}") from exc
            made.add(name)

    def _build(self, con) -> None:
        folders = self._folders
        con.execute(f"SET temp_directory = {_literal(self._tmpdir)}")
        con.execute("SET autoinstall_known_extensions = false")
        con.execute("SET autoload_known_extensions = false")
        self._views(con, "main", self.output)
        for name, out in self.attached.items():
            con.execute(f"CREATE SCHEMA {quote_identifier(name)}")
            self._views(con, name, out)
        for fn, plugin in self.functions.values():
            try:
                con.create_function(fn.python_name, arrow_udf(fn),
                                    [t for _, t in fn.parameters], fn.return_type, type="arrow",
                                    null_handling="special", side_effects=False)
            except duckdb.Error as exc:
                raise PluginError(f"plugin {plugin!r}: SQL function {fn.name!r} cannot be "
                                  f"installed: {query_error(exc, 'DuckDB')}") from exc
        dirs = [str(f) + os.sep for f in folders]
        dirs += [str(p) + os.sep for p in self.read_paths if p.is_dir()]
        files = [str(p) for p in self.read_paths if p.is_file()]
        if self._tmp_target is not None:
            files.append(str(self._tmp_target))
        if dirs:
            con.execute(f"SET allowed_directories = {_path_list(dirs)}")
        if files:
            con.execute(f"SET allowed_paths = {_path_list(files)}")
        con.execute("SET enable_external_access = false")
        con.execute("SET lock_configuration = true")

    def _native_body(self, fn: SqlFunction, plugin: str) -> str:
        """The macro text of a native function (fitted once per session, see ``native``)."""
        body = self._native_bodies.get(fn.name)
        if body is None:
            try:
                body, fitted = native_body(fn)
            except Exception as exc:
                raise PluginError(f"plugin {plugin!r}: SQL function {fn.name!r}: its "
                                  f"approximation could not be fitted: {exc}") from exc
            if fitted is not None:
                self.fitted[fn.name] = fitted
            self._native_bodies[fn.name] = body
        return body

    def _views(self, con, schema: str, out: OutputFolder) -> None:
        q = quote_identifier(schema)
        con.execute(f"CREATE VIEW {q}.catalogue AS SELECT * FROM read_parquet("
                    f"{_path_list(out.parts)})")
        if out.rejected_parts:
            con.execute(f"CREATE VIEW {q}.rejected AS SELECT * FROM read_parquet("
                        f"{_path_list(out.rejected_parts)})")
        else:
            cols = ", ".join(f"NULL::{t} AS {quote_identifier(n)}" for n, t in REJECTED_COLUMNS)
            con.execute(f"CREATE VIEW {q}.rejected AS SELECT {cols} WHERE false")
        load_small_tables(con, schema, out)

    # ------------------------------------------------------------------ selections
    def selection(self, name: str) -> Selection:
        if name not in self.selections:
            known = ", ".join(sorted(self.selections)) or "none for this output"
            raise ConfigError(f"--selection {name}: no such selection (available: {known})")
        return self.selections[name][0]

    def use_selection(self, name: str, values: Mapping[str, object] | None = None) -> str:
        """Define the view ``selection`` as the rendered selection; return its SQL."""
        sql = self.selection(name).render(values)
        text, kind = read_only_statement(sql)
        if kind != "SELECT":
            raise PluginError(f"selection {name!r} is not a SELECT")
        used = self._native_named(text)
        try:
            for con in (self.con, self._serial):
                if con is not None:
                    self._ensure_native(con, used)
                    con.execute(f"CREATE OR REPLACE VIEW {SELECTION_VIEW} AS\n{text}\n")
        except duckdb.Error as exc:
            raise query_error(exc, f"selection {name!r}") from None
        self._selection_text = text
        return text

    # ------------------------------------------------------------------ queries
    def relation(self, sql: str):
        """The (lazy) DuckDB relation of a checked, read-only statement."""
        text, _ = read_only_statement(sql)
        try:
            return self._connection_for(text).sql(text)
        except duckdb.Error as exc:
            raise query_error(exc) from None

    def reader(self, sql: str, batch_rows: int = 65_536):
        """A streaming Arrow RecordBatchReader over the result."""
        rel = self.relation(sql)
        try:
            return arrow_reader(rel, batch_rows)
        except duckdb.Error as exc:
            raise query_error(exc) from None

    def copy_to(self, sql: str, fmt: str, *, overwrite: bool = False) -> int:
        """Write the result to ``write_to``; return the count.

        Parquet is written by DuckDB's COPY (no rows pass through Python). CSV and JSON Lines
        go through the very writers of ``--format csv|json`` on stdout (Arrow's CSV writer,
        one batch at a time; JSON with NaN and infinities as null), so one format gives one
        output whether it goes to a pipe or to a file. The file appears complete or not at
        all (written beside it, then renamed).
        """
        if self.write_to is None or self._tmp_target is None:
            raise ConfigError("copy_to needs the session opened with write_to=FILE")
        if fmt not in COPY_OPTIONS:
            raise ConfigError(f"--format {fmt} cannot be written to a file "
                              f"(choose {', '.join(COPY_OPTIONS)})")
        if self.write_to.exists() and not overwrite:
            raise OutputError(f"--to {self.write_to}: exists (add --overwrite to replace it)")
        text, kind = read_only_statement(sql)
        if kind != "SELECT":
            raise QueryError("SQL: only a SELECT can be written with --to")
        tmp = self._tmp_target
        tmp.unlink(missing_ok=True)
        try:
            if fmt == "parquet":
                rows = self._connection_for(text).execute(
                    f"COPY (\n{text}\n) TO {_literal(str(tmp))} ({COPY_OPTIONS[fmt]})"
                ).fetchone()
                rows = int(rows[0]) if rows else 0
            else:
                rows = self._write_streamed(text, fmt, tmp)
        except (duckdb.Error, pa.ArrowException) as exc:
            tmp.unlink(missing_ok=True)
            raise query_error(exc) from None
        except BaseException:
            tmp.unlink(missing_ok=True)
            raise
        os.replace(tmp, self.write_to)
        return rows

    def _write_streamed(self, text: str, fmt: str, tmp: Path) -> int:
        from .output import write_csv, write_json_lines

        reader = self.reader(text)
        try:
            if fmt == "csv":
                with open(tmp, "wb") as fh:
                    return write_csv(reader, fh)
            with open(tmp, "w", encoding="utf-8", newline="\n") as fh:
                return write_json_lines(reader, fh)
        finally:
            try:
                reader.close()
            except Exception:  # already exhausted
                pass

    # ------------------------------------------------------------------ lifetime
    def close(self) -> None:
        for con in (self.con, getattr(self, "_serial", None)):
            try:
                if con is not None:
                    con.close()
            except Exception:  # pragma: no cover - closing twice
                pass
        if self._tmp_target is not None:
            self._tmp_target.unlink(missing_ok=True)
        shutil.rmtree(self._tmpdir, ignore_errors=True)

    def __enter__(self) -> "QuerySession":
        return self

    def __exit__(self, *exc) -> None:
        self.close()

    def cosmology_notes(self) -> list[str]:
        """Warnings when an attached output was annotated under another cosmology."""
        mine = self.output.cosmology.to_dict()
        notes = []
        for name, out in self.attached.items():
            if out.cosmology.to_dict() != mine:
                notes.append(f"attached {name!r} ({out.path}) was annotated under cosmology "
                             f"{out.cosmology_name}; the SQL functions use "
                             f"{self.output.cosmology_name}, the cosmology of {self.output.path}")
        return notes
