"""Assemble the report: read the output, draw the figures, write one HTML file."""

from __future__ import annotations

import math
import os
import time
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from .. import __version__
from ..errors import ConfigError, OutputError
from . import page
from .data import (FLAGS_COLUMN, REACHABLE, UNKNOWN, UNREACHABLE, Output, Sample, band_counts,
                   band_flag_names, draw_sample, flagged_in_sample, open_output,
                   redshift_aggregate, rejected_summary)

DEFAULT_SAMPLE_ROWS = 20_000
DEFAULT_SEED = 0
# Stored values and values recomputed from the recorded cosmology agree when their relative
# difference is below this (both come from the same tabulated engine; the tables interpolate
# to ~1e-9, so anything larger means the output and its manifest disagree).
AGREEMENT_RTOL = 1e-6
MAG_TOLERANCE = 1e-6  # mag, for columns already logarithmic (distance modulus)

PARAMETER_LABELS = {
    "name": ("name", ""),
    "h0": ("Hubble constant H₀", "km s⁻¹ Mpc⁻¹"),
    "omega_m": ("matter density Ω_m", ""),
    "omega_de": ("dark-energy density Ω_DE (empty: flat, from closure)", ""),
    "omega_b": ("baryon density Ω_b", ""),
    "t_cmb": ("CMB temperature today", "K"),
    "n_eff": ("effective number of neutrino species N_eff", ""),
    "m_nu": ("neutrino masses", "eV"),
    "w0": ("dark-energy equation of state w₀", ""),
    "wa": ("its evolution w_a", ""),
}
HEADLINE_DERIVED = ("age_today_gyr", "hubble_distance_mpc", "event_horizon_mpc",
                    "particle_horizon_mpc")
DERIVED_LABELS = {
    "age_today_gyr": "age of the universe today",
    "hubble_distance_mpc": "Hubble radius c/H₀ (where recession velocity = c today)",
    "event_horizon_mpc": "event horizon today (proper distance)",
    "particle_horizon_mpc": "particle horizon today (radius of the observable universe)",
    "future_visibility_limit_mpc": "future visibility limit (comoving)",
    "event_horizon_redshift": "redshift of an object on the event horizon today",
    "hubble_sphere_redshift": "redshift of an object on the Hubble sphere today",
    "hubble_time_gyr": "Hubble time 1/H₀",
    "end_of_time_gyr": "age at the end of time (none: expands for ever)",
    "omega_k": "curvature density Ω_k",
    "omega_de": "dark-energy density Ω_DE",
    "omega_radiation": "radiation density Ω_r (photons and massless neutrinos)",
    "omega_nu": "massive-neutrino density Ω_ν today",
    "omega_gamma": "photon density Ω_γ",
    "z_max_tabulated": "highest redshift in the engine's tables",
}
# Stored columns the report recomputes on the sample from the recorded cosmology.
# (A few, not all: every column read costs time on 10 M rows; these cover the distance,
# time and velocity tables.)
CHECKED_COLUMNS = ("comoving_distance_mpc", "angular_diameter_distance_mpc",
                   "luminosity_distance_mpc", "distance_modulus_mag", "lookback_time_gyr",
                   "recession_velocity_now_c")


@dataclass
class ReportResult:
    path: Path
    rows: int
    sampled: int
    seconds: float
    timings: dict[str, float] = field(default_factory=dict)
    figures: list[str] = field(default_factory=list)
    skipped: dict[str, str] = field(default_factory=dict)


def _unit_of(key: str) -> str:
    if key.endswith("_mpc"):
        return "Mpc"
    if key.endswith("_gyr"):
        return "Gyr"
    return ""


def _finite(x) -> bool:
    return isinstance(x, (int, float)) and not isinstance(x, bool) and math.isfinite(x)


def _pct(part: int | None, whole: int | None) -> str:
    if part is None or not whole:
        return ""
    return f"{100.0 * part / whole:.3g} % of {whole:,}"


def _rebuild_cosmology(out: Output):
    from ..cosmology import Cosmology, CosmologyError

    manifest_path = out.folder / "manifest.json"
    try:
        params = out.manifest["cosmology"]["parameters"]
        derived = dict(out.manifest["cosmology"].get("derived") or {})
    except (KeyError, TypeError):
        raise OutputError(f"{manifest_path}: key 'cosmology.parameters' is missing") from None
    try:
        cosmo = Cosmology.from_dict(params)
    except (CosmologyError, TypeError, ValueError) as exc:
        raise OutputError(f"{manifest_path}: cosmology.parameters cannot be rebuilt: "
                          f"{exc}") from exc
    return cosmo, derived


# ------------------------------------------------------------------------- sections
def _summary_cards(m: dict, agg, cosmo_name: str) -> str:
    read = m.get("rows_read")
    cards = [
        page.card("rows read", "rows_read", read),
        page.card("rows written", "rows_written", m.get("rows_written"),
                  sub=_pct(m.get("rows_written"), read)),
        page.card("rows set aside", "rows_rejected", m.get("rows_rejected"),
                  sub=_pct(m.get("rows_rejected"), read)),
        page.card("rows flagged", "rows_flagged", m.get("rows_flagged"),
                  sub=_pct(m.get("rows_flagged"), m.get("rows_written"))),
    ]
    if agg is not None and agg.reachable is not None:
        cards.append(page.card("reachable today", "aggregate/reachable", agg.reachable,
                               sub=_pct(agg.reachable, agg.usable) + " with a usable z"))
        cards.append(page.card("unreachable today", "aggregate/unreachable", agg.unreachable,
                               sub=_pct(agg.unreachable, agg.usable)))
    elapsed = m.get("elapsed_s")
    cards.append(page.card("run time", "elapsed_s", elapsed,
                           text=f"{elapsed:,.1f} s" if _finite(elapsed) else None))
    rps = m.get("rows_per_second")
    cards.append(page.card("throughput", "rows_per_second", rps,
                           text=f"{rps:,.0f} rows/s" if _finite(rps) else None))
    cards.append(page.card("cosmology", "cosmology/parameters/name", cosmo_name, text=cosmo_name))
    return f'<div class="cards">{"".join(cards)}</div>'


def _counts_section(m: dict, out: Output, agg, rejected_total: int | None) -> str:
    parts = []
    read, written, rej = m.get("rows_read"), m.get("rows_written"), m.get("rows_rejected")
    rows = [
        ["rows read", page.cell("rows_read", read)],
        ["rows written (in the part files)", page.cell("rows_written", written)],
        ["rows set aside (rejected/, with a reason)", page.cell("rows_rejected", rej)],
        ["rows written with at least one flag", page.cell("rows_flagged", m.get("rows_flagged"))],
        ["part files", page.cell("aggregate/parts", len(out.parts))],
    ]
    if agg is not None:
        rows.append([f"rows with a usable redshift (column {out.redshift_column})",
                     page.cell("aggregate/usable_redshift", agg.usable)])
        if agg.reachable is not None:
            rows.append(["reachable (inside our event horizon today)",
                         page.cell("aggregate/reachable", agg.reachable)])
            rows.append(["unreachable", page.cell("aggregate/unreachable", agg.unreachable)])
    parts.append(page.table(["", "rows"], rows, numeric_cols=(1,), table_id="counts"))
    if None not in (read, written, rej) and read != written + rej:
        parts.append(page.note(f"The counts do not reconcile: read {read:,} ≠ written "
                               f"{written:,} + set aside {rej:,}."))
    if rejected_total is not None and rej is not None and rejected_total != rej:
        parts.append(page.note(f"The rejected/ files hold {rejected_total:,} rows; the "
                               f"manifest says {rej:,}."))
    return "".join(parts)


def _flags_section(m: dict) -> str:
    flags = m.get("flags") or {}
    counts = flags.get("counts") or {}
    desc = flags.get("descriptions") or {}
    if not counts:
        return '<p class="muted">No flag reasons were declared by the annotators of this run.</p>'
    written = m.get("rows_written") or 0
    rows = []
    for reason, n in sorted(counts.items(), key=lambda kv: (-kv[1], kv[0])):
        share = f"{100.0 * n / written:.3g} %" if written else ""
        rows.append([reason, desc.get(reason, ""), page.cell(f"flags/counts/{reason}", n),
                     share])
    return page.table(["reason", "meaning", "rows", "of written"], rows, numeric_cols=(2, 3),
                      table_id="flags")


def _cosmology_section(m: dict, derived: dict) -> str:
    from ..cosmology import constants

    params = (m.get("cosmology") or {}).get("parameters") or {}
    p_rows = []
    for key, value in params.items():
        label, unit = PARAMETER_LABELS.get(key, (key, ""))
        if isinstance(value, list):
            text = ", ".join(page.fmt_number(v) for v in value) or "none"
        elif value is None:
            text = "—"
        else:
            text = None
        p_rows.append([label, page.cell(f"cosmology/parameters/{key}", value, text=text,
                                        numeric=not isinstance(value, str)), unit])
    keys = [k for k in HEADLINE_DERIVED if k in derived] + \
        [k for k in derived if k not in HEADLINE_DERIVED]
    d_rows = []
    for key in keys:
        value = derived[key]
        unit = _unit_of(key)
        if unit == "Mpc" and _finite(value):
            extra = f"{value * constants.MPC_IN_GLY:,.4g} Gly"
        elif value is None:
            extra = "none" if key.endswith(("_mpc", "_gyr", "_redshift")) else ""
        else:
            extra = ""
        label = DERIVED_LABELS.get(key, key)
        d_rows.append([label, page.cell(f"cosmology/derived/{key}", value), unit, extra])
    return ('<div class="two"><div><h3>Parameters</h3>'
            + page.table(["parameter", "value", "unit"], p_rows, numeric_cols=(1,),
                         table_id="cosmology-parameters")
            + '</div><div><h3>Derived constants</h3>'
            + page.table(["quantity", "value", "unit", ""], d_rows, numeric_cols=(1, 3),
                         table_id="cosmology-derived")
            + "</div></div>")


def _run_section(m: dict) -> str:
    run_rows = [
        ["engine", page.cell("engine", m.get("engine"), numeric=False)],
        ["started", page.cell("started_at", m.get("started_at"), numeric=False)],
        ["finished", page.cell("finished_at", m.get("finished_at"), numeric=False)],
        ["elapsed (s)", page.cell("elapsed_s", m.get("elapsed_s"))],
        ["rows per second", page.cell("rows_per_second", m.get("rows_per_second"))],
    ]
    if m.get("host"):
        run_rows.append(["host", page.cell("host", m.get("host"), numeric=False)])
    tool = m.get("tool") or {}
    tool_rows = [[k, page.cell(f"tool/{k}", v, numeric=False)] for k, v in tool.items()]
    ann_rows = []
    for rec in m.get("annotators") or []:
        name = rec.get("name", "")
        inputs = ", ".join(f"{k} ← {v}" for k, v in (rec.get("inputs") or {}).items())
        ann_rows.append([
            name,
            page.cell(f"annotators/{name}/version", rec.get("version"), numeric=False),
            rec.get("distribution") or rec.get("plugin") or "",
            inputs,
            ", ".join(rec.get("columns") or []),
        ])
    in_rows = []
    for i, src in enumerate(m.get("inputs") or []):
        sha = src.get("sha256") or ""
        in_rows.append([
            page.raw_cell(f"<code>{page.esc(src.get('path', ''))}</code>"),
            src.get("format", ""),
            page.cell(f"inputs/{i}/size_bytes", src.get("size_bytes")),
            page.cell(f"inputs/{i}/rows_read", src.get("rows_read")),
            page.cell(f"inputs/{i}/rows_written", src.get("rows_written")),
            page.cell(f"inputs/{i}/rows_rejected", src.get("rows_rejected")),
            page.raw_cell(f'<code title="{page.esc(sha)}">{page.esc(sha[:16])}…</code>'
                          if sha else "—"),
        ])
    col_rows = [[page.raw_cell(f"<code>{page.esc(c.get('name', ''))}</code>"),
                 c.get("unit") or "", c.get("ucd") or "", c.get("description") or ""]
                for c in m.get("columns_added") or []]
    return (
        '<div class="two"><div><h3>Run</h3>'
        + page.table(["", "value"], run_rows, numeric_cols=(1,), table_id="run")
        + '</div><div><h3>Tool versions</h3>'
        + page.table(["package", "version"], tool_rows, table_id="tool") + "</div></div>"
        + "<h3>Annotators</h3>"
        + page.table(["annotator", "version", "from", "inputs", "columns added"], ann_rows,
                     table_id="annotators")
        + "<h3>Inputs</h3>"
        + page.table(["file", "format", "bytes", "read", "written", "set aside", "sha256"],
                     in_rows, numeric_cols=(2, 3, 4, 5), table_id="inputs")
        + "<h3>Columns added</h3>"
        + page.table(["column", "unit (VOUnit)", "UCD", "meaning"], col_rows,
                     table_id="columns-added")
    )


def _rejected_section(summary, m: dict) -> str:
    if summary.total == 0:
        return ('<p data-key="rows_rejected" data-value="{0}">No row was set aside: every row '
                'read was written.</p>'.format(m.get("rows_rejected", 0)))
    rows = []
    for reason, n in summary.reasons:
        examples = summary.examples.get(reason, [])
        ex_html = "".join(
            f'<div><span class="muted">{page.esc(Path(e["source"]).name)}, row '
            f'{e["row"]}:</span><pre class="raw">{page.esc(e["raw"])}'
            f'{"…" if e["truncated"] else ""}</pre></div>' for e in examples)
        rows.append([reason, page.cell("aggregate/rejected_by_reason", n,
                                       attrs={"data-reason": reason}),
                     page.raw_cell(ex_html)])
    shown = sum(n for _, n in summary.reasons)
    parts = [page.table(["reason", "rows", "first examples (file, row, raw text)"], rows,
                        numeric_cols=(1,), table_id="rejected-reasons")]
    if shown < summary.total:
        parts.append(f'<p class="muted">…and {summary.total - shown:,} more rows under other '
                     f'reasons.</p>')
    if len(summary.by_source) > 1:
        parts.append("<h3>By input file</h3>" + page.table(
            ["file", "rows set aside"],
            [[page.raw_cell(f"<code>{page.esc(s)}</code>"),
              page.cell("aggregate/rejected_by_source", n, attrs={"data-source": s})]
             for s, n in summary.by_source], numeric_cols=(1,)))
    return "".join(parts)


def _consistency(cosmo, sample: Sample, z: np.ndarray,
                 reach_stored: bool) -> tuple[list[list[str]], bool]:
    """Stored columns against the recorded cosmology on the sample.

    :return: the table rows, and whether any column disagrees.
    """
    rows: list[list[str]] = []
    disagree = False
    with np.errstate(invalid="ignore"):
        usable = np.isfinite(z) & (z >= 0)
    if not usable.any():
        return rows, False
    for col in CHECKED_COLUMNS:
        stored = sample.get(col)
        if stored is None:
            continue
        model = np.full(len(z), np.nan)
        model[usable] = getattr(cosmo, col)(z[usable])
        both = np.isfinite(stored) & np.isfinite(model)
        # Null in one only is shown, not judged: an annotator may leave a value null on
        # purpose (a flag it raised).
        one_only = int(np.sum(np.isfinite(stored) != np.isfinite(model)))
        if not both.any():
            continue
        diff = np.abs(stored[both] - model[both])
        max_abs = float(np.max(diff))
        rel = float(np.max(diff / np.maximum(np.abs(model[both]), 1e-300)))
        if col.endswith("_mag"):  # logarithmic already: compare in magnitudes
            ok = max_abs < MAG_TOLERANCE
        else:
            ok = rel < AGREEMENT_RTOL or max_abs < 1e-9
        disagree |= not ok
        rows.append([page.raw_cell(f"<code>{col}</code>"), f"{int(both.sum()):,}",
                     f"{max_abs:.2e}", f"{rel:.2e}", f"{one_only:,}",
                     "agree" if ok else "DISAGREE"])
    if reach_stored:
        stored = sample.reach[usable]
        model = np.where(cosmo.reachable(z[usable]), REACHABLE, UNREACHABLE)
        known = stored != UNKNOWN
        bad = int(np.sum(stored[known] != model[known]))
        disagree |= bad > 0
        rows.append([page.raw_cell("<code>reachable</code>"), f"{int(known.sum()):,}",
                     f"{bad:,} differ", "", f"{int(np.sum(~known)):,}",
                     "agree" if bad == 0 else "DISAGREE"])
    return rows, disagree


# ---------------------------------------------------------------------------- build
def build_report(folder: str | Path, to: str | Path, *, sample_rows: int = DEFAULT_SAMPLE_ROWS,
                 seed: int = DEFAULT_SEED) -> ReportResult:
    """Write one self-contained HTML report of the annotated output in ``folder`` to ``to``.

    :param sample_rows: rows drawn (uniformly, without replacement) for the scatter plots.
    :param seed: seed of the sample; the same seed on the same output gives the same report.
    """
    try:
        import matplotlib  # noqa: F401
    except ModuleNotFoundError:
        raise ConfigError("annotator report needs matplotlib: pip install 'annotator[report]'") \
            from None
    if sample_rows < 0:
        raise ConfigError(f"--sample-rows: must be 0 or more, got {sample_rows}")
    to = Path(to)
    if to.is_dir():
        raise OutputError(f"--to {to}: is a folder; give the HTML file to write")
    if not to.parent.is_dir():
        raise OutputError(f"--to {to}: folder {to.parent} does not exist")

    from . import figures, luminosity

    t0 = time.perf_counter()
    timings: dict[str, float] = {}
    out = open_output(folder)
    m = out.manifest
    cosmo, derived = _rebuild_cosmology(out)
    cosmo_name = str(cosmo.to_dict().get("name") or "custom")
    z_eh = derived.get("event_horizon_redshift")
    has_eh = derived.get("event_horizon_mpc") is not None
    agg = redshift_aggregate(out, z_eh if _finite(z_eh) else None, has_eh)
    rejected = rejected_summary(out)
    timings["aggregates_s"] = time.perf_counter() - t0

    t1 = time.perf_counter()
    zc = out.redshift_column
    wanted = [c for c in (zc, out.ra_column, out.dec_column) if c] + \
        [c for c in CHECKED_COLUMNS if out.has(c)] + list(out.bands.values()) + \
        ([FLAGS_COLUMN] if out.bands and out.has(FLAGS_COLUMN) else [])
    sample = draw_sample(out, wanted, sample_rows, seed)
    timings["sample_s"] = time.perf_counter() - t1
    z = sample.get(zc) if zc else None
    if z is None:
        z = np.full(sample.size, np.nan)
    with np.errstate(invalid="ignore"):
        usable = np.isfinite(z) & (z >= 0)
    reach_stored = out.has("reachable")
    if not reach_stored:
        # No reachability column: from the redshift and the recorded cosmology.
        codes = np.full(sample.size, UNKNOWN, dtype=np.int8)
        codes[usable] = np.where(cosmo.reachable(z[usable]), REACHABLE, UNREACHABLE)
        sample.reach = codes

    t2 = time.perf_counter()
    figs: list[str] = []
    skipped: dict[str, str] = {}
    sections: list[str] = []
    sample_line = (f"Points: a simple random sample of {sample.size:,} of the "
                   f"{sample.population:,} written rows (seed {seed}).")
    z_max_data = agg.z_max if agg is not None else None

    # -- distances
    d_c = sample.get("comoving_distance_mpc")
    if d_c is None:
        d_c = np.full(sample.size, np.nan)
        if usable.any():
            d_c[usable] = cosmo.comoving_distance_mpc(z[usable])
    png = figures.distance_redshift(cosmo, derived, z if zc else None, sample.reach, d_c,
                                    z_max_data)
    figs.append("distance-redshift")
    hs = derived.get("hubble_sphere_redshift")
    sections.append(
        '<section id="distances"><h2>Distances and horizons</h2>' + page.figure(
            "distance-redshift", png,
            "Comoving, luminosity, angular-diameter and light-travel distance against redshift, "
            "with the Hubble sphere, event horizon and particle horizon",
            "Curves are computed from the cosmology recorded in the manifest. The Hubble sphere "
            f"(z = {page.fmt_number(hs)}) is where an object recedes at the speed of light "
            "today, at the Hubble radius c/H₀; "
            + (f"objects beyond the event horizon (z = {page.fmt_number(z_eh)}) can never "
               "receive a signal sent now; " if has_eh else
               "this model has no event horizon: a signal sent now reaches every object in "
               "the end; ")
            + "the comoving distance approaches the particle horizon as z grows without "
            "bound. "
            + (sample_line if zc else "No redshift column: no objects drawn.")) + "</section>")

    # -- redshift distribution
    if agg is not None:
        png = figures.redshift_histogram(agg, derived)
        figs.append("redshift-distribution")
        how = {"column": "the <code>reachable</code> column",
               "redshift": "the redshift (reachable below the event-horizon redshift)",
               "none": "nothing (no reachability could be derived)"}[agg.reachability_source]
        above = (f" {agg.above_range:,} objects with z above {agg.edges[-1]:.3g} "
                 f"(up to {agg.z_max:.4g}) lie beyond the right edge." if agg.above_range else "")
        if agg.usable == 0:
            above += " No row of this output has a usable redshift: the histogram is empty."
        sections.append(
            '<section id="redshifts"><h2>Redshift distribution</h2>' + page.figure(
                "redshift-distribution", png,
                "Histogram of redshifts split into reachable and unreachable objects",
                f"Every row with a usable redshift ({agg.usable:,} of {agg.rows:,}), counted by "
                f"DuckDB over the full column <code>{page.esc(zc)}</code>; reachability from "
                f"{how}.{above}") + "</section>")
    else:
        skipped["redshift-distribution"] = "no redshift column"
        sections.append('<section id="redshifts"><h2>Redshift distribution</h2>' + page.note(
            "No redshift column in this output (the manifest maps none): no histogram.",
            skipped="redshift-distribution") + "</section>")

    # -- reachability probability and redshift posteriors (when the output has them)
    if out.has("reachable_probability"):
        from . import posteriors

        html_text, drawn, why = posteriors.section(out, derived)
        sections.append(html_text)
        figs.extend(drawn)
        skipped.update(why)

    # -- Hubble diagram and absolute magnitudes
    hubble_parts = ['<section id="hubble"><h2>Hubble diagram and absolute magnitudes</h2>']
    mu = sample.get("distance_modulus_mag")
    mu_note = ""
    if mu is None:
        mu = np.full(sample.size, np.nan)
        if usable.any():
            mu[usable] = cosmo.distance_modulus_mag(z[usable])
        mu_note = " The output has no distance_modulus_mag column; the points use the " \
                  "recorded cosmology."
    png = figures.hubble_diagram(cosmo, derived, z if zc else None, mu, sample.reach,
                                 z_max_data)
    figs.append("hubble-diagram")
    hubble_parts.append(page.figure(
        "hubble-diagram", png, "Distance modulus against redshift",
        "Distance modulus of the recorded cosmology; the catalogue's stored values lie on it "
        "(see the check below). " + (sample_line if zc else "") + mu_note))
    if out.bands and zc:
        band_values = {b: sample.get(c) for b, c in out.bands.items()}
        known_flags = list(((out.manifest.get("flags") or {}).get("counts") or {}))
        flag_text = sample.get(FLAGS_COLUMN)
        band_flagged, band_totals, flag_lists = {}, {}, {}
        for b, c in out.bands.items():
            names = band_flag_names(b, list(out.bands), known_flags)
            flag_lists[b] = names
            band_flagged[b] = flagged_in_sample(flag_text, names)
            band_totals[b] = band_counts(out, c, names)
        png = figures.absolute_magnitudes(z, band_values, band_flagged, band_totals)
        figs.append("absolute-magnitudes")
        refused = "; ".join(
            f"band {page.esc(b)}: {t.null_flagged:,} refused, {t.given_flagged:,} kept with a "
            f"warning" for b, t in band_totals.items())
        hubble_parts.append(page.figure(
            "absolute-magnitudes", png, "Absolute magnitude against redshift, per band",
            "K-corrected absolute magnitudes (columns "
            + ", ".join(f"<code>{page.esc(c)}</code>" for c in out.bands.values())
            + "). A flux-limited survey sees only ever brighter objects at higher redshift: "
            "the dashed line, the 98th percentile of unflagged M in redshift bins of the "
            "sample, traces that faint edge. Rows whose value carries a flag of its band or of "
            "the whole row (e.g. a colour clipped to a template, a redshift posterior with a "
            "secondary peak) are drawn apart as orange triangles; rows "
            "whose K-correction was refused (null, with a flag naming why) cannot be drawn "
            "and are counted instead, over every row of the output (" + refused + "). "
            + sample_line))
    else:
        why = "no redshift column" if not zc else \
            "no absolute_magnitude_<band>_mag columns (the K-correction annotator did not run)"
        skipped["absolute-magnitudes"] = why
        hubble_parts.append(page.note(f"No absolute-magnitude figure: {page.esc(why)}.",
                                      skipped="absolute-magnitudes"))
    rows, disagree = _consistency(cosmo, sample, z, reach_stored)
    if rows:
        hubble_parts.append(
            "<h3>Stored values against the recorded cosmology</h3>"
            f"<p>Each stored column recomputed from the manifest's cosmology for the "
            f"{sample.size:,} sampled rows; they agree when the relative difference is below "
            f"{AGREEMENT_RTOL:g} (distance moduli: {MAG_TOLERANCE:g} mag).</p>"
            + page.table(["column", "rows compared", "max |difference|",
                          "max relative difference", "null in one only", "verdict"], rows,
                         numeric_cols=(1, 2, 3, 4), table_id="consistency"))
        if disagree:
            hubble_parts.append(page.note(
                "Some stored values do not match the cosmology recorded in the manifest: the "
                "output was changed after the run, or written by a different engine version."))
    hubble_parts.append("</section>")
    sections.append("".join(hubble_parts))

    # -- luminosity function (report/luminosity.py: from the V_max columns, when present)
    sections.append(luminosity.section(out, figs, skipped))

    # -- sky map
    if out.ra_column and out.dec_column:
        png = figures.sky_map(sample.get(out.ra_column), sample.get(out.dec_column),
                              sample.reach, seed)
        figs.append("sky-map")
        sections.append('<section id="sky"><h2>Sky map</h2>' + page.figure(
            "sky-map", png, "Mollweide sky map of the objects coloured by reachability",
            f"Positions from columns <code>{page.esc(out.ra_column)}</code> and "
            f"<code>{page.esc(out.dec_column)}</code> (degrees), equatorial, right ascension "
            f"growing to the left as seen on the sky. " + sample_line
            + " Points are drawn in a shuffled order so neither class hides the other.")
            + "</section>")
    else:
        skipped["sky-map"] = "no right ascension / declination columns"
        sections.append('<section id="sky"><h2>Sky map</h2>' + page.note(
            "No sky map: the output has no right ascension / declination columns (none mapped "
            "in the manifest, and none of the usual names such as <code>ra</code> / "
            "<code>dec</code>).", skipped="sky-map") + "</section>")
    timings["figures_s"] = time.perf_counter() - t2

    # -- rejected
    sections.append('<section id="rejected"><h2>Rows set aside</h2>'
                    + _rejected_section(rejected, m) + "</section>")

    # -- how this report was made
    method = (
        '<section id="method"><h2>How this report was made</h2><ul>'
        "<li>Every count, the flags, the cosmology and the run figures are read from "
        "<code>manifest.json</code>; the redshift histogram and the reachable / unreachable "
        "counts are DuckDB aggregates over the full columns of every part file; the rows set "
        "aside are counted over every file in <code>rejected/</code>.</li>"
        f'<li id="sampling" data-sample-rows="{sample.size}" data-population='
        f'"{sample.population}" data-seed="{seed}">Scatter plots draw a simple random sample '
        f"of {sample.size:,} rows out of {sample.population:,}, without replacement: one "
        "multivariate hypergeometric draw shares the sample among the part files in "
        "proportion to their rows, then rows are chosen uniformly inside each part (NumPy's "
        f"PCG64 generator, seed {seed}). Only the plotted columns are read. The same seed "
        "on the same output draws the same rows.</li>"
        "<li>Curves and horizons use the cosmology rebuilt from "
        "<code>manifest.json</code> → <code>cosmology.parameters</code>.</li>"
        + "".join(f"<li>{page.esc(n)}</li>" for n in out.notes)
        + "</ul></section>")
    sections.append(method)

    seconds = time.perf_counter() - t0
    timings["total_s"] = seconds
    title = f"Annotation report: {out.folder.name or out.folder}"
    head = (
        f"<header><h1>{page.esc(title)}</h1>"
        f'<p class="lead">Output folder <code>{page.esc(out.folder.resolve())}</code>, '
        f"finished {page.esc(m.get('finished_at', 'at an unknown time'))}, cosmology "
        f"{page.esc(cosmo_name)}.</p>"
        '<nav><a href="#summary">Summary</a><a href="#cosmology">Cosmology</a>'
        '<a href="#distances">Distances</a><a href="#redshifts">Redshifts</a>'
        + ('<a href="#posteriors">Posteriors</a>' if out.has("reachable_probability") else "")
        + '<a href="#hubble">Hubble diagram</a><a href="#sky">Sky map</a>'
        '<a href="#rejected">Set aside</a><a href="#provenance">Run</a>'
        '<a href="#method">Method</a></nav></header>'
    )
    summary = (
        '<section id="summary"><h2>Summary</h2>' + _summary_cards(m, agg, cosmo_name)
        + _counts_section(m, out, agg, rejected.total if out.rejected_parts else None)
        + "<h3>Flags by reason</h3>" + _flags_section(m) + "</section>"
        + '<section id="cosmology"><h2>Cosmology</h2>' + _cosmology_section(m, derived)
        + "</section>"
    )
    provenance = '<section id="provenance"><h2>Run and provenance</h2>' + _run_section(m) + \
        "</section>"
    footer = (f"<footer>Written by annotator {page.esc(__version__)} in {seconds:.1f} s "
              f"(aggregates {timings['aggregates_s']:.1f} s, sample {timings['sample_s']:.1f} s,"
              f" figures {timings['figures_s']:.1f} s). Self-contained: no network needed."
              "</footer>")
    body = head + summary + "".join(sections[:-1]) + provenance + sections[-1] + footer
    text = page.document(title, body)
    tmp = to.with_name(to.name + ".tmp")
    try:
        tmp.write_text(text, encoding="utf-8")
        os.replace(tmp, to)
    except OSError as exc:
        tmp.unlink(missing_ok=True)
        raise OutputError(f"--to {to}: cannot write the report: {exc}") from exc
    return ReportResult(path=to, rows=out.rows, sampled=sample.size, seconds=seconds,
                        timings=timings, figures=figs, skipped=skipped)
