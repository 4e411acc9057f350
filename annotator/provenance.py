"""Provenance: VOParquet column metadata in every part file, and ``manifest.json``.

VOParquet 1.0 (IVOA Note, 2025) stores a VOTable header, one FIELD per column with its unit
(VOUnit) and UCD, under the file-level key ``IVOA.VOTable-Parquet.content``, beside
``IVOA.VOTable-Parquet.version = "1.0"``. Our own provenance (tool, cosmology, annotators)
is stored as JSON under ``annotator.provenance``.
"""

from __future__ import annotations

import datetime as _dt
import functools
import hashlib
import json
import os
import platform
import xml.etree.ElementTree as ET
from pathlib import Path

import pyarrow as pa

from . import __version__
from .columns import FLAGS_COLUMN

VOPARQUET_VERSION_KEY = b"IVOA.VOTable-Parquet.version"
VOPARQUET_CONTENT_KEY = b"IVOA.VOTable-Parquet.content"
PROVENANCE_KEY = b"annotator.provenance"
MANIFEST = "manifest.json"
VOTABLE_NS = "http://www.ivoa.net/xml/VOTable/v1.3"


def _votable_datatype(typ: pa.DataType) -> tuple[str, str | None]:
    """VOTable datatype and arraysize for an Arrow type."""
    if pa.types.is_boolean(typ):
        return "boolean", None
    if pa.types.is_int8(typ) or pa.types.is_uint8(typ):
        return ("unsignedByte", None) if pa.types.is_uint8(typ) else ("short", None)
    if pa.types.is_int16(typ) or pa.types.is_uint16(typ):
        return ("short", None) if pa.types.is_int16(typ) else ("int", None)
    if pa.types.is_int32(typ) or pa.types.is_uint32(typ):
        return ("int", None) if pa.types.is_int32(typ) else ("long", None)
    if pa.types.is_integer(typ):
        return "long", None
    if pa.types.is_float16(typ) or pa.types.is_float32(typ):
        return "float", None
    if pa.types.is_floating(typ) or pa.types.is_decimal(typ):
        return "double", None
    if pa.types.is_timestamp(typ) or pa.types.is_date(typ):
        return "char", "*"
    return "char", "*"


def votable_header(schema: pa.Schema, specs: dict, *, table_name: str, description: str,
                   params: dict[str, str]) -> str:
    """A VOTable document with one FIELD per column and no data."""
    ET.register_namespace("", VOTABLE_NS)
    root = ET.Element("VOTABLE", {"version": "1.5", "xmlns": VOTABLE_NS})
    resource = ET.SubElement(root, "RESOURCE", {"type": "results"})
    table = ET.SubElement(resource, "TABLE", {"name": table_name})
    ET.SubElement(table, "DESCRIPTION").text = description
    for name, value in params.items():
        ET.SubElement(table, "PARAM", {"name": name, "datatype": "char", "arraysize": "*",
                                       "value": value})
    for f in schema:
        typ, dims = f.type, []
        while pa.types.is_fixed_size_list(typ):  # a vector or array cell (e.g. FITS TDIMn)
            dims.append(typ.list_size)
            typ = typ.value_type
        datatype, arraysize = _votable_datatype(typ)
        if dims:  # VOTable arraysize: the first axis varies fastest ("3x2")
            arraysize = "x".join(str(d) for d in reversed(dims))
        attrs = {"name": f.name, "datatype": datatype}
        if arraysize:
            attrs["arraysize"] = arraysize
        spec = specs.get(f.name)
        meta = f.metadata or {}
        if spec is not None:
            if spec.unit:
                attrs["unit"] = spec.unit
            if spec.ucd:
                attrs["ucd"] = spec.ucd
        elif meta.get(b"unit"):  # an input column's own unit (e.g. FITS TUNITn)
            attrs["unit"] = meta[b"unit"].decode("utf-8", "replace")
        field_el = ET.SubElement(table, "FIELD", attrs)
        if spec is not None:
            desc = spec.description
        elif meta.get(b"description"):
            desc = meta[b"description"].decode("utf-8", "replace")
        else:
            desc = "Column of the input catalogue."
        ET.SubElement(field_el, "DESCRIPTION").text = desc
    xml = ET.tostring(root, encoding="unicode")
    return '<?xml version="1.0" encoding="utf-8"?>\n' + xml.replace(' xmlns:ns0', ' xmlns')


def tool_versions() -> dict:
    """Versions of the libraries a run depends on, read from their installed metadata
    (importing pandas, scipy and duckdb only to ask would cost most of a small run's start-up).
    Read once per process (every part and the manifest ask): the code a process runs does
    not change under it. A copy, so callers may change it."""
    return dict(_tool_versions())


@functools.lru_cache(maxsize=1)
def _tool_versions() -> dict:
    from .entry_points import version  # importlib.metadata's answers, without importing it

    versions = {"annotator": __version__, "python": platform.python_version()}
    for name in ("numpy", "scipy", "pyarrow", "pandas", "pluggy", "duckdb"):
        versions[name] = version(name) or "not installed"
    return versions


def provenance_record(plan) -> dict:
    return {
        "tool": tool_versions(),
        "cosmology": {"parameters": plan.cosmology.to_dict(), "derived": plan.cosmology.derived()},
        "annotators": plan.annotator_records(),
    }


def part_metadata(plan, input_metadata: dict | None = None) -> dict[bytes, bytes]:
    """File-level key/value metadata written into every part file."""
    specs = {c.name: c for c in plan.added_columns}
    specs[FLAGS_COLUMN.name] = FLAGS_COLUMN
    cosmo = plan.cosmology.to_dict()
    params = {"cosmology": json.dumps(cosmo, sort_keys=True), "annotator_version": __version__}
    content = votable_header(
        plan.output_schema, specs, table_name="catalogue",
        description=("Survey catalogue annotated by annotator " + __version__
                     + " under cosmology " + str(cosmo.get("name") or "custom")),
        params=params,
    )
    meta = {k: v for k, v in (input_metadata or {}).items()
            if k not in (b"pandas", VOPARQUET_CONTENT_KEY, VOPARQUET_VERSION_KEY, PROVENANCE_KEY)}
    meta[VOPARQUET_VERSION_KEY] = b"1.0"
    meta[VOPARQUET_CONTENT_KEY] = content.encode("utf-8")
    meta[PROVENANCE_KEY] = json.dumps(provenance_record(plan), sort_keys=True).encode("utf-8")
    return meta


def file_sha256(path: Path, bufsize: int = 8 << 20) -> str:
    """The SHA-256 of a file, by a read of its own: only the Dask engine still needs it, for
    Parquet and FITS inputs its workers read in parallel byte ranges (the readers otherwise
    hash while reading, ``annotator.io.hashing``)."""
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        while chunk := fh.read(bufsize):
            h.update(chunk)
    return h.hexdigest()


def now_iso() -> str:
    return _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds")


def build_manifest(plan, records: list[dict], *, started_at: str, finished_at: str,
                   elapsed_s: float, engine: str, checksums: dict[str, str]) -> dict:
    """The manifest, from the checkpoint records (so resumed runs count every part once)."""
    by_source: dict[int, dict] = {s.index: {"read": 0, "written": 0, "rejected": 0}
                                  for s in plan.sources}
    flags: dict[str, int] = {r: 0 for r, _, _ in plan.flag_reasons}
    flagged = 0
    parts = []
    for rec in records:
        agg = by_source[rec["source"]]
        agg["read"] += rec["rows_read"]
        agg["written"] += rec["rows_written"]
        agg["rejected"] += rec["rows_rejected"]
        flagged += rec.get("rows_flagged", 0)
        for reason, count in rec.get("flags", {}).items():
            flags[reason] = flags.get(reason, 0) + count
        parts.append({k: rec[k] for k in ("part", "rows_written", "rows_rejected", "bytes")
                      if k in rec} | ({"rejected_part": rec["rejected_part"]}
                                      if rec.get("rejected_part") else {}))
    rows_read = sum(a["read"] for a in by_source.values())
    rows_written = sum(a["written"] for a in by_source.values())
    rows_rejected = sum(a["rejected"] for a in by_source.values())
    specs = [c.to_dict() for c in plan.added_columns] + [FLAGS_COLUMN.to_dict()]
    return {
        "format": "annotator-manifest/1",
        "rows_read": rows_read,
        "rows_written": rows_written,
        "rows_rejected": rows_rejected,
        "rows_flagged": flagged,
        "inputs": [
            {
                "path": str(s.path),
                "format": s.format,
                "size_bytes": s.size_bytes,
                "sha256": checksums.get(str(s.path)),
                "rows_read": by_source[s.index]["read"],
                "rows_written": by_source[s.index]["written"],
                "rows_rejected": by_source[s.index]["rejected"],
            }
            for s in plan.sources
        ],
        "cosmology": {"parameters": plan.cosmology.to_dict(),
                      "derived": plan.cosmology.derived()},
        "annotators": plan.annotator_records(),
        "columns_added": specs,
        "column_mapping": {k: v[0] for k, v in plan.column_mapping.items()},
        "flags": {"counts": flags,
                  "descriptions": {r: d for r, d, _ in plan.flag_reasons}},
        "parts": parts,
        "tool": tool_versions(),
        "engine": engine,
        "job": plan.job.to_dict(),
        "started_at": started_at,
        "finished_at": finished_at,
        "elapsed_s": round(elapsed_s, 3),
        "rows_per_second": round(rows_read / elapsed_s, 1) if elapsed_s > 0 else None,
        "host": platform.node(),
        "pid": os.getpid(),
    }


def write_json_atomic(obj: dict, path: Path) -> None:
    from .io.writer import DiskFullError, is_disk_full, temporary_name

    path = Path(path)
    tmp = temporary_name(path)
    try:
        with open(tmp, "w", encoding="utf-8") as fh:
            json.dump(obj, fh, indent=2, sort_keys=False, default=str)
            fh.write("\n")
            fh.flush()
            os.fsync(fh.fileno())
        os.replace(tmp, path)
    except BaseException as exc:
        tmp.unlink(missing_ok=True)
        if is_disk_full(exc):
            raise DiskFullError(path.parent, None, path.name) from exc
        raise


def read_manifest(output_dir: Path) -> dict:
    from .errors import OutputError

    path = Path(output_dir) / MANIFEST
    if not path.is_file():
        raise OutputError(f"{output_dir}: no {MANIFEST} (is this an annotated output folder, "
                          f"and did the run finish?)")
    try:
        return json.loads(path.read_text(encoding="utf-8"))
    except json.JSONDecodeError as exc:
        raise OutputError(f"{path}: not valid JSON: {exc}") from exc
