"""Filter curves and SEDs read and checked before any row is read; K(z) tables on a uniform grid.

Every check names the job-file key (``[bands.r].filter``), the file, and what would be valid.
A table is tabulated once per job and then evaluated for whole batches by a single gather
on a uniform redshift grid (no search), which is what makes millions of rows per second.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field

import numpy as np

from annotator.errors import ConfigError

from .synthetic import filter_support, pivot_wavelength

#: Default accuracy of a K table: the largest difference, in magnitudes, between linear
#: interpolation on the grid and the directly computed value at the grid midpoints.
DEFAULT_TOLERANCE_MAG = 1e-4
#: The coarsest grid step tried first, and the most grid points a table may take.
START_STEP = 0.02
MAX_POINTS = 1 << 17
#: When an SED covers a filter to a very high redshift, tabulate no further than this unless
#: ``z_max`` asks for more.
DEFAULT_Z_CAP = 10.0


@dataclass(frozen=True)
class Curve:
    """A validated two-column table: wavelength in Angstrom and a non-negative value."""

    wave: np.ndarray
    value: np.ndarray
    path: str  # as given in the job file (messages)
    key: str  # job-file key it came from (messages)

    @property
    def first(self) -> float:
        return float(self.wave[0])

    @property
    def last(self) -> float:
        return float(self.wave[-1])


@dataclass(frozen=True)
class Filter(Curve):
    """A photon-counting filter curve."""

    support: tuple[float, float] = (0.0, 0.0)
    pivot_A: float = 0.0


def _check_curve(table: np.ndarray, *, key: str, path: str, kind: str,
                 value_name: str) -> tuple[np.ndarray, np.ndarray]:
    if table.shape[1] != 2:
        raise ConfigError(
            f"{key}: {path} has {table.shape[1]} columns; a {kind} has exactly 2 "
            f"(wavelength in Angstrom, {value_name})"
        )
    if table.shape[0] < 2:
        raise ConfigError(f"{key}: {path} has {table.shape[0]} data row; a {kind} needs at "
                          f"least 2")
    wave, value = table[:, 0].copy(), table[:, 1].copy()
    bad = np.flatnonzero(wave <= 0)
    if bad.size:
        raise ConfigError(f"{key}: {path} data row {bad[0] + 1}: wavelength {wave[bad[0]]:g} "
                          f"is not positive (wavelengths are in Angstrom)")
    step = np.diff(wave)
    bad = np.flatnonzero(step <= 0)
    if bad.size:
        i = bad[0] + 1
        raise ConfigError(
            f"{key}: {path} is not sorted: data row {i + 1} has wavelength {wave[i]:g} after "
            f"{wave[i - 1]:g} in row {i}; wavelengths must strictly increase"
        )
    bad = np.flatnonzero(value < 0)
    if bad.size:
        raise ConfigError(
            f"{key}: {path} data row {bad[0] + 1} (wavelength {wave[bad[0]]:g} A): "
            f"{value_name} {value[bad[0]]:g} is negative; it must be >= 0"
        )
    if not np.any(value > 0):
        raise ConfigError(f"{key}: {path}: the {value_name} is zero everywhere")
    return wave, value


def load_filter(setup, path: str, key: str) -> Filter:
    """Read and check a filter file (wavelength in Angstrom, photon-counting response)."""
    if not isinstance(path, str) or not path:
        raise setup.error(key, f"expected the path of a filter file, got {path!r}")
    table = setup.read_table(path, what=f"{key} ({path})")
    wave, resp = _check_curve(table, key=key, path=path, kind="filter curve",
                              value_name="response")
    return Filter(wave, resp, path, key, support=filter_support(wave, resp),
                  pivot_A=pivot_wavelength(wave, resp))


def load_sed(setup, path: str, key: str) -> Curve:
    """Read and check an SED file (rest-frame wavelength in Angstrom, f_lambda in any scale)."""
    if not isinstance(path, str) or not path:
        raise setup.error(key, f"expected the path of an SED file, got {path!r}")
    table = setup.read_table(path, what=f"{key} ({path})")
    wave, flam = _check_curve(table, key=key, path=path, kind="SED",
                              value_name="f_lambda")
    return Curve(wave, flam, path, key)


def covered_redshifts(sed: Curve, filt: Filter) -> tuple[float, float]:
    """The redshifts at which the SED, shifted by (1 + z), covers the filter's support.

    Covered iff ``sed.first (1 + z) <= support_lo`` and ``sed.last (1 + z) >= support_hi``.
    Returns ``(z_lo, z_hi)``; empty when ``z_lo > z_hi``.
    """
    lo, hi = filt.support
    return hi / sed.last - 1.0, lo / sed.first - 1.0


def check_coverage(sed: Curve, filt: Filter, z_max: float, *, band_key: str,
                   rest_frame: bool = False) -> None:
    """Error unless the SED covers the filter at every redshift of [0, z_max] (or z = 0)."""
    z_lo, z_hi = covered_redshifts(sed, filt)
    top = 0.0 if rest_frame else z_max
    if z_lo <= 0.0 and z_hi >= top:
        return
    lo, hi = filt.support
    frame = "in the rest frame (z = 0)" if rest_frame else \
        f"redshifted over z = 0 to {z_max:g}"
    if z_lo > z_hi or z_hi < 0 or z_lo > top:
        covers = "at no redshift in that range"
    else:
        covers = f"only for z = {max(z_lo, 0):.4g} to {min(z_hi, top):.4g}"
    fails, advice = [], []
    if z_lo > 0:
        fails.append(f"z < {z_lo:.4g} (the SED ends at {sed.last:g} A, the filter reaches "
                     f"{hi:g} A)")
        advice.append("extend the SED to the red")
    if z_hi < top:
        fails.append(f"z > {max(z_hi, 0):.4g} (the SED starts at {sed.first:g} A, the filter "
                     f"starts at {lo:g} A)")
        advice.append(f"lower z_max to {max(z_hi, 0):.4g} or extend the SED to the blue"
                      if not rest_frame else "extend the SED to the blue")
    raise ConfigError(
        f"{band_key}: SED {sed.path} ({sed.first:g}-{sed.last:g} A) does not cover filter "
        f"{filt.path} ({lo:g}-{hi:g} A) {frame}: it covers it {covers}; it fails for "
        f"{' and '.join(fails)}; {' and '.join(advice)}"
    )


def default_z_max(pairs: Sequence[tuple[Curve, Filter]]) -> float:
    """The highest redshift up to which every SED covers its filter (capped)."""
    z = DEFAULT_Z_CAP
    for sed, filt in pairs:
        z = min(z, covered_redshifts(sed, filt)[1])
    return z


@dataclass
class Grid:
    """A uniform redshift grid ``z_k = k * step`` for k = 0 .. n - 1, ``z_{n-1} = z_max``."""

    z_max: float
    n: int

    @property
    def step(self) -> float:
        return self.z_max / (self.n - 1)

    @property
    def z(self) -> np.ndarray:
        return np.linspace(0.0, self.z_max, self.n)

    def locate(self, z: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """Cell index, fraction within the cell, and where z lies inside [0, z_max].

        Rows outside (and NaN) get an index clamped into the table and a meaningless fraction;
        callers null them with ``inside``.
        """
        with np.errstate(invalid="ignore"):
            inside = (z >= 0.0) & (z <= self.z_max)
            t = z * ((self.n - 1) / self.z_max)
            idx = t.astype(np.intp)  # NaN and huge values cast to some integer, clamped next
        np.clip(idx, 0, self.n - 2, out=idx)
        t -= idx
        return idx, t, inside


@dataclass
class Tabulated:
    """Values of several functions of z on one grid, linearly interpolated."""

    grid: Grid
    values: np.ndarray  # (functions, n)
    slopes: np.ndarray = field(init=False)  # (functions, n - 1): per-cell differences
    max_error: float = 0.0  # largest midpoint error measured while refining
    _knot_slopes: np.ndarray | None = field(default=None, init=False, repr=False)

    def __post_init__(self) -> None:
        self.slopes = np.diff(self.values, axis=1)

    def at(self, k: int, idx: np.ndarray, frac: np.ndarray) -> np.ndarray:
        return self.values[k][idx] + frac * self.slopes[k][idx]

    def derivative(self, k: int, idx: np.ndarray, frac: np.ndarray) -> np.ndarray:
        """d/dz of function k: central differences at the knots, linearly interpolated
        (second-order accurate, unlike the piecewise-constant slope of the interpolant)."""
        if self._knot_slopes is None:
            v = self.values
            d = np.empty_like(v)
            d[:, 1:-1] = (v[:, 2:] - v[:, :-2]) / 2.0
            d[:, 0] = v[:, 1] - v[:, 0]
            d[:, -1] = v[:, -1] - v[:, -2]
            self._knot_slopes = d / self.grid.step
        d = self._knot_slopes[k]
        return d[idx] + frac * (d[idx + 1] - d[idx])


def tabulate(functions: Sequence[Callable[[np.ndarray], np.ndarray]], z_max: float, *,
             error: Callable[[np.ndarray, np.ndarray], np.ndarray],
             tolerance: float = DEFAULT_TOLERANCE_MAG) -> Tabulated:
    """Tabulate functions of z on a uniform grid over [0, z_max], halving the step until
    linear interpolation is within ``tolerance`` (measured by ``error(interpolated, exact)``
    at every cell midpoint, which then join the grid) or the grid reaches MAX_POINTS."""
    n = max(3, int(math.ceil(z_max / START_STEP)) + 1)
    z = np.linspace(0.0, z_max, n)
    values = np.array([f(z) for f in functions])
    worst = math.inf
    while True:
        mids = 0.5 * (z[:-1] + z[1:])
        exact = np.array([f(mids) for f in functions])
        guess = 0.5 * (values[:, :-1] + values[:, 1:])
        worst = float(np.max(error(guess, exact)))
        merged = np.empty((values.shape[0], 2 * n - 1))
        merged[:, 0::2] = values
        merged[:, 1::2] = exact
        values, n = merged, 2 * n - 1
        z = np.linspace(0.0, z_max, n)
        # ``worst`` was measured on the coarser grid; the merged grid is finer still.
        if worst <= tolerance or 2 * n - 1 > MAX_POINTS:
            break
    return Tabulated(Grid(z_max, n), values, max_error=worst)


def ucd_band_word(pivot_A: float | None) -> str | None:
    """The IVOA UCD1+ em.* word whose wavelength range holds ``pivot_A``.

    Ranges from the UCD1+ controlled vocabulary (IVOA, list version 1.5, 2022).
    """
    if pivot_A is None or not math.isfinite(pivot_A):
        return None
    nm = pivot_A / 10.0
    ranges = [
        (10, 50, "em.UV.10-50nm"), (50, 100, "em.UV.50-100nm"),
        (100, 200, "em.UV.100-200nm"), (200, 300, "em.UV.200-300nm"),
        (300, 400, "em.opt.U"), (400, 500, "em.opt.B"), (500, 600, "em.opt.V"),
        (600, 750, "em.opt.R"), (750, 1000, "em.opt.I"),
        (1000, 1500, "em.IR.J"), (1500, 2000, "em.IR.H"), (2000, 3000, "em.IR.K"),
        (3000, 4000, "em.IR.3-4um"), (4000, 8000, "em.IR.4-8um"),
        (8000, 15000, "em.IR.8-15um"), (15000, 30000, "em.IR.15-30um"),
    ]
    for lo, hi, word in ranges:
        if lo <= nm < hi:
            return word
    return None


def cached_table(parts: dict, build: Callable[[], Tabulated]) -> Tabulated:
    """``build()``'s table, or the same table read from the on-disk cache (``cache.py``),
    keyed by the content hash of ``parts`` (curves, redshift range, settings) and the code."""
    from . import cache

    def make(values, n, z_max, max_error):
        return Tabulated(Grid(z_max, n), values, max_error=max_error)

    return cache.cached_tabulation(parts, build, make)
