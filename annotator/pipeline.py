"""Apply a plan to one batch: the single code path every engine uses.

:class:`Pipeline` holds only the configured annotators, how their inputs resolve and the
output schema, so it pickles small and is shipped as-is to Dask workers.
"""

from __future__ import annotations

import sys
from dataclasses import dataclass

import numpy as np
import pyarrow as pa

from .api import Batch
from .arrow_numpy import from_numpy, string_array, to_numpy
from .columns import FLAGS_COLUMN
from .errors import PluginError
from .io.missing import apply_sentinels

FLAG_SEPARATOR = ";"


@dataclass
class PipelineStep:
    name: str
    annotator: object
    resolve: dict
    columns: list  # ColumnSpec


class Pipeline:
    """Annotators in order, ready to run on batches."""

    def __init__(self, steps: list[PipelineStep], output_schema: pa.Schema,
                 flag_reasons: list[str], schema_metadata: dict | None = None,
                 sentinels: dict | None = None):
        self.steps = steps
        #: ``{column: values}`` read as null and flagged before any annotator runs
        self.sentinels = dict(sentinels or {})
        self.output_schema = output_schema
        self.flag_reasons = list(flag_reasons)
        self.flag_bits = {r: i for i, r in enumerate(self.flag_reasons)}
        self.schema_metadata = schema_metadata or {}
        self._prepared = False

    @classmethod
    def from_plan(cls, plan, schema_metadata: dict | None = None) -> "Pipeline":
        steps = [PipelineStep(s.name, s.annotator, dict(s.resolve), list(s.columns))
                 for s in plan.steps]
        return cls(steps, plan.output_schema, [r for r, _, _ in plan.flag_reasons],
                   schema_metadata, sentinels=getattr(plan.job, "sentinels", None))

    def __getstate__(self):
        state = self.__dict__.copy()
        state["_prepared"] = False
        return state

    def prepare(self) -> None:
        """Build each annotator's heavy tables once (per process)."""
        if not self._prepared:
            for step in self.steps:
                step.annotator.prepare()
            self._prepared = True

    def annotate(self, table: pa.Table) -> tuple[pa.Table, dict[str, int], int]:
        """Annotate one batch.

        Sentinel values of the input (``[input].sentinels``) become nulls first, each raising
        its ``sentinel_<column>`` flag, whatever format the batch was read from.

        :return: the output table, the count of rows raising each flag, the count of rows with
            at least one flag.
        """
        self.prepare()
        n = table.num_rows
        n_words = max(1, (len(self.flag_reasons) + 63) // 64)
        bits = np.zeros((n_words, n), dtype=np.uint64)
        computed: dict[str, list] = {}
        input_flags: dict = {}
        if self.sentinels:
            table, input_flags = apply_sentinels(table, self.sentinels)

        def flagger(owner: str, reason: str, mask) -> None:
            bit = self.flag_bits.get(reason)
            if bit is None:
                raise PluginError(
                    f"annotator {owner!r} raised flag {reason!r}, which it did not declare "
                    f"in its 'flags'"
                )
            mask = np.asarray(mask, dtype=bool)
            if mask.shape != (n,):
                raise PluginError(f"annotator {owner!r}: flag {reason!r} mask has shape "
                                  f"{mask.shape}, expected ({n},)")
            bits[bit // 64][mask] |= np.uint64(1 << (bit % 64))

        for reason, mask in input_flags.items():
            flagger("input", reason, mask)
        shared: dict = {}
        for step in self.steps:
            batch = Batch(table, step.resolve, computed, flagger, step.name, shared)
            try:
                result = step.annotator.annotate(batch)
            except PluginError:
                raise
            except Exception as exc:
                raise PluginError(f"annotator {step.name!r} failed on a batch: "
                                  f"{type(exc).__name__}: {exc}") from exc
            for spec in step.columns:
                if spec.name not in result:
                    raise PluginError(f"annotator {step.name!r} did not return column "
                                      f"{spec.name!r}")
                computed[spec.name] = [_to_arrow(result[spec.name], spec, n, step.name), None]
                if isinstance(result[spec.name], np.ndarray) and \
                        result[spec.name].dtype == np.float64:
                    computed[spec.name][1] = result[spec.name]

        columns = list(table.columns)
        for step in self.steps:
            for spec in step.columns:
                columns.append(computed[spec.name][0])
        flags_array, counts = self._flags(bits)
        columns.append(flags_array)
        out = pa.Table.from_arrays(columns, schema=self.output_schema)
        flagged = int(np.count_nonzero(bits.any(axis=0))) if n else 0
        return out, counts, flagged

    def _flags(self, bits: np.ndarray) -> tuple[pa.Array, dict[str, int]]:
        """The flags column and the rows per reason, without sorting the batch.

        Clean rows (most of a catalogue) are code 0 and never looked at again; the flagged
        rows' bit patterns are grouped by Arrow's hash-based dictionary encoding, so the cost
        is one pass over the flagged rows, not a sort of all of them.
        """
        n = bits.shape[1]
        counts: dict[str, int] = {}
        if n == 0:
            return string_array([]), counts
        flagged = np.flatnonzero(bits.any(axis=0))
        if not len(flagged):  # a clean batch: n empty strings, straight from their offsets
            return pa.Array.from_buffers(pa.string(), n, [None, pa.py_buffer(
                np.zeros(n + 1, dtype=np.int32)), pa.py_buffer(b"")]), counts
        indices = np.zeros(n, dtype=np.int32)
        combos: list[tuple[int, ...]] = [(0,) * bits.shape[0]]
        if len(flagged):
            if bits.shape[0] == 1:
                encoded = from_numpy(bits[0][flagged]).dictionary_encode()
                uniques = to_numpy(encoded.dictionary)
                combos += [(int(c),) for c in uniques]
                indices[flagged] = to_numpy(encoded.indices) + 1
            else:  # more than 64 reasons: group whole rows of words (rare; sorts flagged rows)
                rows = np.ascontiguousarray(bits[:, flagged].T)
                uniques, inverse = np.unique(rows, axis=0, return_inverse=True)
                combos += [tuple(int(x) for x in u) for u in uniques]
                indices[flagged] = inverse.ravel() + 1
        per_combo = np.bincount(indices, minlength=len(combos))
        labels = []
        for combo, count in zip(combos, per_combo):
            reasons = [r for r, b in self.flag_bits.items() if (combo[b // 64] >> (b % 64)) & 1]
            labels.append(FLAG_SEPARATOR.join(reasons))
            for r in reasons:
                counts[r] = counts.get(r, 0) + int(count)
        dictionary = string_array(labels)
        arr = pa.DictionaryArray.from_arrays(from_numpy(indices), dictionary)
        return arr.cast(FLAGS_COLUMN.type), counts


def _to_arrow(values, spec, n: int, owner: str) -> pa.Array:
    try:
        if isinstance(values, (pa.Array, pa.ChunkedArray)):
            arr = values
        elif "numpy.ma" in sys.modules and isinstance(values, np.ma.MaskedArray):
            # (np.ma imports numpy.ma, ~20 ms: without it nothing can be a MaskedArray)
            arr = from_numpy(np.ma.getdata(values), spec.type, mask=np.ma.getmaskarray(values))
        else:
            values = np.asarray(values)
            arr = from_numpy(values, spec.type, nan_is_null=values.dtype.kind == "f")
        if arr.type != spec.type:
            arr = arr.cast(spec.type)
    except (pa.ArrowInvalid, pa.ArrowTypeError, TypeError, ValueError) as exc:
        raise PluginError(f"annotator {owner!r}: column {spec.name!r} cannot be "
                          f"{spec.type}: {exc}") from exc
    if len(arr) != n:
        raise PluginError(f"annotator {owner!r}: column {spec.name!r} has {len(arr)} values "
                          f"for a batch of {n} rows")
    return arr
