"""What an annotated output folder holds: its part files, manifest, cosmology and columns.

Column metadata comes from the VOParquet header (``IVOA.VOTable-Parquet.content``, one FIELD
per column with unit, UCD and description) of the first part file, completed by the
manifest's ``columns_added`` for anything the header lacks.
"""

from __future__ import annotations

import json
import xml.etree.ElementTree as ET
from dataclasses import dataclass, field
from functools import cached_property
from pathlib import Path

import pyarrow as pa
import pyarrow.parquet as pq

from ..columns import FLAGS_COLUMN
from ..errors import OutputError
from ..io.writer import REJECTED_DIR, REJECTED_SCHEMA
from ..provenance import MANIFEST, VOPARQUET_CONTENT_KEY, read_manifest

_VOTABLE = "{http://www.ivoa.net/xml/VOTable/v1.3}"


@dataclass
class OutputFolder:
    """An annotated output folder, checked: the manifest is readable and every part exists."""

    path: Path
    manifest: dict
    parts: list[Path]
    rejected_parts: list[Path]
    _fields: dict | None = field(default=None, repr=False)

    @classmethod
    def open(cls, folder: str | Path) -> "OutputFolder":
        path = Path(folder).expanduser().resolve()
        if not path.is_dir():
            raise OutputError(f"{folder}: no such output folder")
        manifest = read_manifest(path)
        listed = manifest.get("parts")
        if isinstance(listed, list) and listed:
            parts, rejected = [], []
            for entry in listed:
                name = entry.get("part") if isinstance(entry, dict) else None
                if not name:
                    raise OutputError(f"{path / MANIFEST}: parts: an entry has no 'part' name")
                parts.append(path / name)
                if isinstance(entry, dict) and entry.get("rejected_part"):
                    rp = Path(entry["rejected_part"])
                    rejected.append(rp if rp.is_absolute() else path / rp)
        else:
            parts = sorted(path.glob("part-*.parquet"))
            rejected = sorted((path / REJECTED_DIR).glob("part-*.parquet"))
        for p in parts + rejected:
            if not p.is_file():
                raise OutputError(f"{p}: listed in {path / MANIFEST} but missing (the output "
                                  f"folder is incomplete; re-run the job with --resume)")
        if not parts:
            raise OutputError(f"{path}: no part files (part-*.parquet)")
        return cls(path, manifest, sorted(parts), sorted(rejected))

    # ------------------------------------------------------------------ contents
    @cached_property
    def schema(self) -> pa.Schema:
        try:
            return pq.read_schema(self.parts[0])
        except (OSError, pa.ArrowException) as exc:
            raise OutputError(f"{self.parts[0]}: not a readable Parquet file: {exc}") from exc

    @cached_property
    def cosmology(self):
        """The :class:`~annotator.cosmology.Cosmology` that annotated this output."""
        from ..cosmology import Cosmology, CosmologyError

        params = (self.manifest.get("cosmology") or {}).get("parameters")
        if not isinstance(params, dict):
            raise OutputError(f"{self.path / MANIFEST}: no cosmology.parameters table")
        try:
            return Cosmology.from_dict(params)
        except (CosmologyError, TypeError, ValueError) as exc:
            raise OutputError(f"{self.path / MANIFEST}: cosmology.parameters: {exc}") from exc

    @property
    def cosmology_name(self) -> str:
        params = (self.manifest.get("cosmology") or {}).get("parameters") or {}
        return str(params.get("name") or "custom")

    @property
    def added_column_names(self) -> list[str]:
        return [c["name"] for c in self.manifest.get("columns_added", []) if "name" in c]

    @property
    def redshift_column(self) -> str | None:
        """The column the distances were computed from (after any redefinition)."""
        for rec in self.manifest.get("annotators", []):
            if "comoving_distance_mpc" in rec.get("columns", []):
                col = (rec.get("inputs") or {}).get("redshift")
                if col:
                    return col
        col = (self.manifest.get("column_mapping") or {}).get("redshift")
        return col if isinstance(col, str) else None

    def votable_fields(self) -> dict[str, dict]:
        """``{column: {datatype, unit, ucd, description}}`` from the VOParquet header."""
        if self._fields is None:
            meta = self.schema.metadata or {}
            content = meta.get(VOPARQUET_CONTENT_KEY)
            fields: dict[str, dict] = {}
            if content:
                try:
                    root = ET.fromstring(content.decode("utf-8"))
                except ET.ParseError as exc:
                    raise OutputError(f"{self.parts[0]}: the VOParquet header is not valid "
                                      f"VOTable XML: {exc}") from exc
                for el in root.iter(_VOTABLE + "FIELD"):
                    desc = el.find(_VOTABLE + "DESCRIPTION")
                    fields[el.get("name", "")] = {
                        "datatype": el.get("datatype"),
                        "unit": el.get("unit"),
                        "ucd": el.get("ucd"),
                        "description": (desc.text or "").strip() if desc is not None else "",
                    }
            self._fields = fields
        return self._fields

    def columns(self) -> list[dict]:
        """Every column of the catalogue: name, Arrow type, unit, UCD, description, origin."""
        fields = self.votable_fields()
        added = {c["name"]: c for c in self.manifest.get("columns_added", []) if "name" in c}
        out = []
        for f in self.schema:
            vo = fields.get(f.name, {})
            spec = added.get(f.name, {})
            origin = "added" if f.name in added else "input"
            if f.name == FLAGS_COLUMN.name:
                origin = "added"
            out.append({
                "name": f.name,
                "type": str(f.type),
                "unit": vo.get("unit") or spec.get("unit"),
                "ucd": vo.get("ucd") or spec.get("ucd"),
                "description": (spec.get("description") or vo.get("description")
                                or "Column of the input catalogue."),
                "origin": origin,
            })
        return out

    def provenance_rows(self) -> list[dict]:
        """One ``{key, value}`` per top-level manifest key; the value as JSON text."""
        return [{"key": k, "value": json.dumps(v, sort_keys=True, default=str)}
                for k, v in self.manifest.items()]


COLUMN_FIELDS = ("name", "type", "unit", "ucd", "description", "origin")
REJECTED_COLUMNS = [(f.name, {"string": "VARCHAR", "int64": "BIGINT"}[str(f.type)])
                    for f in REJECTED_SCHEMA]
REJECTED_DESCRIPTIONS = {
    "source": "Path of the input file the row came from.",
    "row": "Row number in that input (data line number for CSV, 1-based after the header).",
    "reason": "Why the row was set aside.",
    "raw": "The row as read, verbatim.",
}
