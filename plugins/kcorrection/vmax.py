"""z_max, V_max and V/V_max per object of a flux-limited sample (part of plugin ``kcorrection``).

Configured by a band's ``limit_mag`` (the sample's faint limit in that band's catalogue
magnitude) and optional ``bright_limit_mag``, with the survey's ``area_deg2`` and the sample's
``sample_redshift_range`` as options of ``[annotators.kcorrection]``.

An object of observed magnitude m at redshift z, with absolute magnitude M and its own
K-curve K(z') (:meth:`Method.k_at` of the band's method, with the object's shape parameter),
would be seen at redshift z' with

    m(z') = m + [mu(z') + K(z')] - [mu(z) + K(z)]

(Galactic extinction is that of the object's own line of sight, the same at every z', so it
cancels: the limits apply to the catalogue magnitudes as they were selected). ``zmax_<band>``
is the first z' above z where m(z') reaches the faint limit, ``zmin_<band>`` the first z'
below z where it reaches the bright limit. With the survey's solid angle Omega and the
comoving volume V_C of the job's cosmology (Hogg 1999 eq. 29),

    V_max = (Omega / 4 pi) [V_C(min(z_max, z_hi)) - V_C(max(z_min, z_lo))]
    V     = (Omega / 4 pi) [V_C(z)                - V_C(max(z_min, z_lo))]

(Schmidt 1968, ApJ 151, 393; [z_lo, z_hi] is ``sample_redshift_range``), and V/V_max is
uniform on [0, 1] for a sample uniform in space (so <V/V_max> = 1/2 with error 1/sqrt(12 N)).

The root finding is vectorised over the batch: m(z') is evaluated on a grid of
:data:`GRID_POINTS` redshifts per object, uniform in ln(1 + z') between z and the end of the
search; the first grid cell where the limit is crossed brackets the root, which the Illinois
variant of regula falsi (Dowell & Jarratt 1971, BIT 11, 168) refines for all objects at once
until the bracket is below 1e-10 in ln(1 + z) or m(z') is within 1e-9 mag of the limit. Two
crossings inside one grid cell (a K-curve wiggling through the limit within 1/63 of the
search in ln(1 + z)) are not resolved.
"""

from __future__ import annotations

import math
import re
from dataclasses import dataclass

import numpy as np
import pyarrow as pa

from annotator import ColumnSpec, hookimpl
from annotator.sql import Selection, SelectionParameter

#: Grid points per object in the bracketing search; rows are processed in blocks.
GRID_POINTS = 64
BLOCK_ROWS = 8192
MAX_ITERATIONS = 60
U_TOLERANCE = 1e-10
MAG_TOLERANCE = 1e-9
#: Full sky in square degrees: 4 pi (180 / pi)^2.
FULL_SKY_DEG2 = 4.0 * math.pi * (180.0 / math.pi) ** 2
#: The search never goes beyond this redshift (nor the band's K range).
Z_SEARCH_CAP = 10.0
BAND_KEYS = ("limit_mag", "bright_limit_mag")
OPTIONS = ("area_deg2", "sample_redshift_range")

NOT_IN_SAMPLE = "vmax_{band}_outside_limits"
OUTSIDE_RANGE = "vmax_{band}_outside_redshift_range"
UNDEFINED = "zmax_{band}_undefined"
BEYOND = "zmax_{band}_beyond_search"

# Status of a crossing search.
NONE, FOUND, UNKNOWN = 0, 1, 2


def first_crossing(func, start: np.ndarray, end: np.ndarray, *, grid: int = GRID_POINTS
                   ) -> tuple[np.ndarray, np.ndarray]:
    """Per row i, the first z' on the way from ``start[i]`` to ``end[i]`` (either direction)
    where ``func(z', rows)`` turns positive, with ``func(start) <= 0`` expected.

    ``func(zp, rows)`` returns g for the rows ``rows`` (index array) at zp of shape
    (len(rows),) or (len(rows), m). Returns (root, status): status FOUND with the root, NONE
    when g stays <= 0 all the way (root NaN), UNKNOWN when g is NaN before any crossing.
    A row with g(start) > 0 has its root at ``start``.
    """
    start = np.asarray(start, dtype=np.float64)
    end = np.asarray(end, dtype=np.float64)
    n = start.size
    root = np.full(n, np.nan)
    status = np.full(n, NONE, dtype=np.int8)
    t = np.linspace(0.0, 1.0, grid)
    ua_all, ub_all = np.log1p(start), np.log1p(end)
    for s in range(0, n, BLOCK_ROWS):
        rows = np.arange(s, min(n, s + BLOCK_ROWS))
        ua, ub = ua_all[rows], ub_all[rows]
        u = ua[:, None] + (ub - ua)[:, None] * t[None, :]
        zp = np.expm1(u)
        zp[:, 0], zp[:, -1] = start[rows], end[rows]  # exactly the ends (no rounding past)
        g = func(zp, rows)
        hit = (g > 0) | np.isnan(g)
        any_hit = hit.any(axis=1)
        j = np.argmax(hit, axis=1)
        g_j = g[np.arange(rows.size), j]
        unknown = any_hit & np.isnan(g_j)
        status[rows[unknown]] = UNKNOWN
        at_start = any_hit & ~unknown & (j == 0)
        root[rows[at_start]] = start[rows[at_start]]
        status[rows[at_start]] = FOUND
        inner = np.flatnonzero(any_hit & ~unknown & (j > 0))
        if inner.size == 0:
            continue
        jj = j[inner]
        u_lo, u_hi = u[inner, jj - 1], u[inner, jj]
        g_lo, g_hi = g[inner, jj - 1], g[inner, jj]
        r, ok = _illinois(func, rows[inner], u_lo, u_hi, g_lo, g_hi,
                          bounds=(start[rows[inner]], end[rows[inner]]))
        root[rows[inner]] = _between(np.expm1(r), start[rows[inner]], end[rows[inner]])
        status[rows[inner]] = np.where(ok, FOUND, UNKNOWN)
        root[rows[inner][~ok]] = np.nan
    return root, status


def _between(z, a, b):
    """z clipped into [min(a, b), max(a, b)] (rounding of expm1(log1p(z)) only)."""
    return np.clip(z, np.minimum(a, b), np.maximum(a, b))


def _illinois(func, rows, u_lo, u_hi, g_lo, g_hi, bounds=None):
    """Regula falsi with the Illinois modification on brackets g_lo <= 0 < g_hi in
    u = ln(1 + z'); all rows at once, each until converged."""
    u_lo, u_hi, g_lo, g_hi = (np.array(a, dtype=np.float64) for a in (u_lo, u_hi, g_lo, g_hi))
    # u_lo/u_hi are the ends where g <= 0 / g > 0 (u_hi may lie below u_lo when searching down)
    best = u_hi.copy()
    ok = np.ones(rows.size, dtype=bool)
    last = np.zeros(rows.size, dtype=np.int8)
    active = np.arange(rows.size)
    for _ in range(MAX_ITERATIONS):
        if active.size == 0:
            break
        a_lo, a_hi, b_lo, b_hi = u_lo[active], u_hi[active], g_lo[active], g_hi[active]
        with np.errstate(invalid="ignore", divide="ignore"):
            um = (a_lo * b_hi - a_hi * b_lo) / (b_hi - b_lo)
        bad_step = ~np.isfinite(um)
        um[bad_step] = 0.5 * (a_lo[bad_step] + a_hi[bad_step])
        gm = func(np.expm1(um), rows[active]) if bounds is None else func(
            _between(np.expm1(um), *(x[active] for x in bounds)), rows[active])
        nan = np.isnan(gm)
        ok[active[nan]] = False
        pos = gm > 0
        lst = last[active]
        # Illinois: the end kept twice in a row has its g halved.
        b_lo = np.where(pos & (lst == 1), 0.5 * b_lo, b_lo)
        b_hi = np.where(~pos & (lst == -1), 0.5 * b_hi, b_hi)
        u_hi[active] = np.where(pos, um, a_hi)
        g_hi[active] = np.where(pos, gm, b_hi)
        u_lo[active] = np.where(pos, a_lo, um)
        g_lo[active] = np.where(pos, b_lo, gm)
        last[active] = np.where(pos, 1, -1)
        best[active] = um
        done = nan | (np.abs(gm) <= MAG_TOLERANCE) | \
            (np.abs(u_hi[active] - u_lo[active]) <= U_TOLERANCE)
        active = active[~done]
    return best, ok


@dataclass
class BandLimits:
    faint: float
    bright: float | None


@dataclass
class Vmax:
    """Per-job V_max set-up: limits per band, area, redshift range."""

    limits: dict[str, BandLimits]
    area_deg2: float
    z_range: tuple[float, float]
    z_top: dict[str, float]  # band -> end of the upward search
    cosmology: object

    @property
    def sky_fraction(self) -> float:
        return self.area_deg2 / FULL_SKY_DEG2

    def columns(self) -> list[ColumnSpec]:
        out = []
        lo, hi = self.z_range
        for band, lim in self.limits.items():
            bright = (f" and bright limit {lim.bright:g}" if lim.bright is not None else "")
            if lim.bright is not None:
                out.append(ColumnSpec(
                    f"zmin_{band}", pa.float64(), None, "src.redshift;stat.min",
                    f"Redshift below the object's own at which, with its own K-curve, its "
                    f"{band} magnitude would reach the bright limit {lim.bright:g}."))
            out += [
                ColumnSpec(
                    f"zmax_{band}", pa.float64(), None, "src.redshift;stat.max",
                    f"Redshift at which the object, with its own K-curve, would fall to the "
                    f"{band} limit {lim.faint:g} (solving m_lim = M + mu(z) + K(z))."),
                ColumnSpec(
                    f"vmax_{band}_mpc3", pa.float64(), "Mpc3", "phys.volume;stat.max",
                    f"Comoving volume (Schmidt 1968) in which the object would be in the "
                    f"sample: {self.area_deg2:g} deg2, {band} faint limit {lim.faint:g}"
                    f"{bright}, {lo:g} <= z <= {hi:g}."),
                ColumnSpec(
                    f"v_over_vmax_{band}", pa.float64(), None, "arith.ratio",
                    f"V/V_max (Schmidt 1968): comoving volume inside the object's own "
                    f"redshift over vmax_{band}_mpc3, within the same limits."),
            ]
        return out

    def flags(self) -> dict[str, str]:
        lo, hi = self.z_range
        out = {}
        for band, lim in self.limits.items():
            within = (f"{lim.bright:g} to {lim.faint:g}" if lim.bright is not None
                      else f"brighter than {lim.faint:g}")
            out[NOT_IN_SAMPLE.format(band=band)] = (
                f"The {band} magnitude is not {within}: not in the flux-limited sample, null "
                f"z_max, V_max and V/V_max.")
            out[OUTSIDE_RANGE.format(band=band)] = (
                f"The redshift lies outside the sample's {lo:g} <= z <= {hi:g}: null z_max, "
                f"V_max and V/V_max in band {band}.")
            out[UNDEFINED.format(band=band)] = (
                f"No z_max in band {band}: the absolute magnitude or the object's K-curve has "
                f"no value between its redshift and the limit; null z_max, V_max and V/V_max.")
            out[BEYOND.format(band=band)] = (
                f"The object stays brighter than the {band} limit out to z = "
                f"{self.z_top[band]:g}, the end of its K-curve: null z_max; V_max runs to the "
                f"sample's upper redshift {hi:g}.")
        return out

    def compute(self, batch, band: str, method, shape, z_cosmo: np.ndarray,
                m_obs: np.ndarray, k_obs: np.ndarray, mu: np.ndarray, m_abs: np.ndarray
                ) -> dict[str, np.ndarray]:
        """The columns of one band for a batch.

        ``shape``: the objects' K-curve parameters (``method.shape`` at the observed redshift
        and colour); ``z_cosmo``/``mu``: the redshift and distance modulus of M; ``k_obs``: K
        at the observed redshift; ``m_abs`` null where M is null (e.g. a missing E(B-V)); the
        limits apply to ``m_obs``, the catalogue magnitude. z' stands for both the observed
        and the cosmological redshift of the moved object."""
        lim = self.limits[band]
        lo, hi = self.z_range
        n = z_cosmo.size
        zmax = np.full(n, np.nan)
        zmin = np.full(n, np.nan)
        vmax = np.full(n, np.nan)
        ratio = np.full(n, np.nan)
        with np.errstate(invalid="ignore"):
            out_lim = np.isfinite(m_obs) & ((m_obs > lim.faint) | (
                (m_obs < lim.bright) if lim.bright is not None else False))
            out_z = np.isfinite(z_cosmo) & ((z_cosmo < lo) | (z_cosmo > hi))
        shift = m_obs - mu - k_obs  # M + A: m(z') = shift + mu(z') + K(z')
        usable = np.isfinite(m_abs) & np.isfinite(shift) & ~out_lim & ~out_z
        if shape is not None:
            usable &= np.isfinite(shape)
        undefined = np.isfinite(m_obs) & ~out_lim & ~out_z & ~usable & np.isfinite(z_cosmo)
        rows = np.flatnonzero(usable)
        beyond = np.zeros(n, dtype=bool)
        if rows.size:
            sh = None if shape is None else shape[rows]
            base = shift[rows]
            cosmo = self.cosmology

            def m_at(zp, sub):
                s = None if sh is None else sh[sub]
                return base[sub].reshape((-1,) + (1,) * (zp.ndim - 1)) + \
                    cosmo.distance_modulus_mag(zp) + method.k_at(zp, s)

            z_own = z_cosmo[rows]
            top = np.full(rows.size, self.z_top[band])
            faint_root, st = first_crossing(lambda zp, sub: m_at(zp, sub) - lim.faint,
                                            z_own, top)
            found = st == FOUND
            zmax[rows[found]] = faint_root[found]
            none = st == NONE
            beyond[rows[none]] = True
            bad = st == UNKNOWN
            z_upper = np.where(found, np.minimum(faint_root, hi), np.where(none, hi, np.nan))
            if lim.bright is not None:
                bright_root, sb = first_crossing(lambda zp, sub: lim.bright - m_at(zp, sub),
                                                 z_own, np.full(rows.size, lo))
                zmin[rows[sb == FOUND]] = bright_root[sb == FOUND]
                bad |= sb == UNKNOWN
                z_lower = np.where(sb == FOUND, np.maximum(bright_root, lo), lo)
            else:
                z_lower = np.full(rows.size, lo)
            z_upper[bad] = np.nan
            v_lower = cosmo.comoving_volume_mpc3(z_lower)
            with np.errstate(invalid="ignore", divide="ignore"):
                vm = self.sky_fraction * (cosmo.comoving_volume_mpc3(z_upper) - v_lower)
                v = self.sky_fraction * (cosmo.comoving_volume_mpc3(z_own) - v_lower)
                vmax[rows] = np.where(vm > 0, vm, np.nan)
                ratio[rows] = v / vmax[rows]
            undefined[rows[bad]] = True
            zmax[rows[bad]] = np.nan
            zmin[rows[bad]] = np.nan
        for reason, mask in ((NOT_IN_SAMPLE, out_lim), (OUTSIDE_RANGE, out_z),
                             (UNDEFINED, undefined), (BEYOND, beyond & ~undefined)):
            if mask.any():
                batch.flag(reason.format(band=band), mask)
        out = {f"zmax_{band}": zmax, f"vmax_{band}_mpc3": vmax, f"v_over_vmax_{band}": ratio}
        if lim.bright is not None:
            out[f"zmin_{band}"] = zmin
        return out


def configure_vmax(setup, bands, raw_bands: dict, options: dict, cosmology) -> Vmax | None:
    """The V_max set-up when any band has ``limit_mag``, else None (and then no V_max option
    may be given)."""
    limits: dict[str, BandLimits] = {}
    for b in bands:
        table = raw_bands[b.name]
        if "limit_mag" not in table:
            if "bright_limit_mag" in table:
                raise setup.error(f"{b.key}.bright_limit_mag", "needs limit_mag (the faint "
                                  "limit) in the same band")
            continue
        if b.method is None:
            raise setup.error(f"{b.key}.limit_mag", "a flux limit needs the band's absolute "
                              "magnitude: add kcorrection = { method = ... }")
        faint = _mag(setup, f"{b.key}.limit_mag", table["limit_mag"])
        bright = None
        if "bright_limit_mag" in table:
            bright = _mag(setup, f"{b.key}.bright_limit_mag", table["bright_limit_mag"])
            if not bright < faint:
                raise setup.error(f"{b.key}.bright_limit_mag", f"{bright:g} must be brighter "
                                  f"(smaller) than limit_mag = {faint:g}")
        limits[b.name] = BandLimits(faint, bright)
    given = [k for k in OPTIONS if k in options]
    if not limits:
        if given:
            raise setup.error(given[0], "only used with a flux limit: add limit_mag = ... to "
                              "a [bands.<band>] table")
        return None
    if "area_deg2" not in options:
        raise setup.error("area_deg2", "missing: V_max needs the survey's solid angle in "
                          "square degrees ([annotators.kcorrection] area_deg2 = ...)")
    area = options["area_deg2"]
    if isinstance(area, bool) or not isinstance(area, (int, float)) or \
            not 0 < area <= FULL_SKY_DEG2 * (1 + 1e-12):
        raise setup.error("area_deg2", f"expected a solid angle in (0, {FULL_SKY_DEG2:.2f}] "
                          f"square degrees, got {area!r}")
    z_top = {}
    for name in limits:
        method = next(b.method for b in bands if b.name == name)
        z_top[name] = float(min(method.z_max, Z_SEARCH_CAP))
    top = min(z_top.values())
    z_range = options.get("sample_redshift_range", [0.0, top])
    if not (isinstance(z_range, list) and len(z_range) == 2 and all(
            isinstance(v, (int, float)) and not isinstance(v, bool) and math.isfinite(v)
            for v in z_range)):
        raise setup.error("sample_redshift_range", f"expected [lowest, highest] redshift, got "
                          f"{z_range!r}")
    lo, hi = float(z_range[0]), float(z_range[1])
    if not 0 <= lo < hi:
        raise setup.error("sample_redshift_range", f"expected 0 <= lowest < highest, got "
                          f"{z_range!r}")
    for name, zt in z_top.items():
        if hi > zt:
            raise setup.error("sample_redshift_range", f"the highest redshift {hi:g} is beyond "
                              f"z = {zt:g}, where band {name}'s K-correction ends")
    return Vmax(limits=limits, area_deg2=float(area), z_range=(lo, hi), z_top=z_top,
                cosmology=cosmology)


def _mag(setup, key: str, value) -> float:
    if isinstance(value, bool) or not isinstance(value, (int, float)) or \
            not math.isfinite(value) or not -50 < value < 60:
        raise setup.error(key, f"expected an apparent magnitude, got {value!r}")
    return float(value)


# ------------------------------------------------------------------ luminosity function
VMAX_COLUMN = re.compile(r"^vmax_([a-z][a-z0-9_]*)_mpc3$")
DEFAULT_BIN_MAG = 0.25


def luminosity_function_selection(bands: list[str]) -> Selection:
    """The 1/V_max estimate of the luminosity function per bin of absolute magnitude (Schmidt
    1968; Felten 1976, AJ 81, 376 for the binned form): per bin of width dM,
    phi = sum 1/V_max / dM and its Poisson error sqrt(sum 1/V_max^2) / dM.

    The band is a checked identifier (one of ``bands``), placed inside the quoted names.
    """
    def check(values: dict) -> str | None:
        if not values["bin_mag"] > 0:
            return f"bin_mag = {values['bin_mag']} must be above 0"
        return None

    m = '"absolute_magnitude_${band}_mag"'
    v = '"vmax_${band}_mpc3"'
    return Selection(
        "luminosity_function",
        "The 1/V_max luminosity function per bin of absolute magnitude, with Poisson errors "
        "(one row per bin).",
        f"SELECT (floor({m} / ${{bin_mag}}) + 0.5) * ${{bin_mag}} AS absolute_magnitude_mag,\n"
        f"  count(*) AS objects,\n"
        f"  sum(1.0 / {v}) / ${{bin_mag}} AS phi_per_mpc3_per_mag,\n"
        f"  sqrt(sum(1.0 / ({v} * {v}))) / ${{bin_mag}} AS phi_error_per_mpc3_per_mag,\n"
        f'  avg("v_over_vmax_${{band}}") AS mean_v_over_vmax\n'
        f"FROM catalogue WHERE {v} > 0 AND {m} IS NOT NULL\n"
        f"GROUP BY 1 ORDER BY 1",
        (SelectionParameter("band", "band of the absolute magnitude and V_max", kind="choice",
                            default=bands[0], choices=tuple(bands)),
         SelectionParameter("bin_mag", "width of the absolute-magnitude bins in mag",
                            default=DEFAULT_BIN_MAG)),
        check=check,
        note="phi counts each object in the flux-limited sample (V_max not null) once, "
             "weighted by 1/V_max in Mpc^-3; the Poisson error assumes independent objects "
             "(no cosmic variance). Bins are [k dM, (k + 1) dM), labelled by their centre.")


@hookimpl
def register_selections(manifest) -> list[Selection]:
    added = {c.get("name") for c in manifest.get("columns_added", [])}
    bands = sorted(mt.group(1) for name in added if name and (mt := VMAX_COLUMN.match(name))
                   and f"absolute_magnitude_{mt.group(1)}_mag" in added)
    return [luminosity_function_selection(bands)] if bands else []
