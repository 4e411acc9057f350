"""Report section on redshift posteriors: the distribution of ``reachable_probability`` and
a few example posteriors with the event-horizon redshift marked.

Reads columns and the manifest only (the annotator that wrote ``reachable_probability``, its
recorded ``settings``: the kind of posterior, its column and, for a shared grid, the grid);
it never imports a plugin.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pyarrow.parquet as pq

from . import page
from .data import Output

PROBABILITY = "reachable_probability"
SECONDARY = "redshift_pdf_secondary_mass"
BINS = 20
UNDECIDED = (0.05, 0.95)
EXAMPLES = 4


@dataclass
class ProbabilityCounts:
    edges: np.ndarray
    counts: np.ndarray
    rows: int
    null: int
    undecided: int
    zero: int
    one: int


def posterior_source(out: Output) -> dict | None:
    """The manifest record of the annotator that wrote reachable_probability (or None)."""
    for record in out.manifest.get("annotators", []):
        if PROBABILITY in record.get("columns", []):
            return record
    return None


def probability_counts(out: Output) -> ProbabilityCounts:
    """Histogram of every row's reachable_probability (one column read per part)."""
    edges = np.linspace(0.0, 1.0, BINS + 1)
    counts = np.zeros(BINS, dtype=np.int64)
    rows = null = undecided = zero = one = 0
    for part in out.parts:
        col = pq.read_table(part, columns=[PROBABILITY]).column(0)
        p = col.to_numpy(zero_copy_only=False).astype(np.float64)
        rows += len(p)
        ok = np.isfinite(p)
        null += int((~ok).sum())
        p = p[ok]
        counts += np.histogram(p, bins=edges)[0]
        undecided += int(((p > UNDECIDED[0]) & (p < UNDECIDED[1])).sum())
        zero += int((p == 0).sum())
        one += int((p == 1).sum())
    return ProbabilityCounts(edges, counts, rows, null, undecided, zero, one)


def pick_examples(out: Output, pdf_column: str, n: int = EXAMPLES) -> list[dict]:
    """A few rows worth looking at, from the first part file with usable posteriors: the most
    undecided, one with a strong secondary peak (undecided if there is one), a clearly
    reachable and a clearly unreachable object (each once)."""
    cols = [c for c in (pdf_column, PROBABILITY, SECONDARY, out.redshift_column) if c]
    for part in out.parts:
        table = pq.read_table(part, columns=list(dict.fromkeys(cols)))
        p = table.column(PROBABILITY).to_numpy(zero_copy_only=False).astype(np.float64)
        ok = np.isfinite(p)
        if not ok.any():
            continue
        sec = table.column(SECONDARY).to_numpy(zero_copy_only=False).astype(np.float64) \
            if SECONDARY in table.column_names else np.zeros(len(p))
        chosen: list[int] = []

        def take(order, mask):
            for i in order:
                if mask[i] and ok[i] and i not in chosen:
                    chosen.append(int(i))
                    return

        idx = np.arange(len(p))
        take(np.argsort(np.abs(np.nan_to_num(p, nan=9.0) - 0.5)), ok)
        by_secondary = np.argsort(-np.nan_to_num(sec, nan=-1.0))
        strong = np.nan_to_num(sec) > 0.1
        before = len(chosen)
        # prefer a secondary peak that straddles the horizon (an undecided object)
        take(by_secondary, strong & (np.nan_to_num(p) > UNDECIDED[0])
             & (np.nan_to_num(p) < UNDECIDED[1]))
        if len(chosen) == before:
            take(by_secondary, strong)
        take(idx, np.nan_to_num(p) > 0.999)
        take(idx, np.nan_to_num(p, nan=1.0) < 0.001)
        rows = []
        for i in chosen[:n]:
            rows.append({k: table.column(k)[i].as_py() for k in table.column_names})
        return rows
    return []


def probability_figure(counts: ProbabilityCounts, source: str) -> bytes:
    from .figures import BLUE, GREY, ORANGE, new_figure, style, to_png

    with style():
        fig = new_figure(8.6, 4.2)
        ax = fig.add_subplot()
        left = counts.edges[:-1]
        width = counts.edges[1] - counts.edges[0]
        colours = [ORANGE if e < UNDECIDED[0] else BLUE if e >= UNDECIDED[1] else GREY
                   for e in left]
        ax.bar(left, np.maximum(counts.counts, 0), width=width, align="edge", color=colours,
               edgecolor="#333333", linewidth=0.4)
        ax.set_yscale("symlog", linthresh=1)
        ax.set_xlim(0, 1)
        ax.set_xlabel("reachable_probability = P(z < z_EH)")
        ax.set_ylabel(f"objects per bin (width {width:.2g})")
        ax.set_title(f"Probability of being inside the event horizon ({source})")
        for x in UNDECIDED:
            ax.axvline(x, color="#333333", ls=":", lw=1)
        return to_png(fig)


def examples_figure(examples: list[dict], pdf_column: str, grid: list[float] | None,
                    kind: str, z_eh: float | None, redshift_column: str | None) -> bytes:
    from .figures import BLACK, BLUE, ORANGE, new_figure, style, to_png

    with style():
        fig = new_figure(8.6, 2.3 * len(examples) + 0.6)
        axes = fig.subplots(len(examples), 1, squeeze=False)[:, 0]
        for ax, ex in zip(axes, examples):
            values = np.asarray(ex[pdf_column], dtype=np.float64)
            if kind == "samples":
                hi = max(float(values.max()), (z_eh or 0) * 1.1)
                ax.hist(values, bins=40, range=(0, hi), density=True, color=BLUE, alpha=0.8)
            else:
                z = np.asarray(grid, dtype=np.float64)
                dens = values / np.trapezoid(values, z)
                ax.plot(z, dens, color=BLUE, lw=1.4)
                ax.fill_between(z, dens, where=z >= (z_eh if z_eh is not None else np.inf),
                                color=ORANGE, alpha=0.5, lw=0)
            if z_eh is not None:
                ax.axvline(z_eh, color=BLACK, ls="--", lw=1.2)
            zc = ex.get(redshift_column) if redshift_column else None
            label = f"P(z < z_EH) = {ex[PROBABILITY]:.3f}"
            if ex.get(SECONDARY):
                label += f", secondary peak {ex[SECONDARY]:.0%}"
            if zc is not None:
                label += f", catalogue z = {zc:.3f}"
            ax.text(0.99, 0.92, label, transform=ax.transAxes, ha="right", va="top",
                    fontsize=9, bbox={"fc": "white", "ec": "none", "alpha": 0.85})
            ax.set_ylabel("p(z)")
        axes[-1].set_xlabel("redshift z  (dashed: event horizon today; shaded: beyond it)")
        return to_png(fig)


def section(out: Output, derived: dict) -> tuple[str, list[str], dict[str, str]]:
    """The HTML section, the figure ids drawn, and the figures skipped with why."""
    record = posterior_source(out)
    head = '<section id="posteriors"><h2>Reachability probability and redshift posteriors</h2>'
    if record is None:
        return (head + page.note("No reachable_probability column in this output (neither a "
                                 "redshift error nor a redshift posterior was given).",
                                 skipped="reachability-probability") + "</section>",
                [], {"reachability-probability": "no reachable_probability column",
                     "example-posteriors": "no reachable_probability column"})
    settings = record.get("settings") or {}
    kind = settings.get("kind")
    source = f"from the redshift posteriors ({kind})" if kind else \
        f"from the {record.get('name')} annotator's error model"
    counts = probability_counts(out)
    z_eh = derived.get("event_horizon_redshift")
    figs, skipped = ["reachability-probability"], {}
    parts = [head, page.figure(
        "reachability-probability", probability_figure(counts, record.get("name", "")),
        "Histogram of the probability that each object is inside the event horizon",
        f"Every row's <code>{PROBABILITY}</code> ({counts.rows - counts.null:,} of "
        f"{counts.rows:,}; null for {counts.null:,}), {page.esc(source)}. "
        f"{counts.undecided:,} objects are undecided ({UNDECIDED[0]} &lt; P &lt; "
        f"{UNDECIDED[1]}; ready-made selection <code>undecided</code>); {counts.one:,} have "
        f"P = 1 and {counts.zero:,} P = 0 exactly. The count axis is logarithmic.")]
    pdf_column = (record.get("inputs") or {}).get("redshift_pdf")
    drawable = kind == "samples" or (kind == "gridded" and settings.get("grid"))
    if pdf_column and drawable and out.has(pdf_column):
        examples = pick_examples(out, pdf_column)
    else:
        examples = []
    if examples:
        figs.append("example-posteriors")
        parts.append(page.figure(
            "example-posteriors",
            examples_figure(examples, pdf_column, settings.get("grid"), kind, z_eh,
                            out.redshift_column),
            "A few example redshift posteriors with the event-horizon redshift marked",
            f"Posteriors from column <code>{page.esc(pdf_column)}</code> of the first part "
            "file: the most undecided object, the one with the strongest secondary peak, a "
            "clearly reachable and a clearly unreachable one (where present). "
            + (f"The dashed line is the event-horizon redshift z_EH = {z_eh:.4f}; probability "
               "beyond it is shaded." if z_eh is not None else "This model has no event "
               "horizon.")))
    else:
        why = ("no posterior column (the probability comes from a Gaussian error)"
               if not kind else "posteriors on per-object grids or from quantile columns are "
               "not drawn" if not drawable else "no row with a usable posterior")
        skipped["example-posteriors"] = why
        parts.append(page.note(f"No example posteriors: {page.esc(why)}.",
                               skipped="example-posteriors"))
    parts.append("</section>")
    return "".join(parts), figs, skipped


__all__ = ["section", "posterior_source", "probability_counts", "pick_examples",
           "ProbabilityCounts"]
