"""The report's luminosity-function section: the 1/V_max estimate from the output's columns.

Read from the columns only (``absolute_magnitude_<band>_mag``, ``vmax_<band>_mpc3``,
``v_over_vmax_<band>``), never from a plugin: per bin of absolute magnitude,
phi = sum 1/V_max / dM with the Poisson error sqrt(sum 1/V_max^2) / dM (Schmidt 1968,
ApJ 151, 393; Felten 1976, AJ 81, 376), summed by DuckDB over every row of every part file.
"""

from __future__ import annotations

import math
import re
from dataclasses import dataclass

import numpy as np

from . import page
from .data import Output, _connect, quote_identifier

VMAX_COLUMN = re.compile(r"^vmax_([a-z][a-z0-9_]*)_mpc3$")
BIN_MAG = 0.25
#: Bins with fewer objects are drawn hollow: their Poisson error is itself uncertain.
FEW_OBJECTS = 5


@dataclass
class LuminosityFunction:
    band: str
    centres: np.ndarray
    counts: np.ndarray
    phi: np.ndarray  # per Mpc^3 per mag
    error: np.ndarray
    objects: int  # rows with a V_max
    mean_v_over_vmax: float | None


def vmax_bands(out: Output) -> list[str]:
    """Bands whose absolute magnitude, V_max and V/V_max columns are all in the output."""
    names = set(out.schema.names)
    return sorted(m.group(1) for n in out.schema.names if (m := VMAX_COLUMN.match(n))
                  and f"absolute_magnitude_{m.group(1)}_mag" in names
                  and f"v_over_vmax_{m.group(1)}" in names)


def luminosity_function(out: Output, band: str, bin_mag: float = BIN_MAG
                        ) -> LuminosityFunction:
    """The binned 1/V_max estimate over the full columns."""
    files = [str(p) for p in out.parts]
    m = quote_identifier(f"absolute_magnitude_{band}_mag")
    v = quote_identifier(f"vmax_{band}_mpc3")
    r = quote_identifier(f"v_over_vmax_{band}")
    ok = f"{v} > 0 AND isfinite({v}) AND isfinite({m})"
    con = _connect()
    try:
        rows = con.execute(
            f"SELECT floor({m} / {bin_mag!r}) AS k, count(*), sum(1.0 / {v}), "
            f"sum(1.0 / ({v} * {v})) FROM read_parquet(?) WHERE {ok} GROUP BY k ORDER BY k",
            [files]).fetchall()
        n, mean = con.execute(f"SELECT count(*), avg({r}) FROM read_parquet(?) WHERE {ok}",
                              [files]).fetchone()
    finally:
        con.close()
    k = np.array([row[0] for row in rows], dtype=float)
    return LuminosityFunction(
        band=band, centres=(k + 0.5) * bin_mag,
        counts=np.array([row[1] for row in rows], dtype=np.int64),
        phi=np.array([row[2] for row in rows], dtype=float) / bin_mag,
        error=np.sqrt(np.array([row[3] for row in rows], dtype=float)) / bin_mag,
        objects=int(n), mean_v_over_vmax=None if mean is None else float(mean))


def figure_png(functions: list[LuminosityFunction]) -> bytes:
    """phi(M) on a log axis with Poisson error bars, one marker and colour per band."""
    from . import figures

    styles = [(figures.BLUE, "o"), (figures.VERMILLION, "s"), (figures.GREEN, "^"),
              (figures.PURPLE, "D"), (figures.ORANGE, "v")]
    with figures.style():
        fig = figures.new_figure(8.6, 5.6)
        ax = fig.add_subplot()
        ax.set_yscale("log")
        for i, lf in enumerate(functions):
            colour, marker = styles[i % len(styles)]
            full = lf.counts >= FEW_OBJECTS
            label = f"band {lf.band} ({lf.objects:,} objects)"
            for sel, face, lab in ((full, colour, label), (~full, "none", None)):
                if sel.any():
                    ax.errorbar(lf.centres[sel], lf.phi[sel], yerr=lf.error[sel], fmt=marker,
                                color=colour, mfc=face, ms=5, capsize=2, lw=1.0, label=lab)
        ax.invert_xaxis()
        ax.set_xlabel("absolute magnitude M (AB)")
        ax.set_ylabel(r"$\phi$ (Mpc$^{-3}$ mag$^{-1}$)")
        ax.set_title(f"Luminosity function, 1/V_max estimate ({BIN_MAG:g} mag bins)")
        ax.legend(loc="lower left")
        return figures.to_png(fig)


def section(out: Output, figs: list[str], skipped: dict[str, str]) -> str:
    """The HTML section; empty when the output has no V_max columns (a job without flux
    limits), so reports of other outputs are unchanged."""
    head = '<section id="luminosity-function"><h2>Luminosity function</h2>'
    bands = vmax_bands(out) if out.parts else []
    if not bands:
        return ""
    functions = [luminosity_function(out, b) for b in bands]
    png = figure_png(functions)
    figs.append("luminosity-function")
    checks = []
    for lf in functions:
        if lf.mean_v_over_vmax is None or lf.objects == 0:
            continue
        err = 1.0 / math.sqrt(12.0 * lf.objects)
        checks.append(f"band {page.esc(lf.band)}: ⟨V/V_max⟩ = {lf.mean_v_over_vmax:.4f} ± "
                      f"{err:.4f} over {lf.objects:,} objects")
    return head + page.figure(
        "luminosity-function", png,
        "Luminosity function: number density per magnitude against absolute magnitude",
        "phi(M) = Σ 1/V_max / ΔM per bin, error sqrt(Σ 1/V_max²) / ΔM (Poisson), over every "
        "row with a V_max (columns " + ", ".join(
            f"<code>vmax_{page.esc(b)}_mpc3</code>" for b in bands) + "), summed by DuckDB "
        f"over the full columns. Hollow markers: bins with fewer than {FEW_OBJECTS} objects. "
        "A sample uniform in space has ⟨V/V_max⟩ = 0.5 ± 1/sqrt(12 N) (Schmidt 1968): "
        + "; ".join(checks) + ".") + "</section>"
