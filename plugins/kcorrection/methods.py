"""The ways of computing a K-correction, each built once per job and evaluated per batch.

K is defined as in Hogg, Baldry, Blanton & Eisenstein (2002, astro-ph/0210394):
``m_R = M_Q + mu(z) + K_QR(z)``, R the observed band, Q the rest-frame band (Q = R unless a
``rest_filter`` is given).

* :class:`PowerLaw` -- f_nu proportional to nu^alpha: ``K = -2.5 (1 + alpha) log10(1 + z)``
  (Hogg et al. 2002, the power-law case after eq. 13), whatever the filter.
* :class:`PowerLawFromColour` -- the same with alpha, per object, the slope of the power law
  whose synthetic colour through the two colour filters equals the observed colour.
* :class:`Template` -- an SED through the filters by synthetic photometry (eq. 9).
* :class:`TemplateMix` -- per object, the non-negative mixture of two SEDs whose synthetic
  colour at the object's redshift equals its observed colour, then eq. 9 on that mixture.
* :class:`Polynomial` -- ``K = sum_xy a_xy z^x c^y`` with user coefficients (the published
  form of Chilingarian, Melchior & Zolotukhin 2010, MNRAS 405, 1409, eq. 1).

Every method returns K with NaN where it has no value, and a mask per flag suffix.
"""

from __future__ import annotations

import math
import threading
from dataclasses import dataclass
from typing import ClassVar

import numpy as np

from annotator.errors import ConfigError

from .synthetic import ab_maggies
from .tables import Curve, Filter, Grid, Tabulated, cached_table, tabulate

LN10 = math.log(10.0)
#: Flag suffixes a method may raise (the annotator prefixes ``kcorrection_<band>_``).
OUTSIDE_Z = "outside_redshift_range"
COLOUR_MISSING = "colour_missing"
COLOUR_OUTSIDE = "colour_outside_range"
COLOUR_CLIPPED = "colour_clipped"
COLOUR_DEGENERATE = "colour_degenerate"
COLOUR_INSENSITIVE = "colour_insensitive"
#: Default bound on the spread of a template mixture's K over the colour's +-1 sigma (mag).
DEFAULT_MAX_K_SPREAD_MAG = 0.5
#: The colour error assumed when the magnitude errors are not known (mag).
DEFAULT_ASSUMED_COLOUR_ERROR_MAG = 0.05


def _mag_error(guess: np.ndarray, exact: np.ndarray) -> np.ndarray:
    return np.abs(guess - exact)


def _maggies_error(guess: np.ndarray, exact: np.ndarray) -> np.ndarray:
    with np.errstate(divide="ignore", invalid="ignore"):
        return np.abs(2.5 * np.log10(guess / exact))


class Method:
    """A K-correction method for one band."""

    kind: ClassVar[str] = ""
    #: ``(p, q)``: the method reads the observed colour m_p - m_q (band names), or None.
    colour: tuple[str, str] | None = None
    z_max: float = math.inf

    def flag_suffixes(self) -> dict[str, str]:
        """``{suffix: description}`` of the flags :meth:`evaluate` may raise."""
        out = {OUTSIDE_Z: f"The redshift is outside the range 0 <= z <= {self.z_max:g} over "
                          f"which this band's K-correction is defined: null K-correction and "
                          f"absolute magnitude."}
        if self.colour is not None:
            p, q = self.colour
            out[COLOUR_MISSING] = (f"The {p} or {q} magnitude needed for the colour {p} - {q} "
                                   f"is null: null K-correction and absolute magnitude.")
        return out

    def describe(self) -> str:
        raise NotImplementedError

    def release(self) -> None:
        """Drop anything kept from the last batch (called by the annotator after each band)."""

    def evaluate(self, z: np.ndarray, colour: np.ndarray | None
                 ) -> tuple[np.ndarray, dict[str, np.ndarray]]:
        """K at each row (NaN where there is none) and the flag masks."""
        raise NotImplementedError

    def derivatives(self, z: np.ndarray, colour: np.ndarray | None
                    ) -> tuple[np.ndarray, np.ndarray]:
        """dK/dz and dK/dcolour at each row (central differences unless overridden)."""
        hz = 1e-4
        z_lo = np.clip(z - hz, 0.0, self.z_max)
        z_hi = np.clip(z + hz, 0.0, self.z_max)
        k_lo, _ = self.evaluate(z_lo, colour)
        k_hi, _ = self.evaluate(z_hi, colour)
        with np.errstate(invalid="ignore", divide="ignore"):
            dkdz = (k_hi - k_lo) / (z_hi - z_lo)
        if colour is None:
            return dkdz, np.zeros_like(z)
        hc = 1e-3
        k_lo, _ = self.evaluate(z, colour - hc)
        k_hi, _ = self.evaluate(z, colour + hc)
        return dkdz, (k_hi - k_lo) / (2 * hc)

    # -- per-object K-curve: K of each object's own SED at other redshifts ---------------
    def shape(self, z: np.ndarray, colour: np.ndarray | None) -> np.ndarray | None:
        """Per-object shape parameter fixing each object's K-curve, from its observed redshift
        and colour: the mixing weight (template_mix), the slope alpha (power_law_colour), the
        observed colour held fixed (polynomial), or None when K depends on z alone (template,
        power_law). NaN where the object has no K-curve (missing colour, redshift outside)."""
        return None

    def k_at(self, z_new: np.ndarray, shape: np.ndarray | None) -> np.ndarray:
        """K at new redshifts for the objects whose :meth:`shape` is given.

        ``z_new`` has shape (n,) (one new redshift per object) or (n, m) (m per object);
        ``shape`` has shape (n,) or is None. NaN outside 0 <= z_new <= z_max and where the
        shape is NaN. ``k_at(z, shape(z, c))`` equals ``evaluate(z, c)[0]``.
        """
        raise NotImplementedError

    # -- shared ----------------------------------------------------------------------
    def _outside(self, z: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """(usable, flag): usable where 0 <= z <= z_max; flag where z is finite but outside."""
        with np.errstate(invalid="ignore"):
            usable = (z >= 0.0) & (z <= self.z_max)
        return usable, np.isfinite(z) & ~usable

    def _colour_checks(self, colour: np.ndarray) -> np.ndarray:
        return ~np.isfinite(colour)


# ------------------------------------------------------------------------ power laws
@dataclass(kw_only=True)
class PowerLaw(Method):
    """f_nu proportional to nu^alpha (alpha = 0: flat in f_nu; alpha = -2: flat in f_lambda)."""

    alpha: float
    z_max: float = math.inf
    kind: ClassVar[str] = "power_law"

    def describe(self) -> str:
        return (f"power law f_nu ~ nu^{self.alpha:g}: K = -2.5 (1 + alpha) log10(1 + z) "
                f"(Hogg et al. 2002)")

    def evaluate(self, z, colour=None):
        usable, outside = self._outside(z)
        k = (-2.5 * (1.0 + self.alpha) / LN10) * np.log1p(np.where(usable, z, np.nan))
        return k, {OUTSIDE_Z: outside}

    def derivatives(self, z, colour=None):
        with np.errstate(invalid="ignore"):
            return (-2.5 * (1.0 + self.alpha) / LN10) / (1.0 + z), np.zeros_like(z)

    def k_at(self, z_new, shape=None):
        z_new = np.asarray(z_new, dtype=np.float64)
        usable, _ = self._outside(z_new)
        return (-2.5 * (1.0 + self.alpha) / LN10) * np.log1p(np.where(usable, z_new, np.nan))


def power_law_colours(filt_p: Filter, filt_q: Filter, alphas: np.ndarray) -> np.ndarray:
    """Synthetic AB colour m_p - m_q of f_nu ~ nu^alpha, for each alpha.

    Maggies of a power law through a photon-counting filter are proportional to
    ``int lambda^(-alpha) R(lambda) dlambda / lambda`` divided by ``int R dlambda / lambda``
    (Hogg et al. 2002 eq. 2 with f_nu ~ nu^alpha). Both by Simpson's rule with two panels in
    every interval of the filter table, so R is linear inside each panel.
    """
    def log_maggies(f: Filter) -> np.ndarray:
        nz = np.flatnonzero(f.value > 0)
        lo, hi = max(nz[0] - 1, 0), min(nz[-1] + 1, len(f.wave) - 1)
        fw, fr = f.wave[lo:hi + 1], f.value[lo:hi + 1]
        sub = 4
        t = np.linspace(0.0, 1.0, sub + 1)[:-1]
        x = np.append((fw[:-1, None] + np.diff(fw)[:, None] * t[None, :]).ravel(), fw[-1])
        # Simpson weights h/3 (1, 4, 1) on each panel (x_2k, x_2k+1, x_2k+2).
        panel_h = np.repeat(np.diff(fw) / sub, sub)[0::2]
        wt = np.zeros_like(x)
        wt[0:-1:2] += panel_h / 3.0
        wt[1::2] += 4.0 * panel_h / 3.0
        wt[2::2] += panel_h / 3.0
        wt *= np.interp(x, fw, fr) / x
        wt /= wt.sum()
        lnx = np.log(x / f.pivot_A)
        out = np.empty(alphas.size)
        step = max(1, 2_000_000 // x.size)
        for i in range(0, alphas.size, step):
            a = alphas[i:i + step]
            e = -a[:, None] * lnx[None, :]
            top = e.max(axis=1, keepdims=True)
            out[i:i + a.size] = top[:, 0] + np.log(np.exp(e - top) @ wt)
        return out - alphas * math.log(f.pivot_A)

    return -2.5 / LN10 * (log_maggies(filt_p) - log_maggies(filt_q))


@dataclass(kw_only=True)
class PowerLawFromColour(Method):
    """Power law whose slope reproduces the observed colour m_p - m_q."""

    colour: tuple[str, str]
    colour_grid: Grid  # colour_min + k * step -> alpha (uniform in colour)
    colour_min: float
    alphas_on_grid: np.ndarray
    alpha_range: tuple[float, float]
    z_max: float = math.inf
    kind: ClassVar[str] = "power_law_colour"

    @classmethod
    def build(cls, colour: tuple[str, str], filt_p: Filter, filt_q: Filter,
              alpha_range: tuple[float, float], z_max: float, key: str) -> "PowerLawFromColour":
        a_lo, a_hi = alpha_range
        alphas = np.linspace(a_lo, a_hi, int(round((a_hi - a_lo) / 0.01)) + 1)
        colours = power_law_colours(filt_p, filt_q, alphas)
        step = np.diff(colours)
        if not (np.all(step > 0) or np.all(step < 0)):
            raise ConfigError(
                f"{key}: the colour {colour[0]} - {colour[1]} (filters {filt_p.path} and "
                f"{filt_q.path}) does not change monotonically with the power-law slope over "
                f"alpha = {a_lo:g} to {a_hi:g}, so it cannot determine the slope; use two "
                f"bands that do not overlap"
            )
        if step[0] < 0:
            colours, alphas = colours[::-1], alphas[::-1]
        # Resample alpha(colour) on a uniform colour grid: one gather per row, no search.
        n = 8 * len(alphas) + 1
        c_lo, c_hi = float(colours[0]), float(colours[-1])
        grid_c = np.linspace(c_lo, c_hi, n)
        alpha_of_c = np.interp(grid_c, colours, alphas)
        return cls(colour=colour, colour_grid=Grid(c_hi - c_lo, n), colour_min=c_lo,
                   alphas_on_grid=alpha_of_c, alpha_range=(a_lo, a_hi), z_max=z_max)

    def flag_suffixes(self):
        out = super().flag_suffixes()
        p, q = self.colour
        c_hi = self.colour_min + self.colour_grid.z_max
        out[COLOUR_OUTSIDE] = (
            f"The colour {p} - {q} lies outside {self.colour_min:.3f} to {c_hi:.3f}, the "
            f"colours of power laws with slopes {self.alpha_range[0]:g} to "
            f"{self.alpha_range[1]:g}: null K-correction and absolute magnitude.")
        return out

    def describe(self) -> str:
        p, q = self.colour
        return (f"power law f_nu ~ nu^alpha with alpha per object from the colour {p} - {q} "
                f"(K = -2.5 (1 + alpha) log10(1 + z), Hogg et al. 2002)")

    def alpha(self, colour: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Slope per row (NaN outside the tabulated colours) and the outside mask."""
        idx, frac, inside = self.colour_grid.locate(colour - self.colour_min)
        slopes = np.diff(self.alphas_on_grid)
        a = self.alphas_on_grid[idx] + frac * slopes[idx]
        a[~inside] = np.nan
        return a, np.isfinite(colour) & ~inside

    def evaluate(self, z, colour):
        usable, outside = self._outside(z)
        alpha, colour_out = self.alpha(colour)
        k = -2.5 / LN10 * (1.0 + alpha) * np.log1p(np.where(usable, z, np.nan))
        return k, {OUTSIDE_Z: outside, COLOUR_MISSING: ~np.isfinite(colour),
                   COLOUR_OUTSIDE: colour_out}

    def derivatives(self, z, colour):
        alpha, _ = self.alpha(colour)
        idx, _, _ = self.colour_grid.locate(colour - self.colour_min)
        dalpha_dc = np.diff(self.alphas_on_grid)[idx] / self.colour_grid.step
        with np.errstate(invalid="ignore"):
            dkdz = -2.5 / LN10 * (1.0 + alpha) / (1.0 + z)
            dkdc = -2.5 / LN10 * np.log1p(z) * dalpha_dc
        return dkdz, dkdc

    def shape(self, z, colour):
        """The slope alpha of each object's power law (NaN outside the tabulated colours)."""
        alpha, _ = self.alpha(colour)
        return alpha

    def k_at(self, z_new, shape):
        z_new = np.asarray(z_new, dtype=np.float64)
        alpha = _per_row(shape, z_new)
        usable, _ = self._outside(z_new)
        return -2.5 / LN10 * (1.0 + alpha) * np.log1p(np.where(usable, z_new, np.nan))


# ------------------------------------------------------------------------- templates
def _shape_maggies(sed: Curve, filt: Filter, z: np.ndarray) -> np.ndarray:
    """AB maggies of the SED (its own scale) observed at each z through the filter."""
    return ab_maggies(sed.wave, sed.value, filt.wave, filt.value, z)


def _check_flux(values: np.ndarray, grid_z: np.ndarray, sed: Curve, filt: Filter,
                key: str) -> None:
    bad = ~(values > 0)
    if np.any(bad):
        zb = grid_z[np.flatnonzero(bad)] if grid_z.size == values.size else grid_z
        raise ConfigError(
            f"{key}: SED {sed.path} gives no flux through filter {filt.path} at "
            f"z = {zb.min():.4g} to {zb.max():.4g} (the SED is zero over the whole "
            f"redshifted band there), so no K-correction exists; lower z_max or use an SED "
            f"without a gap"
        )


@dataclass(kw_only=True)
class Template(Method):
    """One SED through the band's filter (and rest-frame filter) by synthetic photometry."""

    table: Tabulated  # one function: K(z)
    sed_path: str
    z_max: float
    kind: ClassVar[str] = "template"

    @classmethod
    def build(cls, sed: Curve, filt: Filter, rest: Filter, z_max: float, key: str,
              tolerance: float) -> "Template":
        rest_maggies = float(_shape_maggies(sed, rest, np.zeros(1))[0])
        _check_flux(np.array([rest_maggies]), np.zeros(1), sed, rest, key)

        def k_of_z(z: np.ndarray) -> np.ndarray:
            m = _shape_maggies(sed, filt, z)
            _check_flux(m, z, sed, filt, key)
            return -2.5 * np.log10(m / rest_maggies)

        parts = {"method": cls.kind, "sed": sed, "filter": filt, "rest": rest, "z_max": z_max,
                 "tolerance": tolerance}
        table = cached_table(parts, lambda: tabulate([k_of_z], z_max, error=_mag_error,
                                                     tolerance=tolerance))
        return cls(table=table, sed_path=sed.path, z_max=z_max)

    def describe(self) -> str:
        return (f"template SED {self.sed_path} by synthetic photometry (Hogg et al. 2002 "
                f"eq. 9), tabulated at {self.table.grid.n} redshifts on 0 <= z <= "
                f"{self.z_max:g} (interpolation error <= {self.table.max_error:.1e} mag)")

    def evaluate(self, z, colour=None):
        idx, frac, inside = self.table.grid.locate(z)
        k = self.table.at(0, idx, frac)
        k[~inside] = np.nan
        return k, {OUTSIDE_Z: np.isfinite(z) & ~inside}

    def derivatives(self, z, colour=None):
        idx, frac, _ = self.table.grid.locate(z)
        return self.table.derivative(0, idx, frac), np.zeros_like(z)

    def k_at(self, z_new, shape=None):
        z_new = np.array(z_new, dtype=np.float64)
        idx, frac, inside = self.table.grid.locate(z_new)
        k = self.table.at(0, idx, frac)
        k[~inside] = np.nan
        return k


@dataclass
class MixSolution:
    """What :meth:`TemplateMix.solve` found for a batch: reused by :meth:`TemplateMix.evaluate`
    and :meth:`TemplateMix.derivatives` so the weights are found once per batch."""

    idx: np.ndarray
    frac: np.ndarray
    inside: np.ndarray  # 0 <= z <= z_max
    fluxes: dict  # filter role ("r", "p", "q") -> (F^A, F^B) at each row
    rho: np.ndarray  # 10^(-0.4 c)
    w: np.ndarray  # weight of template B, in [0, 1]; NaN where refused
    free: np.ndarray  # the colour lies between the templates' (w solved, not clamped)
    clipped: np.ndarray  # beyond a template's colour by <= clip_tolerance_mag: its K
    outside: np.ndarray  # beyond by more: null K
    degenerate: np.ndarray  # both templates have the same colour here: null K
    insensitive: np.ndarray  # K spread over the colour's +-1 sigma above the bound; null K
    spread: np.ndarray  # |K(c + sigma) - K(c - sigma)| (mag)
    missing: np.ndarray  # no colour

    @property
    def sensitivity(self) -> np.ndarray:
        """dK/dc at the mixture found (NaN where there is none): (dK/dw) / (dc/dw) =
        (dF_R / F_R) / (dF_p / F_p - dF_q / F_q) at w (only when asked: a check, not a column).
        """
        (a_r, b_r), (a_p, b_p), (a_q, b_q) = (self.fluxes[k] for k in ("r", "p", "q"))
        w = self.w
        with np.errstate(invalid="ignore", divide="ignore"):
            d_r, d_p, d_q = b_r - a_r, b_p - a_p, b_q - a_q
            return (d_r / (a_r + w * d_r)) / (d_p / (a_p + w * d_p) - d_q / (a_q + w * d_q))


@dataclass(kw_only=True)
class TemplateMix(Method):
    """Per object, the mixture (1 - w) A + w B (0 <= w <= 1) of two SEDs, each scaled to unit
    rest-frame flux in the rest-frame band, whose synthetic colour m_p - m_q at the object's
    redshift equals the observed one.

    Synthetic fluxes are linear in the SED, so with tabulated fluxes F_X^A(z), F_X^B(z) of both
    templates in every filter X the colour condition
    ``F_p(w) / F_q(w) = 10^(-0.4 c)`` is linear in w and solves in closed form:
    ``w = a / (a - b)``, ``a = F_p^A - rho F_q^A``, ``b = F_p^B - rho F_q^B``.

    The mixture's colour ``c(w) = -2.5 log10((F_p^A + w dF_p) / (F_q^A + w dF_q))`` is a ratio
    of two linear functions of w, positive on 0 <= w <= 1, so its derivative
    ``dc/dw ~ -(dF_p F_q^A - dF_q F_p^A) / (F_p(w) F_q(w))`` has one sign there: the colour is
    strictly monotonic in w from template A's colour to template B's, unless the two colours
    are equal (then it is constant and the colour cannot choose a mixture: refused, flag
    ``colour_degenerate``). So the observed colour is placed by comparing it with the two
    templates' colours at its redshift (never by the sign of w, which wraps through infinity
    for colours beyond the templates'):

    * between them: w solved, K of the mixture;
    * beyond the nearer template's colour by at most the tolerance -- ``clip_tolerance_mag``,
      or ``clip_tolerance_sigma`` times the colour's own error when the annotator has the
      magnitude errors, whichever is larger: that template's K, flagged ``colour_clipped``
      (the value is kept: photometric noise alone scatters about half of the objects of the
      bluest and of the reddest type a little beyond them);
    * beyond it by more: null K and absolute magnitude, flag ``colour_outside_range`` (no
      extrapolated or end-member K is ever returned unflagged);
    * where the colour cannot fix K: the K of the mixtures matching the colour plus and
      minus its error (the annotator's magnitude errors in quadrature, else
      ``assumed_colour_error_mag``; each clamped to the templates' range) differ by more
      than ``max_kcorrection_spread_mag``: null K, flag ``colour_insensitive``. The local
      slope ``dK/dc = (dF_R / F_R) / (dF_p / F_p - dF_q / F_q)`` shows why: with the demo
      survey's early and star-forming templates and amber - infrared it exceeds 10 mag per
      mag near the star-forming end at z ~ 2, where the early template adds infrared light
      but almost no observed amber light, so a colour error of a tenth of a magnitude moves
      K by magnitudes.
    """

    colour: tuple[str, str]
    table: Tabulated  # per distinct filter u: A_u, B_u (maggies, unit rest-frame flux)
    columns: tuple[int, int, int]  # distinct-filter index of R, p and q
    sed_paths: tuple[str, str]
    z_max: float
    clip_tolerance_mag: float = 0.1
    #: Templates whose colours differ by less than this (mag) do not determine a mixture.
    degenerate_mag: float = 1e-3
    #: A colour this close (mag) to a template's is taken as that template's, unflagged.
    on_template_mag: float = 1e-4
    max_k_spread_mag: float = DEFAULT_MAX_K_SPREAD_MAG
    assumed_colour_error_mag: float = DEFAULT_ASSUMED_COLOUR_ERROR_MAG
    clip_tolerance_sigma: float = 2.0
    kind: ClassVar[str] = "template_mix"

    def __post_init__(self) -> None:
        self._last = threading.local()

    # The per-thread memo of the last batch's weights is not sent to Dask workers.
    def __getstate__(self) -> dict:
        state = dict(self.__dict__)
        state.pop("_last", None)
        return state

    def __setstate__(self, state: dict) -> None:
        self.__dict__.update(state)
        self._last = threading.local()

    @classmethod
    def build(cls, seds: tuple[Curve, Curve], filt: Filter, rest: Filter,
              colour: tuple[str, str], colour_filters: tuple[Filter, Filter], z_max: float,
              key: str, tolerance: float, clip_tolerance_mag: float = 0.1,
              max_k_spread_mag: float = DEFAULT_MAX_K_SPREAD_MAG,
              clip_tolerance_sigma: float = 2.0,
              assumed_colour_error_mag: float = DEFAULT_ASSUMED_COLOUR_ERROR_MAG
              ) -> "TemplateMix":
        # The band is often one of the colour's bands (r with g - r): tabulate each distinct
        # filter once.
        distinct: list[Filter] = []
        columns = []
        for f in (filt, *colour_filters):
            same = [i for i, d in enumerate(distinct) if d.path == f.path
                    and np.array_equal(d.wave, f.wave) and np.array_equal(d.value, f.value)]
            if not same:
                distinct.append(f)
            columns.append(same[0] if same else len(distinct) - 1)

        def build_table() -> Tabulated:
            scales = []
            for sed in seds:
                rest_maggies = float(_shape_maggies(sed, rest, np.zeros(1))[0])
                _check_flux(np.array([rest_maggies]), np.zeros(1), sed, rest, key)
                scales.append(rest_maggies)
            functions = []
            for filt_x in distinct:
                for sed, scale in zip(seds, scales):
                    def f(z, sed=sed, filt_x=filt_x, scale=scale):
                        m = _shape_maggies(sed, filt_x, z)
                        _check_flux(m, z, sed, filt_x, key)
                        return m / scale

                    functions.append(f)
            return tabulate(functions, z_max, error=_maggies_error, tolerance=tolerance)

        parts = {"method": cls.kind, "seds": list(seds), "rest": rest, "filters": distinct,
                 "z_max": z_max, "tolerance": tolerance}
        table = cached_table(parts, build_table)
        return cls(colour=colour, table=table, columns=tuple(columns),
                   sed_paths=(seds[0].path, seds[1].path), z_max=z_max,
                   clip_tolerance_mag=clip_tolerance_mag,
                   max_k_spread_mag=max_k_spread_mag,
                   clip_tolerance_sigma=clip_tolerance_sigma,
                   assumed_colour_error_mag=assumed_colour_error_mag)

    def flag_suffixes(self):
        out = super().flag_suffixes()
        p, q = self.colour
        out[COLOUR_CLIPPED] = (
            f"The colour {p} - {q} lies beyond both templates' colours at this redshift, by "
            f"at most {self.clip_tolerance_mag:g} mag or {self.clip_tolerance_sigma:g} times "
            f"its error: the K-correction (kept) is that of the nearer template.")
        out[COLOUR_OUTSIDE] = (
            f"The colour {p} - {q} lies beyond the colours of both templates at this "
            f"redshift by more than {self.clip_tolerance_mag:g} mag and more than "
            f"{self.clip_tolerance_sigma:g} times its error, so no mixture of them has it: "
            f"null K-correction and absolute magnitude.")
        out[COLOUR_DEGENERATE] = (
            f"Both templates have the same colour {p} - {q} at this redshift (within "
            f"{self.degenerate_mag:g} mag), so the colour cannot choose a mixture: null "
            f"K-correction and absolute magnitude.")
        out[COLOUR_INSENSITIVE] = (
            f"At this redshift the K-corrections of the mixtures matching {p} - {q} plus and "
            f"minus its error (or {self.assumed_colour_error_mag:g} mag) differ by more than "
            f"{self.max_k_spread_mag:g} mag (the colour hardly depends on the mixture while "
            f"K does), so the colour cannot fix K: null K-correction and absolute magnitude.")
        return out

    def describe(self) -> str:
        p, q = self.colour
        return (f"per-object mixture of templates {self.sed_paths[0]} and {self.sed_paths[1]} "
                f"matching the colour {p} - {q}, by synthetic photometry (Hogg et al. 2002 "
                f"eq. 9), fluxes tabulated at {self.table.grid.n} redshifts on 0 <= z <= "
                f"{self.z_max:g}; no K for colours more than {self.clip_tolerance_mag:g} mag "
                f"beyond both templates' or where K over the colour's +-1 sigma spans more "
                f"than {self.max_k_spread_mag:g} mag")

    def template_colours(self, z: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Synthetic colours m_p - m_q of templates A and B at each z (NaN outside the table)."""
        sol = self.solve(z, np.zeros_like(z))
        (a_p, b_p), (a_q, b_q) = sol.fluxes["p"], sol.fluxes["q"]
        with np.errstate(invalid="ignore", divide="ignore"):
            c_a = -2.5 * np.log10(a_p / a_q)
            c_b = -2.5 * np.log10(b_p / b_q)
        c_a[~sol.inside] = np.nan
        c_b[~sol.inside] = np.nan
        return c_a, c_b

    def solve(self, z: np.ndarray, colour: np.ndarray,
              colour_err: np.ndarray | None = None) -> MixSolution:
        """The mixture weight of every row and why it was or was not found (``colour_err``,
        when given, widens the clipping tolerance of each row to ``clip_tolerance_sigma``
        times it)."""
        idx, frac, inside = self.table.grid.locate(z)
        t = self.table
        r, p, q = self.columns
        got: dict[int, tuple[np.ndarray, np.ndarray]] = {}
        for u in (r, p, q):
            if u not in got:
                got[u] = (t.at(2 * u, idx, frac), t.at(2 * u + 1, idx, frac))
        fluxes = {"r": got[r], "p": got[p], "q": got[q]}
        (a_p, b_p), (a_q, b_q) = fluxes["p"], fluxes["q"]
        rho = np.exp((-0.4 * LN10) * colour)
        missing = ~np.isfinite(colour)
        with np.errstate(invalid="ignore", divide="ignore"):
            # Ratios F_p / F_q of the templates and of the object (no logarithm per row):
            # the object lies between the templates when rho lies between their ratios.
            ra, rb = a_p / a_q, b_p / b_q
            lo, hi = np.minimum(ra, rb), np.maximum(ra, rb)
            degenerate = inside & ~missing & ~(hi > lo * 10.0 ** (0.4 * self.degenerate_mag))
            # A colour on a template's own (to the tables' accuracy) is that template.
            slack = 10.0 ** (0.4 * self.on_template_mag)
            free = (rho >= lo / slack) & (rho <= hi * slack) & ~degenerate
            a = a_p - rho * a_q
            b = b_p - rho * b_q
            w = a / (a - b)
        np.clip(w, 0.0, 1.0, out=w)
        # Beyond the templates: the nearer one in colour (ratios compared in magnitudes).
        beyond = inside & ~missing & ~free & ~degenerate
        clipped = np.zeros_like(beyond)
        outside = np.zeros_like(beyond)
        if beyond.any():
            rows = np.flatnonzero(beyond)
            rr = rho[rows]
            da = np.abs(np.log(rr / ra[rows]))
            db = np.abs(np.log(rr / rb[rows]))
            to_b = db < da
            w[rows] = np.where(to_b, 1.0, 0.0)
            gap = np.minimum(da, db) * (2.5 / LN10)
            tol = np.full(rows.size, self.clip_tolerance_mag)
            if colour_err is not None:
                with np.errstate(invalid="ignore"):
                    tol = np.fmax(tol, self.clip_tolerance_sigma * colour_err[rows])
            near = gap <= tol
            clipped[rows] = near
            outside[rows] = ~near
        w[~inside | missing | outside | degenerate] = np.nan
        (a_r, b_r) = fluxes["r"]
        d_r = b_r - a_r
        with np.errstate(invalid="ignore", divide="ignore"):
            # K of the mixtures matching the colour -+ its error (weights clamped by colour)
            sigma = np.full(z.shape, self.assumed_colour_error_mag)
            if colour_err is not None:
                sigma = np.where(np.isfinite(colour_err) & (colour_err >= 0), colour_err,
                                 sigma)
            shift = np.exp((0.4 * LN10) * sigma)

            def flux_at(rho_x):
                """The mixture's band flux N = F_R^A + w_x (F_R^B - F_R^A) at ratio rho_x."""
                a_x = a_p - rho_x * a_q
                w_x = a_x / (a_x - (b_p - rho_x * b_q))
                np.clip(w_x, 0.0, 1.0, out=w_x)
                off = np.flatnonzero(~((rho_x >= lo) & (rho_x <= hi)))  # beyond: nearer end
                if off.size:
                    r_off = rho_x[off]
                    w_x[off] = np.where(np.abs(np.log(r_off / ra[off]))
                                        <= np.abs(np.log(r_off / rb[off])), 0.0, 1.0)
                return a_r + w_x * d_r

            # |K(+) - K(-)| = 2.5 |log10(N+ / N-)|: one logarithm per row
            spread = (2.5 / LN10) * np.abs(np.log(flux_at(rho * shift) / flux_at(rho / shift)))
            insensitive = np.isfinite(w) & ~(spread <= self.max_k_spread_mag)
        w[insensitive] = np.nan
        clipped &= ~insensitive
        return MixSolution(idx=idx, frac=frac, inside=inside, fluxes=fluxes, rho=rho, w=w,
                           free=free & inside & ~missing & ~insensitive, clipped=clipped,
                           outside=outside, degenerate=degenerate, missing=missing,
                           insensitive=insensitive, spread=spread)

    def _solution(self, z: np.ndarray, colour: np.ndarray,
                  colour_err: np.ndarray | None = None) -> MixSolution:
        """:meth:`solve`, reusing this thread's last solution for the very same arrays (the
        annotator calls :meth:`evaluate` then :meth:`derivatives` on one batch)."""
        last = getattr(self._last, "value", None)
        if last is not None and last[0] is z and last[1] is colour and \
                (colour_err is None or last[2] is colour_err):
            return last[3]
        sol = self.solve(z, colour, colour_err)
        self._last.value = (z, colour, colour_err, sol)
        return sol

    def release(self) -> None:
        self._last.value = None

    def weights(self, z: np.ndarray, colour: np.ndarray):
        """Mixture weight w of template B per row (NaN where refused), the rows flagged
        ``colour_clipped``, the rows inside the table, and the band's fluxes of both
        templates."""
        sol = self._solution(z, colour)
        a_r, b_r = sol.fluxes["r"]
        return sol.w, sol.clipped, sol.inside, a_r, b_r

    def evaluate(self, z, colour, colour_err=None):
        sol = self._solution(z, colour, colour_err)
        a_r, b_r = sol.fluxes["r"]
        # Both templates have unit rest-frame flux in Q, so the mixture's is 1 and
        # K = m_R(z) - m_Q(0) = -2.5 log10 of its observed maggies (which already carry the
        # 1 / (1 + z) of the redshifted spectrum, see synthetic.py).
        with np.errstate(invalid="ignore", divide="ignore"):
            k = -2.5 * np.log10(a_r + sol.w * (b_r - a_r))
        k[~np.isfinite(k)] = np.nan
        return k, {OUTSIDE_Z: np.isfinite(z) & ~sol.inside, COLOUR_MISSING: sol.missing,
                   COLOUR_CLIPPED: sol.clipped, COLOUR_OUTSIDE: sol.outside,
                   COLOUR_DEGENERATE: sol.degenerate, COLOUR_INSENSITIVE: sol.insensitive}

    def derivatives(self, z, colour):
        """dK/dz and dK/dc in closed form from the tabulated fluxes and their z-derivatives:
        with a = F_p^A - rho F_q^A, b = F_p^B - rho F_q^B, w = a / (a - b),
        dw = (a db - b da) / (a - b)^2, N = F_R^A + w (F_R^B - F_R^A), dK = -2.5 dN / (N ln 10);
        a clipped w does not move (dw = 0). The weights come from :meth:`solve` (once)."""
        sol = self._solution(z, colour)
        t = self.table
        r, p, q = self.columns
        idx, frac = sol.idx, sol.frac
        d = {u: (t.derivative(2 * u, idx, frac), t.derivative(2 * u + 1, idx, frac))
             for u in {r, p, q}}
        (a_r, b_r), (a_p, b_p), (a_q, b_q) = sol.fluxes["r"], sol.fluxes["p"], sol.fluxes["q"]
        (da_r, db_r), (da_p, db_p), (da_q, db_q) = d[r], d[p], d[q]
        rho, w = sol.rho, sol.w
        with np.errstate(invalid="ignore", divide="ignore"):
            a = a_p - rho * a_q
            b = b_p - rho * b_q
            inv = np.where(sol.free, 1.0 / (a - b) ** 2, 0.0)
            drho = (-0.4 * LN10) * rho
            dw_dc = (a * (-drho * b_q) - b * (-drho * a_q)) * inv
            dw_dz = (a * (db_p - rho * db_q) - b * (da_p - rho * da_q)) * inv
            n = a_r + w * (b_r - a_r)
            scale = -2.5 / (LN10 * n)
            dkdz = scale * (da_r + w * (db_r - da_r) + (b_r - a_r) * dw_dz)
            dkdc = scale * (b_r - a_r) * dw_dc
        return dkdz, dkdc

    def shape(self, z, colour):
        """Each object's mixing weight w of template B (as used by :meth:`evaluate`, so
        clipped to [0, 1]); NaN where the colour is missing or z is outside the table."""
        w, _, inside, _, _ = self.weights(z, colour)
        w = np.array(w, dtype=np.float64)
        w[~inside | ~np.isfinite(colour)] = np.nan
        return w

    def k_at(self, z_new, shape):
        """K of the fixed mixture (1 - w) A + w B at new redshifts: both templates have unit
        rest-frame flux, so K = -2.5 log10((1 - w) A_R(z') + w B_R(z'))."""
        z_new = np.array(z_new, dtype=np.float64)
        w = _per_row(shape, z_new)
        idx, frac, inside = self.table.grid.locate(z_new)
        r = self.columns[0]
        a_r = self.table.at(2 * r, idx, frac)
        b_r = self.table.at(2 * r + 1, idx, frac)
        with np.errstate(invalid="ignore", divide="ignore"):
            k = -2.5 * np.log10(a_r + w * (b_r - a_r))
        k[~inside] = np.nan
        return k


# ------------------------------------------------------------------------ polynomial
@dataclass(kw_only=True)
class Polynomial(Method):
    """``K(z, c) = sum_x sum_y a[x][y] z^x c^y`` (Chilingarian et al. 2010, eq. 1)."""

    colour: tuple[str, str]
    coefficients: np.ndarray  # (powers of z, powers of colour)
    z_max: float
    colour_range: tuple[float, float] | None = None
    kind: ClassVar[str] = "polynomial"

    def flag_suffixes(self):
        out = super().flag_suffixes()
        if self.colour_range is not None:
            p, q = self.colour
            lo, hi = self.colour_range
            out[COLOUR_OUTSIDE] = (f"The colour {p} - {q} lies outside {lo:g} to {hi:g}, where "
                                   f"the polynomial is valid: null K-correction and absolute "
                                   f"magnitude.")
        return out

    def describe(self) -> str:
        p, q = self.colour
        nx, ny = self.coefficients.shape
        return (f"polynomial K = sum a_xy z^x ({p} - {q})^y, x < {nx}, y < {ny} "
                f"(form of Chilingarian, Melchior & Zolotukhin 2010), valid for "
                f"0 <= z <= {self.z_max:g}")

    def _valid(self, z, colour):
        usable, outside = self._outside(z)
        missing = ~np.isfinite(colour)
        flags = {OUTSIDE_Z: outside, COLOUR_MISSING: missing}
        ok = usable & ~missing
        if self.colour_range is not None:
            lo, hi = self.colour_range
            with np.errstate(invalid="ignore"):
                out_c = ~missing & ((colour < lo) | (colour > hi))
            flags[COLOUR_OUTSIDE] = out_c
            ok &= ~out_c
        return ok, flags

    def evaluate(self, z, colour):
        ok, flags = self._valid(z, colour)
        k = _polyval2d(z, colour, self.coefficients)
        k[~ok] = np.nan
        return k, flags

    def derivatives(self, z, colour):
        a = self.coefficients
        dz = np.arange(a.shape[0])[:, None] * a
        dc = np.arange(a.shape[1])[None, :] * a
        return (_polyval2d(z, colour, dz[1:]) if a.shape[0] > 1 else np.zeros_like(z),
                _polyval2d(z, colour, dc[:, 1:]) if a.shape[1] > 1 else np.zeros_like(z))

    def shape(self, z, colour):
        """The observed colour, HELD FIXED: a polynomial in (z, colour) says nothing about
        how an object's colour would change with redshift, so K(z') is the polynomial at z'
        and the colour observed at z (an approximation; NaN where the colour is missing or
        outside colour_range)."""
        c = np.array(colour, dtype=np.float64)
        if self.colour_range is not None:
            lo, hi = self.colour_range
            with np.errstate(invalid="ignore"):
                c[(c < lo) | (c > hi)] = np.nan
        return c

    def k_at(self, z_new, shape):
        z_new = np.array(z_new, dtype=np.float64)
        c = np.broadcast_to(_per_row(shape, z_new), z_new.shape).copy()
        usable, _ = self._outside(z_new)
        k = _polyval2d(z_new, c, self.coefficients)
        k[~usable | ~np.isfinite(c)] = np.nan
        return k


def _per_row(shape: np.ndarray, z_new: np.ndarray) -> np.ndarray:
    """A per-object parameter shaped to broadcast against z_new of shape (n,) or (n, m)."""
    shape = np.asarray(shape, dtype=np.float64)
    return shape[:, None] if z_new.ndim == 2 and shape.ndim == 1 else shape


def _polyval2d(z: np.ndarray, c: np.ndarray, a: np.ndarray) -> np.ndarray:
    """Horner's rule in z of Horner's rules in c (few passes over the rows, no powers)."""
    out = np.zeros_like(z)
    for row in a[::-1]:
        inner = np.full_like(c, row[-1])
        for coef in row[-2::-1]:
            inner *= c
            inner += coef
        out *= z
        out += inner
    return out
