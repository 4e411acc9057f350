"""Streaming readers: one interface, one batch type (Arrow tables of at most ``chunk_rows``).

Every reader yields :class:`Chunk` objects in a deterministic sequence: chunk ``k`` of a source
always holds the same rows, so a resumed run can skip exactly the chunks already committed.

* Parquet: ``ParquetFile.iter_batches`` (bounded memory), re-cut to exactly ``chunk_rows``.
* CSV and CSV.gz: the text is cut into blocks at line ends, each block parsed by
  ``pyarrow.csv``; rows with the wrong number of fields or text where a number belongs are set
  aside with their physical line number (header = line 1), the reason and the raw text.
  Quoted fields spanning several lines are not supported (say so in the reason if they occur).
"""

from __future__ import annotations

import gzip
import io
from collections.abc import Iterator
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.csv as pacsv
import pyarrow.parquet as pq

from ..errors import InputError

CSV_SUFFIXES = (".csv", ".csv.gz", ".tsv", ".tsv.gz", ".txt", ".txt.gz")
PARQUET_SUFFIXES = (".parquet", ".pq", ".parq")
CSV_BLOCK_BYTES = 8 << 20
TYPE_BY_NAME = {
    "int8": pa.int8(),
    "int16": pa.int16(),
    "int32": pa.int32(),
    "int64": pa.int64(),
    "float32": pa.float32(),
    "float64": pa.float64(),
    "bool": pa.bool_(),
    "string": pa.string(),
}


@dataclass(frozen=True)
class Source:
    """One input file."""

    index: int
    path: Path
    format: str  # "parquet" or "csv"
    size_bytes: int


@dataclass
class Chunk:
    """Rows of one source, in order: the accepted ones and the ones set aside."""

    source: Source
    index: int
    table: pa.Table
    rejected: list[dict] = field(default_factory=list)

    @property
    def rows_read(self) -> int:
        return self.table.num_rows + len(self.rejected)


def _format_of(path: Path, fmt: str) -> str | None:
    if fmt != "auto":
        return fmt
    name = path.name.lower()
    if name.endswith(PARQUET_SUFFIXES):
        return "parquet"
    if name.endswith(CSV_SUFFIXES):
        return "csv"
    return None


def expand_inputs(paths: list[Path], fmt: str = "auto") -> list[Source]:
    """Files stay as given; folders give their Parquet (or CSV) files, sorted by path."""
    sources: list[Source] = []
    for path in paths:
        path = Path(path)
        if path.is_dir():
            files = sorted(
                p for p in path.rglob("*")
                if p.is_file() and not p.name.startswith((".", "_")) and _format_of(p, fmt)
            )
            if not files:
                raise InputError(f"input folder {path}: holds no Parquet or CSV files")
        elif path.is_file():
            files = [path]
        else:
            raise InputError(f"input {path}: no such file or folder")
        for f in files:
            kind = _format_of(f, fmt)
            if kind is None:
                raise InputError(
                    f"input {f}: cannot tell the format from the name "
                    f"(use .parquet, .csv or .csv.gz, or set [input].format)"
                )
            sources.append(Source(len(sources), f.resolve(), kind, f.stat().st_size))
    return sources


class ParquetReader:
    def __init__(self, source: Source):
        self.source = source
        try:
            # pre_buffer=True (pyarrow's default) keeps every row group read so far in memory
            # while iter_batches runs: memory would grow with the file (measured: ~20 MB per
            # 250k-row chunk). Without it, memory stays flat.
            self._file = pq.ParquetFile(source.path, pre_buffer=False)
            self.schema = self._file.schema_arrow
        except Exception as exc:
            raise InputError(f"input {source.path}: not a readable Parquet file: {exc}") from exc

    def estimate_rows(self) -> int:
        return self._file.metadata.num_rows

    def chunks(self, chunk_rows: int, start_chunk: int = 0, target: pa.Schema | None = None
               ) -> Iterator[Chunk]:
        meta = self._file.metadata
        start_row = start_chunk * chunk_rows
        first_group, skip, seen = 0, 0, 0
        for g in range(meta.num_row_groups):
            n = meta.row_group(g).num_rows
            if seen + n > start_row:
                first_group, skip = g, start_row - seen
                break
            seen += n
        else:
            return
        groups = list(range(first_group, meta.num_row_groups))
        pending: list[pa.RecordBatch] = []
        pending_rows = 0
        index = start_chunk
        try:
            batches = self._file.iter_batches(batch_size=chunk_rows, row_groups=groups)
            for batch in batches:
                if skip:
                    if batch.num_rows <= skip:
                        skip -= batch.num_rows
                        continue
                    batch = batch.slice(skip)
                    skip = 0
                pending.append(batch)
                pending_rows += batch.num_rows
                while pending_rows >= chunk_rows:
                    table = pa.Table.from_batches(pending)
                    yield Chunk(self.source, index, self._conform(table.slice(0, chunk_rows), target))
                    index += 1
                    rest = table.slice(chunk_rows)
                    pending = rest.to_batches() if rest.num_rows else []
                    pending_rows = rest.num_rows
        except InputError:
            raise
        except Exception as exc:
            raise InputError(
                f"input {self.source.path}: unreadable Parquet data near row "
                f"{index * chunk_rows}: {exc}"
            ) from exc
        if pending_rows:
            yield Chunk(self.source, index, self._conform(pa.Table.from_batches(pending), target))

    def _conform(self, table: pa.Table, target: pa.Schema | None) -> pa.Table:
        table = table.combine_chunks()
        if target is None or table.schema.equals(target, check_metadata=False):
            return table
        try:
            return table.select(target.names).cast(target)
        except Exception as exc:
            raise InputError(
                f"input {self.source.path}: columns do not match the first input's types "
                f"({exc})"
            ) from exc


def _open_text(path: Path):
    raw = open(path, "rb")
    if path.name.lower().endswith(".gz"):
        return gzip.GzipFile(fileobj=raw, mode="rb")
    return raw


def _iter_line_blocks(path: Path, block_bytes: int) -> Iterator[bytes]:
    """Blocks of whole lines (each ends with a newline, except perhaps the last)."""
    with _open_text(path) as fh:
        tail = b""
        while True:
            data = fh.read(block_bytes)
            if not data:
                if tail:
                    yield tail
                return
            data = tail + data
            cut = data.rfind(b"\n")
            if cut < 0:
                tail = data
                continue
            yield data[: cut + 1]
            tail = data[cut + 1 :]


class CsvReader:
    """CSV / CSV.gz with a header line; see the module docstring for what is set aside."""

    def __init__(self, source: Source, *, delimiter: str = ",", column_types: dict | None = None,
                 block_bytes: int = CSV_BLOCK_BYTES):
        self.source = source
        self.delimiter = delimiter
        self.block_bytes = block_bytes
        self._delim_b = delimiter.encode()
        try:
            first = next(_iter_line_blocks(source.path, 1 << 20), b"")
        except (OSError, EOFError, gzip.BadGzipFile) as exc:
            raise InputError(f"input {source.path}: cannot read: {exc}") from exc
        if not first.strip():
            raise InputError(f"input {source.path}: empty file (a header line is needed)")
        header, _, body = first.partition(b"\n")
        self.header = header.rstrip(b"\r")
        try:
            names = pacsv.read_csv(
                io.BytesIO(self.header + b"\n"),
                parse_options=pacsv.ParseOptions(delimiter=delimiter),
            ).column_names
        except pa.ArrowInvalid as exc:
            raise InputError(f"input {source.path}: unreadable header line: {exc}") from exc
        if len(set(names)) != len(names):
            raise InputError(f"input {source.path}: the header repeats a column name")
        self.names = names
        sample = pacsv.read_csv(
            io.BytesIO(self.header + b"\n" + body[: 4 << 20]),
            read_options=pacsv.ReadOptions(column_names=names, skip_rows=1),
            parse_options=pacsv.ParseOptions(delimiter=delimiter,
                                             invalid_row_handler=lambda r: "skip"),
            convert_options=pacsv.ConvertOptions(
                column_types={n: pa.string() for n in names}, strings_can_be_null=True),
        )
        inferred = {n: _infer_type(sample.column(n).combine_chunks()) for n in names}
        fields = []
        for name in names:
            typ = inferred.get(name, pa.string())
            if pa.types.is_null(typ):
                typ = pa.float64()
            if column_types and name in column_types:
                typ = TYPE_BY_NAME[column_types[name]]
            fields.append(pa.field(name, typ))
        unknown = set(column_types or {}) - set(names)
        if unknown:
            raise InputError(
                f"input {source.path}: [input].column_types names column "
                f"{sorted(unknown)[0]!r}, which is not in the header"
            )
        self.schema = pa.schema(fields)

    def estimate_rows(self) -> int | None:
        if self.source.path.name.lower().endswith(".gz"):
            return None
        first = next(_iter_line_blocks(self.source.path, 1 << 20), b"")
        lines = max(first.count(b"\n") - 1, 1)
        return int(self.source.size_bytes / (len(first) / lines)) if first else 0

    # -- parsing ----------------------------------------------------------------------
    def _parse_block(self, block: bytes, first_line: int, target: pa.Schema
                     ) -> tuple[pa.Table, list[dict]]:
        """Parse one block of whole lines that starts at physical line ``first_line``."""
        invalid: list[bytes] = []

        def on_invalid(row):
            invalid.append(row.text)
            return "skip"

        parse = pacsv.ParseOptions(delimiter=self.delimiter, invalid_row_handler=on_invalid)
        read = pacsv.ReadOptions(column_names=self.names, block_size=max(len(block), 1) + 1)
        try:
            table = pacsv.read_csv(
                io.BytesIO(block), read_options=read, parse_options=parse,
                convert_options=pacsv.ConvertOptions(
                    column_types={f.name: f.type for f in target}, strings_can_be_null=True),
            )
            cast_failed = False
        except pa.ArrowInvalid:
            invalid.clear()
            table = pacsv.read_csv(
                io.BytesIO(block), read_options=read, parse_options=parse,
                convert_options=pacsv.ConvertOptions(
                    column_types={n: pa.string() for n in self.names}, strings_can_be_null=True),
            )
            cast_failed = True

        lines = self._line_numbers(block, first_line, table.num_rows, invalid)
        rejected = []
        if invalid:
            for text, line in zip(invalid, lines["invalid"]):
                n_fields = text.count(self.delimiter) + 1 if isinstance(text, str) else None
                rejected.append({
                    "source": str(self.source.path),
                    "row": int(line),
                    "reason": f"wrong number of fields: {n_fields}, expected {len(self.names)}",
                    "raw": text if isinstance(text, str) else str(text),
                })
        row_lines = lines["rows"]
        if cast_failed:
            strings = table
            table, bad = self._cast_with_rejects(strings, target)
            for i, why in bad:
                raw = self.delimiter.join(
                    "" if v is None else str(v) for v in _row_values(strings, i))
                rejected.append({"source": str(self.source.path), "row": int(row_lines[i]),
                                 "reason": why, "raw": raw})
        rejected.sort(key=lambda r: r["row"])
        return table, rejected

    def _line_numbers(self, block: bytes, first_line: int, n_rows: int, invalid: list):
        """Physical line numbers of the parsed rows and of the invalid rows of a block."""
        simple = not invalid and b"\n\n" not in block and not block.startswith(b"\n") \
            and b"\r\n\r\n" not in block
        if simple:
            return {"rows": first_line + np.arange(n_rows), "invalid": []}
        lines = block.split(b"\n")
        if lines and lines[-1] == b"":
            lines.pop()
        pending = [t.encode() if isinstance(t, str) else t for t in invalid]
        rows, bad = [], []
        k = 0
        for offset, line in enumerate(lines):
            text = line.rstrip(b"\r")
            if not text.strip():
                continue  # blank lines are not rows
            if k < len(pending) and text == pending[k].rstrip(b"\r"):
                bad.append(first_line + offset)
                k += 1
            else:
                rows.append(first_line + offset)
        if len(rows) != n_rows:  # quoted newlines: fall back to counting rows
            rows = list(first_line + np.arange(n_rows))
        return {"rows": np.asarray(rows, dtype=np.int64), "invalid": bad}

    def _cast_with_rejects(self, table: pa.Table, target: pa.Schema):
        """Cast string columns to the target types; rows that fail are removed and reported."""
        bad_reason: dict[int, str] = {}
        for f in target:
            if pa.types.is_string(f.type):
                continue
            col = table.column(f.name).combine_chunks()
            try:
                pc.cast(col, f.type)
                continue
            except (pa.ArrowInvalid, pa.ArrowNotImplementedError):
                pass
            import pandas as pd  # only when a CSV column needs checking

            strings = pd.Series(col.to_numpy(zero_copy_only=False), dtype=object)
            for i in np.flatnonzero(_unparseable(strings, f.type)):
                bad_reason.setdefault(
                    # the value itself is in the raw text; a fixed reason groups well in SQL
                    int(i), f"column {f.name!r}: text where a {f.type} belongs"
                )
        keep = np.ones(table.num_rows, dtype=bool)
        keep[list(bad_reason)] = False
        kept = table.filter(pa.array(keep))
        try:
            kept = kept.cast(target)
        except (pa.ArrowInvalid, pa.ArrowNotImplementedError) as exc:
            raise InputError(f"input {self.source.path}: cannot convert columns: {exc}") from exc
        return kept, sorted(bad_reason.items())

    def chunks(self, chunk_rows: int, start_chunk: int = 0, target: pa.Schema | None = None
               ) -> Iterator[Chunk]:
        target = target or self.schema
        if target.names != self.names:
            raise InputError(
                f"input {self.source.path}: header {self.names} does not match the first "
                f"input's columns {target.names}"
            )
        index = 0
        pending: list[pa.Table] = []
        pending_rows = 0
        pending_rejected: list[dict] = []
        line = 1
        first = True
        try:
            for block in _iter_line_blocks(self.source.path, self.block_bytes):
                if first:
                    header_end = block.find(b"\n") + 1
                    block = block[header_end:]
                    line = 2
                    first = False
                if not block:
                    continue
                n_lines = block.count(b"\n") + (0 if block.endswith(b"\n") else 1)
                table, rejected = self._parse_block(block, line, target)
                line += n_lines
                pending.append(table)
                pending_rows += table.num_rows
                pending_rejected.extend(rejected)
                while pending_rows >= chunk_rows:
                    whole = pa.concat_tables(pending)
                    head, rest = whole.slice(0, chunk_rows), whole.slice(chunk_rows)
                    if index >= start_chunk:
                        yield Chunk(self.source, index, head.combine_chunks(), pending_rejected)
                    pending_rejected = []
                    index += 1
                    pending, pending_rows = ([rest] if rest.num_rows else []), rest.num_rows
        except InputError:
            raise
        except (OSError, EOFError, gzip.BadGzipFile, pa.ArrowException) as exc:
            raise InputError(f"input {self.source.path}: unreadable near line {line}: {exc}") \
                from exc
        if (pending_rows or pending_rejected) and index >= start_chunk:
            whole = pa.concat_tables(pending) if pending else target.empty_table()
            yield Chunk(self.source, index, whole.combine_chunks(), pending_rejected)


def _row_values(table: pa.Table, i: int) -> list:
    return [table.column(j)[i].as_py() for j in range(table.num_columns)]


def _infer_type(strings: pa.Array) -> pa.DataType:
    """The column's type from a sample of its text: the narrowest of int64, float64, bool that
    all but a few stray values (at most 0.1 %, at least 2) parse as; else string. The stray
    values are then set aside as rows with text where a number belongs."""
    import pandas as pd

    series = pd.Series(strings.to_numpy(zero_copy_only=False), dtype=object)
    present = int(series.notna().sum())
    if present == 0:
        return pa.float64()
    allowed = max(2, int(0.001 * present))
    for typ in (pa.int64(), pa.float64(), pa.bool_()):
        if pa.types.is_boolean(typ):
            ok = series.dropna().str.lower().isin(["true", "false"])
            if int((~ok).sum()) <= allowed and ok.any():
                return typ
            continue
        if int(_unparseable(series, typ).sum()) <= allowed and \
                int((~_unparseable(series, typ) & series.notna().to_numpy()).sum()) > 0:
            return typ
    return pa.string()


def _unparseable(strings: "pd.Series", typ: pa.DataType) -> np.ndarray:
    """Rows whose non-null text cannot become ``typ``."""
    present = strings.notna().to_numpy()
    if pa.types.is_floating(typ) or pa.types.is_integer(typ):
        stripped = strings.where(strings.notna(), None)
        import pandas as pd

        numbers = pd.to_numeric(stripped, errors="coerce")
        lowered = stripped.str.strip().str.lower()
        literal_nan = lowered.isin(["nan", "+nan", "-nan"]).to_numpy()
        bad = present & numbers.isna().to_numpy() & ~literal_nan
        bad |= present & (stripped.str.strip() != stripped).fillna(False).to_numpy()
        if pa.types.is_integer(typ):
            vals = numbers.to_numpy(dtype=float, na_value=np.nan)
            with np.errstate(invalid="ignore"):
                bad |= present & ~literal_nan & np.isfinite(vals) & (np.mod(vals, 1) != 0)
            bad |= present & literal_nan
            bad |= present & np.isinf(vals)
        return bad
    out = np.zeros(len(strings), dtype=bool)
    for i, s in enumerate(strings):
        if s is None or (isinstance(s, float) and np.isnan(s)):
            continue
        try:
            pc.cast(pa.array([s]), typ)
        except (pa.ArrowInvalid, pa.ArrowNotImplementedError):
            out[i] = True
    return out


def open_reader(source: Source, *, delimiter: str = ",", column_types: dict | None = None):
    """The reader for a source's format."""
    if source.format == "parquet":
        return ParquetReader(source)  # Parquet carries its own types
    if source.format == "csv":
        return CsvReader(source, delimiter=delimiter, column_types=column_types)
    raise InputError(f"input {source.path}: unknown format {source.format!r} (parquet or csv)")
