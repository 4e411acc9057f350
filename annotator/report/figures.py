"""The report's figures, drawn with matplotlib's Agg renderer into PNG bytes.

Figures are built as :class:`matplotlib.figure.Figure` objects on an Agg canvas, never through
``pyplot``, so drawing changes no global state (a Jupyter session keeps its own backend) and
needs no display. Colours are from the Okabe & Ito (2008) palette for colour-blind readers;
every pair that must be told apart also differs in lightness and in marker, line style or
hatching, so a greyscale print still separates them.
"""

from __future__ import annotations

import io
import math
import sys

import numpy as np

from ..cosmology import constants
from .data import REACHABLE, UNKNOWN, UNREACHABLE

# Okabe & Ito (2008), "Color Universal Design": the eight colours of their palette we use.
BLACK = "#000000"
ORANGE = "#E69F00"
SKY_BLUE = "#56B4E9"
GREEN = "#009E73"
BLUE = "#0072B2"
VERMILLION = "#D55E00"
PURPLE = "#CC79A7"
GREY = "#777777"

# Reachable: dark blue circles; unreachable: light orange triangles (greyscale ~0.37 vs ~0.64).
REACH_STYLE = {
    REACHABLE: {"color": BLUE, "marker": "o", "label": "reachable (inside the event horizon)"},
    UNREACHABLE: {"color": ORANGE, "marker": "^",
                  "label": "unreachable (beyond the event horizon)"},
    UNKNOWN: {"color": BLACK, "marker": "x", "label": "reachability unknown (no usable redshift)"},
}

STYLE = {
    "font.size": 10,
    "axes.titlesize": 11,
    "axes.labelsize": 10,
    "legend.fontsize": 9,
    "xtick.labelsize": 9,
    "ytick.labelsize": 9,
    "axes.grid": True,
    "grid.color": "#d9d9d9",
    "grid.linewidth": 0.6,
    "axes.axisbelow": True,
    "axes.spines.top": False,
    "axes.spines.right": False,
    "legend.frameon": False,
    "savefig.facecolor": "white",
}
DPI = 110


def _agg():
    """matplotlib with the headless Agg backend.

    The backend is switched only when pyplot is not loaded yet: the figures never use pyplot,
    so an interactive session that already chose a backend keeps it.
    """
    import matplotlib

    if "matplotlib.pyplot" not in sys.modules:
        matplotlib.use("Agg")
    return matplotlib


def new_figure(width: float, height: float):
    _agg()
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    fig = Figure(figsize=(width, height), layout="constrained")
    FigureCanvasAgg(fig)
    return fig


def to_png(fig) -> bytes:
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=DPI, metadata={"Software": None})
    return buf.getvalue()


def style():
    return _agg().rc_context(STYLE)


def _plain_number(v, _pos=None) -> str:
    """Tick label of a log axis as a plain number (0.01, 1, 1,000): easier to read than
    powers of ten, and much faster to draw than typeset exponents."""
    if v <= 0:
        return ""
    text = f"{v:,.0f}" if v >= 1 else f"{v:.10f}".rstrip("0")
    return text


def plain_log_axis(axis) -> None:
    from matplotlib.ticker import FuncFormatter, LogLocator, NullFormatter

    axis.set_major_locator(LogLocator(base=10.0, numticks=15))
    axis.set_major_formatter(FuncFormatter(_plain_number))
    axis.set_minor_formatter(NullFormatter())


def _finite(x) -> bool:
    return x is not None and isinstance(x, (int, float)) and math.isfinite(x)


def _objects_label(code: int, derived: dict) -> str:
    if code == REACHABLE and derived.get("event_horizon_mpc") is None:
        return "catalogue objects, all reachable (this model has no event horizon)"
    return f"catalogue objects, {REACH_STYLE[code]['label']}"


def _point_size(n: int) -> float:
    return 9.0 if n <= 2_000 else 5.0 if n <= 10_000 else 3.0


def _mpc_to_gly(d):
    return np.asarray(d, dtype=float) * constants.MPC_IN_GLY


def _gly_to_mpc(d):
    return np.asarray(d, dtype=float) * constants.GLY_IN_MPC


def _fmt(x: float, digits: int = 4) -> str:
    return f"{x:,.0f}" if abs(x) >= 1000 else f"{x:.{digits}g}"


# ---------------------------------------------------------------- distance-redshift
def distance_redshift(cosmology, derived: dict, z_sample: np.ndarray | None,
                      reach: np.ndarray | None, d_sample: np.ndarray | None,
                      z_max_data: float | None) -> bytes:
    """Comoving, luminosity, angular-diameter and light-travel distance against redshift,
    with the Hubble sphere, event horizon and particle horizon; the sample on the comoving
    curve."""
    z_hi = 10.0
    if _finite(z_max_data) and z_max_data > 8.0:
        z_hi = min(1.3 * z_max_data, 1.0e4)
    z_lo = 1.0e-3
    z = np.geomspace(z_lo, z_hi, 600)
    d_c = cosmology.comoving_distance_mpc(z)
    d_l = cosmology.luminosity_distance_mpc(z)
    d_a = cosmology.angular_diameter_distance_mpc(z)
    d_t = cosmology.lookback_time_gyr(z) * constants.GLY_IN_MPC  # c * t_lookback, in Mpc
    with style():
        fig = new_figure(8.6, 6.0)
        ax = fig.add_subplot()
        ax.set_xscale("log")
        ax.set_yscale("log")
        if z_sample is not None and len(z_sample):
            size = _point_size(len(z_sample))
            for code in (UNREACHABLE, REACHABLE):
                sel = (reach == code) & np.isfinite(z_sample) & np.isfinite(d_sample) \
                    & (z_sample > 0)
                if sel.any():
                    st = REACH_STYLE[code]
                    ax.scatter(z_sample[sel], d_sample[sel], s=size * 3, c=st["color"],
                               marker=st["marker"], alpha=0.6, linewidths=0, zorder=4,
                               label=_objects_label(code, derived))
        ax.plot(z, d_c, color=BLACK, lw=1.8, ls="-", label="comoving distance $D_C$", zorder=3)
        ax.plot(z, d_l, color=BLUE, lw=1.8, ls="--", label="luminosity distance $D_L$", zorder=3)
        ax.plot(z, d_a, color=VERMILLION, lw=1.8, ls="-.",
                label="angular-diameter distance $D_A$", zorder=3)
        ax.plot(z, d_t, color=GREEN, lw=2.0, ls=":",
                label=r"light-travel distance $c\,t_\mathrm{lookback}$", zorder=3)
        y_lo = float(np.nanmin(np.concatenate([d_a, d_c]))) / 1.6
        y_hi = float(np.nanmax(d_l)) * 1.6
        ax.set_xlim(z_lo, z_hi)
        ax.set_ylim(y_lo, y_hi)

        hubble = derived.get("hubble_distance_mpc")
        event = derived.get("event_horizon_mpc")
        particle = derived.get("particle_horizon_mpc")
        text_x = z_lo * 1.25
        line_kw = {"color": GREY, "lw": 1.0, "zorder": 1}
        if _finite(hubble):
            ax.axhline(hubble, ls=(0, (1, 1.5)), **line_kw)
            ax.text(text_x, hubble / 1.06, f"Hubble radius $c/H_0$ = {_fmt(hubble)} Mpc",
                    va="top", ha="left", fontsize=8.5, color="#333333")
        if _finite(event):
            ax.axhline(event, ls=(0, (6, 3)), **line_kw)
            ax.text(text_x, event * 1.06, f"event horizon today = {_fmt(event)} Mpc",
                    va="bottom", ha="left", fontsize=8.5, color="#333333")
        if _finite(particle):
            ax.axhline(particle, ls=(0, (3, 1.5, 1, 1.5)), **line_kw)
            ax.text(text_x, particle * 1.06,
                    f"particle horizon = {_fmt(particle)} Mpc ($D_C$ as $z \\to \\infty$)",
                    va="bottom", ha="left", fontsize=8.5, color="#333333")

        # The two marked redshifts sit where the comoving curve crosses the lines above;
        # their notes go into the empty lower right, with arrows.
        z_hs = derived.get("hubble_sphere_redshift")
        z_eh = derived.get("event_horizon_redshift")
        # Side by side: the Hubble-sphere note left of its mark, the event-horizon note right
        # of its mark (the event horizon lies farther out), so the arrows never cross.
        notes = []
        ty = y_lo * (y_hi / y_lo) ** 0.2
        if _finite(z_hs) and _finite(hubble) and z_lo < z_hs < z_hi:
            notes.append((z_hs, hubble, "D", "Hubble sphere today\n(recedes at c)\n"
                          f"z = {z_hs:.3f}", (z_hs / 1.35, ty), "right"))
        if _finite(z_eh) and _finite(event) and z_lo < z_eh < z_hi:
            notes.append((z_eh, event, "s", f"event horizon\ntoday\nz = {z_eh:.3f}",
                          (z_eh * 1.35, ty), "left"))
        for zm, dm, marker, text, where, ha in notes:
            ax.plot([zm], [dm], marker=marker, ms=8, mfc="white", mec=BLACK, mew=1.6,
                    ls="none", zorder=5)
            ax.annotate(text, xy=(zm, dm), xytext=where, fontsize=8.5,
                        ha=ha, va="center",
                        arrowprops={"arrowstyle": "->", "color": "#444444", "lw": 0.8,
                                    "shrinkB": 5},
                        bbox={"boxstyle": "round,pad=0.25", "fc": "white", "ec": "#bbbbbb",
                              "lw": 0.6}, zorder=6)
        ax.set_xlabel("redshift $z$")
        ax.set_ylabel("distance (Mpc)")
        plain_log_axis(ax.xaxis)
        plain_log_axis(ax.yaxis)
        sec = ax.secondary_yaxis("right", functions=(_mpc_to_gly, _gly_to_mpc))
        sec.set_ylabel("distance (Gly, billions of light-years)")
        plain_log_axis(sec.yaxis)
        name = (cosmology.to_dict().get("name") or "custom cosmology")
        ax.set_title(f"Distance against redshift, cosmology {name}")
        fig.legend(loc="outside lower center", ncol=2, handlelength=3.2, markerscale=2.0)
        return to_png(fig)


# ---------------------------------------------------------------- redshift histogram
def redshift_histogram(agg, derived: dict) -> bytes:
    """Stacked histogram of every usable redshift, reachable and unreachable."""
    edges = agg.edges
    width = float(edges[1] - edges[0])
    left = edges[:-1]
    with style():
        fig = new_figure(8.6, 4.6)
        ax = fig.add_subplot()
        bottom = np.zeros(len(left))
        layers = [
            (agg.counts_reachable, {"color": BLUE, "hatch": None,
                                    "label": REACH_STYLE[REACHABLE]["label"]}),
            (agg.counts_unreachable, {"color": ORANGE, "hatch": "///",
                                      "label": REACH_STYLE[UNREACHABLE]["label"]}),
            (agg.counts_unknown, {"color": "#bbbbbb", "hatch": "..",
                                  "label": "reachability not recorded"}),
        ]
        for counts, st in layers:
            if counts.sum() == 0:
                continue
            ax.bar(left, counts, width=width, bottom=bottom, align="edge", color=st["color"],
                   hatch=st["hatch"], edgecolor="#333333" if st["hatch"] else st["color"],
                   linewidth=0.4, label=st["label"])
            bottom = bottom + counts
        z_eh = derived.get("event_horizon_redshift")
        if _finite(z_eh) and z_eh <= edges[-1]:
            ax.axvline(z_eh, color=BLACK, ls="--", lw=1.4)
            ax.annotate(f"event horizon today, z = {z_eh:.3f}", xy=(z_eh, 1.0),
                        xycoords=("data", "axes fraction"), xytext=(5, -3),
                        textcoords="offset points", va="top", ha="left", fontsize=9,
                        bbox={"boxstyle": "round,pad=0.2", "fc": "white", "ec": "none",
                              "alpha": 0.85})
        ax.set_xlim(0.0, edges[-1])
        ax.set_xlabel("redshift $z$")
        ax.set_ylabel(f"objects per bin ($\\Delta z$ = {width:.3g})")
        ax.set_title("Redshift distribution, every row with a usable redshift")
        if bottom.max() == 0:
            ax.text(0.5, 0.5, "no usable redshift in this output", transform=ax.transAxes,
                    ha="center", va="center", color=GREY)
            ax.set_ylim(0, 1)
        else:
            ax.set_ylim(0, bottom.max() * 1.14)  # head room for the horizon's label
            fig.legend(loc="outside lower center", ncol=2)
        return to_png(fig)


# --------------------------------------------------------------------- Hubble diagram
def empty_universe_distance_modulus_mag(z, h0_km_s_mpc: float) -> np.ndarray:
    """Distance modulus of the empty (Milne) universe with the same H0, the usual reference of
    a Hubble diagram: D_L = (c/H0) z (1 + z/2) (Omega_m = Omega_Lambda = 0, open; e.g.
    Hogg 1999, astro-ph/9905116, eq. 16 with Omega_k = 1)."""
    z = np.asarray(z, dtype=float)
    d_l = constants.C_KM_S / h0_km_s_mpc * z * (1.0 + 0.5 * z)
    with np.errstate(divide="ignore", invalid="ignore"):
        return 5.0 * np.log10(d_l / constants.TEN_PC_IN_MPC)


def hubble_diagram(cosmology, derived: dict, z_sample: np.ndarray | None,
                   mu_sample: np.ndarray | None, reach: np.ndarray | None,
                   z_max_data: float | None) -> bytes:
    """Distance modulus against redshift: the model curve and the sampled objects; below,
    the same relative to an empty universe, where acceleration shows as a rise."""
    z_hi = max(10.0, 1.3 * z_max_data) if _finite(z_max_data) else 10.0
    z_lo = 1.0e-3
    if z_sample is not None and len(z_sample):
        pos = z_sample[np.isfinite(z_sample) & (z_sample > 0)]
        if len(pos):
            z_lo = min(z_lo, float(pos.min()) / 1.3)
    z = np.geomspace(z_lo, min(z_hi, 1.0e4), 500)
    mu = cosmology.distance_modulus_mag(z)
    h0 = float(cosmology.to_dict()["h0"])
    mu_empty = empty_universe_distance_modulus_mag(z, h0)
    with style():
        fig = new_figure(8.6, 5.8)
        top, bottom = fig.subplots(2, 1, sharex=True, height_ratios=[2.4, 1.0])
        top.set_xscale("log")
        if z_sample is not None and len(z_sample):
            size = _point_size(len(z_sample))
            for code in (UNREACHABLE, REACHABLE):
                sel = (reach == code) & np.isfinite(mu_sample) & (z_sample > 0)
                if sel.any():
                    st = REACH_STYLE[code]
                    kw = {"s": size * 3, "c": st["color"], "marker": st["marker"],
                          "alpha": 0.6, "linewidths": 0, "zorder": 4}
                    top.scatter(z_sample[sel], mu_sample[sel],
                                label=_objects_label(code, derived), **kw)
                    residual = mu_sample[sel] - empty_universe_distance_modulus_mag(
                        z_sample[sel], h0)
                    bottom.scatter(z_sample[sel], residual, **kw)
        top.plot(z, mu, color=BLACK, lw=1.4, zorder=3,
                 label=r"$\mu(z) = 5\log_{10}(D_L / 10\,\mathrm{pc})$ of the recorded cosmology")
        bottom.plot(z, mu - mu_empty, color=BLACK, lw=1.4, zorder=3)
        bottom.axhline(0.0, color=GREY, lw=1.0, ls=(0, (4, 2)), zorder=1)
        z_eh = derived.get("event_horizon_redshift")
        if _finite(z_eh) and z[0] < z_eh < z[-1]:
            for ax in (top, bottom):
                ax.axvline(z_eh, color=GREY, ls="--", lw=1.0, zorder=1)
            top.annotate(f"event horizon today, z = {z_eh:.3f}", xy=(z_eh, 0.04),
                         xycoords=("data", "axes fraction"), xytext=(-5, 0), ha="right",
                         textcoords="offset points", fontsize=8.5, color="#333333")
        top.set_xlim(z[0], z[-1])
        plain_log_axis(top.xaxis)
        bottom.set_xlabel("redshift $z$")
        top.set_ylabel(r"distance modulus $\mu$ (mag)")
        bottom.set_ylabel(r"$\mu - \mu_\mathrm{empty}$ (mag)")
        bottom.annotate("0 = empty universe, same H$_0$ (coasting, no acceleration)",
                        xy=(0.01, 0.06), xycoords="axes fraction", fontsize=8.5,
                        color="#333333")
        top.set_title("Hubble diagram")
        fig.legend(loc="outside lower center", ncol=1, markerscale=2.0)
        return to_png(fig)


# ---------------------------------------------------------------- absolute magnitudes
def faint_edge(z: np.ndarray, m: np.ndarray, bins: int = 24, q: float = 98.0,
               min_count: int = 20) -> tuple[np.ndarray, np.ndarray]:
    """The ``q``-th percentile of absolute magnitude in redshift bins (bins with enough
    objects only): the faint edge a flux limit leaves."""
    ok = np.isfinite(z) & np.isfinite(m)
    z, m = z[ok], m[ok]
    if len(z) < min_count:
        return np.zeros(0), np.zeros(0)
    edges = np.quantile(z, np.linspace(0, 1, bins + 1))
    idx = np.clip(np.searchsorted(edges, z, side="right") - 1, 0, bins - 1)
    zc, mc = [], []
    for b in range(bins):
        sel = idx == b
        if sel.sum() >= min_count:
            zc.append(float(np.median(z[sel])))
            mc.append(float(np.percentile(m[sel], q)))
    return np.asarray(zc), np.asarray(mc)


def absolute_magnitudes(z_sample: np.ndarray, bands: dict[str, np.ndarray],
                        flagged: dict[str, np.ndarray] | None = None,
                        counts: dict | None = None) -> bytes:
    """Per band, absolute magnitude against redshift (brighter up).

    ``flagged[band]`` marks sampled rows whose value carries a flag of that band (kept, but
    warned about, e.g. a clipped colour): drawn apart, in another colour and marker, and left
    out of the faint edge. ``counts[band]`` (a :class:`~.data.BandCounts` over the whole
    output) is written under each panel, with the rows whose value was refused (null with a
    flag), which cannot be drawn."""
    flagged = flagged or {}
    counts = counts or {}
    n = len(bands)
    cols = min(n, 3)
    rows = int(math.ceil(n / cols))
    with style():
        fig = new_figure(8.6, 3.5 * rows + 0.8)
        axes = fig.subplots(rows, cols, squeeze=False, sharex=True, sharey=True)
        size = _point_size(len(z_sample))
        any_flagged = False
        for k, (band, m) in enumerate(bands.items()):
            ax = axes[k // cols][k % cols]
            ok = np.isfinite(z_sample) & np.isfinite(m)
            warn = flagged.get(band)
            warn = np.zeros_like(ok) if warn is None or len(warn) != len(ok) else warn & ok
            clean = ok & ~warn
            ax.scatter(z_sample[clean], m[clean], s=size, c=BLUE, alpha=0.35, linewidths=0)
            if warn.any():
                any_flagged = True
                ax.scatter(z_sample[warn], m[warn], s=size * 1.6, c=ORANGE, alpha=0.55,
                           marker="^", linewidths=0)
            ze, me = faint_edge(z_sample[clean], m[clean])
            if len(ze):
                ax.plot(ze, me, color="white", lw=3.2)
                ax.plot(ze, me, color=BLACK, lw=1.5, ls="--", marker="o", ms=3)
            ax.set_title(f"band {band}  ({int(clean.sum()):,} + {int(warn.sum()):,} "
                         f"flagged sampled)", fontsize=9)
            c = counts.get(band)
            if c is not None:
                ax.text(0.02, 0.02, f"all rows: {c.given:,} values, {c.given_flagged:,} of "
                        f"them flagged;\n{c.null_flagged:,} refused (null, flagged), not "
                        f"drawn" + (f"; {c.null_unflagged:,} null unflagged"
                                    if c.null_unflagged else ""),
                        transform=ax.transAxes, fontsize=7.5, color=BLACK, va="bottom",
                        bbox={"facecolor": "white", "alpha": 0.8, "lw": 0})
            if k % cols == 0:
                ax.set_ylabel("absolute magnitude $M$ (mag)")
            if k // cols == rows - 1:
                ax.set_xlabel("redshift $z$")
            if not ok.any():
                ax.text(0.5, 0.5, "no values", transform=ax.transAxes, ha="center",
                        color=GREY)
        for k in range(n, rows * cols):
            axes[k // cols][k % cols].set_visible(False)
        first = axes[0][0]
        if not first.yaxis_inverted():
            first.invert_yaxis()  # shared: brighter (more negative) magnitudes up, all panels
        from matplotlib.lines import Line2D

        handles = [Line2D([], [], ls="none", marker="o", ms=5, color=BLUE, alpha=0.6,
                          label="unflagged (sample)")]
        if any_flagged:
            handles.append(Line2D([], [], ls="none", marker="^", ms=5, color=ORANGE,
                                  alpha=0.8, label="kept but flagged (sample)"))
        handles.append(Line2D([], [], ls="--", marker="o", ms=3, lw=1.5, color=BLACK,
                              label="faint edge (98th percentile, unflagged)"))
        fig.legend(handles=handles, loc="outside lower center", ncol=min(3, len(handles)))
        return to_png(fig)


# ---------------------------------------------------------------------------- sky map
def _ra_span(ra: np.ndarray) -> tuple[float, float]:
    """Smallest RA interval (start, width in degrees) holding every point, across 0/360."""
    r = np.sort(np.mod(ra, 360.0))
    gaps = np.diff(np.concatenate([r, [r[0] + 360.0]]))
    k = int(np.argmax(gaps))
    start = r[(k + 1) % len(r)]
    return float(start), float(360.0 - gaps[k])


def sky_map(ra: np.ndarray, dec: np.ndarray, reach: np.ndarray, seed: int) -> bytes:
    """Mollweide map (RA increasing to the left, as on the sky), coloured by reachability;
    a close-up of the footprint beside it when the footprint is small."""
    ok = np.isfinite(ra) & np.isfinite(dec) & (np.abs(dec) <= 90.0)
    ra, dec, reach = ra[ok], dec[ok], reach[ok]
    # One scatter call in a shuffled order: no class hides another just by being drawn last.
    order = np.random.default_rng(seed).permutation(len(ra))
    ra, dec, reach = ra[order], dec[order], reach[order]
    colours = np.array([REACH_STYLE[int(c)]["color"] for c in reach]) if len(reach) else None
    present = [c for c in (REACHABLE, UNREACHABLE, UNKNOWN) if (reach == c).any()]
    small = False
    if len(ra):
        start, width = _ra_span(ra)
        dec_lo, dec_hi = float(dec.min()), float(dec.max())
        small = width < 120.0 and (dec_hi - dec_lo) < 60.0
    size = _point_size(len(ra))
    with style():
        fig = new_figure(8.6, 3.9 if small else 5.0)
        if small:
            grid = fig.add_gridspec(1, 2, width_ratios=[1.75, 1.0])
            ax = fig.add_subplot(grid[0], projection="mollweide")
            zoom = fig.add_subplot(grid[1])
        else:
            ax = fig.add_subplot(projection="mollweide")
            zoom = None
        lon = np.radians(-(np.mod(ra + 180.0, 360.0) - 180.0))  # RA 0 in the middle, east left
        if len(ra):
            ax.scatter(lon, np.radians(dec), s=size, c=colours, linewidths=0, alpha=0.7)
        else:
            ax.text(0.0, 0.35, "no objects in the sample", ha="center", va="center",
                    color=GREY, fontsize=10)
        ticks = np.arange(-150, 181, 30)
        ax.set_xticks(np.radians(ticks))
        from matplotlib import patheffects

        halo = [patheffects.withStroke(linewidth=2.5, foreground="white")]
        labels = ax.set_xticklabels([f"{int(np.mod(-t, 360))}°" for t in ticks], fontsize=7.5,
                                    color="#333333")
        for label in labels:
            label.set_path_effects(halo)  # readable over the points
        ax.tick_params(axis="y", labelsize=8)
        ax.set_axisbelow(False)  # the graticule over the points, thin and light
        ax.grid(True, color="#888888", lw=0.4, alpha=0.6)
        ax.set_title("Whole sky (Mollweide, equatorial; RA grows to the left)", fontsize=10,
                     pad=16)
        if zoom is not None:
            ra_u = np.mod(ra - start, 360.0) + start  # unwrapped across the footprint
            zoom.scatter(ra_u, dec, s=size * 1.5, c=colours, linewidths=0, alpha=0.7)
            pad_ra = max(width * 0.04, 0.05)
            pad_dec = max((dec_hi - dec_lo) * 0.04, 0.05)
            zoom.set_xlim(start + width + pad_ra, start - pad_ra)  # RA increasing to the left
            zoom.set_ylim(dec_lo - pad_dec, dec_hi + pad_dec)
            mid = math.cos(math.radians(0.5 * (dec_lo + dec_hi)))
            zoom.set_aspect(1.0 / max(mid, 0.05), adjustable="box")
            from matplotlib.ticker import FuncFormatter

            zoom.xaxis.set_major_formatter(FuncFormatter(lambda v, _: f"{np.mod(v, 360):g}"))
            zoom.set_xlabel("right ascension (deg)")
            zoom.set_ylabel("declination (deg)")
            zoom.set_title("Footprint close-up", fontsize=10)
        from matplotlib.lines import Line2D

        short = {REACHABLE: "reachable", UNREACHABLE: "unreachable (beyond the event horizon)",
                 UNKNOWN: "no usable redshift"}
        handles = [Line2D([], [], ls="none", marker="o", ms=6, color=REACH_STYLE[c]["color"],
                          label=short[c]) for c in present]
        if handles:
            fig.legend(handles=handles, loc="outside lower center", ncol=len(handles))
        return to_png(fig)
