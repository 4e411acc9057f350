"""The plugin API: everything an annotator (built-in or third-party) is written against.

An annotator is a class registered through the ``register_annotators`` hook. For each job the
core calls :meth:`Annotator.configure` with a :class:`Setup` (its options, the catalogue's
columns, the job's cosmology, a safe way to read its data files). ``configure`` returns an
instance describing what it needs (:attr:`requires`, :attr:`optional`), what it adds
(:attr:`provides`) and which flags it may raise, or ``None`` when it does not apply to this
job. The core then orders the instances, builds the output schema and calls
:meth:`Annotator.annotate` once per batch with a :class:`Batch`.

Walls: an annotator never opens files itself (``Setup.read_table`` does that for it, with
errors naming the file), never sees the CLI or the service, and keeps no per-batch state. Its
instance is pickled to Dask workers, so it holds only arrays, numbers and picklable objects.
"""

from __future__ import annotations

import os
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any, ClassVar

import numpy as np
import pyarrow as pa

from .arrow_numpy import to_numpy
from .columns import ColumnSpec
from .errors import ConfigError, PathRefusedError

__all__ = ["Annotator", "Setup", "Batch", "ColumnSpec"]


class Annotator:
    """Base class of every annotator.

    Class attributes (read before any job is configured, e.g. by ``annotator plugins``):

    * ``name``: unique identifier, the key under ``[annotators]`` in a job file.
    * ``version``: the annotator's own version, recorded in every output.
    * ``summary``: one line for ``annotator plugins``.
    * ``documentation``: where its options and job-dependent columns are described (a page
      or an address), shown by ``annotator plugins``.
    * ``sections``: top-level job-file tables this annotator owns (e.g. ``("bands",)``).
    * ``column_settings``: keys of ``[columns]`` that are settings, not column mappings.
    * ``input_hints``: for a logical input, catalogue column names to try when unmapped.
    * ``enabled_by_default``: whether it runs when the job file does not mention it.
    * ``position``: tie-break for the order of annotators (and so of output columns) when
      their inputs do not decide it; built-ins use 2-55, third parties default to 100.

    Instance attributes (set by ``configure``):

    * ``requires`` / ``optional``: logical names it reads: catalogue inputs (``"redshift"``) or
      columns other annotators add (``"comoving_distance_mpc"``). ``"observed:redshift"``
      is the catalogue's own redshift column even when another annotator redefines
      ``redshift`` (a K-correction wants the observed redshift, a distance the CMB-frame one).
    * ``provides``: the :class:`ColumnSpec` of each column it adds, in output order.
    * ``redefines``: ``{logical: column}``; later annotators that ask for ``logical`` get
      ``column`` instead (a CMB-frame redshift redefines ``"redshift"``).
    * ``flags``: ``{reason: description}`` of the flags it may raise.
    * ``column_map``: ``{logical: catalogue column}`` it resolved itself (e.g. per-band magnitudes).
    * ``replaces``: names of columns in ``provides`` that take the place of another
      annotator's column of the same name (a redshift posterior's ``reachable_probability``
      replaces the Gaussian one). The other annotator still runs, but its values of that
      column are dropped; the manifest records, for that annotator, which column was replaced
      and by whom. Two annotators that both claim to replace a column are refused.
    * ``settings``: a small JSON-serialisable dict of what this job configured (a method, a
      grid), recorded in the manifest beside the annotator so readers of the output (the
      report) need not re-read the job's files. Default: empty (nothing recorded).
    """

    name: ClassVar[str] = ""
    version: ClassVar[str] = "0"
    summary: ClassVar[str] = ""
    documentation: ClassVar[str] = ""
    sections: ClassVar[tuple[str, ...]] = ()
    column_settings: ClassVar[tuple[str, ...]] = ()
    input_hints: ClassVar[Mapping[str, Sequence[str]]] = {}
    enabled_by_default: ClassVar[bool] = True
    position: ClassVar[int] = 100

    requires: tuple[str, ...] = ()
    optional: tuple[str, ...] = ()
    provides: tuple[ColumnSpec, ...] = ()
    redefines: Mapping[str, str] = {}
    flags: Mapping[str, str] = {}
    column_map: Mapping[str, str] = {}
    replaces: tuple[str, ...] = ()
    settings: Mapping[str, Any] = {}

    @classmethod
    def configure(cls, setup: "Setup") -> "Annotator | None":
        """Return an instance for this job, or ``None`` when the annotator does not apply.

        Raise :class:`annotator.errors.ConfigError` (``setup.error(key, why)``) for bad options.
        The default accepts no options and returns ``cls()``.
        """
        setup.reject_unknown_options(())
        return cls()

    def prepare(self) -> None:
        """Build heavy shared state (tables) once per job, before the first batch."""

    def annotate(self, batch: "Batch") -> Mapping[str, Any]:
        """Return ``{column name: values}`` for every column in :attr:`provides`.

        Values may be a numpy array (float NaN becomes null), a ``numpy.ma.MaskedArray``
        (masked becomes null) or a ``pyarrow.Array``. Raise flags with ``batch.flag``.
        """
        raise NotImplementedError(f"annotator {self.name!r} does not implement annotate()")

    # -- helpers -----------------------------------------------------------------------
    @classmethod
    def origin(cls) -> str:
        return f"{cls.__module__}.{cls.__qualname__}"


@dataclass
class Setup:
    """What ``Annotator.configure`` sees of the job.

    :ivar annotator_name: the annotator being configured (used in error messages).
    :ivar options: its ``[annotators.<name>]`` table, without ``enabled``.
    :ivar sections: the top-level tables it declared in ``Annotator.sections``.
    :ivar columns: the job's ``[columns]`` table (mappings and settings).
    :ivar catalogue_schema: the Arrow schema of the input catalogue.
    :ivar cosmology: the job's :class:`annotator.cosmology.Cosmology`.
    :ivar base_dir: folder that relative paths in the job file are resolved against.
    :ivar allowed_roots: when not empty, the only folders :meth:`read_table` may read from
        (the batch service sets its data roots).
    """

    annotator_name: str
    options: dict
    sections: dict
    columns: dict
    catalogue_schema: pa.Schema
    cosmology: Any
    base_dir: Path
    explicitly_enabled: bool = False
    allowed_roots: tuple = ()
    why_not: str = ""

    def does_not_apply(self, why: str) -> None:
        """Say why the annotator does not apply to this job; ``configure`` returns the result.

        ``return setup.does_not_apply("no [bands] table in the job")`` returns ``None``; every
        run then prints ``annotator: <name> not applied: <why>``.
        """
        self.why_not = why
        return None

    def error(self, key: str, why: str) -> ConfigError:
        """A ConfigError naming ``[annotators.<name>].key`` (or a section key as given)."""
        where = key if key.startswith("[") else f"[annotators.{self.annotator_name}].{key}"
        return ConfigError(f"{where}: {why}")

    def reject_unknown_options(self, known: Sequence[str]) -> None:
        unknown = sorted(set(self.options) - set(known))
        if unknown:
            allowed = ", ".join(sorted(known)) or "none"
            raise self.error(unknown[0], f"unknown option (allowed: {allowed})")

    def has_column(self, name: str) -> bool:
        return name in self.catalogue_schema.names

    def resolve_path(self, path: str | Path) -> Path:
        p = Path(path).expanduser()
        p = p if p.is_absolute() else (self.base_dir / p)
        if self.allowed_roots:
            real = Path(os.path.realpath(p))
            if not any(real.is_relative_to(root) for root in map(Path, self.allowed_roots)):
                raise PathRefusedError(
                    f"[annotators.{self.annotator_name}]: file {path} is outside the folders "
                    f"this job may read ({', '.join(map(str, self.allowed_roots))})"
                )
        return p

    def read_table(self, path: str | Path, *, what: str, min_columns: int = 2) -> np.ndarray:
        """Read a small numeric text table (CSV or whitespace separated, '#' comments).

        Returns a float64 array of shape (rows, columns). Errors name ``what`` and the file.
        """
        from .io.tables import read_numeric_table

        return read_numeric_table(self.resolve_path(path), what=what, min_columns=min_columns)


class Batch:
    """One batch of rows, as an annotator sees it.

    Names are logical names (as in ``requires``); the core has already resolved them to
    catalogue columns or to columns of earlier annotators.
    """

    __slots__ = ("_record_batch", "_resolve", "_computed", "_flagger", "_owner", "_shared",
                 "num_rows")

    def __init__(self, record_batch: pa.RecordBatch, resolve, computed, flagger, owner: str,
                 shared: dict | None = None):
        self._record_batch = record_batch
        self._resolve = resolve
        self._computed = computed
        self._flagger = flagger
        self._owner = owner
        # one dict per batch, shared by every annotator's view of it: float values and
        # derived arrays are computed once per batch, not once per annotator
        self._shared = {} if shared is None else shared
        self.num_rows = record_batch.num_rows

    def has(self, name: str) -> bool:
        """Whether the logical input ``name`` is available (always true for ``requires``)."""
        return name in self._resolve

    def _target(self, name: str) -> tuple[str, str]:
        target = self._resolve.get(name)
        if target is None:
            raise KeyError(f"annotator {self._owner!r} did not declare input {name!r}")
        return target

    def array(self, name: str) -> pa.Array:
        """The column as an Arrow array, with its own type and nulls."""
        kind, column = self._target(name)
        if kind == "computed":
            return self._computed[column][0]
        return self._record_batch.column(column)

    def values(self, name: str) -> np.ndarray:
        """The column as float64 numpy values, NaN where null. Read-only: the same array is
        handed to every annotator that reads this column in this batch (copy it to change it).
        """
        kind, column = self._target(name)
        if kind == "computed":
            entry = self._computed[column]
            if entry[1] is None:
                entry[1] = _read_only(_as_float(entry[0]))
            return entry[1]
        key = ("values", column)
        found = self._shared.get(key)
        if found is None:
            found = self._shared[key] = _read_only(_as_float(self._record_batch.column(column)))
        return found

    def derived(self, name: str, function) -> np.ndarray:
        """``function(self.values(name))``, computed once per batch for every annotator that
        asks for the same function of the same column (e.g. the usable redshifts).

        :param function: a module-level function of one float64 array; its result is made
            read-only and shared, so it must not depend on anything but its argument.
        """
        kind, column = self._target(name)
        key = ("derived", kind, column, function)
        found = self._shared.get(key)
        if found is None:
            found = self._shared[key] = _read_only(np.asarray(function(self.values(name))))
        return found

    def flag(self, reason: str, mask: np.ndarray) -> None:
        """Add ``reason`` to ``annotation_flags`` of the rows where ``mask`` is true."""
        self._flagger(self._owner, reason, mask)


def _read_only(values: np.ndarray) -> np.ndarray:
    values.flags.writeable = False
    return values


def _as_float(arr: pa.Array) -> np.ndarray:
    if pa.types.is_floating(arr.type) and arr.type != pa.float64():
        arr = arr.cast(pa.float64())
    elif not pa.types.is_floating(arr.type):
        if pa.types.is_integer(arr.type) or pa.types.is_boolean(arr.type) or pa.types.is_decimal(
            arr.type
        ):
            arr = arr.cast(pa.float64())
        else:
            raise TypeError(f"column of type {arr.type} is not numeric")
    return to_numpy(arr)  # not arr.to_numpy(): that imports pandas (annotator.arrow_numpy)
