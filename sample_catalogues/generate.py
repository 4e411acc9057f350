"""Catalogues of the Quillfield Deep Survey, an invented galaxy survey, of any size.

The Quillfield Deep Survey is fictional: an invented 2.4 m survey telescope on the invented
Mount Orrin, imaging a 40 deg^2 field in five invented bands (violet, cyan, amber, crimson,
infrared; curves in ``filters/``) to a flux limit of amber < 24.5 (AB).  Nothing here
describes a real survey, instrument or person.

What is drawn, per galaxy:

* a spectral type (``early``, ``intermediate``, ``starforming``; SEDs in ``seds/``) in
  proportion to its expected number in the flux-limited field;
* a redshift from that type's dN/dz = (dV_C/dz dOmega) Omega phi*(z) G(M_lim(z)) by inverse
  CDF on a grid, where the luminosity function has the form of Schechter (1976, ApJ 203, 297,
  eq. 1, in magnitudes), with luminosity evolution M*(z) = M*(0) - Q z (the form of Lin et al.
  1999, ApJ 518, 533), cut at a faint absolute magnitude ``ABSOLUTE_MAG_FAINT``, and M_lim(z)
  = m_lim - mu(z) - K(z) is the faintest absolute magnitude inside the flux limit;
* an absolute amber magnitude from the Schechter form truncated at M_lim(z) (inverse CDF);
* apparent magnitudes in every band, m = M_amber + mu(z) + K_amber->band(z), with K from
  synthetic photometry of the type's SED (Hogg et al. 2002, astro-ph/0210394, eqs. 8-13),
  computed by the K-correction plugin's ``kcorrection_curve``, so the plugin's template
  method recovers these absolute magnitudes (up to the noise);
* positions uniform on the sphere inside the field.

Then it is "observed": flux noise that grows towards each band's depth (a null magnitude for
a non-detection, below 2 sigma), a spectroscopic redshift (error 1e-4 (1 + z)) for a bright
subset and a photometric one (error 0.03 (1 + z), 2 % outliers) for the rest, 0.5 % missing
redshifts, a handful of nearby blueshifted galaxies (negative z) and, in CSV output, a handful
of malformed lines.  The selection is made on the true amber magnitude; the noise comes after.

Module use: :func:`generate` (whole files, chunked, bounded memory), :class:`SurveyModel`
(the tabulated model and :meth:`SurveyModel.draw_galaxies`), :func:`draw_photoz_pdfs` and
:func:`pdf_grid` (the photo-z posteriors).  CLI::

    python sample_catalogues/generate.py --rows N --out FILE [--format parquet|csv|csv.gz]
        [--seed S] [--cosmology PRESET] [--first-id ID] [--malformed K] [--truth] [--no-pdfs]

``--truth`` adds, in the same rows after the observed columns, ``true_z``, ``true_sed``,
``true_distance_modulus_mag``, ``true_absolute_magnitude_<band>_mag`` (rest-frame, AB) and
``true_mag_<band>`` (noiseless apparent): see :func:`truth_columns`. Malformed CSV lines stay
malformed, with the truth after them. ``--no-pdfs`` leaves out the photo-z PDFs
(:func:`draw_photoz_pdfs`); every other column is the same with or without them.
"""

from __future__ import annotations

import argparse
import gzip
import io
import json
import math
import os
import sys
import time
from dataclasses import dataclass
from functools import cached_property
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.csv as pacsv
import pyarrow.parquet as pq

if __package__ in (None, ""):  # run as a script: make the repository importable
    sys.path.insert(0, str(Path(__file__).resolve().parent.parent))

from annotator.cosmology import Cosmology, CosmologyError, preset  # noqa: E402
from annotator_plugins.kcorrection.synthetic import kcorrection_curve  # noqa: E402

HERE = Path(__file__).resolve().parent
SURVEY_NAME = "Quillfield Deep Survey"
GENERATOR_VERSION = "1.0"
DEFAULT_SEED = 20260101
DEFAULT_COSMOLOGY = "planck2018"
CHUNK_ROWS = 200_000  # part of the definition of a seed's output: do not change casually
DEFAULT_MALFORMED_LINES = 8

# -- the invented field ------------------------------------------------------------------
FIELD_RA_CENTRE_DEG = 141.25
FIELD_DEC_MIN_DEG = -10.5
FIELD_DEC_MAX_DEG = -4.5
FIELD_AREA_DEG2 = 40.0
SR_PER_DEG2 = (math.pi / 180.0) ** 2


def field_ra_width_deg() -> float:
    """RA width of the field so that the RA x Dec box covers FIELD_AREA_DEG2 on the sphere:
    area = dRA (sin dec_max - sin dec_min)."""
    band = math.sin(math.radians(FIELD_DEC_MAX_DEG)) - math.sin(math.radians(FIELD_DEC_MIN_DEG))
    return math.degrees(FIELD_AREA_DEG2 * SR_PER_DEG2 / band)


# -- the invented instrument -----------------------------------------------------------------
BANDS = ("violet", "cyan", "amber", "crimson", "infrared")
SELECTION_BAND = "amber"
SELECTION_LIMIT_MAG = 24.5
# Magnitude at which the sky noise alone gives S/N = 5 (invented depths).
DEPTH_5SIGMA_MAG = {"violet": 25.0, "cyan": 25.6, "amber": 25.4, "crimson": 25.0,
                    "infrared": 24.2}
SOURCE_NOISE_FRACTION = 0.2   # source photon noise relative to sky noise at the 5-sigma flux
CALIBRATION_FLOOR_MAG = 0.005
DETECTION_SIGMA = 2.0
MAG_PER_RELATIVE_FLUX = 2.5 / math.log(10.0)  # d(mag) = 1.0857 d(flux) / flux

# -- redshifts -----------------------------------------------------------------------------
Z_MIN, Z_MAX = 0.005, 3.0
Z_GRID_POINTS = 6000
Z_INVERSE_POINTS = 1 << 16
K_Z_RANGE, K_Z_POINTS = (-0.01, Z_MAX + 0.01), 1205  # K tables every 0.0025 in z
SPEC_Z_ERROR = 1e-4      # x (1 + z)
PHOT_Z_ERROR = 0.03      # x (1 + z)
PHOT_Z_OUTLIER_FRACTION = 0.02
MISSING_Z_FRACTION = 0.005
# Fraction with a spectroscopic redshift, by true amber magnitude (bright subset).
SPEC_FRACTION_BY_MAG = ((20.5, 0.85), (22.0, 0.5), (23.0, 0.1))
LOCAL_FRACTION = 2.5e-4  # nearby blueshifted galaxies
LOCAL_MIN_ROWS = 3
LOCAL_TYPE_FRACTIONS = (0.15, 0.35, 0.5)  # early, intermediate, starforming: mostly dwarfs

# -- photometric-redshift posteriors (invented; their own random stream) ---------------------
# Every object with a redshift gets a gridded photo-z PDF on one shared grid, uniform in
# ln(1 + z) (step 0.01, 0 <= z <= 4.0: the photo-z width grows like 1 + z), written to
# pdf_grid.csv. Invented model: a Gaussian of width PHOT_Z_ERROR (1 + z) x U(0.7, 1.4) at the
# photo-z (the catalogue redshift of photometric objects, a fresh draw for spectroscopic ones);
# PDF_BIMODAL_FRACTION of them get a secondary peak (weight U(0.10, 0.45), 1.3 x wider) at a
# confused redshift, and photometric outliers get one at their true redshift. Densities are
# scaled to a peak of 1 and rounded to PDF_DECIMALS (values below half the last digit are 0),
# which keeps the committed sample small.
PDF_LN_STEP = 0.01
PDF_NODES = 162
PDF_BIMODAL_FRACTION = 0.12
PDF_SECONDARY_WEIGHT = (0.10, 0.45)
PDF_WIDTH_SCATTER = (0.7, 1.4)
PDF_DECIMALS = 3
PDF_STREAM = 7  # spawn-key tag of the posterior stream (the catalogue's streams are untouched)
PDF_COLUMN = "photoz_pdf"
PDF_GRID_FILE = "pdf_grid.csv"


@dataclass(frozen=True)
class GalaxyType:
    """One spectral type: its SED file and its luminosity function in the amber band.

    ``m_star_h`` is M* - 5 log10 h and ``phi_star_h3`` is phi* in h^3 Mpc^-3 (h = H0 / 100);
    ``q_evolution`` is Q in M*(z) = M*(0) - Q z and ``p_evolution`` is P in
    phi*(z) = phi*(0) 10^(0.4 P z) (the luminosity and density evolution of Lin et al. 1999).
    """

    name: str
    m_star_h: float
    alpha: float
    phi_star_h3: float
    q_evolution: float
    p_evolution: float = 0.0


# Schechter parameters per type, invented for this survey.  Their sizes and the trend (early
# types brighter with a flat faint end, star-forming ones fainter with a steep one) are loosely
# after type-split luminosity functions such as Madgwick et al. 2002 (MNRAS 333, 133) and the
# all-type r-band values of Blanton et al. 2003 (ApJ 592, 819: M* - 5 log h ~ -20.4,
# alpha ~ -1.05, phi* ~ 1.5e-2 h^3 Mpc^-3), both from memory.  Q ~ 1 mag per unit z of
# brightening and P < 0 (fewer galaxies per volume in the past) use the evolution form of
# Lin et al. 1999; the values were tuned by eye to give ~40 000 galaxies per deg^2 with a median
# redshift near 0.8 at amber < 24.5, plausible for a deep field, and are not measurements.
GALAXY_TYPES = (
    GalaxyType("early", m_star_h=-20.8, alpha=-0.55, phi_star_h3=1.0e-2, q_evolution=1.0,
               p_evolution=-1.2),
    GalaxyType("intermediate", m_star_h=-20.45, alpha=-1.05, phi_star_h3=5.0e-3,
               q_evolution=1.0, p_evolution=-0.8),
    GalaxyType("starforming", m_star_h=-20.0, alpha=-1.40, phi_star_h3=3.0e-3,
               q_evolution=1.0, p_evolution=-0.8),
)
ABSOLUTE_MAG_FAINT = -13.0      # faintest galaxy drawn: M_amber in this cosmology (no h)
DELTA_MAG_BRIGHT = -6.0         # M - M* where the Schechter integrand is negligible
DELTA_MAG_STEP = 0.002
LN_FRACTION_MIN, LF_INVERSE_POINTS = -40.0, 1 << 17

COLUMN_ORDER = (["object_id", "ra", "dec", "z", "z_err", "z_type"]
                + [c for b in BANDS for c in (f"mag_{b}", f"magerr_{b}")]
                + ["sed_type", PDF_COLUMN])


def schema(pdfs: bool = True) -> pa.Schema:
    """Arrow schema of a generated catalogue (units in the field metadata)."""
    fields = [
        pa.field("object_id", pa.int64(), False, {"unit": "", "description": "object id"}),
        pa.field("ra", pa.float64(), False, {"unit": "deg", "description": "right ascension"}),
        pa.field("dec", pa.float64(), False, {"unit": "deg", "description": "declination"}),
        pa.field("z", pa.float64(), True, {"unit": "", "description": "measured redshift"}),
        pa.field("z_err", pa.float64(), True, {"unit": "", "description": "redshift error"}),
        pa.field("z_type", pa.string(), False,
                 {"unit": "", "description": "spec, phot or none (no redshift)"}),
    ]
    for band in BANDS:
        fields.append(pa.field(f"mag_{band}", pa.float32(), True,
                               {"unit": "mag", "description": f"AB magnitude, {band} band"}))
        fields.append(pa.field(f"magerr_{band}", pa.float32(), True,
                               {"unit": "mag", "description": f"error of mag_{band}"}))
    fields.append(pa.field("sed_type", pa.string(), False,
                           {"unit": "", "description": "SED template the object was drawn from"}))
    if pdfs:
        fields.append(pa.field(PDF_COLUMN, pa.list_(pa.float32()), True, {
            "unit": "", "description": "photo-z PDF on the grid of pdf_grid.csv (peak 1)"}))
    return pa.schema(fields)


class CurveError(ValueError):
    """A filter or SED file of this folder that cannot be used (names the file and line)."""


def read_curve(path: str | Path, value_name: str) -> tuple[np.ndarray, np.ndarray]:
    """A two-column CSV ``wavelength_angstrom,<value_name>``: increasing wavelengths and
    finite, non-negative values."""
    path = Path(path)
    try:
        with path.open() as fh:
            header = fh.readline().strip()
        data = np.loadtxt(path, delimiter=",", skiprows=1, ndmin=2)
    except (OSError, ValueError) as exc:
        raise CurveError(f"{path}: not a readable two-column numeric CSV ({exc})") from exc
    if header != f"wavelength_angstrom,{value_name}" or data.shape[1] != 2 or len(data) < 2:
        raise CurveError(f"{path}: expected a header 'wavelength_angstrom,{value_name}' and "
                         f"at least two rows of two numbers")
    wl, values = data[:, 0], data[:, 1]
    for bad, why in ((~np.isfinite(data).all(axis=1), "a value that is not finite"),
                     (np.r_[False, np.diff(wl) <= 0], "a wavelength that does not increase"),
                     (values < 0, f"a negative {value_name}")):
        if bad.any():
            raise CurveError(f"{path}: line {int(np.flatnonzero(bad)[0]) + 2}: {why}")
    return wl, values


def schechter_shape(delta_mag: np.ndarray, alpha: float) -> np.ndarray:
    """phi(M) / phi* of Schechter (1976, ApJ 203, 297) in magnitudes, with M - M* = delta:
    0.4 ln10 10^(-0.4 (alpha + 1) delta) exp(-10^(-0.4 delta))."""
    x = 10.0 ** (-0.4 * np.asarray(delta_mag, dtype=np.float64))
    return 0.4 * math.log(10.0) * x ** (alpha + 1.0) * np.exp(-x)


def _cumulative_trapezoid(y: np.ndarray, x: np.ndarray) -> np.ndarray:
    out = np.empty_like(y)
    out[0] = 0.0
    np.cumsum(0.5 * (y[1:] + y[:-1]) * np.diff(x), out=out[1:])
    return out


class UniformTables:
    """Several functions tabulated on one uniform grid (``values`` has one row per function),
    evaluated by linear interpolation and clamped to the end values outside the grid.

    Locating a point on a uniform grid is arithmetic, not a search, and one location serves
    every row, so evaluating many rows at many random points is a few gathers."""

    def __init__(self, x0: float, x1: float, values: np.ndarray):
        values = np.atleast_2d(np.asarray(values, dtype=np.float64))
        self.x0, self.n = float(x0), values.shape[1]
        self.inv_step = (self.n - 1) / (float(x1) - float(x0))
        self.values = values
        self._flat = np.ascontiguousarray(values).reshape(-1)
        slope = np.zeros_like(values)
        slope[:, :-1] = np.diff(values, axis=1)
        self._slope = slope.reshape(-1)

    @property
    def grid(self) -> np.ndarray:
        return self.x0 + np.arange(self.n) / self.inv_step

    def locate(self, x: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """(cell index, fraction within the cell) of each point."""
        f = (np.asarray(x, dtype=np.float64) - self.x0) * self.inv_step
        np.clip(f, 0.0, self.n - 1, out=f)
        i = f.astype(np.intp)
        np.minimum(i, self.n - 2, out=i)
        f -= i
        return i, f

    def evaluate(self, located: tuple[np.ndarray, np.ndarray], row: int | np.ndarray = 0
                 ) -> np.ndarray:
        """Row ``row`` (a number, or one per point) at located points."""
        i, f = located
        k = i + np.asarray(row, dtype=np.intp) * self.n if np.ndim(row) else i + row * self.n
        return self._flat[k] + f * self._slope[k]

    def __call__(self, x: np.ndarray, row: int | np.ndarray = 0) -> np.ndarray:
        return self.evaluate(self.locate(x), row)


class SurveyModel:
    """The survey's tabulated model under one cosmology: K(z) tables, luminosity-function
    integrals, per-type dN/dz and its inverse CDF.  Built once; drawing is vectorised."""

    def __init__(self, cosmology: Cosmology | str = DEFAULT_COSMOLOGY, curves_dir: Path = HERE):
        self.cosmology = preset(cosmology) if isinstance(cosmology, str) else cosmology
        self.curves_dir = Path(curves_dir)
        self.h = self.cosmology.to_dict()["h0"] / 100.0
        self.filters = {b: read_curve(self.curves_dir / "filters" / f"{b}.csv", "response")
                        for b in BANDS}
        self.seds = {t.name: read_curve(self.curves_dir / "seds" / f"{t.name}.csv", "flambda")
                     for t in GALAXY_TYPES}
        self.types = GALAXY_TYPES
        self.field_sr = FIELD_AREA_DEG2 * SR_PER_DEG2
        self._m_star_0 = np.array([t.m_star_h + 5.0 * math.log10(self.h) for t in self.types])
        self._q = np.array([t.q_evolution for t in self.types])

    # -- luminosity functions in this cosmology's units -----------------------------------
    def m_star(self, t: GalaxyType, z: np.ndarray | float) -> np.ndarray:
        """M*(z) = M*(0) - Q z in the amber band for this cosmology's h
        (M*(0) = (M* - 5 log h) + 5 log h)."""
        return t.m_star_h + 5.0 * math.log10(self.h) - t.q_evolution * np.asarray(z)

    def phi_star(self, t: GalaxyType, z: np.ndarray | float = 0.0) -> np.ndarray:
        """phi*(z) = phi*(0) 10^(0.4 P z) in Mpc^-3 for this cosmology's h."""
        return t.phi_star_h3 * self.h ** 3 * 10.0 ** (0.4 * t.p_evolution * np.asarray(z))

    # -- tables -----------------------------------------------------------------------------
    @cached_property
    def k_tables(self) -> UniformTables:
        """K_amber->band(z) of every type and band (row = type * n_bands + band), from a
        little below zero (the local blueshifted galaxies) to just beyond Z_MAX."""
        z = np.linspace(K_Z_RANGE[0], K_Z_RANGE[1], K_Z_POINTS)
        qwl, qr = self.filters[SELECTION_BAND]
        rows = []
        for t in self.types:
            swl, sf = self.seds[t.name]
            rows += [kcorrection_curve(swl, sf, *self.filters[b], z, rest_filter=(qwl, qr))
                     for b in BANDS]
        return UniformTables(z[0], z[-1], np.stack(rows))

    def kcorrection(self, type_name: str, band: str, z: np.ndarray) -> np.ndarray:
        """K_amber->band(z) of a type."""
        k = [t.name for t in self.types].index(type_name)
        return self.k_tables(z, k * len(BANDS) + BANDS.index(band))

    @cached_property
    def z_grid(self) -> np.ndarray:
        return np.linspace(Z_MIN, Z_MAX, Z_GRID_POINTS)

    @cached_property
    def _lf_cumulative(self) -> tuple[np.ndarray, np.ndarray]:
        """delta grid and, per type, G(delta): the Schechter shape integrated from the bright
        end to M - M* = delta (number density brighter than delta = phi* G)."""
        widest = max(ABSOLUTE_MAG_FAINT - float(self.m_star(t, Z_MAX)) for t in self.types)
        n = int(math.ceil((widest + 0.5 - DELTA_MAG_BRIGHT) / DELTA_MAG_STEP)) + 1
        d = DELTA_MAG_BRIGHT + DELTA_MAG_STEP * np.arange(n)
        return d, np.stack([_cumulative_trapezoid(schechter_shape(d, t.alpha), d)
                            for t in self.types])

    @cached_property
    def lf_fraction(self) -> UniformTables:
        """Per type, W(delta) = G(delta) / G(end of grid)."""
        d, g = self._lf_cumulative
        return UniformTables(d[0], d[-1], g / g[:, -1:])

    @cached_property
    def lf_inverse(self) -> UniformTables:
        """Per type, delta as a function of ln W on a uniform grid (the inverse of
        ``lf_fraction``; ln W keeps the bright tail resolved)."""
        table = self.lf_fraction
        d = table.grid
        ln_w = np.linspace(LN_FRACTION_MIN, 0.0, LF_INVERSE_POINTS)
        rows = []
        for k in range(len(self.types)):
            w = table.values[k]
            keep = w > 0
            rows.append(np.interp(ln_w, np.log(w[keep]), d[keep]))
        return UniformTables(ln_w[0], ln_w[-1], np.stack(rows))

    def lf_number_density(self, t: GalaxyType, faintest_delta: np.ndarray) -> np.ndarray:
        """Galaxies per Mpc^3 of type t brighter than M - M* = delta, at z = 0 (phi* G)."""
        k = self.types.index(t)
        total = self._lf_cumulative[1][k, -1]
        return self.phi_star(t) * total * self.lf_fraction(faintest_delta, k)

    def faintest_delta_mag(self, t: GalaxyType, z: np.ndarray) -> np.ndarray:
        """M - M*(z) of the faintest galaxy of type t in the sample at z: the flux limit
        (M_lim = m_lim - mu - K) or the absolute-magnitude cut, whichever is brighter."""
        z = np.asarray(z, dtype=np.float64)
        mu = self.cosmology.distance_modulus_mag(z)
        m_lim = SELECTION_LIMIT_MAG - mu - self.kcorrection(t.name, SELECTION_BAND, z)
        return np.minimum(m_lim, ABSOLUTE_MAG_FAINT) - self.m_star(t, z)

    @cached_property
    def dndz(self) -> dict[str, np.ndarray]:
        """``{type: dN/dz}`` on ``z_grid``: galaxies per unit redshift in the whole field."""
        z = self.z_grid
        volume = self.cosmology.differential_comoving_volume_mpc3_sr(z) * self.field_sr
        density_evolution = {t.name: 10.0 ** (0.4 * t.p_evolution * z) for t in self.types}
        return {t.name: volume * density_evolution[t.name]
                * self.lf_number_density(t, self.faintest_delta_mag(t, z))
                for t in self.types}

    @cached_property
    def z_inverse(self) -> UniformTables:
        """Per type, z as a function of its cumulative fraction u (inverse CDF of dN/dz)."""
        u = np.linspace(0.0, 1.0, Z_INVERSE_POINTS)
        rows = []
        for t in self.types:
            c = _cumulative_trapezoid(self.dndz[t.name], self.z_grid)
            rows.append(np.interp(u, c / c[-1], self.z_grid))
        return UniformTables(0.0, 1.0, np.stack(rows))

    @cached_property
    def expected_counts(self) -> dict[str, float]:
        """Galaxies of each type in the field brighter than the flux limit."""
        return {name: float(np.trapezoid(n, self.z_grid)) for name, n in self.dndz.items()}

    @cached_property
    def type_fractions(self) -> np.ndarray:
        counts = np.array([self.expected_counts[t.name] for t in self.types])
        return counts / counts.sum()

    @cached_property
    def rest_colours_direct(self) -> np.ndarray:
        """(types, bands): rest-frame colours m_band - m_amber of each type's SED by direct
        synthetic photometry at z = 0 (not from the K tables)."""
        qwl, qr = self.filters[SELECTION_BAND]
        out = np.empty((len(self.types), len(BANDS)))
        for i, t in enumerate(self.types):
            swl, sf = self.seds[t.name]
            for b, band in enumerate(BANDS):
                out[i, b] = float(kcorrection_curve(swl, sf, *self.filters[band], [0.0],
                                                    rest_filter=(qwl, qr))[0])
        return out

    def rest_colour(self, type_name: str, band: str) -> float:
        """Rest-frame colour m_band - m_amber of a type (K_amber->band at z = 0)."""
        return float(self.kcorrection(type_name, band, np.array([0.0]))[0])

    # -- drawing -------------------------------------------------------------------------
    def draw_galaxies(self, rng: np.random.Generator, n: int) -> dict[str, np.ndarray]:
        """``n`` flux-limited galaxies: ``type_index`` (into GALAXY_TYPES), true ``z``,
        ``abs_mag`` (amber), ``mag`` (n, n_bands) true apparent AB magnitudes and
        ``distance_modulus``.  All types at once: every table is indexed by type."""
        cumulative = np.cumsum(self.type_fractions)
        type_index = np.minimum(np.searchsorted(cumulative, rng.random(n), side="right"),
                                len(self.types) - 1).astype(np.intp)
        z = self.z_inverse(rng.random(n), type_index)
        mu = self.cosmology.distance_modulus_mag(z)
        m_star = self._m_star_0[type_index] - self._q[type_index] * z
        at_z = self.k_tables.locate(z)
        k_rows = type_index * len(BANDS)
        k_sel = self.k_tables.evaluate(at_z, k_rows + BANDS.index(SELECTION_BAND))
        faintest = np.minimum(SELECTION_LIMIT_MAG - mu - k_sel, ABSOLUTE_MAG_FAINT) - m_star
        top = self.lf_fraction(faintest, type_index)
        with np.errstate(divide="ignore"):
            ln_w = np.log(rng.random(n)) + np.log(top)
        abs_mag = m_star + self.lf_inverse(ln_w, type_index)
        mag = np.empty((n, len(BANDS)))
        base = abs_mag + mu
        for b in range(len(BANDS)):
            mag[:, b] = base + self.k_tables.evaluate(at_z, k_rows + b)
        return {"type_index": type_index.astype(np.int8), "z": z, "abs_mag": abs_mag,
                "mag": mag, "distance_modulus": mu}

    def draw_local(self, rng: np.random.Generator, n: int) -> dict[str, np.ndarray]:
        """``n`` nearby galaxies approaching us (invented): distance 0.6-3.5 Mpc, velocity
        -60 to -360 km/s (negative z), M_amber -18 to -11."""
        type_index = rng.choice(len(self.types), n, p=LOCAL_TYPE_FRACTIONS).astype(np.intp)
        distance_mpc = rng.uniform(0.6, 3.5, n)
        z = -rng.uniform(60.0, 360.0, n) / 299792.458
        abs_mag = rng.uniform(-18.0, -11.0, n)
        mu = 5.0 * np.log10(distance_mpc * 1e5)
        at_z = self.k_tables.locate(z)
        mag = np.empty((n, len(BANDS)))
        for b in range(len(BANDS)):
            mag[:, b] = abs_mag + mu + self.k_tables.evaluate(at_z, type_index * len(BANDS) + b)
        return {"type_index": type_index.astype(np.int8), "z": z, "abs_mag": abs_mag,
                "mag": mag, "distance_modulus": mu}


# -- observing ---------------------------------------------------------------------------------
def observe_magnitudes(rng: np.random.Generator, true_mag: np.ndarray
                       ) -> tuple[np.ndarray, np.ndarray]:
    """Noisy magnitudes and their errors; NaN (null) below DETECTION_SIGMA.

    Flux in units of each band's 5-sigma flux f5: sigma_f^2 = (f5/5)^2 (1 + g f/f5)
    + (floor f)^2, so errors grow towards the depth."""
    # float32 throughout: the results are written as float32 rounded to 1e-4 mag
    depth = np.array([DEPTH_5SIGMA_MAG[b] for b in BANDS], dtype=np.float32)
    flux = np.exp(np.float32(0.4 * math.log(10.0)) * (depth - true_mag.astype(np.float32)))
    floor = np.float32(CALIBRATION_FLOOR_MAG / MAG_PER_RELATIVE_FLUX)
    sigma = np.sqrt(np.float32(0.04) * (1 + np.float32(SOURCE_NOISE_FRACTION) * flux)
                    + (floor * flux) ** 2)
    observed = flux + sigma * rng.standard_normal(flux.shape, dtype=np.float32)
    detected = observed > np.float32(DETECTION_SIGMA) * sigma
    observed[~detected] = np.nan
    mag = depth - np.float32(2.5) * np.log10(observed)
    err = np.float32(MAG_PER_RELATIVE_FLUX) * sigma / observed
    return mag, err


def observe_redshifts(rng: np.random.Generator, z_true: np.ndarray, selection_mag: np.ndarray
                      ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """(z, z_err, is_spectroscopic): spectroscopic for a bright subset, photometric else."""
    n = z_true.size
    p_spec = np.zeros(n)
    for limit, fraction in reversed(SPEC_FRACTION_BY_MAG):
        p_spec = np.where(selection_mag < limit, fraction, p_spec)
    spec = rng.random(n) < p_spec
    z_spec = z_true + SPEC_Z_ERROR * (1.0 + z_true) * rng.standard_normal(n)
    z_phot = np.abs(z_true + PHOT_Z_ERROR * (1.0 + z_true) * rng.standard_normal(n))
    outlier = rng.random(n) < PHOT_Z_OUTLIER_FRACTION
    z_phot = np.where(outlier, rng.uniform(0.01, Z_MAX + 0.2, n), z_phot)
    z = np.where(spec, z_spec, z_phot)
    z_err = np.where(spec, SPEC_Z_ERROR, PHOT_Z_ERROR) * (1.0 + z)
    return z, z_err, spec


def _labels(names, codes: np.ndarray) -> pa.Array:
    """A string column from small integer codes (built by Arrow, not as numpy strings)."""
    return pa.array(names, pa.string()).take(pa.array(codes))


def _round_float32(values: np.ndarray, decimals: int) -> pa.Array:
    return pa.array(np.round(values, decimals).astype(np.float32, copy=False),
                    from_pandas=True)


def pdf_grid() -> np.ndarray:
    """The shared redshift grid of the photo-z PDFs: z_k = exp(k PDF_LN_STEP) - 1."""
    return np.expm1(PDF_LN_STEP * np.arange(PDF_NODES))


def write_pdf_grid(path: str | Path) -> None:
    """Write the grid as a one-column CSV (what the demo job's grid_file reads)."""
    Path(path).write_text("z\n" + "".join(f"{z:.10f}\n" for z in pdf_grid()))


def pdf_stream(seed: int, chunk_index: int) -> np.random.Generator:
    """The posteriors' own random stream for a chunk: drawing them never shifts any other
    column's random numbers."""
    return np.random.default_rng(np.random.SeedSequence(
        seed, spawn_key=(chunk_index + 1, PDF_STREAM)))


def draw_photoz_pdfs(rng: np.random.Generator, z_true: np.ndarray, z: np.ndarray,
                     photometric: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Gridded photo-z PDFs (rows x PDF_NODES, float32, peak 1) and which rows have one."""
    n = z_true.size
    grid = pdf_grid()
    has = np.isfinite(z)
    width_true = PHOT_Z_ERROR * (1.0 + np.clip(z_true, 0.0, None))
    fresh = np.abs(np.clip(z_true, 0.0, None) + width_true * rng.standard_normal(n))
    centre = np.where(photometric, z, fresh)
    centre = np.where(has, np.clip(centre, 0.0, grid[-1]), 1.0)
    sigma = PHOT_Z_ERROR * (1.0 + centre) * rng.uniform(*PDF_WIDTH_SCATTER, n)
    bimodal = rng.random(n) < PDF_BIMODAL_FRACTION
    weight = rng.uniform(*PDF_SECONDARY_WEIGHT, n)
    # invented confusion: a low-z solution gains a high-z twin and vice versa
    second = np.where(centre < 1.2, centre + rng.uniform(0.8, 2.0, n),
                      centre * rng.uniform(0.2, 0.5, n))
    outlier = photometric & has & (np.abs(z - z_true) > 5.0 * width_true)
    second = np.where(outlier, np.clip(z_true, 0.0, None), second)
    weight = np.where(outlier, rng.uniform(0.2, 0.45, n), weight)
    bimodal |= outlier
    weight = np.where(bimodal, weight, 0.0)
    second = np.clip(second, 0.0, grid[-1])
    s2 = 1.3 * sigma
    dens = (1.0 - weight)[:, None] / sigma[:, None] * np.exp(
        -0.5 * ((grid[None, :] - centre[:, None]) / sigma[:, None]) ** 2)
    dens += weight[:, None] / s2[:, None] * np.exp(
        -0.5 * ((grid[None, :] - second[:, None]) / s2[:, None]) ** 2)
    dens /= dens.max(axis=1, keepdims=True)
    return np.round(dens, PDF_DECIMALS).astype(np.float32), has


def _pdf_column(dens: np.ndarray, has: np.ndarray) -> pa.Array:
    n, g = dens.shape
    offsets = pa.array(np.arange(0, n * g + 1, g, dtype=np.int32))
    return pa.ListArray.from_arrays(offsets, pa.array(dens.ravel()),
                                    mask=pa.array(~has)).cast(pa.list_(pa.float32()))


def pdf_as_text(column: pa.Array, delimiter: str = ";") -> pa.Array:
    """A list<float> column as delimited text (a CSV field; an empty field when null)."""
    text = pc.binary_join(pc.cast(column, pa.list_(pa.string())), delimiter)
    return pc.fill_null(text, "")


def make_chunk(model: SurveyModel, seed: int, chunk_index: int, first_row: int, n: int,
               local_rows: np.ndarray, first_id: int, truth: bool = False,
               pdfs: bool = True) -> pa.Table:
    """Rows ``first_row .. first_row + n`` of the catalogue of ``seed`` (chunk ``chunk_index``
    has its own random stream, so chunks can be made in any order). With ``truth``, the
    :func:`truth_columns` follow the observed ones (they draw no random numbers, so the
    observed columns are the same with or without them)."""
    table, gal = _observed_chunk(model, seed, chunk_index, first_row, n, local_rows, first_id,
                                 pdfs)
    if truth:
        for name, column in truth_columns(model, gal).items():
            table = table.append_column(truth_field(name), column)
    return table


def _observed_chunk(model: SurveyModel, seed: int, chunk_index: int, first_row: int, n: int,
                    local_rows: np.ndarray, first_id: int, pdfs: bool = True
                    ) -> tuple[pa.Table, dict]:
    rng = np.random.default_rng(np.random.SeedSequence(seed, spawn_key=(chunk_index + 1,)))
    gal = model.draw_galaxies(rng, n)
    local = local_rows[(local_rows >= first_row) & (local_rows < first_row + n)] - first_row
    if local.size:
        near = model.draw_local(rng, local.size)
        for key in ("type_index", "z", "abs_mag", "mag", "distance_modulus"):
            gal[key][local] = near[key]
    mag, err = observe_magnitudes(rng, gal["mag"])
    selection = gal["mag"][:, BANDS.index(SELECTION_BAND)]
    z, z_err, spec = observe_redshifts(rng, gal["z"], selection)
    is_local = np.zeros(n, dtype=bool)
    is_local[local] = True
    z = np.where(is_local, gal["z"] + 1e-5 * rng.standard_normal(n), z)
    z_err = np.where(is_local, 1e-5, z_err)
    spec |= is_local
    missing = (rng.random(n) < MISSING_Z_FRACTION) & ~is_local
    z[missing] = np.nan
    z_err[missing] = np.nan
    z_type_code = np.where(missing, 2, np.where(spec, 0, 1)).astype(np.int8)

    ra_width = field_ra_width_deg()
    ra = FIELD_RA_CENTRE_DEG + ra_width * (rng.random(n) - 0.5)
    s1, s2 = (math.sin(math.radians(d)) for d in (FIELD_DEC_MIN_DEG, FIELD_DEC_MAX_DEG))
    dec = np.degrees(np.arcsin(s1 + (s2 - s1) * rng.random(n)))

    columns = {
        "object_id": pa.array(np.arange(first_id + first_row, first_id + first_row + n,
                                        dtype=np.int64)),
        "ra": pa.array(np.round(ra, 7)),
        "dec": pa.array(np.round(dec, 7)),
        "z": pa.array(np.round(z, 6), from_pandas=True),
        "z_err": pa.array(np.round(z_err, 6), from_pandas=True),
        "z_type": _labels(("spec", "phot", "none"), z_type_code),
    }
    for b, band in enumerate(BANDS):
        columns[f"mag_{band}"] = _round_float32(mag[:, b], 4)
        columns[f"magerr_{band}"] = _round_float32(err[:, b], 4)
    columns["sed_type"] = _labels([t.name for t in model.types], gal["type_index"])
    if pdfs:
        dens, has = draw_photoz_pdfs(pdf_stream(seed, chunk_index), gal["z"],
                                     np.round(z, 6), (z_type_code == 1))
        columns[PDF_COLUMN] = _pdf_column(dens, has)
    return pa.Table.from_pydict(columns, schema=schema(pdfs)), gal


# -- the truth beside the observations ---------------------------------------------------------
def truth_column_names() -> list[str]:
    return (["true_z", "true_sed", "true_distance_modulus_mag"]
            + [f"true_absolute_magnitude_{b}_mag" for b in BANDS]
            + [f"true_mag_{b}" for b in BANDS])


def truth_field(name: str) -> pa.Field:
    """Arrow field of a truth column (units and meaning in the field metadata)."""
    if name == "true_sed":
        return pa.field(name, pa.string(), False, {
            "unit": "", "description": "SED the object was drawn from (a pure template: "
                                       "mixture weight 1)"})
    if name == "true_z":
        return pa.field(name, pa.float64(), False, {
            "unit": "", "description": "true (cosmological) redshift, before any error"})
    if name == "true_distance_modulus_mag":
        return pa.field(name, pa.float64(), False, {
            "unit": "mag", "description": "distance modulus at true_z in the generator's "
                                          "cosmology (its distance for the local galaxies)"})
    if name.startswith("true_absolute_magnitude_"):
        band = name.removeprefix("true_absolute_magnitude_").removesuffix("_mag")
        return pa.field(name, pa.float64(), False, {
            "unit": "mag", "description": f"true rest-frame AB absolute magnitude in the "
                                          f"{band} band (rest-frame {band} filter)"})
    band = name.removeprefix("true_mag_")
    return pa.field(name, pa.float64(), False, {
        "unit": "mag", "description": f"true apparent AB magnitude in the {band} band, "
                                      f"before noise"})


def truth_columns(model: SurveyModel, gal: dict) -> dict[str, pa.Array]:
    """The truth of the drawn galaxies (no random numbers drawn).

    A galaxy is drawn with an absolute amber magnitude M_amber (rest-frame amber); its
    rest-frame absolute magnitude in band b is ``M_b = M_amber + (m_b - m_amber)_rest``, the
    rest-frame colour of its SED by direct synthetic photometry at z = 0 (Hogg et al. 2002,
    astro-ph/0210394, eqs. 8 and 9 with z = 0; AB as in Oke & Gunn 1983, ApJ 266, 713). So
    ``m_b = M_b + mu + K_bb(z)`` holds with the K-correction of the same SED (eq. 13:
    K_amber->b(z) - K_amber->b(0) = K_bb(z))."""
    types = gal["type_index"].astype(np.intp)
    out: dict[str, pa.Array] = {
        "true_z": pa.array(gal["z"]),
        "true_sed": _labels([t.name for t in model.types], types),
        "true_distance_modulus_mag": pa.array(gal["distance_modulus"]),
    }
    rest = model.rest_colours_direct
    for b, band in enumerate(BANDS):
        out[f"true_absolute_magnitude_{band}_mag"] = pa.array(gal["abs_mag"] + rest[types, b])
    for b, band in enumerate(BANDS):
        out[f"true_mag_{band}"] = pa.array(gal["mag"][:, b])
    return out


# -- malformed CSV lines ------------------------------------------------------------------------
MALFORMED_KINDS = ("too_few_fields", "too_many_fields", "text_in_ra", "text_in_z",
                   "text_in_mag_amber", "text_in_object_id")
_TEXT_FOR = {"ra": "09h25m00s", "z": "z?", "mag_amber": "saturated", "object_id": "QDS-"}


def malform_line(line: str, kind: str) -> str:
    """Corrupt one CSV data line (no quoting in generated lines, so split on commas)."""
    fields = line.split(",")
    if kind == "too_few_fields":
        return ",".join(fields[:-3])
    if kind == "too_many_fields":
        return ",".join(fields + ["0.0", "extra"])
    column = kind.removeprefix("text_in_")
    i = COLUMN_ORDER.index(column)
    fields[i] = _TEXT_FOR[column] + (fields[i] if column == "object_id" else "")
    return ",".join(fields)


def _choose_rows(rng: np.random.Generator, total: int, count: int) -> np.ndarray:
    count = min(count, total)
    return np.sort(rng.choice(total, size=count, replace=False)) if count else \
        np.zeros(0, dtype=np.int64)


# -- writing --------------------------------------------------------------------------------------
def _format_of(path: Path, fmt: str | None) -> str:
    if fmt:
        if fmt not in ("parquet", "csv", "csv.gz"):
            raise ValueError(f"--format: {fmt!r} is not one of parquet, csv, csv.gz")
        return fmt
    name = path.name.lower()
    for suffix, kind in ((".parquet", "parquet"), (".csv.gz", "csv.gz"), (".csv", "csv")):
        if name.endswith(suffix):
            return kind
    raise ValueError(f"--out {path}: cannot tell the format from the name "
                     f"(use .parquet, .csv or .csv.gz, or give --format)")


def generate(rows: int, out: str | Path, *, fmt: str | None = None, seed: int = DEFAULT_SEED,
             cosmology: str = DEFAULT_COSMOLOGY, first_id: int = 1,
             malformed: int = DEFAULT_MALFORMED_LINES, model: SurveyModel | None = None,
             truth: bool = False, pdfs: bool = True) -> dict:
    """Write a catalogue of ``rows`` rows to ``out`` (atomically: temporary name, then rename)
    and return a summary (rows, timings, the malformed lines written, counts by kind).

    ``truth``: also write the ``true_*`` columns of :func:`truth_columns` after the observed
    ones, in the same rows (the observed columns are identical either way). ``pdfs=False``
    leaves out the photo-z PDF column (every other column is unchanged)."""
    if not isinstance(rows, int) or rows < 1:
        raise ValueError(f"--rows: expected a positive integer, got {rows!r}")
    out = Path(out)
    kind = _format_of(out, fmt)
    start = time.perf_counter()
    model = model or SurveyModel(cosmology)
    global_rng = np.random.default_rng(np.random.SeedSequence(seed, spawn_key=(0,)))
    n_local = min(max(LOCAL_MIN_ROWS, round(LOCAL_FRACTION * rows)), rows // 100)
    local_rows = _choose_rows(global_rng, rows, n_local)
    bad_rows = _choose_rows(global_rng, rows, malformed if kind != "parquet" else 0)
    bad_kind = {int(r): MALFORMED_KINDS[i % len(MALFORMED_KINDS)] for i, r in enumerate(
        global_rng.permutation(bad_rows))}
    metadata = {
        "survey": SURVEY_NAME, "generator_version": GENERATOR_VERSION, "rows": rows,
        "seed": seed, "cosmology": model.cosmology.to_dict(), "first_id": first_id,
        "selection": f"{SELECTION_BAND} < {SELECTION_LIMIT_MAG} (true magnitude)",
        "note": "invented data: a fictional survey, not observations",
    }
    if truth:
        metadata["truth_columns"] = truth_column_names()
    tmp = out.with_name(out.name + ".tmp")
    out.parent.mkdir(parents=True, exist_ok=True)
    counts = {"spec": 0, "phot": 0, "none": 0, "negative_z": 0}
    try:
        if kind == "parquet":
            sch = schema(pdfs)
            if truth:
                for name in truth_column_names():
                    sch = sch.append(truth_field(name))
            sch = sch.with_metadata({"quillfield.generator": json.dumps(metadata)})
            # dictionary encoding only where values repeat (labels, 4-decimal errors): on the
            # other float columns it costs three times the write time and saves nothing
            dictionary = ["z_type", "sed_type"] + [f"magerr_{b}" for b in BANDS]
            with pq.ParquetWriter(tmp, sch, compression="zstd",
                                  use_dictionary=dictionary) as writer:
                for table in _chunks(model, seed, rows, local_rows, first_id, counts, truth,
                                     pdfs):
                    writer.write_table(table.replace_schema_metadata(sch.metadata))
        else:
            raw = open(tmp, "wb")
            sink = gzip.GzipFile(filename="", fileobj=raw, mode="wb", compresslevel=1,
                                 mtime=0) if kind == "csv.gz" else raw
            try:
                first_row = 0
                header = [c for c in COLUMN_ORDER if pdfs or c != PDF_COLUMN] + \
                    (truth_column_names() if truth else [])
                sink.write((",".join(header) + "\n").encode())
                for table in _chunks(model, seed, rows, local_rows, first_id, counts, truth,
                                     pdfs):
                    if pdfs:  # CSV: the PDF as one field of ';'-separated values
                        i = table.column_names.index(PDF_COLUMN)
                        table = table.set_column(i, PDF_COLUMN,
                                                 pdf_as_text(table.column(PDF_COLUMN)))
                    buf = io.BytesIO()
                    pacsv.write_csv(table, buf, pacsv.WriteOptions(
                        include_header=False, quoting_style="none"))
                    data = buf.getvalue()
                    here = [r for r in bad_kind if first_row <= r < first_row + table.num_rows]
                    if here:
                        data = _malform_block(data, first_row, here, bad_kind)
                    sink.write(data)
                    first_row += table.num_rows
            finally:
                if sink is not raw:
                    sink.close()
                raw.close()
        os.replace(tmp, out)
    except BaseException:
        tmp.unlink(missing_ok=True)
        raise
    elapsed = time.perf_counter() - start
    return {
        "path": str(out), "format": kind, "rows": rows, "seed": seed,
        "cosmology": model.cosmology.to_dict().get("name"), "elapsed_s": elapsed,
        "rows_per_second": rows / elapsed if elapsed > 0 else float("inf"),
        "bytes": out.stat().st_size, "local_blueshifted_rows": int(local_rows.size),
        "z_types": {k: counts[k] for k in ("spec", "phot", "none")},
        "negative_z_rows": counts["negative_z"],
        # physical line numbers (header = line 1) of the corrupted lines, with their kind
        "malformed_lines": [{"line": r + 2, "kind": bad_kind[r]} for r in sorted(bad_kind)],
    }


def _chunks(model, seed, rows, local_rows, first_id, counts, truth=False, pdfs=True):
    for index, first_row in enumerate(range(0, rows, CHUNK_ROWS)):
        n = min(CHUNK_ROWS, rows - first_row)
        table = make_chunk(model, seed, index, first_row, n, local_rows, first_id, truth, pdfs)
        for item in pc.value_counts(table.column("z_type")).to_pylist():
            counts[item["values"]] += item["counts"]
        counts["negative_z"] += pc.sum(pc.less(table.column("z"), 0.0)).as_py() or 0
        yield table


def _malform_block(data: bytes, first_row: int, rows: list[int], bad_kind: dict[int, str]
                   ) -> bytes:
    lines = data.decode().split("\n")
    for r in rows:
        lines[r - first_row] = malform_line(lines[r - first_row], bad_kind[r])
    return "\n".join(lines).encode()


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(
        prog="generate.py", description=f"Write a catalogue of the invented {SURVEY_NAME}.")
    parser.add_argument("--rows", type=int, required=True, metavar="N", help="rows to write")
    parser.add_argument("--out", type=Path, required=True, metavar="FILE",
                        help="output file (.parquet, .csv or .csv.gz)")
    parser.add_argument("--format", choices=("parquet", "csv", "csv.gz"),
                        help="output format (default: from the file name)")
    parser.add_argument("--seed", type=int, default=DEFAULT_SEED, help="random seed")
    parser.add_argument("--cosmology", default=DEFAULT_COSMOLOGY, metavar="PRESET",
                        help="cosmology preset the galaxies are drawn in (default planck2018)")
    parser.add_argument("--first-id", type=int, default=1, metavar="ID",
                        help="object_id of the first row (default 1)")
    parser.add_argument("--malformed", type=int, default=DEFAULT_MALFORMED_LINES, metavar="K",
                        help="malformed lines to write into CSV output (default 8)")
    parser.add_argument("--truth", action="store_true",
                        help="also write the true redshift, SED and rest-frame absolute "
                             "magnitudes (columns true_*) beside the observations")
    parser.add_argument("--no-pdfs", action="store_true",
                        help=f"leave out the photo-z PDF column {PDF_COLUMN}")
    args = parser.parse_args(argv)
    if args.malformed < 0:
        parser.error("--malformed: must be 0 or more")
    try:
        summary = generate(args.rows, args.out, fmt=args.format, seed=args.seed,
                           cosmology=args.cosmology, first_id=args.first_id,
                           malformed=args.malformed, truth=args.truth,
                           pdfs=not args.no_pdfs)
    except (ValueError, CosmologyError, OSError) as exc:
        print(f"generate.py: error: {exc}", file=sys.stderr)
        return 2
    print(json.dumps(summary, indent=2))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
