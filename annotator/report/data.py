"""What the report reads from an annotated output folder.

Two kinds of numbers, kept apart on purpose:

* every number the report *states* (counts, horizons, histograms) comes from ``manifest.json``
  or from an aggregate over the full columns (DuckDB over every part file);
* scatter plots use a seeded simple random sample of the written rows (``draw_sample``), so a
  report on ten million rows reads only a few columns and draws a few ten thousand points.
"""

from __future__ import annotations

import math
import re
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

from ..errors import OutputError
from ..provenance import read_manifest

REJECTED_DIR = "rejected"
# absolute_magnitude_<band>_<summary>_mag: percentiles and means of a redshift posterior
POSTERIOR_SUMMARIES = ("p16", "p50", "p84", "mean")
BAND_COLUMN = re.compile(r"^absolute_magnitude_([a-z0-9_]+?)_mag$")
# Position columns tried when the manifest maps none (case-insensitive, first match wins).
RA_NAMES = ("ra", "ra_deg", "radeg", "raj2000", "ra_j2000", "ra_icrs", "alpha", "alpha_j2000")
DEC_NAMES = ("dec", "dec_deg", "decdeg", "dej2000", "decj2000", "dec_j2000", "de_icrs",
             "dec_icrs", "delta", "delta_j2000")
# Columns the distance/horizon annotators add that read the redshift.
REDSHIFT_READERS = ("reachable", "comoving_distance_mpc", "distance_modulus_mag",
                    "luminosity_distance_mpc", "lookback_time_gyr")

# Redshifts above this are beyond any survey (galaxies, quasars, bursts); a maximum above it
# makes the histogram check for a few wild values before choosing its range.
TAIL_REDSHIFT = 20.0

# Codes of the reachability array of a sample.
REACHABLE, UNREACHABLE, UNKNOWN = 1, 0, -1


def quote_identifier(name: str) -> str:
    """A column name as a DuckDB identifier (any name, including quotes and spaces)."""
    return '"' + name.replace('"', '""') + '"'


@dataclass
class Output:
    """An annotated output folder, checked against its manifest."""

    folder: Path
    manifest: dict
    parts: list[Path]
    part_rows: list[int]
    rejected_parts: list[Path]
    schema: pa.Schema
    redshift_column: str | None
    ra_column: str | None
    dec_column: str | None
    bands: dict[str, str]  # band -> absolute-magnitude column
    notes: list[str] = field(default_factory=list)

    @property
    def rows(self) -> int:
        return int(sum(self.part_rows))

    def has(self, column: str) -> bool:
        return column in self.schema.names


def _find_column(schema: pa.Schema, mapped: str | None, names: tuple[str, ...]) -> str | None:
    if mapped and mapped in schema.names:
        return mapped
    lower = {n.lower(): n for n in schema.names}
    for name in names:
        if name in lower:
            return lower[name]
    return None


def _redshift_column(manifest: dict, schema: pa.Schema) -> str | None:
    """The redshift the cosmological annotators read (possibly a column another annotator
    computed, e.g. a frame-corrected redshift), else the catalogue's mapped redshift."""
    for record in manifest.get("annotators", []):
        column = (record.get("inputs") or {}).get("redshift")
        if column and column in schema.names and \
                set(record.get("columns", [])) & set(REDSHIFT_READERS):
            return column
    mapped = (manifest.get("column_mapping") or {}).get("redshift")
    if mapped and mapped in schema.names:
        return mapped
    return None


def _bands(manifest: dict, schema: pa.Schema) -> dict[str, str]:
    added = [c.get("name", "") for c in manifest.get("columns_added", [])]
    names = [n for n in added if n in schema.names] + \
        [n for n in schema.names if n not in added]
    bands: dict[str, str] = {}
    for name in names:
        m = BAND_COLUMN.match(name)
        if m is None or m.group(1).endswith("_err"):  # absolute_magnitude_<band>_err_mag
            continue
        base, _, tag = m.group(1).rpartition("_")
        if tag in POSTERIOR_SUMMARIES and f"absolute_magnitude_{base}_mag" in schema.names:
            continue  # a posterior summary of band <base>, not a band of its own
        typ = schema.field(name).type
        if pa.types.is_floating(typ) or pa.types.is_integer(typ):
            bands.setdefault(m.group(1), name)
    return bands


def open_output(folder: str | Path) -> Output:
    """Read the manifest and check that every part it lists is there with its row count."""
    folder = Path(folder)
    if not folder.is_dir():
        raise OutputError(f"{folder}: not a folder (give the output folder of 'annotator run')")
    manifest = read_manifest(folder)
    listed = manifest.get("parts")
    if not isinstance(listed, list):
        raise OutputError(f"{folder / 'manifest.json'}: key 'parts' is missing or not a list")
    parts, rows, rejected = [], [], []
    for i, entry in enumerate(listed):
        name = entry.get("part") if isinstance(entry, dict) else None
        if not name:
            raise OutputError(f"{folder / 'manifest.json'}: parts[{i}] has no 'part' name")
        path = folder / name
        if not path.is_file():
            raise OutputError(f"{path}: listed in the manifest but missing (was the folder "
                              f"copied partly, or changed after the run?)")
        try:
            n = pq.ParquetFile(path).metadata.num_rows
        except (pa.ArrowInvalid, OSError) as exc:
            raise OutputError(f"{path}: not a readable Parquet file: {exc}") from exc
        expected = entry.get("rows_written")
        if expected is not None and int(expected) != n:
            raise OutputError(f"{path}: holds {n} rows, the manifest says {expected}")
        parts.append(path)
        rows.append(n)
        if entry.get("rejected_part"):
            rej = folder / entry["rejected_part"]
            if not rej.is_file():
                raise OutputError(f"{rej}: listed in the manifest but missing")
            rejected.append(rej)
    notes = []
    listed_names = {p.name for p in parts}
    stray = sorted(p.name for p in folder.glob("part-*.parquet") if p.name not in listed_names)
    if stray:
        notes.append(f"{len(stray)} part file(s) in the folder are not in the manifest and were "
                     f"ignored (first: {stray[0]}).")
    if parts:
        schema = pq.read_schema(parts[0])
    else:
        schema = pa.schema([])
    mapping = manifest.get("column_mapping") or {}
    ra = _find_column(schema, mapping.get("ra"), RA_NAMES)
    dec = _find_column(schema, mapping.get("dec"), DEC_NAMES)
    if (ra is None) != (dec is None):
        notes.append(f"found {'ra' if ra else 'dec'} column {ra or dec!r} but no "
                     f"{'dec' if ra else 'ra'} column; no sky map.")
        ra = dec = None
    return Output(
        folder=folder, manifest=manifest, parts=parts, part_rows=rows, rejected_parts=rejected,
        schema=schema, redshift_column=_redshift_column(manifest, schema), ra_column=ra,
        dec_column=dec, bands=_bands(manifest, schema), notes=notes,
    )


# ------------------------------------------------------------------ full-column aggregates
def _connect():
    import duckdb

    con = duckdb.connect(database=":memory:")
    con.execute("SET enable_progress_bar = false")  # the report prints its own one line
    return con


def _usable(z: str) -> str:
    return f"(isfinite(TRY_CAST({z} AS DOUBLE)) AND TRY_CAST({z} AS DOUBLE) >= 0)"


@dataclass
class RedshiftAggregate:
    """Counts and a histogram of the redshift over every written row."""

    rows: int
    usable: int  # finite, non-negative redshift
    reachable: int | None  # None when the output has no reachability
    unreachable: int | None
    reachability_source: str  # "column" (the 'reachable' column), "redshift", or "none"
    z_min: float | None
    z_max: float | None
    edges: np.ndarray  # histogram bin edges in z
    counts_reachable: np.ndarray
    counts_unreachable: np.ndarray
    counts_unknown: np.ndarray  # usable redshift, reachability not known
    above_range: int  # usable redshifts beyond the last edge


def redshift_aggregate(out: Output, event_horizon_redshift: float | None,
                       has_event_horizon: bool, bins: int = 60) -> RedshiftAggregate | None:
    """Full-column counts and histogram; ``None`` when there is no redshift column.

    Reachability comes from the ``reachable`` column when the output has one; otherwise from
    the redshift (reachable below the event-horizon redshift; every object is reachable in a
    model without an event horizon).
    """
    if out.redshift_column is None or not out.parts:
        return None
    files = [str(p) for p in out.parts]
    zq = quote_identifier(out.redshift_column)
    z = f"TRY_CAST({zq} AS DOUBLE)"
    ok = _usable(zq)
    if out.has("reachable"):
        reach = f"TRY_CAST({quote_identifier('reachable')} AS BOOLEAN)"
        source = "column"
    elif not has_event_horizon:
        reach, source = "TRUE", "redshift"
    elif event_horizon_redshift is not None and np.isfinite(event_horizon_redshift):
        reach = f"({z} < {float(event_horizon_redshift)!r})"
        source = "redshift"
    else:
        reach, source = "CAST(NULL AS BOOLEAN)", "none"
    con = _connect()
    try:
        row = con.execute(
            f"""SELECT count(*),
                       count(*) FILTER (WHERE {ok}),
                       count(*) FILTER (WHERE {ok} AND {reach}),
                       count(*) FILTER (WHERE {ok} AND NOT {reach}),
                       min({z}) FILTER (WHERE {ok}),
                       max({z}) FILTER (WHERE {ok})
                FROM read_parquet(?)""", [files]).fetchone()
        rows, usable, n_reach, n_unreach, z_min, z_max = row
        if not usable:
            edges = np.linspace(0.0, 1.0, bins + 1)
            zeros = np.zeros(bins, dtype=np.int64)
            return RedshiftAggregate(rows, 0, None if source == "none" else 0,
                                     None if source == "none" else 0, source, None, None,
                                     edges, zeros, zeros.copy(), zeros.copy(), 0)
        # A few wild redshifts must not squash the histogram: beyond any survey's reach
        # (TAIL_REDSHIFT), the range ends at the 99.5th percentile when the maximum lies far
        # beyond it. (Only then: an exact quantile costs a sort of the column.)
        upper = float(z_max)
        if upper > TAIL_REDSHIFT:
            z_995 = con.execute(f"SELECT quantile_disc({z}, 0.995) FROM read_parquet(?) "
                                f"WHERE {ok}", [files]).fetchone()[0]
            if upper > 2.0 * float(z_995):
                upper = float(z_995)
        if event_horizon_redshift is not None and np.isfinite(event_horizon_redshift) \
                and event_horizon_redshift < 50:
            upper = max(upper, 1.15 * float(event_horizon_redshift))  # the horizon shows
        upper = upper if upper > 0 else 1.0
        width = upper / bins
        if event_horizon_redshift is not None and np.isfinite(event_horizon_redshift) \
                and 0 < event_horizon_redshift < upper:
            # The event-horizon redshift falls on a bin edge: no bin mixes the two classes.
            width = float(event_horizon_redshift) / max(1, round(event_horizon_redshift / width))
        bins = int(math.ceil(upper / width - 1e-9))
        upper = bins * width
        # One pass: bin -1 collects the redshifts beyond the range.
        hist = con.execute(
            f"""SELECT CASE WHEN {z} > ? THEN -1
                            ELSE least(CAST(floor({z} / ?) AS BIGINT), ?) END AS b,
                       {reach} AS r, count(*)
                FROM read_parquet(?) WHERE {ok}
                GROUP BY ALL""", [upper, width, bins - 1, files]).fetchall()
    finally:
        con.close()
    counts = {True: np.zeros(bins, np.int64), False: np.zeros(bins, np.int64),
              None: np.zeros(bins, np.int64)}
    above = 0
    for b, r, n in hist:
        if b < 0:
            above += n
        else:
            counts[r][int(b)] += n
    known = source != "none"
    return RedshiftAggregate(
        rows=int(rows), usable=int(usable),
        reachable=int(n_reach) if known else None,
        unreachable=int(n_unreach) if known else None,
        reachability_source=source, z_min=float(z_min), z_max=float(z_max),
        edges=width * np.arange(bins + 1), counts_reachable=counts[True],
        counts_unreachable=counts[False], counts_unknown=counts[None], above_range=int(above),
    )


@dataclass
class RejectedSummary:
    total: int
    reasons: list[tuple[str, int]]  # (reason, count), most frequent first
    examples: dict[str, list[dict]]  # reason -> a few rows (source, row, raw)
    by_source: list[tuple[str, int]]


def rejected_summary(out: Output, max_reasons: int = 25, examples: int = 3,
                     raw_chars: int = 240) -> RejectedSummary:
    """Rejected rows grouped by reason (every rejected row counts), with the first examples."""
    if not out.rejected_parts:
        return RejectedSummary(0, [], {}, [])
    files = [str(p) for p in out.rejected_parts]
    con = _connect()
    try:
        total = con.execute("SELECT count(*) FROM read_parquet(?)", [files]).fetchone()[0]
        reasons = con.execute(
            "SELECT reason, count(*) AS n FROM read_parquet(?) GROUP BY reason "
            "ORDER BY n DESC, reason LIMIT ?", [files, max_reasons]).fetchall()
        by_source = con.execute(
            "SELECT source, count(*) AS n FROM read_parquet(?) GROUP BY source "
            "ORDER BY n DESC, source LIMIT 50", [files]).fetchall()
        rows = con.execute(
            """SELECT reason, source, "row", left(raw, ?) , length(raw) FROM (
                   SELECT *, row_number() OVER (PARTITION BY reason ORDER BY source, "row") AS k
                   FROM read_parquet(?)) WHERE k <= ? ORDER BY reason, source, "row" """,
            [raw_chars, files, examples]).fetchall()
    finally:
        con.close()
    shown = {r for r, _ in reasons}
    ex: dict[str, list[dict]] = {}
    for reason, source, row, raw, length in rows:
        if reason in shown:
            ex.setdefault(reason, []).append(
                {"source": source, "row": row, "raw": raw,
                 "truncated": length is not None and length > raw_chars})
    return RejectedSummary(int(total), [(r, int(n)) for r, n in reasons], ex,
                           [(s, int(n)) for s, n in by_source])


# ------------------------------------------------------------------------------- sample
@dataclass
class Sample:
    """A simple random sample of the written rows: column -> float64 array (NaN for null),
    plus ``reach`` codes (REACHABLE / UNREACHABLE / UNKNOWN)."""

    values: dict[str, np.ndarray]
    reach: np.ndarray
    size: int
    population: int
    seed: int

    def get(self, column: str | None) -> np.ndarray | None:
        return None if column is None else self.values.get(column)


def _as_float(arr: pa.ChunkedArray | pa.Array) -> np.ndarray:
    if isinstance(arr, pa.ChunkedArray):
        arr = arr.combine_chunks()
    typ = arr.type
    if pa.types.is_boolean(typ):
        arr = arr.cast(pa.float64())
    elif not pa.types.is_floating(typ):
        try:
            arr = arr.cast(pa.float64(), safe=False)
        except (pa.ArrowInvalid, pa.ArrowNotImplementedError):
            return np.full(len(arr), np.nan)
    return arr.to_numpy(zero_copy_only=False).astype(np.float64)


def draw_sample(out: Output, columns: list[str], n: int, seed: int,
                batch_rows: int = 262_144) -> Sample:
    """Draw ``n`` rows uniformly without replacement from every written row.

    Rows are allotted to the part files by one multivariate hypergeometric draw (so each
    subset of ``n`` rows is equally likely), then chosen uniformly inside each part; only
    ``columns`` are read, one batch at a time. The same seed on the same output gives the same
    sample, whatever the number of threads.
    """
    columns = [c for c in dict.fromkeys(columns) if out.has(c)]
    if "reachable" in out.schema.names and "reachable" not in columns:
        columns.append("reachable")
    population = out.rows
    n = int(max(0, min(n, population)))
    rng = np.random.default_rng(seed)
    if n and population:
        per_part = rng.multivariate_hypergeometric(np.asarray(out.part_rows, dtype=np.int64), n,
                                                   method="marginals" if n > 1000 else "count")
    else:
        per_part = np.zeros(len(out.parts), dtype=np.int64)
    pieces: dict[str, list[np.ndarray]] = {c: [] for c in columns}
    for path, rows, k in zip(out.parts, out.part_rows, per_part):
        if k == 0:
            continue
        picks = np.sort(rng.choice(rows, size=int(k), replace=False))
        start = 0
        pf = pq.ParquetFile(path)
        for batch in pf.iter_batches(batch_size=batch_rows, columns=columns):
            stop = start + batch.num_rows
            lo, hi = np.searchsorted(picks, [start, stop])
            if hi > lo:
                take = pa.array(picks[lo:hi] - start)
                sub = batch.take(take)
                for c in columns:
                    col = sub.column(c)
                    if pa.types.is_string(col.type) or pa.types.is_large_string(col.type):
                        # text (the flags column): kept as text, null as ""
                        pieces[c].append(np.asarray(col.fill_null("").to_pylist(),
                                                    dtype=object))
                    else:
                        pieces[c].append(_as_float(col))
            start = stop
    values = {c: (np.concatenate(v) if v else np.zeros(0)) for c, v in pieces.items()}
    if "reachable" in values:
        r = values["reachable"]
        reach = np.where(np.isnan(r), UNKNOWN, np.where(r > 0.5, REACHABLE, UNREACHABLE))
    else:
        reach = np.full(n, UNKNOWN)
    return Sample(values=values, reach=reach.astype(np.int8), size=n, population=population,
                  seed=seed)


# ------------------------------------------------------------- absolute magnitudes and flags
FLAGS_COLUMN = "annotation_flags"


def _band_of_flag(name: str, bands: list[str]) -> str | None:
    """The band a band-specific flag (``kcorrection_<band>_*``, ``magnitude_<band>_*``)
    belongs to, the longest matching band name winning (``amber_from_crimson`` over
    ``amber``); ``None`` for a flag of the whole row (redshift, posterior, sentinel, ...)."""
    owner = None
    for band in bands:
        for prefix in (f"kcorrection_{band}_", f"magnitude_{band}_"):
            if name.startswith(prefix) and (owner is None or len(band) > len(owner)):
                owner = band
    return owner


# Flags of the whole row that cast doubt on a point absolute magnitude: the catalogue
# redshift's own checks, sentinel values read as null, and a redshift posterior with a
# secondary peak (a catastrophic photometric redshift puts M wherever the wrong z does).
# The other redshift_pdf_* flags concern only the posterior's own columns.
ROW_FLAGS_FOR_MAGNITUDES = re.compile(r"^(redshift_(?!pdf_)|sentinel_|redshift_pdf_secondary_peak$)")


def band_flag_names(band: str, bands: list[str], known: list[str]) -> list[str]:
    """The flags (of ``known``) that concern band ``band``'s absolute magnitude: its own
    ``kcorrection_<band>_*`` and ``magnitude_<band>_*`` flags and the flags of the whole row
    that cast doubt on it (:data:`ROW_FLAGS_FOR_MAGNITUDES`), but not another band's."""
    out = []
    for name in known:
        owner = _band_of_flag(name, bands)
        if owner == band or (owner is None and ROW_FLAGS_FOR_MAGNITUDES.match(name)):
            out.append(name)
    return out


def flagged_in_sample(flags_text: np.ndarray | None, names: list[str]) -> np.ndarray:
    """Per sampled row, whether its flags column holds any of ``names`` (';'-separated)."""
    if flags_text is None:
        return np.zeros(0, dtype=bool)
    wanted = set(names)
    return np.fromiter((bool(wanted.intersection(t.split(";"))) if t else False
                        for t in flags_text), dtype=bool, count=len(flags_text))


@dataclass
class BandCounts:
    """Over every written row: absolute magnitudes given, given but flagged (a warning flag
    such as a clipped colour), and null with a usable redshift (refused, flagged)."""

    given: int
    given_flagged: int
    null_flagged: int
    null_unflagged: int


def band_counts(out: Output, column: str, flag_names: list[str]) -> BandCounts:
    """Counts over the whole output by DuckDB (not the sample)."""
    files = [str(p) for p in out.parts]
    if FLAGS_COLUMN in out.schema.names and flag_names:
        pattern = "|".join(re.escape(n) for n in flag_names)
        flagged = f"regexp_matches({FLAGS_COLUMN}, '(^|;)({pattern})(;|$)')"
    else:
        flagged = "false"
    has_distance = "distance_modulus_mag IS NOT NULL" if out.has("distance_modulus_mag") \
        else "true"
    con = _connect()
    try:
        row = con.execute(
            f'SELECT count(*) FILTER (WHERE "{column}" IS NOT NULL AND NOT isnan("{column}")), '
            f'count(*) FILTER (WHERE "{column}" IS NOT NULL AND NOT isnan("{column}") '
            f'AND coalesce({flagged}, false)), '
            f'count(*) FILTER (WHERE ("{column}" IS NULL OR isnan("{column}")) AND '
            f'{has_distance} AND coalesce({flagged}, false)), '
            f'count(*) FILTER (WHERE ("{column}" IS NULL OR isnan("{column}")) AND '
            f'{has_distance} AND NOT coalesce({flagged}, false)) '
            f"FROM read_parquet(?)", [files]).fetchone()
    finally:
        con.close()
    return BandCounts(*(int(v or 0) for v in row))
