"""From a job and the catalogue's schema to an ordered, validated plan.

Everything that can be wrong with a job is found here, before a single row is read: unknown
keys, unknown annotators, missing inputs, output-column clashes, cycles, invalid cosmology.
The plan is what ``--dry-run`` prints and what every engine executes.
"""

from __future__ import annotations

import os

from dataclasses import dataclass, field

import pyarrow as pa

from .api import Annotator, Setup
from .columns import FLAGS_COLUMN, ColumnSpec
from .config import Job
from .errors import ConfigError, InputError, PlanError
from .io.missing import SENTINEL_FLAG_PREFIX, check_sentinels, sentinel_flag
from .io.readers import Source, expand_inputs, open_reader
from .registry import RegisteredAnnotator, collect_annotators, load_registry


@dataclass
class Step:
    """One configured annotator and how its inputs resolve.

    ``resolve`` maps each logical input to ``("catalogue", column)`` or ``("computed", column)``.
    """

    annotator: Annotator
    registered: RegisteredAnnotator
    resolve: dict[str, tuple[str, str]]
    replaced: dict[str, str] = field(default_factory=dict)  # column -> annotator replacing it

    @property
    def columns(self) -> list[ColumnSpec]:
        """The columns this step writes: its ``provides`` minus those another one replaces."""
        return [c for c in self.annotator.provides if c.name not in self.replaced]

    @property
    def name(self) -> str:
        return self.annotator.name


@dataclass
class Plan:
    job: Job
    sources: list[Source]
    catalogue_schema: pa.Schema
    cosmology: object
    steps: list[Step]
    added_columns: list[ColumnSpec]
    output_schema: pa.Schema
    flag_reasons: list[tuple[str, str, str]]  # (reason, description, annotator)
    column_mapping: dict[str, tuple[str, str]]  # logical -> (catalogue column, how)
    skipped: list[tuple[str, str]] = field(default_factory=list)
    estimated_rows: int | None = None

    def estimated_output_bytes(self) -> int | None:
        if self.estimated_rows is None:
            return None
        input_bytes = sum(s.size_bytes for s in self.sources)
        # Added columns: their raw width (float columns compress little); flags mostly empty.
        per_row = sum(max(getattr(c.type, "bit_width", 64) // 8, 1) for c in self.added_columns)
        return int(input_bytes + self.estimated_rows * (per_row + 1))

    def annotator_records(self) -> list[dict]:
        return [
            {
                "name": s.name,
                "version": s.annotator.version,
                "class": s.registered.cls.origin(),
                "plugin": s.registered.plugin,
                "distribution": s.registered.distribution,
                "inputs": {k: v[1] for k, v in s.resolve.items()},
                "columns": [c.name for c in s.columns],
                **({"columns_replaced": dict(s.replaced)} if s.replaced else {}),
                **({"settings": dict(s.annotator.settings)} if s.annotator.settings else {}),
            }
            for s in self.steps
        ]


OBSERVED_PREFIX = "observed:"


def _hints(registered: dict[str, RegisteredAnnotator]) -> dict[str, list[str]]:
    hints: dict[str, list[str]] = {}
    for reg in registered.values():
        for logical, names in reg.cls.input_hints.items():
            bucket = hints.setdefault(logical, [])
            bucket.extend(n for n in names if n not in bucket)
    return hints


def _position(reg: RegisteredAnnotator) -> tuple:
    return (getattr(reg.cls, "position", 100), reg.cls.name)


def _check_one_shape(readers) -> None:
    """Every input must hold the same columns. When they do not (a folder that also holds
    other tables, e.g. filter curves), say which files hold which columns, in one line."""
    shapes: dict[frozenset, list] = {}
    for reader in readers:
        shapes.setdefault(frozenset(reader.schema.names), []).append(reader)
    if len(shapes) == 1:
        return
    paths = [str(r.source.path) for r in readers]
    base = os.path.commonpath(paths) if len(paths) > 1 else ""
    base = base if base and os.path.isdir(base) else os.path.dirname(base)

    def name(reader) -> str:
        return os.path.relpath(reader.source.path, base) if base else str(reader.source.path)

    groups = sorted(shapes.values(), key=lambda g: (-len(g[0].schema.names), name(g[0])))
    parts = []
    for group in groups:
        cols = group[0].schema.names
        shown = ", ".join(cols[:4]) + (f", … ({len(cols)} columns)" if len(cols) > 4 else "")
        files = ", ".join(name(r) for r in group[:3]) + (f" and {len(group) - 3} more"
                                                          if len(group) > 3 else "")
        parts.append(f"{files} [{shown}]")
    where = f"under {base}: " if base else ""
    raise InputError(f"inputs hold tables of {len(groups)} different shapes; a run reads one "
                     f"kind of catalogue ({where}{'; '.join(parts)}): name the catalogue files, "
                     f"or keep other tables out of the input folder")


def build_plan(job: Job, pm=None) -> Plan:
    from .cosmology import Cosmology, CosmologyError

    pm = pm or load_registry()
    registered = collect_annotators(pm)
    ordered = sorted(registered.values(), key=_position)

    # -- job-level keys that plugins claim -------------------------------------------
    for name in job.annotators:
        if name not in registered:
            raise ConfigError(
                f"[annotators].{name}: no such annotator (known: {', '.join(sorted(registered))})"
            )
    claimed = {sec: reg.cls.name for reg in ordered for sec in reg.cls.sections}
    for sec in job.sections:
        if sec not in claimed:
            known = ", ".join(["input", "output", "cosmology", "columns", "annotators",
                               *sorted(claimed)])
            raise ConfigError(f"{sec}: unknown top-level key (allowed: {known})")
    settings = {key for reg in ordered for key in reg.cls.column_settings}

    # -- inputs and cosmology --------------------------------------------------------
    sources = expand_inputs(job.inputs, job.input_format)
    readers = [open_reader(s, **job.reader_options()) for s in sources]
    schema = readers[0].schema
    _check_one_shape(readers)
    try:
        cosmology = Cosmology.from_dict(job.cosmology).build()  # tables: a refusal is here
    except CosmologyError as exc:
        raise ConfigError(f"[cosmology]: {exc}") from exc
    estimates = [r.estimate_rows() for r in readers]
    estimated_rows = None if any(e is None for e in estimates) else sum(estimates)

    # -- configure each enabled annotator --------------------------------------------
    configured: list[tuple[Annotator, RegisteredAnnotator]] = []
    skipped: list[tuple[str, str]] = []
    for reg in ordered:
        entry = job.annotators.get(reg.cls.name, {"enabled": None, "options": {}})
        enabled = entry["enabled"]
        if enabled is None:
            enabled = reg.cls.enabled_by_default
        if not enabled:
            skipped.append((reg.cls.name, f"disabled ([annotators] {reg.cls.name} = false)"
                            if entry["enabled"] is False else
                            f"off by default ([annotators] {reg.cls.name} = true enables it)"))
            continue
        setup = Setup(
            annotator_name=reg.cls.name,
            options=dict(entry["options"]),
            sections={s: job.sections[s] for s in reg.cls.sections if s in job.sections},
            columns=dict(job.columns),
            catalogue_schema=schema,
            cosmology=cosmology,
            base_dir=job.base_dir,
            allowed_roots=tuple(job.allowed_roots),
            explicitly_enabled=entry["enabled"] is True,
        )
        instance = reg.cls.configure(setup)
        if instance is None:
            why = setup.why_not or "it does not apply to this job (it gave no reason)"
            if entry["enabled"] is True:
                raise ConfigError(f"[annotators].{reg.cls.name}: enabled, but not applied: {why}")
            skipped.append((reg.cls.name, why))
            continue
        configured.append((instance, reg))

    # -- who provides what -------------------------------------------------------------
    providers: dict[str, int] = {}
    replaced: dict[int, dict[str, str]] = {}
    for i, (inst, reg) in enumerate(configured):
        for col in inst.provides:
            if col.name in providers:
                j = providers[col.name]
                other_inst, other = configured[j]
                mine = col.name in inst.replaces
                theirs = col.name in other_inst.replaces
                if mine != theirs:
                    # one replaces the other's column: the replacer provides it
                    loser, winner = (j, i) if mine else (i, j)
                    replaced.setdefault(loser, {})[col.name] = configured[winner][1].cls.name
                    providers[col.name] = winner
                    continue
                raise PlanError(
                    f"column {col.name!r} is added by two annotators: {other.cls.name!r} "
                    f"({other.cls.origin()}) and {reg.cls.name!r} ({reg.cls.origin()}); "
                    f"disable one in [annotators]"
                )
            if col.name in schema.names:
                raise PlanError(
                    f"column {col.name!r} of annotator {reg.cls.name!r} already exists in the "
                    f"catalogue {sources[0].path}; rename that column or disable the annotator"
                )
            if col.name == FLAGS_COLUMN.name:
                raise PlanError(f"annotator {reg.cls.name!r} may not add {FLAGS_COLUMN.name!r}")
            providers[col.name] = i
    if FLAGS_COLUMN.name in schema.names:
        raise PlanError(
            f"the catalogue {sources[0].path} already has a column {FLAGS_COLUMN.name!r}: "
            f"is it an annotated output? Annotate the original catalogue instead"
        )
    redefiners: dict[str, int] = {}
    for i, (inst, reg) in enumerate(configured):
        for logical, column in inst.redefines.items():
            if logical in redefiners:
                other = configured[redefiners[logical]][1]
                raise PlanError(
                    f"input {logical!r} is redefined by both {other.cls.name!r} and "
                    f"{reg.cls.name!r}; disable one"
                )
            if providers.get(column) != i:
                raise PlanError(
                    f"annotator {reg.cls.name!r} redefines {logical!r} as {column!r}, "
                    f"a column it does not add"
                )
            redefiners[logical] = i

    # -- resolve inputs -----------------------------------------------------------------
    hints = _hints(registered)
    lower = {n.lower(): n for n in schema.names}
    mapping: dict[str, tuple[str, str]] = {}
    used_mappings: set[str] = set()

    def catalogue_column(logical: str, inst: Annotator) -> tuple[str, str] | None:
        if logical in inst.column_map:
            col = inst.column_map[logical]
            how = f"[{inst.name}]"
        elif logical in job.columns and logical not in settings:
            col = job.columns[logical]
            used_mappings.add(logical)
            if not isinstance(col, str):
                raise ConfigError(f"[columns].{logical}: expected a column name, got {col!r}")
            how = "[columns]"
        else:
            for cand in [logical, *hints.get(logical, [])]:
                if cand in schema.names:
                    return cand, "detected"
                if cand.lower() in lower:
                    return lower[cand.lower()], "detected"
            return None
        if col not in schema.names:
            raise ConfigError(
                f"{how if how != '[columns]' else '[columns].' + logical}: column {col!r} is not "
                f"in the catalogue {sources[0].path} (columns: {', '.join(schema.names)})"
            )
        return col, how

    deps: dict[int, set[int]] = {i: set() for i in range(len(configured))}
    resolves: list[dict[str, tuple[str, str]]] = []
    for i, (inst, reg) in enumerate(configured):
        resolve: dict[str, tuple[str, str]] = {}
        for name, required in [(n, True) for n in inst.requires] + \
                              [(n, False) for n in inst.optional]:
            # "observed:<logical>" is the catalogue's own column, whatever redefines it
            observed = name.startswith(OBSERVED_PREFIX)
            logical = name[len(OBSERVED_PREFIX):] if observed else name
            if observed:
                found = catalogue_column(logical, inst)
                if found is None and required:
                    raise PlanError(f"annotator {reg.cls.name!r} needs the catalogue's own "
                                    f"{logical!r} column, and {sources[0].path} has none; map "
                                    f"it in the job file: [columns] {logical} = \"<column>\"")
                if found is not None:
                    resolve[name] = ("catalogue", found[0])
                continue
            if logical in redefiners and redefiners[logical] != i:
                j = redefiners[logical]
                resolve[logical] = ("computed", configured[j][0].redefines[logical])
                deps[i].add(j)
                continue
            if logical in providers and providers[logical] != i:
                resolve[logical] = ("computed", logical)
                deps[i].add(providers[logical])
                continue
            found = catalogue_column(logical, inst)
            if found is None:
                if required:
                    tried = ", ".join([logical, *hints.get(logical, [])])
                    raise PlanError(
                        f"annotator {reg.cls.name!r} needs input {logical!r}, and the catalogue "
                        f"{sources[0].path} has no such column (tried: {tried}); map it in the "
                        f"job file: [columns] {logical} = \"<column>\""
                    )
                continue
            col, how = found
            typ = schema.field(col).type
            text_ok = logical in getattr(inst, "text_inputs", ())
            if hasattr(readers[0], "holds_numbers"):
                # Text formats: a numeric input is read as numbers whatever its first rows
                # look like; refused only when the sample holds values and none is a number.
                if not text_ok and not readers[0].holds_numbers(col):
                    raise PlanError(
                        f"annotator {reg.cls.name!r} needs numbers for input {logical!r}, but "
                        f"column {col!r} of {sources[0].path} holds no number in its first "
                        f"rows")
            elif not (pa.types.is_integer(typ) or pa.types.is_floating(typ)
                      or pa.types.is_boolean(typ) or pa.types.is_decimal(typ)
                      or pa.types.is_null(typ)) and not text_ok:
                raise PlanError(
                    f"annotator {reg.cls.name!r} needs numbers for input {logical!r}, but "
                    f"column {col!r} of {sources[0].path} has type {typ}"
                )
            resolve[logical] = ("catalogue", col)
            mapping.setdefault(logical, (col, how))
        resolves.append(resolve)

    unused = [k for k in job.columns if k not in settings and k not in used_mappings
              and k not in mapping]
    if unused:
        known = sorted({n for inst, _ in configured for n in (*inst.requires, *inst.optional)}
                       | settings)
        raise ConfigError(
            f"[columns].{unused[0]}: no enabled annotator reads an input of that name "
            f"(inputs and settings: {', '.join(known)})"
        )

    # -- final input types: what the job reads as numbers is read as float64 -----------
    numeric: set[str] = set()
    for (inst, _), resolve in zip(configured, resolves):
        text = set(getattr(inst, "text_inputs", ()))
        for name, (kind, col) in resolve.items():
            logical = name[len(OBSERVED_PREFIX):] if name.startswith(OBSERVED_PREFIX) else name
            if kind == "catalogue" and logical not in text:
                numeric.add(col)
    # The first input's types rule (later inputs are cast to them, rows that cannot be set
    # aside); only when it is a text format are they found from the values of every text input.
    typed = [r.resolve_types(numeric) for r in readers if hasattr(r, "resolve_types")] \
        if hasattr(readers[0], "resolve_types") else []
    if typed:
        from .io.csv import widest  # CSV only: a Parquet run need not import the CSV reader

        fields = {f.name: f.type for f in typed[0]}
        for other in typed[1:]:
            for f in other:
                if f.name in fields:
                    fields[f.name] = widest(fields[f.name], f.type)
        schema = pa.schema([pa.field(n, fields.get(n, schema.field(n).type))
                            for n in schema.names])
        exact = [r.exact_rows for r in readers if getattr(r, "exact_rows", None) is not None]
        if len(exact) == len(readers):
            estimated_rows = sum(exact)
    check_sentinels(job.sentinels, schema, str(sources[0].path))

    # -- order: dependencies first, ties by position ------------------------------------
    order: list[int] = []
    done: set[int] = set()
    remaining = list(range(len(configured)))
    while remaining:
        ready = [i for i in remaining if deps[i] <= done]
        if not ready:
            names = ", ".join(configured[i][1].cls.name for i in remaining)
            raise PlanError(f"annotators depend on each other in a cycle: {names}")
        i = ready[0]
        order.append(i)
        done.add(i)
        remaining.remove(i)

    steps = [Step(configured[i][0], configured[i][1], resolves[i], replaced.get(i, {}))
             for i in order]
    added = [col for s in steps for col in s.columns]
    out_fields = list(schema) + [pa.field(c.name, c.type) for c in added] + \
        [pa.field(FLAGS_COLUMN.name, FLAGS_COLUMN.type)]
    flag_reasons: list[tuple[str, str, str]] = []
    seen_flags: set[str] = set()
    for column, values in job.sentinels.items():
        reason = sentinel_flag(column)
        shown = ", ".join(repr(v) if isinstance(v, str) else f"{v:g}" for v in values)
        flag_reasons.append((reason, f"{column} held a sentinel value ({shown}), read as null",
                             "input"))
        seen_flags.add(reason)
    for s in steps:
        for reason, desc in s.annotator.flags.items():
            if reason.startswith(SENTINEL_FLAG_PREFIX) and reason in seen_flags and \
                    not any(r == reason and o != "input" for r, _, o in flag_reasons):
                raise PlanError(f"annotator {s.name!r} declares flag {reason!r}, which the "
                                f"input's sentinels raise; rename the flag")
            if reason not in seen_flags:
                seen_flags.add(reason)
                flag_reasons.append((reason, desc, s.name))
    return Plan(
        job=job,
        sources=sources,
        catalogue_schema=schema,
        cosmology=cosmology,
        steps=steps,
        added_columns=added,
        output_schema=pa.schema(out_fields),
        flag_reasons=flag_reasons,
        column_mapping=mapping,
        skipped=skipped,
        estimated_rows=estimated_rows,
    )


def describe_plan(plan: Plan) -> str:
    """Human-readable plan, as ``annotator run --dry-run`` prints it."""
    lines = ["inputs:"]
    for s in plan.sources:
        lines.append(f"  {s.path}  ({s.format}, {s.size_bytes / 1e6:.1f} MB)")
    lines.append("column mapping:")
    width = max((len(k) for k in plan.column_mapping), default=0)
    for logical, (col, how) in plan.column_mapping.items():
        lines.append(f"  {logical:<{width}} <- {col}  ({how})")
    c = plan.cosmology
    lines.append(f"cosmology: {c.to_dict().get('name') or 'custom'}  {c.to_dict()}")
    lines.append("annotators, in order:")
    name_width = max((len(c.name) for c in plan.added_columns), default=0)
    for s in plan.steps:
        lines.append(f"  {s.name} {s.annotator.version}  [{s.registered.distribution}]")
        for col in s.columns:
            lines.append(f"      + {col.name:<{name_width}} {str(col.type):<7} "
                         f"{col.unit or '-':<4} {col.ucd or ''}")
        for col, by in s.replaced.items():
            lines.append(f"      ({col}: replaced by {by})")
    for name, why in plan.skipped:
        lines.append(f"  ({name}: {why})")
    lines.append(f"      + {FLAGS_COLUMN.name}")
    rows = plan.estimated_rows
    size = plan.estimated_output_bytes()
    lines.append(f"estimated rows: {rows if rows is not None else 'unknown (compressed CSV)'}")
    if size is not None:
        lines.append(f"estimated output size: {size / 1e6:.1f} MB")
    lines.append(f"output: {plan.job.output_dir}")
    return "\n".join(lines)
