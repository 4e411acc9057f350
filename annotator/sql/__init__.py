"""The SQL layer: DuckDB over an annotated output folder.

* :class:`SqlFunction` and :class:`Selection` are what plugins return from the
  ``register_sql_functions(cosmology)`` and ``register_selections(manifest)`` hooks.
* :class:`~annotator.sql.session.QuerySession` opens an in-memory DuckDB connection with views
  over the part files (``catalogue``, ``rejected``, ``provenance``, ``columns``), the SQL
  functions of the cosmology recorded in the manifest and the ready-made selections. It is
  read-only by construction: only ``SELECT`` (and ``EXPLAIN`` of a ``SELECT``) statements run,
  and file access is confined to the folders being queried and the one file a result is
  written to.
* :mod:`annotator.sql.metadata` reads what ``annotator describe`` shows;
  :mod:`annotator.sql.export` writes a standalone DuckDB database.
"""

from __future__ import annotations

import math
import re
from collections.abc import Callable, Mapping
from dataclasses import dataclass, field

from ..errors import ConfigError, UserError
from .native import SqlApproximation

__all__ = ["SqlFunction", "SqlApproximation", "Selection", "SelectionParameter", "QueryError",
           "quote_identifier"]

_SQL_NAME = re.compile(r"^[a-z_][a-z0-9_]*$")
_PLACEHOLDER = re.compile(r"\$\{([a-z_][a-z0-9_]*)\}")


class QueryError(UserError):
    """A query could not be run: bad SQL, a refused statement, a failing function."""


def quote_identifier(name: str) -> str:
    """``name`` as a DuckDB identifier, quoted so any column name is safe."""
    return '"' + name.replace('"', '""') + '"'


@dataclass(frozen=True)
class SqlFunction:
    """A vectorised scalar SQL function.

    :param name: the SQL name (lower-case snake; by convention the output column it mirrors).
    :param function: called once per DuckDB vector with one float64 numpy array per
        parameter (NaN where the SQL value is NULL); returns a numpy array (or a
        ``numpy.ma.MaskedArray``, masked = NULL) of the same length. NaN results become NULL.
    :param parameters: ``(name, DuckDB type)`` of each argument; numbers are passed as DOUBLE.
    :param return_type: ``"DOUBLE"`` or ``"BOOLEAN"`` (boolean results are NULL wherever an
        argument is NaN).
    :param unit: VOUnit of the result, or ``None``.
    :param description: one sentence for ``annotator query --list-functions``.
    :param approximation: how DuckDB may evaluate a one-argument DOUBLE function natively on
        all its threads (:class:`~annotator.sql.native.SqlApproximation`: piecewise
        polynomials fitted to ``function`` and checked against it when a statement first
        uses it; ``function`` itself answers wherever they are not within tolerance).
    :param native_sql: the function's exact SQL expression over its parameter names, for a
        function SQL can state in closed form (e.g. a comparison with a constant); DuckDB then
        evaluates it natively. ``function`` still defines the result: a test should hold the
        two equal.
    """

    name: str
    function: Callable
    parameters: tuple[tuple[str, str], ...] = (("z", "DOUBLE"),)
    return_type: str = "DOUBLE"
    unit: str | None = None
    description: str = ""
    approximation: SqlApproximation | None = None
    native_sql: str | None = None

    def __post_init__(self) -> None:
        if not _SQL_NAME.match(self.name):
            raise ValueError(f"SQL function name {self.name!r} must be lower-case letters, "
                             f"digits and underscores")
        for arg, typ in self.parameters:
            if typ.upper() not in ("DOUBLE",):
                raise ValueError(f"SQL function {self.name}: parameter {arg!r} has type {typ!r}; "
                                 f"only DOUBLE parameters are supported")
        if self.return_type.upper() not in ("DOUBLE", "BOOLEAN"):
            raise ValueError(f"SQL function {self.name}: return type {self.return_type!r} is not "
                             f"DOUBLE or BOOLEAN")
        if self.approximation is not None and self.native_sql is not None:
            raise ValueError(f"SQL function {self.name}: give approximation or native_sql, "
                             f"not both")
        if self.approximation is not None and (len(self.parameters) != 1
                                               or self.return_type.upper() != "DOUBLE"):
            raise ValueError(f"SQL function {self.name}: an approximation needs one DOUBLE "
                             f"parameter and a DOUBLE result")

    @property
    def native(self) -> bool:
        """True when DuckDB evaluates it itself (an approximation or native SQL)."""
        return self.approximation is not None or self.native_sql is not None

    @property
    def python_name(self) -> str:
        """The SQL name of the Python function itself: ``name`` unless the function is native,
        then a hidden name the native form falls back on."""
        return f"_python_{self.name}" if self.native else self.name

    @property
    def signature(self) -> str:
        args = ", ".join(a for a, _ in self.parameters)
        return f"{self.name}({args}) -> {self.return_type.upper()}"


@dataclass(frozen=True)
class SelectionParameter:
    """One parameter of a :class:`Selection`.

    :param name: the placeholder name (``${name}`` in the selection's SQL).
    :param description: one line for ``--list-selections``.
    :param kind: ``"number"`` (any finite number, rendered as a SQL literal) or ``"choice"``
        (one of ``choices``, rendered verbatim: the choices are checked identifiers).
    :param default: the value used when none is given; ``None`` = required, unless
        ``default_sql`` is given.
    :param default_sql: a SQL expression used when no value is given (may contain the other
        parameters' placeholders), e.g. an estimate computed from the data.
    :param choices: the allowed values of a ``"choice"`` parameter.
    """

    name: str
    description: str
    kind: str = "number"
    default: float | str | None = None
    default_sql: str | None = None
    choices: tuple[str, ...] = ()

    def __post_init__(self) -> None:
        if not _SQL_NAME.match(self.name):
            raise ValueError(f"selection parameter name {self.name!r} must be lower-case snake")
        if self.kind not in ("number", "choice"):
            raise ValueError(f"selection parameter {self.name!r}: kind must be number or choice")
        for c in self.choices:
            if not _SQL_NAME.match(c):
                raise ValueError(f"selection parameter {self.name!r}: choice {c!r} is not a "
                                 f"lower-case identifier")

    @property
    def required(self) -> bool:
        return self.default is None and self.default_sql is None

    def literal(self, selection: str, raw: object) -> str:
        """The SQL text for a value given by the user (checked)."""
        where = f"--param {self.name} (selection {selection!r})"
        if self.kind == "number":
            try:
                value = float(raw)  # type: ignore[arg-type]
            except (TypeError, ValueError):
                raise ConfigError(f"{where}: {raw!r} is not a number") from None
            if not math.isfinite(value):
                raise ConfigError(f"{where}: {raw!r} is not a finite number")
            return repr(value)
        text = str(raw)
        if text not in self.choices:
            raise ConfigError(f"{where}: {text!r} is not one of "
                              f"{', '.join(self.choices) or '(none available)'}")
        return text


@dataclass(frozen=True)
class Selection:
    """A ready-made, named SQL query (``annotator query DIR --selection NAME``).

    :param name: lower-case snake name.
    :param summary: one line saying which rows it keeps.
    :param sql: a ``SELECT`` over ``catalogue`` with ``${parameter}`` placeholders.
    :param parameters: the placeholders' definitions.
    :param check: optional ``check(values) -> str | None`` on the rendered literal values
        (as floats for numbers); a returned string is the reason the values are refused.
    :param note: how to read the result (assumptions, approximations), shown with the SQL.
    """

    name: str
    summary: str
    sql: str
    parameters: tuple[SelectionParameter, ...] = ()
    check: Callable[[dict], str | None] | None = field(default=None, compare=False)
    note: str = ""

    def __post_init__(self) -> None:
        if not _SQL_NAME.match(self.name):
            raise ValueError(f"selection name {self.name!r} must be lower-case snake")
        known = {p.name for p in self.parameters}
        texts = [self.sql] + [p.default_sql for p in self.parameters if p.default_sql]
        for text in texts:
            for used in _PLACEHOLDER.findall(text):
                if used not in known:
                    raise ValueError(f"selection {self.name!r}: placeholder ${{{used}}} has no "
                                     f"parameter")

    def render(self, values: Mapping[str, object] | None = None) -> str:
        """The SQL with every placeholder replaced; values are checked first.

        :raises ConfigError: naming the parameter when a value is missing, unknown or invalid.
        """
        values = dict(values or {})
        by_name = {p.name: p for p in self.parameters}
        for key in values:
            if key not in by_name:
                known = ", ".join(by_name) or "none"
                raise ConfigError(f"--param {key}: selection {self.name!r} has no such parameter "
                                  f"(its parameters: {known})")
        literals: dict[str, str] = {}
        plain: dict[str, object] = {}
        for p in self.parameters:
            if p.name in values:
                literals[p.name] = p.literal(self.name, values[p.name])
                plain[p.name] = float(literals[p.name]) if p.kind == "number" else literals[p.name]
            elif p.default is not None:
                literals[p.name] = p.literal(self.name, p.default)
                plain[p.name] = float(literals[p.name]) if p.kind == "number" else literals[p.name]
            elif p.default_sql is None:
                raise ConfigError(f"selection {self.name!r} needs --param {p.name}=VALUE "
                                  f"({p.description})")
        if self.check is not None:
            problem = self.check(plain)
            if problem:
                raise ConfigError(f"selection {self.name!r}: {problem}")

        def expand(text: str, depth: int = 0) -> str:
            def one(m: re.Match) -> str:
                name = m.group(1)
                if name in literals:
                    return literals[name]
                if depth > 4:
                    raise ValueError(f"selection {self.name!r}: default_sql refers to itself")
                return "(" + expand(by_name[name].default_sql or "", depth + 1) + ")"
            return _PLACEHOLDER.sub(one, text)

        return expand(self.sql).strip()

    def template(self) -> str:
        """The SQL as written, with its placeholders (for listing)."""
        return self.sql.strip()
