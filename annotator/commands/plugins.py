"""``annotator plugins``: every registered annotator, its origin and the columns it adds."""

from __future__ import annotations

import json

from ..registry import collect_annotators, load_registry


def add_arguments(p) -> None:
    p.add_argument("--json", action="store_true", help="machine-readable output")


def _columns_note(cls) -> str:
    where = f"; see {cls.documentation}" if cls.documentation else ""
    if cls.flags:  # flags declared on the class: a checking annotator with no columns
        return f"no columns: it adds the flags {', '.join(cls.flags)} to annotation_flags" + where
    return ("columns depend on the job: `annotator run --config JOB.toml --dry-run` lists them"
            + where)


def _describe(reg) -> dict:
    cls = reg.cls
    columns = [c.to_dict() for c in getattr(cls, "provides", ())]
    return {
        "name": cls.name,
        "version": cls.version,
        "summary": cls.summary,
        "plugin": reg.plugin,
        "from": reg.distribution,
        "class": cls.origin(),
        "enabled_by_default": cls.enabled_by_default,
        "columns": columns,
        "documentation": cls.documentation or None,
        "columns_note": None if columns else _columns_note(cls),
    }


def main(args) -> int:
    pm = load_registry()
    found = sorted(collect_annotators(pm).values(), key=lambda r: (r.cls.position, r.cls.name))
    records = [_describe(r) for r in found]
    if args.json:
        print(json.dumps(records, indent=2))
        return 0
    for rec in records:
        default = "on by default" if rec["enabled_by_default"] else "off unless configured"
        print(f"{rec['name']} {rec['version']}  [{rec['from']}; {rec['class']}; {default}]")
        print(f"    {rec['summary']}")
        for col in rec["columns"]:
            print(f"    + {col['name']:<38} {col['type']:<7} {col['unit'] or '-':<5} "
                  f"{col['ucd'] or ''}")
        if rec["columns_note"]:
            print(f"    + ({rec['columns_note']})")
    return 0
