"""``annotator describe DIR``: columns (type, unit, UCD, description), cosmology, annotator
versions, counts and flags of an annotated output, from its manifest and VOParquet header."""

from __future__ import annotations

import json


def add_arguments(p) -> None:
    p.add_argument("folder", metavar="DIR", help="annotated output folder")
    p.add_argument("--json", action="store_true", help="machine-readable output")


def describe_output(folder) -> dict:
    """Everything ``annotator describe`` shows, as a dict."""
    import pyarrow.parquet as pq

    from ..sql.metadata import OutputFolder

    out = OutputFolder.open(folder)
    m = out.manifest
    cosmo = m.get("cosmology") or {}
    on_disk = sum(p.stat().st_size for p in out.parts)
    rows_in_parts = sum(pq.ParquetFile(p).metadata.num_rows for p in out.parts)
    rows_in_rejected = sum(pq.ParquetFile(p).metadata.num_rows for p in out.rejected_parts)
    flags = m.get("flags") or {}
    return {
        "folder": str(out.path),
        "format": m.get("format"),
        "counts": {k: m.get(k) for k in ("rows_read", "rows_written", "rows_rejected",
                                         "rows_flagged")},
        "parts": {"files": len(out.parts), "rejected_files": len(out.rejected_parts),
                  "bytes": on_disk, "rows": rows_in_parts, "rejected_rows": rows_in_rejected},
        "reconciles": (m.get("rows_read") == (m.get("rows_written") or 0)
                       + (m.get("rows_rejected") or 0)
                       and rows_in_parts == m.get("rows_written")
                       and rows_in_rejected == m.get("rows_rejected")),
        "inputs": [{k: i.get(k) for k in ("path", "format", "rows_read", "rows_written",
                                           "rows_rejected", "sha256")}
                   for i in m.get("inputs", [])],
        "cosmology": {"name": out.cosmology_name,
                      "parameters": cosmo.get("parameters"),
                      "derived": cosmo.get("derived")},
        "annotators": [{k: a.get(k) for k in ("name", "version", "distribution", "inputs",
                                               "columns")}
                       for a in m.get("annotators", [])],
        "column_mapping": m.get("column_mapping"),
        "flags": [{"reason": r, "count": c,
                   "description": (flags.get("descriptions") or {}).get(r, "")}
                  for r, c in (flags.get("counts") or {}).items()],
        "columns": out.columns(),
        "tool": m.get("tool"),
        "engine": m.get("engine"),
        "started_at": m.get("started_at"),
        "finished_at": m.get("finished_at"),
        "elapsed_s": m.get("elapsed_s"),
        "rows_per_second": m.get("rows_per_second"),
    }


def _fmt(value) -> str:
    if value is None:
        return "-"
    if isinstance(value, float):
        return f"{value:.6g}"
    return str(value)


def render(d: dict) -> str:
    lines = []
    c = d["counts"]
    tool = d.get("tool") or {}
    lines.append(f"{d['folder']}")
    lines.append(f"  annotated by annotator {tool.get('annotator', '?')} ({d.get('engine')} "
                 f"engine), {d.get('started_at')} to {d.get('finished_at')}, "
                 f"{_fmt(d.get('elapsed_s'))} s, {_fmt(d.get('rows_per_second'))} rows/s")
    lines.append(f"  rows: read {c['rows_read']}, written {c['rows_written']}, set aside "
                 f"{c['rows_rejected']}, flagged {c['rows_flagged']}")
    p = d["parts"]
    lines.append(f"  parts: {p['files']} files ({p['bytes']:,} bytes, {p['rows']} rows), "
                 f"{p['rejected_files']} files of rows set aside ({p['rejected_rows']} rows)")
    lines.append("  counts reconcile: read = written + set aside, and the files hold them"
                 if d["reconciles"] else
                 "  WARNING: the counts do not reconcile (manifest against part files)")
    for i in d["inputs"]:
        sha = (i.get("sha256") or "")[:12]
        lines.append(f"  input {i['path']} ({i['format']}): read {i['rows_read']}, written "
                     f"{i['rows_written']}, set aside {i['rows_rejected']}; sha256 {sha}…")
    cos = d["cosmology"]
    params = cos.get("parameters") or {}
    lines.append("")
    lines.append(f"cosmology {cos['name']}: " + ", ".join(
        f"{k}={_fmt(v)}" for k, v in params.items() if k != "name"))
    derived = cos.get("derived") or {}
    if derived:
        lines.append("  derived: " + ", ".join(f"{k}={_fmt(v)}" for k, v in derived.items()))
    lines.append("")
    lines.append("annotators: " + ", ".join(f"{a['name']} {a['version']}"
                                            for a in d["annotators"]))
    if d.get("column_mapping"):
        lines.append("inputs used: " + ", ".join(f"{k} <- {v}"
                                                 for k, v in d["column_mapping"].items()))
    lines.append("")
    lines.append("flags:" if d["flags"] else "flags: none declared")
    wr = max((len(f["reason"]) for f in d["flags"]), default=0)
    for f in d["flags"]:
        lines.append(f"  {f['reason']:<{wr}} {f['count']:>10}  {f['description']}")
    lines.append("")
    cols = d["columns"]
    lines.append(f"columns ({len(cols)}; {sum(x['origin'] == 'added' for x in cols)} added):")
    w = max(len(x["name"]) for x in cols)
    wt = max(len(x["type"]) for x in cols)
    wu = max([len(x["unit"] or "-") for x in cols])
    wucd = max([len(x["ucd"] or "-") for x in cols])
    for x in cols:
        lines.append(f"  {x['name']:<{w}}  {x['type']:<{wt}}  {x['unit'] or '-':<{wu}}  "
                     f"{x['ucd'] or '-':<{wucd}}  {x['description']}")
    return "\n".join(lines)


def main(args) -> int:
    d = describe_output(args.folder)
    if args.json:
        print(json.dumps(d, indent=2, default=str))
    else:
        print(render(d))
    return 0
