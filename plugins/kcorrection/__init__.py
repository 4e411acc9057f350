"""K-corrections and K-corrected absolute magnitudes, per band (plugin ``kcorrection``).

Configured by the job file's top-level ``[bands.<band>]`` tables::

    [bands.r]
    magnitude = "mag_r"          # catalogue column, AB magnitudes
    error = "magerr_r"           # optional: adds absolute_magnitude_r_err_mag
    filter = "filters/r.csv"     # wavelength in Angstrom, photon-counting response
    rest_filter = "filters/g.csv"  # optional (template methods): rest-frame band
    kcorrection = { method = "template", sed = "seds/early.csv" }

Adds, per band with a ``kcorrection``: ``kcorrection_<band>_mag`` (K),
``absolute_magnitude_<band>_mag`` (M = m - mu(z) - K, mu from the job's cosmology) and, when an
``error`` column is given, ``absolute_magnitude_<band>_err_mag``. A band without a
``kcorrection`` only lends its magnitude (and filter) to other bands' colours.

Every file is read and checked, and every table built, when the job is planned: a bad file or a
redshift range an SED cannot cover stops the job before a row is read.
"""

from __future__ import annotations

import math
import re
from dataclasses import dataclass

import numpy as np
import pyarrow as pa

from annotator import Annotator, ColumnSpec, hookimpl

from .._redshift import REDSHIFT_HINTS
from . import extinction as _ext
from . import vmax as _vmax
from .methods import (
    DEFAULT_ASSUMED_COLOUR_ERROR_MAG, DEFAULT_MAX_K_SPREAD_MAG, LN10, Method, Polynomial, PowerLaw, PowerLawFromColour, Template,
    TemplateMix,
)
from .tables import (
    DEFAULT_TOLERANCE_MAG, Filter, check_coverage, default_z_max, load_filter, load_sed,
    ucd_band_word,
)

from .vmax import register_selections  # noqa: E402,F401  (the luminosity_function selection)

__all__ = ["KCorrection", "register_annotators", "register_selections"]

BAND_NAME = re.compile(r"^[a-z][a-z0-9_]*$")
BAND_KEYS = ("magnitude", "error", "filter", "rest_filter", "kcorrection") + _vmax.BAND_KEYS
METHOD_KEYS = {
    "power_law": ("method", "alpha", "z_max"),
    "power_law_colour": ("method", "colour", "alpha_range", "z_max"),
    "template": ("method", "sed", "z_max"),
    "template_mix": ("method", "seds", "colour", "z_max", "clip_tolerance_mag",
                     "clip_tolerance_sigma", "max_kcorrection_spread_mag",
                     "assumed_colour_error_mag"),
    "polynomial": ("method", "coefficients", "colour", "z_max", "colour_range"),
}
OPTIONS = ("tolerance_mag", "use_redshift_error", "extinction_law", "extinction_r_v") + \
    _vmax.OPTIONS
OBSERVED_REDSHIFT = "observed:redshift"
REDSHIFT_ERROR_HINTS = ("redshift_error", "z_err", "zerr", "z_error", "redshift_err")
DEFAULT_ALPHA_RANGE = (-10.0, 10.0)
NO_DISTANCE = "absolute_magnitude_no_distance"

# UCDs, checked against the IVOA UCD1+ controlled vocabulary (list version 1.5, 2022): there is
# no word for a K-correction, so it is described as a difference of magnitudes
# (phot.mag;arith.diff); absolute magnitudes are phys.magAbs, their errors stat.error first;
# the em.* word of the band follows when the band's filter is known.
UCD_K = "phot.mag;arith.diff"
UCD_ABS = "phys.magAbs"
UCD_ABS_ERR = "stat.error;phys.magAbs"


@dataclass
class BandSpec:
    """One configured band: inputs, filters, and (unless colour-only) its K method."""

    name: str
    magnitude_input: str  # logical input names, resolved by column_map
    magnitude_column: str
    error_input: str | None
    error_column: str | None
    filter: Filter | None
    rest_filter: Filter | None
    method: Method | None

    @property
    def key(self) -> str:
        return f"[bands.{self.name}]"


def _number(setup, key: str, value, *, what: str = "a number") -> float:
    if isinstance(value, bool) or not isinstance(value, (int, float)) or not math.isfinite(value):
        raise setup.error(key, f"expected {what}, got {value!r}")
    return float(value)


def _pair(setup, key: str, value, *, what: str) -> tuple:
    if not isinstance(value, list) or len(value) != 2:
        raise setup.error(key, f"expected {what} (a list of two), got {value!r}")
    return tuple(value)


class KCorrection(Annotator):
    name = "kcorrection"
    version = "1.0"
    documentation = "docs/kcorrection.md"
    summary = ("K-corrections and K-corrected absolute magnitudes per band, from the job's "
               "[bands.<band>] tables (power law, template SEDs, template mixtures, polynomials).")
    sections = ("bands",)
    position = 50
    input_hints = {"redshift": REDSHIFT_HINTS, "redshift_error": REDSHIFT_ERROR_HINTS,
                   _ext.EBV_INPUT: _ext.EBV_HINTS}

    def __init__(self, bands: list[BandSpec], cosmology, use_redshift_error: bool,
                 extinction: "_ext.Extinction | None" = None, vmax: "_vmax.Vmax | None" = None):
        self.bands = bands
        self.extinction = extinction
        self.vmax = vmax
        self.cosmology = cosmology
        self.use_redshift_error = use_redshift_error
        used = [b for b in bands if b.method is not None or self._is_colour_band(b.name)]
        # mu takes the cosmological redshift ("redshift", CMB-frame when a frame annotator
        # redefines it); K takes the observed one: the spectrum is shifted by the redshift
        # we actually see (Hogg et al. 2002, sect. 2).
        requires = ["redshift", OBSERVED_REDSHIFT]
        column_map: dict[str, str] = {}
        for b in used:
            requires.append(b.magnitude_input)
            column_map[b.magnitude_input] = b.magnitude_column
            if b.error_input:
                requires.append(b.error_input)
                column_map[b.error_input] = b.error_column
        self.requires = tuple(requires)
        self.column_map = column_map
        self.optional = ("redshift_error",) if use_redshift_error and self._any_error() else ()
        provides: list[ColumnSpec] = []
        flags: dict[str, str] = {}
        for b in bands:
            if b.method is None:
                continue
            provides.extend(_columns(b))
            for suffix, desc in b.method.flag_suffixes().items():
                flags[f"kcorrection_{b.name}_{suffix}"] = desc
            flags[f"magnitude_{b.name}_missing"] = (
                f"The {b.name} magnitude ({b.magnitude_column}) is null or not finite: null "
                f"absolute magnitude.")
        flags[NO_DISTANCE] = ("No distance modulus at this redshift (missing, negative or zero "
                              "redshift): null absolute magnitudes in every band.")
        # ---- extinction and V_max (extinction.py, vmax.py) ------------------------------
        if extinction is not None:
            requires.append(_ext.EBV_INPUT)
            provides.extend(extinction.columns(list(extinction.coefficients)))  # every band used
            flags.update(extinction.flags())
        if vmax is not None:
            provides.extend(vmax.columns())
            flags.update(vmax.flags())
        self.requires = tuple(requires)
        # ---- end: extinction and V_max ---------------------------------------------------
        self.provides = tuple(provides)
        self.flags = flags

    def _is_colour_band(self, name: str) -> bool:
        return any(b.method is not None and b.method.colour is not None
                   and name in b.method.colour for b in self.bands)

    def _any_error(self) -> bool:
        return any(b.method is not None and b.error_input for b in self.bands)

    # -- configuration -----------------------------------------------------------------
    @classmethod
    def configure(cls, setup):
        setup.reject_unknown_options(OPTIONS)
        if "bands" not in setup.sections:
            return setup.does_not_apply("no [bands] tables in the job")
        tolerance = _number(setup, "tolerance_mag",
                            setup.options.get("tolerance_mag", DEFAULT_TOLERANCE_MAG))
        if not 1e-7 <= tolerance <= 0.01:
            raise setup.error("tolerance_mag", f"{tolerance:g} is outside 1e-07 to 0.01 mag")
        use_z_err = setup.options.get("use_redshift_error", True)
        if not isinstance(use_z_err, bool):
            raise setup.error("use_redshift_error", f"expected true or false, got {use_z_err!r}")
        raw = setup.sections["bands"]
        if not raw:
            raise setup.error("[bands]", "no band given: add a [bands.<band>] table")
        for name, table in raw.items():
            if not BAND_NAME.match(name):
                raise setup.error(f"[bands.{name}]", "band names become column names: use "
                                  "lower-case letters, digits and '_', starting with a letter")
            if not isinstance(table, dict):
                raise setup.error(f"[bands].{name}", f"expected a table, got {table!r}")
            unknown = sorted(set(table) - set(BAND_KEYS))
            if unknown:
                raise setup.error(f"[bands.{name}].{unknown[0]}",
                                  f"unknown key (allowed: {', '.join(BAND_KEYS)})")
        # First the inputs and filters of every band (colours refer to other bands), then
        # the methods.
        partial = {name: _band_inputs(setup, name, table) for name, table in raw.items()}
        bands = []
        for name, table in raw.items():
            spec = partial[name]
            if "kcorrection" in table:
                spec.method = _method(setup, spec, table["kcorrection"], partial, tolerance)
            bands.append(spec)
        used_in_colours = {n for b in bands if b.method is not None and b.method.colour
                           for n in b.method.colour}
        for b in bands:
            if b.method is None and b.name not in used_in_colours:
                raise setup.error(b.key, "has no kcorrection and no other band's colour uses "
                                  "it: add kcorrection = { method = ... } or remove the band")
        # ---- extinction and V_max (extinction.py, vmax.py) ------------------------------
        used = [b for b in bands if b.method is not None or b.name in used_in_colours]
        extinction = _ext.configure_extinction(setup, used, setup.options)
        vmax = _vmax.configure_vmax(setup, bands, raw, setup.options, setup.cosmology)
        # ---- end: extinction and V_max ---------------------------------------------------
        return cls(bands, setup.cosmology, use_z_err, extinction, vmax)

    # -- per batch -----------------------------------------------------------------------
    def annotate(self, batch):
        z_cosmo = batch.values("redshift")
        z = batch.values(OBSERVED_REDSHIFT)  # K and its derivatives
        with np.errstate(invalid="ignore"):
            z_ok = np.where(np.isfinite(z_cosmo) & (z_cosmo >= 0), z_cosmo, np.nan)
        mu = np.asarray(self.cosmology.distance_modulus_mag(z_ok), dtype=np.float64)
        no_distance = ~np.isfinite(mu)
        if no_distance.any():
            batch.flag(NO_DISTANCE, no_distance)
        mags = {b.name: batch.values(b.magnitude_input) for b in self.bands
                if b.magnitude_input in self.requires}
        # ---- extinction and V_max (extinction.py, vmax.py) ------------------------------
        observed_mags, extinction, no_ebv = mags, {}, None
        if self.extinction is not None:
            mags, extinction, no_ebv = self.extinction.apply(batch, mags)
        # ---- end: extinction and V_max ---------------------------------------------------
        errs = {b.name: batch.values(b.error_input) for b in self.bands
                if b.error_input and b.error_input in self.requires}
        z_err = None
        if "redshift_error" in self.optional and batch.has("redshift_error"):
            # A negative or missing redshift error gives a null error, not a smaller one.
            z_err = batch.values("redshift_error")
            with np.errstate(invalid="ignore"):
                z_err = np.where(z_err >= 0, z_err, np.nan)
        dmu_dz = self._dmu_dz(z_ok) if z_err is not None and errs else None
        out = {}
        for b in self.bands:
            method = b.method
            if method is None:
                continue
            colour = None
            if method.colour is not None:
                p, q = method.colour
                colour = mags[p] - mags[q]
            if isinstance(method, TemplateMix):
                # the colour's own error widens the mixture's clipping tolerance
                p, q = method.colour
                colour_err = np.hypot(errs[p], errs[q]) if p in errs and q in errs else None
                k, flags = method.evaluate(z, colour, colour_err)
            else:
                k, flags = method.evaluate(z, colour)
            for suffix, mask in flags.items():
                if mask.any():  # the core's flag bookkeeping costs a pass; skip empty masks
                    batch.flag(f"kcorrection_{b.name}_{suffix}", mask)
            m = mags[b.name]
            missing = ~np.isfinite(m)
            if missing.any():
                batch.flag(f"magnitude_{b.name}_missing", missing)
            absolute = m - mu - k
            absolute[~np.isfinite(absolute)] = np.nan
            # ---- extinction and V_max (extinction.py, vmax.py) --------------------------
            if no_ebv is not None:
                absolute[no_ebv] = np.nan
                out[f"extinction_{b.name}_mag"] = extinction[b.name]
            if self.vmax is not None and b.name in self.vmax.limits:
                out.update(self.vmax.compute(
                    batch, b.name, method, method.shape(z, colour), z_ok,
                    observed_mags[b.name], k, mu, absolute))
            # ---- end: extinction and V_max -----------------------------------------------
            out[f"kcorrection_{b.name}_mag"] = k
            out[f"absolute_magnitude_{b.name}_mag"] = absolute
            if b.error_input:
                out[f"absolute_magnitude_{b.name}_err_mag"] = self._error(
                    b, z, colour, errs, z_err, dmu_dz, absolute)
            method.release()  # the weights kept for the error column are not needed now
        # ---- extinction and V_max (extinction.py, vmax.py) ------------------------------
        for band, a in extinction.items():  # bands lending only their colour (no K) too
            out.setdefault(f"extinction_{band}_mag", a)
        # ---- end: extinction and V_max ---------------------------------------------------
        return out

    def _dmu_dz(self, z: np.ndarray) -> np.ndarray:
        """d mu / dz = (5 / ln 10) (1 / (1 + z) + D_M' / D_M), from mu = 5 log10((1 + z) D_M)
        + const (Hogg 1999, eqs. 21 and 25)."""
        dm = self.cosmology.transverse_comoving_distance_mpc(z)
        ddm = self.cosmology.dtransverse_comoving_distance_dz_mpc(z)
        with np.errstate(divide="ignore", invalid="ignore"):
            return (5.0 / LN10) * (1.0 / (1.0 + z) + ddm / dm)

    def _error(self, b: BandSpec, z, colour, errs, z_err, dmu_dz, absolute) -> np.ndarray:
        """sigma_M^2 = sum_j (dM/dm_j)^2 sigma_j^2 + (dmu/dz + dK/dz)^2 sigma_z^2.

        M = m_b - mu(z) - K(z, m_p - m_q): dM/dm_b = 1, and the colour's bands add
        -dK/dc (p) and +dK/dc (q); a colour band without an error column adds nothing.
        Magnitude errors are taken as independent (common practice).
        """
        need_dz = z_err is not None
        if b.method.colour is None and not need_dz:
            var = errs[b.name] ** 2
        else:
            dkdz, dkdc = b.method.derivatives(z, colour)
            coef = {b.name: np.ones_like(z)}
            if b.method.colour is not None:
                p, q = b.method.colour
                coef[p] = coef.get(p, 0.0) - dkdc
                coef[q] = coef.get(q, 0.0) + dkdc
            var = np.zeros_like(z)
            for name, c in coef.items():
                if name in errs:
                    var += (c * errs[name]) ** 2
            if need_dz:
                var += ((dmu_dz + dkdz) * z_err) ** 2
        err = np.sqrt(var)
        err[~np.isfinite(absolute) | ~np.isfinite(err)] = np.nan
        return err


# ---------------------------------------------------------------------- configuration
def _band_inputs(setup, name: str, table: dict) -> BandSpec:
    key = f"[bands.{name}]"
    if "magnitude" not in table:
        raise setup.error(f"{key}.magnitude", "missing: name the catalogue column holding this "
                          "band's AB magnitudes")
    columns = {}
    for field in ("magnitude", "error"):
        if field not in table:
            continue
        col = table[field]
        if not isinstance(col, str):
            raise setup.error(f"{key}.{field}", f"expected a column name, got {col!r}")
        if not setup.has_column(col):
            raise setup.error(f"{key}.{field}", f"column {col!r} is not in the catalogue "
                              f"(columns: {', '.join(setup.catalogue_schema.names)})")
        typ = setup.catalogue_schema.field(col).type
        if not (pa.types.is_floating(typ) or pa.types.is_integer(typ)
                or pa.types.is_decimal(typ) or pa.types.is_null(typ)):
            raise setup.error(f"{key}.{field}", f"column {col!r} has type {typ}; magnitudes "
                              f"must be numbers")
        columns[field] = col
    filt = load_filter(setup, table["filter"], f"{key}.filter") if "filter" in table else None
    rest = load_filter(setup, table["rest_filter"], f"{key}.rest_filter") \
        if "rest_filter" in table else None
    return BandSpec(
        name=name,
        magnitude_input=f"magnitude_{name}",
        magnitude_column=columns["magnitude"],
        error_input=f"magnitude_error_{name}" if "error" in columns else None,
        error_column=columns.get("error"),
        filter=filt,
        rest_filter=rest,
        method=None,
    )


def _colour(setup, key: str, value, bands: dict[str, BandSpec], *, need_filters: bool
            ) -> tuple[str, str]:
    pair = _pair(setup, key, value, what='two band names, e.g. ["g", "r"] for g - r')
    for n in pair:
        if not isinstance(n, str) or n not in bands:
            raise setup.error(key, f"{n!r} is not a configured band (bands: "
                              f"{', '.join(bands)})")
        if need_filters and bands[n].filter is None:
            raise setup.error(key, f"band {n!r} needs a filter for this method: add filter = "
                              f"\"<file>\" to [bands.{n}]")
    if pair[0] == pair[1]:
        raise setup.error(key, f"a colour needs two different bands, got {list(pair)}")
    return pair


def _method(setup, band: BandSpec, spec, bands: dict[str, BandSpec], tolerance: float
            ) -> Method:
    key = f"{band.key}.kcorrection"
    if not isinstance(spec, dict):
        raise setup.error(key, f"expected a table such as {{ method = \"template\", sed = "
                          f"\"seds/early.csv\" }}, got {spec!r}")
    kind = spec.get("method")
    if kind not in METHOD_KEYS:
        raise setup.error(f"{key}.method", f"expected one of {', '.join(METHOD_KEYS)}, "
                          f"got {kind!r}")
    unknown = sorted(set(spec) - set(METHOD_KEYS[kind]))
    if unknown:
        raise setup.error(f"{key}.{unknown[0]}", f"unknown key for method {kind!r} (allowed: "
                          f"{', '.join(METHOD_KEYS[kind])})")
    for required in METHOD_KEYS[kind][1:]:
        optional = required in ("z_max", "alpha_range", "colour_range",
                                "clip_tolerance_mag", "clip_tolerance_sigma",
                                "max_kcorrection_spread_mag",
                                "assumed_colour_error_mag") and not (
            kind == "polynomial" and required == "z_max")
        if required not in spec and not optional:
            raise setup.error(f"{key}.{required}", f"missing (method {kind!r} needs "
                              f"{', '.join(k for k in METHOD_KEYS[kind][1:])})")
    if band.rest_filter is not None and kind not in ("template", "template_mix"):
        raise setup.error(f"{band.key}.rest_filter", f"a rest-frame band different from the "
                          f"observed one needs a template method, not {kind!r}")
    z_max = None
    if "z_max" in spec:
        z_max = _number(setup, f"{key}.z_max", spec["z_max"], what="a redshift > 0")
        if z_max <= 0:
            raise setup.error(f"{key}.z_max", f"expected a redshift > 0, got {z_max:g}")

    if kind == "power_law":
        alpha = _number(setup, f"{key}.alpha", spec["alpha"])
        return PowerLaw(alpha=alpha, z_max=z_max if z_max is not None else math.inf)

    if kind == "power_law_colour":
        colour = _colour(setup, f"{key}.colour", spec["colour"], bands, need_filters=True)
        a_range = DEFAULT_ALPHA_RANGE
        if "alpha_range" in spec:
            a_range = _pair(setup, f"{key}.alpha_range", spec["alpha_range"],
                            what="the lowest and highest slope")
            a_range = tuple(_number(setup, f"{key}.alpha_range", a) for a in a_range)
            if not -30 <= a_range[0] < a_range[1] <= 30:
                raise setup.error(f"{key}.alpha_range", f"expected -30 <= low < high <= 30, "
                                  f"got {list(a_range)}")
        return PowerLawFromColour.build(colour, bands[colour[0]].filter,
                                        bands[colour[1]].filter, a_range,
                                        z_max if z_max is not None else math.inf, key)

    if kind == "polynomial":
        colour = _colour(setup, f"{key}.colour", spec["colour"], bands, need_filters=False)
        coefficients = _coefficients(setup, f"{key}.coefficients", spec["coefficients"])
        c_range = None
        if "colour_range" in spec:
            c_range = tuple(_number(setup, f"{key}.colour_range", c) for c in
                            _pair(setup, f"{key}.colour_range", spec["colour_range"],
                                  what="the lowest and highest colour"))
            if not c_range[0] < c_range[1]:
                raise setup.error(f"{key}.colour_range", f"expected low < high, got "
                                  f"{list(c_range)}")
        return Polynomial(colour=colour, coefficients=coefficients, z_max=z_max,
                          colour_range=c_range)

    # template methods: the band's filter and rest filter, SEDs covering them
    if band.filter is None:
        raise setup.error(f"{band.key}.filter", f"missing: method {kind!r} needs the band's "
                          f"filter curve (wavelength in Angstrom, photon-counting response)")
    rest = band.rest_filter or band.filter
    if kind == "template":
        seds = (load_sed(setup, spec["sed"], f"{key}.sed"),)
        colour_filters: tuple[Filter, ...] = ()
        colour = None
    else:
        paths = _pair(setup, f"{key}.seds", spec["seds"], what="two SED files")
        seds = tuple(load_sed(setup, p, f"{key}.seds") for p in paths)
        colour = _colour(setup, f"{key}.colour", spec["colour"], bands, need_filters=True)
        colour_filters = (bands[colour[0]].filter, bands[colour[1]].filter)
    observed = [(sed, f) for sed in seds for f in (band.filter, *colour_filters)]
    if z_max is None:
        z_max = default_z_max(observed)
        if z_max <= 0:
            z_max = 0.0  # check_coverage below explains why nothing is covered
    for sed, f in observed:
        check_coverage(sed, f, max(z_max, 1e-12), band_key=key)
    for sed in seds:
        check_coverage(sed, rest, 0.0, band_key=key, rest_frame=True)
    if kind == "template":
        return Template.build(seds[0], band.filter, rest, z_max, key, tolerance)
    clip = 0.1
    if "clip_tolerance_mag" in spec:
        clip = _number(setup, f"{key}.clip_tolerance_mag", spec["clip_tolerance_mag"],
                       what="a colour difference in mag, >= 0")
        if clip < 0:
            raise setup.error(f"{key}.clip_tolerance_mag", f"expected >= 0, got {clip:g}")
    spread = DEFAULT_MAX_K_SPREAD_MAG
    if "max_kcorrection_spread_mag" in spec:
        spread = _number(setup, f"{key}.max_kcorrection_spread_mag",
                         spec["max_kcorrection_spread_mag"], what="a magnitude difference > 0")
        if spread <= 0:
            raise setup.error(f"{key}.max_kcorrection_spread_mag", f"expected > 0, got "
                              f"{spread:g}")
    assumed = DEFAULT_ASSUMED_COLOUR_ERROR_MAG
    if "assumed_colour_error_mag" in spec:
        assumed = _number(setup, f"{key}.assumed_colour_error_mag",
                          spec["assumed_colour_error_mag"], what="a colour error in mag, >= 0")
        if assumed < 0:
            raise setup.error(f"{key}.assumed_colour_error_mag", f"expected >= 0, got "
                              f"{assumed:g}")
    clip_sigma = 2.0
    if "clip_tolerance_sigma" in spec:
        clip_sigma = _number(setup, f"{key}.clip_tolerance_sigma", spec["clip_tolerance_sigma"],
                             what="a number of standard deviations, >= 0")
        if clip_sigma < 0:
            raise setup.error(f"{key}.clip_tolerance_sigma", f"expected >= 0, got "
                              f"{clip_sigma:g}")
    return TemplateMix.build(seds, band.filter, rest, colour, colour_filters, z_max, key,
                             tolerance, clip, spread, clip_sigma, assumed)


def _coefficients(setup, key: str, value) -> np.ndarray:
    """Coefficients a[x][y] of z^x c^y: an inline list of rows or a table file."""
    if isinstance(value, str):
        table = setup.read_table(value, what=f"{key} ({value})", min_columns=1)
    else:
        if not (isinstance(value, list) and value and all(isinstance(r, list) and r
                                                          for r in value)):
            raise setup.error(key, "expected rows of numbers [[a00, a01, ...], [a10, ...], "
                              "...] (row x holds the coefficients of z^x c^0, z^x c^1, ...), "
                              "or the path of a table file")
        width = len(value[0])
        for x, row in enumerate(value):
            if len(row) != width:
                raise setup.error(key, f"row {x} has {len(row)} coefficients, row 0 has "
                                  f"{width}; pad with zeros")
            for y, a in enumerate(row):
                _number(setup, f"{key}[{x}][{y}]", a)
        table = np.asarray(value, dtype=np.float64)
    if np.any(table[0] != 0):
        raise setup.error(key, "the coefficients of z^0 (row 0) must all be 0, since "
                          "K(z = 0) = 0 in every band; give row 0 as zeros")
    return table


def _columns(b: BandSpec) -> list[ColumnSpec]:
    rest = b.rest_filter or b.filter
    word = ucd_band_word(rest.pivot_A) if rest is not None else None
    k_word = ucd_band_word(b.filter.pivot_A) if b.filter is not None and \
        b.rest_filter is None else None
    suffix = f";{word}" if word else ""
    k_suffix = f";{k_word}" if k_word else ""
    frames = (f"observed filter {b.filter.path}" if b.filter else "no filter") + (
        f", rest-frame filter {b.rest_filter.path}" if b.rest_filter else "")
    how = b.method.describe()
    cols = [
        ColumnSpec(f"kcorrection_{b.name}_mag", pa.float64(), "mag", UCD_K + k_suffix,
                   f"K-correction in band {b.name} ({frames}): m = M + mu + K; {how}."),
        ColumnSpec(f"absolute_magnitude_{b.name}_mag", pa.float64(), "mag", UCD_ABS + suffix,
                   f"Absolute magnitude (AB) in band {b.name}"
                   + (f", rest-frame filter {b.rest_filter.path}" if b.rest_filter else "")
                   + f": {b.magnitude_column} - distance modulus - kcorrection_{b.name}_mag."),
    ]
    if b.error_input:
        cols.append(ColumnSpec(
            f"absolute_magnitude_{b.name}_err_mag", pa.float64(), "mag", UCD_ABS_ERR + suffix,
            f"Error of absolute_magnitude_{b.name}_mag from {b.error_column}"
            + (" and the colour's magnitude errors" if b.method.colour else "")
            + " (and the redshift error through mu and K, when one is given)."))
    return cols


@hookimpl
def register_annotators():
    return [KCorrection]
