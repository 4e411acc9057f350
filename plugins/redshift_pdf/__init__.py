"""Redshift posteriors (plugin ``redshift_pdf``): every quantity and the reachability from
each object's full redshift probability distribution.

Configured by the job file's top-level ``[redshift_pdf]`` table (see docs/redshift-pdf.md)::

    [redshift_pdf]
    kind = "gridded"                 # or "samples", "quantiles"
    column = "pz"                    # list<float> column (CSV: a delimited list in one field)
    grid = { start = 0.0, stop = 4.0, count = 201 }   # or a list, or grid_file, or grid_column

Adds the posterior's ``reachable_probability`` (it *replaces* the Gaussian one of the
``uncertainties`` annotator: see ``Annotator.replaces``), the 16th, 50th and 84th percentiles
and the mean of the redshift, comoving and luminosity distance, distance modulus, lookback time
and age at emission, per configured K-correction band the same for the absolute magnitude,
and the number of peaks with the probability of the second-largest one.

A row whose posterior cannot be used (negative density, NaN, all zero, empty or missing list,
wrong length, per-object grid not increasing) gets nulls in these columns and a flag; every
other annotator still works from the catalogue redshift.
"""

from __future__ import annotations

import math

import numpy as np
import pyarrow as pa

from annotator import Annotator, ColumnSpec, hookimpl

from . import posterior as post

__all__ = ["RedshiftPdf", "register_annotators", "posterior"]

KINDS = ("gridded", "samples", "quantiles")
KEYS = {
    "gridded": ("kind", "column", "grid", "grid_file", "grid_column", "list_delimiter",
                "mode_threshold", "mode_min_mass", "secondary_peak_mass",
                "absolute_magnitudes", "block_rows", "outputs"),
    "samples": ("kind", "column", "list_delimiter", "mode_threshold", "mode_min_mass",
                "secondary_peak_mass", "sample_mode_bins", "absolute_magnitudes",
                "block_rows", "outputs"),
    "quantiles": ("kind", "quantile_levels", "quantile_columns", "nodes_per_interval",
                  "mode_threshold", "mode_min_mass", "secondary_peak_mass",
                  "absolute_magnitudes", "block_rows", "outputs"),
}
OUTPUTS = ("all", "reachability")
SECTION = "redshift_pdf"
LEVELS = np.array([0.16, 0.50, 0.84])
TAGS = ("p16", "p50", "p84")
COARSE_BLOCK = 10  # shared grids: CDF by matrix product every 10 nodes, refined locally
PDF_INPUT = "redshift_pdf"
GRID_INPUT = "redshift_pdf_grid"

DEFAULTS = {"mode_threshold": 0.05, "mode_min_mass": 0.01, "secondary_peak_mass": 0.10,
            "sample_mode_bins": 24, "nodes_per_interval": 16, "block_rows": 16384,
            "list_delimiter": ";", "outputs": "all"}

# (stem, unit suffix, VOUnit, UCD, quantity, cosmology method, increases with z)
QUANTITIES = (
    ("redshift", None, None, "src.redshift", "the redshift", None, True),
    ("comoving_distance", "mpc", "Mpc", "pos.distance", "the line-of-sight comoving distance",
     "comoving_distance_mpc", True),
    ("luminosity_distance", "mpc", "Mpc", "pos.distance", "the luminosity distance",
     "luminosity_distance_mpc", True),
    ("distance_modulus", "mag", "mag", "phot.mag.distMod", "the distance modulus",
     "distance_modulus_mag", True),
    ("lookback_time", "gyr", "Gyr", "time.age", "the lookback time", "lookback_time_gyr", True),
    ("age_at_emission", "gyr", "Gyr", "time.age", "the age of the universe at emission",
     "age_at_emission_gyr", False),
)

FLAGS = {
    "redshift_pdf_missing": "The redshift posterior is null: no posterior columns.",
    "redshift_pdf_empty": "The redshift posterior is an empty list: no posterior columns.",
    "redshift_pdf_nan": "The redshift posterior holds NaN or infinite values (or, in CSV, "
                        "text that is not a number): no posterior columns.",
    "redshift_pdf_negative": "The redshift posterior has a negative density (gridded) or a "
                             "negative redshift (samples, quantiles): no posterior columns.",
    "redshift_pdf_all_zero": "Every density of the gridded posterior is zero: no posterior "
                             "columns.",
    "redshift_pdf_wrong_length": "The gridded posterior's length differs from its grid's: no "
                                 "posterior columns.",
    "redshift_pdf_grid_not_increasing": "The object's redshift grid (or its quantiles) does "
                                        "not strictly increase: no posterior columns.",
    "redshift_pdf_secondary_peak": "A secondary peak of the redshift posterior holds more "
                                   "than the configured share of the probability (default "
                                   "10 %): catastrophic photo-z risk.",
    "redshift_pdf_magnitude_partial": "Part of the posterior lies where the absolute magnitude "
                                      "is undefined (beyond a K-correction's z_max, or z = 0): "
                                      "its percentiles describe the rest.",
}
SET_ASIDE = ("redshift_pdf_missing", "redshift_pdf_empty", "redshift_pdf_nan",
             "redshift_pdf_negative", "redshift_pdf_all_zero", "redshift_pdf_wrong_length",
             "redshift_pdf_grid_not_increasing")


def _err(setup, key, why):
    return setup.error(f"[{SECTION}].{key}", why)


def _number(setup, cfg, key, lo, hi, *, integer=False):
    v = cfg.get(key, DEFAULTS[key])
    ok = isinstance(v, int) if integer else isinstance(v, (int, float))
    if isinstance(v, bool) or not ok or not (lo <= v <= hi):
        kind = "an integer" if integer else "a number"
        raise _err(setup, key, f"expected {kind} in [{lo}, {hi}], got {v!r}")
    return int(v) if integer else float(v)


def _column(setup, cfg, key):
    col = cfg.get(key)
    if not isinstance(col, str):
        raise _err(setup, key, f"expected a catalogue column name, got {col!r}")
    if not setup.has_column(col):
        raise _err(setup, key, f"column {col!r} is not in the catalogue (columns: "
                   f"{', '.join(setup.catalogue_schema.names)})")
    return col


def _check_grid(setup, key, grid) -> np.ndarray:
    g = np.asarray(grid, dtype=np.float64)
    if g.ndim != 1 or len(g) < 2:
        raise _err(setup, key, f"a grid needs at least 2 redshifts, got {len(g)}")
    if not np.isfinite(g).all():
        raise _err(setup, key, "the grid holds NaN or infinite redshifts")
    if g[0] < 0:
        raise _err(setup, key, f"the grid starts at a negative redshift ({g[0]:g})")
    steps = np.diff(g)
    if not (steps > 0).all():
        i = int(np.argmax(~(steps > 0)))
        raise _err(setup, key, f"the grid must strictly increase: point {i + 2} ({g[i + 1]:g}) "
                   f"follows {g[i]:g}")
    return g


def _grid(setup, cfg) -> np.ndarray | None:
    given = [k for k in ("grid", "grid_file", "grid_column") if k in cfg]
    if len(given) != 1:
        raise _err(setup, "grid", "a gridded posterior needs exactly one of grid, grid_file, "
                   f"grid_column (got {', '.join(given) or 'none'})")
    key = given[0]
    if key == "grid_column":
        return None
    if key == "grid_file":
        path = cfg["grid_file"]
        if not isinstance(path, str):
            raise _err(setup, key, f"expected a file name, got {path!r}")
        table = setup.read_table(path, what=f"[{SECTION}].grid_file", min_columns=1)
        return _check_grid(setup, key, table[:, 0])
    grid = cfg["grid"]
    if isinstance(grid, dict):
        unknown = sorted(set(grid) - {"start", "stop", "count"})
        if unknown or len(grid) != 3:
            raise _err(setup, "grid", "expected { start = ..., stop = ..., count = ... }, got "
                       f"{grid!r}")
        n = grid["count"]
        if isinstance(n, bool) or not isinstance(n, int) or n < 2:
            raise _err(setup, "grid.count", f"expected an integer >= 2, got {n!r}")
        for k in ("start", "stop"):
            if isinstance(grid[k], bool) or not isinstance(grid[k], (int, float)):
                raise _err(setup, f"grid.{k}", f"expected a number, got {grid[k]!r}")
        return _check_grid(setup, "grid", np.linspace(grid["start"], grid["stop"], n))
    if not isinstance(grid, list) or not all(
            isinstance(x, (int, float)) and not isinstance(x, bool) for x in grid):
        raise _err(setup, "grid", "expected a list of redshifts or { start, stop, count }")
    return _check_grid(setup, "grid", grid)


def _list_like(typ: pa.DataType) -> bool:
    return (pa.types.is_list(typ) or pa.types.is_large_list(typ)
            or pa.types.is_fixed_size_list(typ))


def _list_column_check(setup, key, col):
    typ = setup.catalogue_schema.field(col).type
    if _list_like(typ):
        if not (pa.types.is_floating(typ.value_type) or pa.types.is_integer(typ.value_type)):
            raise _err(setup, key, f"column {col!r} is a list of {typ.value_type}, expected "
                       f"numbers")
    elif not (pa.types.is_string(typ) or pa.types.is_large_string(typ)):
        raise _err(setup, key, f"column {col!r} has type {typ}: expected a list of numbers "
                   f"(Parquet) or a delimited list in text (CSV)")


def list_parts(arr, delimiter: str) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Flattened float64 values, int64 offsets (rows + 1), null mask and unreadable mask of a
    list<number> column, or of a text column holding ``delimiter``-separated numbers."""
    if isinstance(arr, pa.ChunkedArray):  # one chunk (the usual batch): no copy
        arr = arr.chunk(0) if arr.num_chunks == 1 else arr.combine_chunks()
    n = len(arr)
    unreadable = np.zeros(n, dtype=bool)
    if pa.types.is_string(arr.type) or pa.types.is_large_string(arr.type):
        arr, unreadable = _parse_text_lists(arr, delimiter)
    if pa.types.is_fixed_size_list(arr.type) or pa.types.is_large_list(arr.type):
        arr = arr.cast(pa.list_(arr.type.value_type))
    nulls = np.asarray(arr.is_null().to_numpy(zero_copy_only=False), dtype=bool)
    offsets = np.asarray(arr.offsets.to_numpy(), dtype=np.int64)
    values = arr.values
    if not pa.types.is_floating(values.type):
        values = values.cast(pa.float64())
    vals = values.to_numpy(zero_copy_only=False)
    if values.null_count:
        vals = np.where(np.asarray(values.is_null().to_numpy(zero_copy_only=False)), np.nan,
                        vals)
    return vals, offsets, nulls, unreadable


def _parse_text_lists(arr, delimiter):
    import pyarrow.compute as pc  # only for text lists (its import costs every run ~40 ms)

    parts = pc.split_pattern(pc.utf8_trim_whitespace(arr), delimiter)
    flat = pc.utf8_trim_whitespace(parts.flatten())
    offsets = parts.offsets
    try:
        nums = pc.cast(flat, pa.float64())
        unreadable = np.zeros(len(arr), dtype=bool)
    except pa.ArrowInvalid:
        text = flat.to_pylist()
        out = np.empty(len(text))
        bad_item = np.zeros(len(text), dtype=bool)
        for i, t in enumerate(text):
            try:
                out[i] = float(t)
            except (TypeError, ValueError):
                out[i] = np.nan
                bad_item[i] = True
        nums = pa.array(out)
        off = offsets.to_numpy()
        row_of = np.repeat(np.arange(len(arr)), np.diff(off))
        unreadable = np.bincount(row_of[bad_item], minlength=len(arr)) > 0
    lists = pa.ListArray.from_arrays(offsets, nums, mask=arr.is_null())
    # "" (an empty field) splits into [""]: an empty list, not an unreadable one
    lengths = np.diff(offsets.to_numpy())
    single_empty = np.zeros(len(arr), dtype=bool)
    one = np.flatnonzero(lengths == 1)
    if len(one):
        first = np.asarray(flat.to_numpy(zero_copy_only=False))[offsets.to_numpy()[one]]
        single_empty[one] = first == ""
    if single_empty.any():
        vals = lists.to_pylist()
        vals = [[] if e else v for v, e in zip(vals, single_empty)]
        lists = pa.array(vals, type=pa.list_(pa.float64()))
        unreadable &= ~single_empty
    return lists, unreadable


_INT_VIEW = {np.dtype(np.float32): np.int32, np.dtype(np.float64): np.int64}


def _lowest(p: np.ndarray) -> np.ndarray:
    """Each row's lowest value (NaN rows are found from their integrals instead).

    IEEE floats of one sign order like their bit patterns read as integers, and an integer
    minimum is several times faster than a float one: only rows whose smallest pattern is
    negative (a sign bit: a negative number, -0.0 or a negative NaN) are looked at as floats.
    """
    lo = p.view(_INT_VIEW[p.dtype]).min(axis=1)
    out = np.zeros(len(p))
    signed = np.flatnonzero(lo < 0)
    if len(signed):
        out[signed] = np.min(p[signed], axis=1)
    return out


def _highest(p: np.ndarray) -> np.ndarray:
    """Each row's highest value, for rows without negative values (the others are set
    aside): the integer maximum of the bit patterns, read back as a float."""
    hi = p.view(_INT_VIEW[p.dtype]).max(axis=1)
    return hi.astype(_INT_VIEW[p.dtype]).view(p.dtype).astype(np.float64)


class RedshiftPdf(Annotator):
    name = "redshift_pdf"
    version = "1.0"
    summary = ("Reachability probability, distances, times and absolute magnitudes from each "
               "object's redshift posterior (samples, gridded PDF or quantile columns).")
    documentation = "docs/redshift-pdf.md"
    sections = (SECTION, "bands")
    position = 55

    def __init__(self, cosmology, kind, *, pdf_column=None, grid=None, grid_column=None,
                 quantile_levels=None, quantile_columns=(), bands=(), opts=None):
        self.cosmology = cosmology
        self.kind = kind
        self.grid = grid
        self.quantile_levels = quantile_levels
        self.bands = list(bands)
        self.opts = dict(DEFAULTS, **(opts or {}))
        column_map = {}
        requires = []
        self.text_inputs = ()
        if kind in ("gridded", "samples"):
            requires.append(PDF_INPUT)
            column_map[PDF_INPUT] = pdf_column
            self.text_inputs = (PDF_INPUT,)
            if grid_column is not None:
                requires.append(GRID_INPUT)
                column_map[GRID_INPUT] = grid_column
                self.text_inputs = (PDF_INPUT, GRID_INPUT)
        self.quantile_inputs = []
        for i, col in enumerate(quantile_columns):
            logical = f"redshift_quantile_{i + 1}"
            requires.append(logical)
            column_map[logical] = col
            self.quantile_inputs.append(logical)
        self.mag_inputs = {}
        for b in self.bands:
            names = [b.name] + (list(b.colour) if b.colour else [])
            cols = [b.magnitude_column] + (list(b.colour_columns) if b.colour else [])
            for name, col in zip(names, cols):
                logical = f"magnitude_{name}"
                if logical not in column_map:
                    requires.append(logical)
                    column_map[logical] = col
                self.mag_inputs[name] = logical
        self.requires = tuple(requires)
        # Galactic extinction per band, from the kcorrection annotator's columns when it runs
        # with an E(B-V): subtracted from each magnitude (and so from the colours) first
        self.extinction_inputs = {name: f"extinction_{name}_mag" for name in self.mag_inputs}
        self.optional = tuple(self.extinction_inputs.values())
        self.column_map = column_map
        self.replaces = ("reachable_probability",)
        self.flags = {k: v for k, v in FLAGS.items()
                      if self.bands or k != "redshift_pdf_magnitude_partial"}
        self.settings = {
            "kind": kind, "pdf_column": pdf_column, "grid_column": grid_column,
            "grid": None if grid is None else [float(x) for x in grid],
            "quantile_levels": None if quantile_levels is None else
            [float(x) for x in quantile_levels], "quantile_columns": list(quantile_columns),
            "percentiles": [16, 50, 84], "outputs": self.opts["outputs"],
            "mode_threshold": self.opts["mode_threshold"],
            "mode_min_mass": self.opts["mode_min_mass"],
            "secondary_peak_mass": self.opts["secondary_peak_mass"],
            "bands": [b.name for b in self.bands]}
        self.reach_only = self.opts.get("outputs") == "reachability"
        cols = self._columns()
        self.provides = tuple(cols[:1] if self.reach_only else cols)
        self.z_eh = None
        self._prepared = False
        self._grid_cache = None

    def _columns(self):
        how = {"gridded": "its gridded PDF (linear between grid points)",
               "samples": "its posterior draws",
               "quantiles": "a monotone cubic (PCHIP) CDF through its redshift quantiles"}[
            self.kind]
        cols = [ColumnSpec("reachable_probability", pa.float64(), None, "stat.probability",
                           f"Probability that the true redshift is below the event-horizon "
                           f"redshift (reachable), from the redshift posterior: {how}.")]
        for stem, suffix, unit, ucd, what, _, _ in QUANTITIES:
            end = f"_{suffix}" if suffix else ""
            for tag, lvl in zip(TAGS, LEVELS):
                cols.append(ColumnSpec(f"{stem}_{tag}{end}", pa.float64(), unit,
                                       ucd,
                                       f"Posterior {round(lvl * 100):d}th percentile of {what}, "
                                       f"from {how}."))
            cols.append(ColumnSpec(f"{stem}_mean{end}", pa.float64(), unit, f"stat.mean;{ucd}",
                                   f"Posterior mean of {what} (null where not finite), from "
                                   f"{how}."))
        for b in self.bands:
            for tag, lvl in zip(TAGS, LEVELS):
                cols.append(ColumnSpec(
                    f"absolute_magnitude_{b.name}_{tag}_mag", pa.float64(), "mag",
                    "phys.magAbs", f"Posterior {round(lvl * 100):d}th percentile of the "
                    f"K-corrected absolute magnitude in {b.name} (M = m - mu(z) - K(z), "
                    f"over the posterior, not mapped through the median)."))
            cols.append(ColumnSpec(f"absolute_magnitude_{b.name}_mean_mag", pa.float64(), "mag",
                                   "stat.mean;phys.magAbs",
                                   f"Posterior mean of the absolute magnitude in {b.name} "
                                   f"(null where not finite)."))
        cols.append(ColumnSpec("redshift_pdf_modes", pa.int16(), None, "meta.number",
                               f"Number of separate peaks of the posterior: runs of density "
                               f">= {self.opts['mode_threshold']:g} of its highest, each "
                               f"holding >= {self.opts['mode_min_mass']:g} of the probability."))
        cols.append(ColumnSpec("redshift_pdf_secondary_mass", pa.float64(), None,
                               "stat.probability",
                               "Probability held by the second-largest peak (0 with one peak)."))
        return cols

    # -- configuration -------------------------------------------------------------------
    @classmethod
    def configure(cls, setup):
        setup.reject_unknown_options(())
        if SECTION not in setup.sections:
            return setup.does_not_apply(f"no [{SECTION}] table in the job")
        cfg = setup.sections[SECTION]
        if not isinstance(cfg, dict):
            raise setup.error(f"[{SECTION}]", f"expected a table, got {cfg!r}")
        kind = cfg.get("kind")
        if kind not in KINDS:
            raise _err(setup, "kind", f"expected one of {', '.join(KINDS)}, got {kind!r}")
        unknown = sorted(set(cfg) - set(KEYS[kind]))
        if unknown:
            raise _err(setup, unknown[0], f"unknown key for kind = {kind!r} (allowed: "
                       f"{', '.join(KEYS[kind])})")
        opts = {
            "mode_threshold": _number(setup, cfg, "mode_threshold", 1e-6, 1.0),
            "mode_min_mass": _number(setup, cfg, "mode_min_mass", 0.0, 0.5),
            "secondary_peak_mass": _number(setup, cfg, "secondary_peak_mass", 0.0, 0.5),
            "sample_mode_bins": _number(setup, cfg, "sample_mode_bins", 4, 1000, integer=True),
            "nodes_per_interval": _number(setup, cfg, "nodes_per_interval", 2, 256,
                                          integer=True),
            "block_rows": _number(setup, cfg, "block_rows", 64, 1 << 22, integer=True),
        }
        delim = cfg.get("list_delimiter", DEFAULTS["list_delimiter"])
        if not isinstance(delim, str) or not delim or delim.strip() != delim and delim != " ":
            raise _err(setup, "list_delimiter", f"expected a non-empty separator, got {delim!r}")
        if delim == ",":
            raise _err(setup, "list_delimiter", "',' separates the CSV's own fields; use ';', "
                       "'|' or ' '")
        opts["list_delimiter"] = delim
        outputs = cfg.get("outputs", "all")
        if outputs not in OUTPUTS:
            raise _err(setup, "outputs", f"expected one of {', '.join(OUTPUTS)}, got "
                       f"{outputs!r}")
        opts["outputs"] = outputs
        want_mag = cfg.get("absolute_magnitudes", True) and outputs == "all"
        if not isinstance(want_mag, bool):
            raise _err(setup, "absolute_magnitudes", f"expected true or false, got {want_mag!r}")
        bands = []
        if want_mag and "bands" in setup.sections:
            from ..kcorrection.api import configured_bands

            bands = configured_bands(setup)
        kw = {"bands": bands, "opts": opts}
        if kind in ("gridded", "samples"):
            kw["pdf_column"] = _column(setup, cfg, "column")
            _list_column_check(setup, "column", kw["pdf_column"])
        if kind == "gridded":
            kw["grid"] = _grid(setup, cfg)
            if kw["grid"] is None:
                kw["grid_column"] = _column(setup, cfg, "grid_column")
                _list_column_check(setup, "grid_column", kw["grid_column"])
            else:
                typ = setup.catalogue_schema.field(kw["pdf_column"]).type
                if pa.types.is_fixed_size_list(typ) and typ.list_size != len(kw["grid"]):
                    raise _err(setup, "column", f"column {kw['pdf_column']!r} holds "
                               f"{typ.list_size} values per row, the grid {len(kw['grid'])}")
        if kind == "quantiles":
            levels = cfg.get("quantile_levels")
            cols = cfg.get("quantile_columns")
            if not isinstance(levels, list) or len(levels) < 2 or not all(
                    isinstance(x, (int, float)) and not isinstance(x, bool) for x in levels):
                raise _err(setup, "quantile_levels", "expected a list of at least 2 "
                           f"percentages, e.g. [2.5, 16, 50, 84, 97.5]; got {levels!r}")
            lv = np.asarray(levels, dtype=np.float64)
            if not ((lv > 0) & (lv < 100)).all() or not (np.diff(lv) > 0).all():
                raise _err(setup, "quantile_levels", "percentages must strictly increase "
                           f"inside (0, 100); got {levels!r}")
            if not isinstance(cols, list) or len(cols) != len(levels):
                raise _err(setup, "quantile_columns", f"expected a list of {len(levels)} "
                           f"column names, one per level; got {cols!r}")
            for c in cols:
                if not isinstance(c, str) or not setup.has_column(c):
                    raise _err(setup, "quantile_columns", f"column {c!r} is not in the "
                               f"catalogue (columns: {', '.join(setup.catalogue_schema.names)})")
            kw["quantile_levels"] = lv / 100.0
            kw["quantile_columns"] = tuple(cols)
        return cls(setup.cosmology, kind, **kw)

    def prepare(self):
        self.z_eh = self.cosmology.derived()["event_horizon_redshift"]
        self._grid_cache = self._tabulate(self.grid) if self.grid is not None else None
        self._prepared = True

    def __getstate__(self):
        state = self.__dict__.copy()
        state["_prepared"] = False
        state["_grid_cache"] = None
        return state

    def _functions(self, z: np.ndarray) -> list[np.ndarray]:
        """Each quantity of QUANTITIES at redshifts z (any shape)."""
        out = []
        for *_, method, _ in QUANTITIES:
            out.append(np.asarray(z, dtype=np.float64) if method is None
                       else getattr(self.cosmology, method)(z))
        return out

    @staticmethod
    def _mean_integrand(z, f):
        """The quantities as the trapezoid rule of a mean should see them at the nodes.

        The distance modulus is -inf at z = 0, but its integral against a density that is
        finite there converges (mu ~ 5 log10 z + const near 0). The node at z = 0 is given the
        value that makes its half interval exact for a constant density:
        (h/2)(f0 + f1) = h (mu(h) - 5/ln 10), so f0 = mu(h) - 10/ln 10.
        """
        mu = np.array(f[3], dtype=np.float64)
        at0 = np.asarray(z)[..., 0] == 0.0
        if np.any(at0):
            mu[..., 0] = np.where(at0, mu[..., 1] - 10.0 / math.log(10.0), mu[..., 0])
        return [*f[:3], mu, *f[4:]]

    def _tabulate(self, grid):
        """Everything the shared grid needs once: weights and the quantities at the nodes."""
        w = post.trapezoid_weights(grid)
        w_eh = (post.weights_below(grid, self.z_eh) if self.z_eh is not None else w)
        f = self._mean_integrand(grid, self._functions(grid))
        cols = [w, w_eh]
        neg_inf_at = []
        for k, fk in enumerate(f):
            wk = w * fk
            bad = ~np.isfinite(wk)
            neg_inf_at.append(np.flatnonzero(bad))
            wk[bad] = 0.0
            cols.append(wk)
        nodes, coarse = post.coarse_weights(grid, COARSE_BLOCK)
        weights = np.column_stack(cols + [coarse])
        mu_grid = self.cosmology.distance_modulus_mag(grid)
        return {"w": w, "weights": weights, "bad_nodes": neg_inf_at, "mu": mu_grid,
                "coarse_nodes": nodes,
                "weights32": np.ascontiguousarray(weights[:, :2], dtype=np.float32)}

    # -- per batch -------------------------------------------------------------------------
    def annotate(self, batch):
        if not self._prepared:
            self.prepare()
        n = batch.num_rows
        fast = self.reach_only and self.grid is not None  # writes reachable_probability only
        out = {spec.name: np.full(n, np.nan) for spec in (self.provides if fast
                                                           else self._columns())}
        out["redshift_pdf_modes"] = np.zeros(n, dtype=np.int16)
        flags = {k: np.zeros(n, dtype=bool) for k in self.flags}
        mags = {name: batch.values(logical) for name, logical in self.mag_inputs.items()}
        for name, logical in self.extinction_inputs.items():
            if batch.has(logical):  # a null A (no usable E(B-V)) gives a null M, as for M
                mags[name] = mags[name] - batch.values(logical)
        if self.kind == "quantiles":
            zq = np.column_stack([batch.values(q) for q in self.quantile_inputs])
            self._run_blocks(n, lambda s, e: self._quantiles_block(zq[s:e], s, e, out, flags,
                                                                   mags))
        else:
            vals, offs, nulls, unreadable = list_parts(batch.array(PDF_INPUT),
                                                       self.opts["list_delimiter"])
            if self.kind == "samples":
                self._run_blocks(n, lambda s, e: self._samples_block(
                    vals, offs[s:e + 1], nulls[s:e], unreadable[s:e], s, e, out, flags, mags))
            else:
                grid_parts = None
                if self.grid is None:
                    grid_parts = list_parts(batch.array(GRID_INPUT), self.opts["list_delimiter"])
                self._run_blocks(n, lambda s, e: self._gridded_block(
                    vals, offs[s:e + 1], nulls[s:e], unreadable[s:e], grid_parts, s, e, out,
                    flags, mags))
        if not fast:
            with np.errstate(invalid="ignore"):
                secondary = out["redshift_pdf_secondary_mass"] > self.opts["secondary_peak_mass"]
            flags["redshift_pdf_secondary_peak"] |= secondary
        for reason, mask in flags.items():
            if mask.any():
                batch.flag(reason, mask)
        aside = np.zeros(n, dtype=bool)
        for reason in SET_ASIDE:
            aside |= flags[reason]
        result = {}
        wanted = {spec.name for spec in self.provides}
        for name, v in out.items():
            if name not in wanted:
                continue
            if name == "redshift_pdf_modes":
                result[name] = np.ma.MaskedArray(v, mask=aside)
            else:
                v[aside] = np.nan
                v[~np.isfinite(v)] = np.nan
                result[name] = v
        return result

    def _run_blocks(self, n, fn):
        step = self.opts["block_rows"]
        for s in range(0, n, step):
            fn(s, min(n, s + step))

    # -- the three inputs --------------------------------------------------------------------
    def _lengths_check(self, offs, nulls, unreadable, flags, s, e):
        lengths = np.diff(offs)
        flags["redshift_pdf_missing"][s:e] |= nulls
        flags["redshift_pdf_empty"][s:e] |= (lengths == 0) & ~nulls
        flags["redshift_pdf_nan"][s:e] |= unreadable
        return lengths

    def _gridded_block(self, vals, offs, nulls, unreadable, grid_parts, s, e, out, flags, mags):
        lengths = self._lengths_check(offs, nulls, unreadable, flags, s, e)
        rows = e - s
        if self.grid is not None:
            g = len(self.grid)
            wrong = (lengths != g) & (lengths > 0) & ~nulls
            flags["redshift_pdf_wrong_length"][s:e] |= wrong
            good = lengths == g
            if good.all() and offs[-1] - offs[0] == rows * g:
                p = vals[offs[0]: offs[-1]].reshape(rows, g)
            else:
                p = np.zeros((rows, g), dtype=vals.dtype)
                idx = np.flatnonzero(good)
                take = offs[idx][:, None] + np.arange(g)[None, :]
                p[idx] = vals[take]
            self._shared_grid(p, s, e, out, mags, flags, good)
            return
        gv, goffs, gnulls, gunread = grid_parts
        goffs = goffs[s:e + 1]
        glen = np.diff(goffs)
        flags["redshift_pdf_missing"][s:e] |= gnulls[s:e]
        flags["redshift_pdf_nan"][s:e] |= gunread[s:e]
        wrong = (glen != lengths) & (lengths > 0) & ~nulls & ~gnulls[s:e]
        flags["redshift_pdf_wrong_length"][s:e] |= wrong
        usable = (lengths == glen) & (lengths >= 2)
        flags["redshift_pdf_empty"][s:e] |= (lengths == 1) & usable  # one point: no interval
        usable &= lengths >= 2
        for g in np.unique(lengths[usable]):
            idx = np.flatnonzero(usable & (lengths == g))
            take_p = offs[idx][:, None] + np.arange(g)[None, :]
            take_z = goffs[idx][:, None] + np.arange(g)[None, :]
            p = vals[take_p]
            z = gv[take_z].astype(np.float64)
            with np.errstate(invalid="ignore"):
                bad_grid = ~(np.isfinite(z).all(axis=1) & (np.diff(z, axis=1) > 0).all(axis=1)
                             & (z[:, 0] >= 0))
            sub_flags = {k: np.zeros(len(idx), dtype=bool) for k in flags}
            bad = self._validate_density(p, np.ones(len(idx), dtype=bool), sub_flags, 0, len(idx))
            p = p.astype(np.float64)
            p[bad | bad_grid] = 0.0
            for k, m in sub_flags.items():
                flags[k][s + idx] |= m
            flags["redshift_pdf_grid_not_increasing"][s + idx] |= bad_grid
            z = np.where(bad_grid[:, None], np.linspace(0, 1, g)[None, :], z)
            self._object_grids(z, p, s + idx, out, mags, flags)

    def _validate_density(self, p, good, flags, s, e):
        with np.errstate(invalid="ignore"):
            lo = p.min(axis=1)
            hi = p.max(axis=1)
        nan = np.isnan(lo) | np.isnan(hi) | ~np.isfinite(hi)
        flags["redshift_pdf_nan"][s:e] |= nan & good
        flags["redshift_pdf_negative"][s:e] |= (lo < 0) & good & ~nan
        flags["redshift_pdf_all_zero"][s:e] |= (hi == 0) & good & ~nan
        return nan | (lo < 0) | ~good

    def _shared_grid(self, p, s, e, out, mags, flags, good):
        """One shared grid: probability, means and the coarse CDF are matrix products."""
        tab = self._grid_cache
        grid = self.grid
        if p.dtype not in (np.float32, np.float64):
            p = p.astype(np.float64)
        lo = _lowest(p)
        if self.reach_only:  # two float32 matrix-vector products, nothing else
            p32 = p.astype(np.float32, copy=False)
            total = np.dot(p32, tab["weights32"][:, 0]).astype(np.float64)
            below = np.dot(p32, tab["weights32"][:, 1]).astype(np.float64)
            bad = self._validate(lo, total, good, flags, s, e)
            with np.errstate(invalid="ignore", divide="ignore"):
                prob = below / total
            prob[bad] = np.nan
            out["reachable_probability"][s:e] = np.clip(prob, 0.0, 1.0)
            return
        p64 = p.astype(np.float64)  # once: the products below are in double precision
        sums = p64 @ tab["weights"]  # rows x (2 + quantities + coarse CDF nodes)
        total = sums[:, 0]
        bad = self._validate(lo, total, good, flags, s, e)
        if bad.any():  # set aside (flagged); zeros keep every row's CDF monotone
            p64[bad] = 0.0
            sums[bad] = 0.0
            total = sums[:, 0]
        nq = len(QUANTITIES)
        with np.errstate(invalid="ignore", divide="ignore"):
            out["reachable_probability"][s:e] = np.clip(sums[:, 1] / total, 0.0, 1.0)
            for k, (stem, suffix, *_rest) in enumerate(QUANTITIES):
                mean = sums[:, 2 + k] / total
                bad_nodes = tab["bad_nodes"][k]
                if len(bad_nodes):
                    mean[(p64[:, bad_nodes] > 0).any(axis=1)] = np.nan
                out[f"{stem}_mean{'_' + suffix if suffix else ''}"][s:e] = mean
        coarse = sums[:, 2 + nq:]
        zq = post.shared_grid_quantiles(grid, p64, coarse, tab["coarse_nodes"], LEVELS)
        self._map_quantiles(zq, slice(s, e), out)
        modes, second = post.count_modes(p, tab["w"], self.opts["mode_threshold"],
                                         self.opts["mode_min_mass"], top=_highest(p))
        out["redshift_pdf_modes"][s:e] = modes
        out["redshift_pdf_secondary_mass"][s:e] = second
        if self.bands:
            self._magnitudes(np.broadcast_to(grid, p.shape), p64 * tab["w"],
                             tab["mu"][None, :], slice(s, e), out, mags, flags)

    @staticmethod
    def _validate(lo, total, good, flags, s, e):
        """Flags from a row's lowest density and its integral: NaN (or an infinite
        integral), a negative density, all zero. Returns the rows to set aside."""
        with np.errstate(invalid="ignore"):
            nan = ~np.isfinite(total) | np.isnan(lo)
            neg = (lo < 0) & ~nan
            zero = (total == 0) & ~nan & ~neg
        flags["redshift_pdf_nan"][s:e] |= nan & good
        flags["redshift_pdf_negative"][s:e] |= neg & good
        flags["redshift_pdf_all_zero"][s:e] |= zero & good
        return nan | neg | zero | ~good

    def _object_grids(self, z, p, rows, out, mags, flags):
        """Per-object grids (also the quantile input): the cosmology on every node."""
        cdf, tot = post.grid_cdf(z, p)
        if self.z_eh is None:
            prob = np.where(tot > 0, 1.0, np.nan)
        else:
            prob = post.grid_probability_below(z, p, cdf, tot, self.z_eh)
        out["reachable_probability"][rows] = prob
        w = post.trapezoid_weights(z)
        node_mass = p * w
        f = self._functions(z)
        with np.errstate(invalid="ignore", divide="ignore"):
            for (stem, suffix, *_r), fk in zip(QUANTITIES, self._mean_integrand(z, f)):
                contrib = np.where(node_mass > 0, node_mass * fk, 0.0)
                mean = contrib.sum(axis=1) / tot
                out[f"{stem}_mean{'_' + suffix if suffix else ''}"][rows] = mean
        zq = post.grid_quantiles(z, p, cdf, tot, LEVELS)
        self._map_quantiles(zq, rows, out)
        modes, second = self._modes(p, w)
        out["redshift_pdf_modes"][rows] = modes
        out["redshift_pdf_secondary_mass"][rows] = second
        if self.bands:
            self._magnitudes(z, node_mass, f[3], rows, out, mags, flags)

    def _samples_block(self, vals, offs, nulls, unreadable, s, e, out, flags, mags):
        lengths = self._lengths_check(offs, nulls, unreadable, flags, s, e)
        v = vals[offs[0]: offs[-1]].astype(np.float64)
        rel = offs - offs[0]
        row_of = np.repeat(np.arange(e - s), lengths)
        nonfinite = np.bincount(row_of[~np.isfinite(v)], minlength=e - s) > 0
        with np.errstate(invalid="ignore"):
            negative = np.bincount(row_of[v < 0], minlength=e - s) > 0
        flags["redshift_pdf_nan"][s:e] |= nonfinite
        flags["redshift_pdf_negative"][s:e] |= negative & ~nonfinite
        v = np.where(np.isfinite(v) & (v >= 0), v, 0.0)
        srt = post._sorted_rows(v, rel)
        zq = post.sample_quantiles(v, rel, LEVELS, sorted_values=srt)
        self._map_quantiles(zq, slice(s, e), out)
        if self.z_eh is None:
            out["reachable_probability"][s:e] = np.where(lengths > 0, 1.0, np.nan)
        else:
            out["reachable_probability"][s:e] = post.sample_fraction_below(v, rel, self.z_eh)
        f = self._functions(v)
        for (stem, suffix, *_r), fk in zip(QUANTITIES, f):
            out[f"{stem}_mean{'_' + suffix if suffix else ''}"][s:e] = post.sample_means(fk, rel)
        dens, mass = post.histogram_density(v, rel, self.opts["sample_mode_bins"])
        modes, second = self._modes(dens, mass)
        out["redshift_pdf_modes"][s:e] = np.where(lengths > 0, modes, 0)
        out["redshift_pdf_secondary_mass"][s:e] = second
        if self.bands:
            self._sample_magnitudes(v, rel, row_of, f[3], slice(s, e), out, mags, flags)

    def _quantiles_block(self, zq, s, e, out, flags, mags):
        with np.errstate(invalid="ignore"):
            nan = ~np.isfinite(zq).all(axis=1)
            neg = (zq < 0).any(axis=1) & ~nan
            bad_order = ~(np.diff(zq, axis=1) > 0).all(axis=1) & ~nan & ~neg
        flags["redshift_pdf_nan"][s:e] |= nan
        flags["redshift_pdf_negative"][s:e] |= neg
        flags["redshift_pdf_grid_not_increasing"][s:e] |= bad_order
        z, p, bad = post.quantiles_to_grid(zq, self.quantile_levels,
                                           self.opts["nodes_per_interval"])
        ok = np.flatnonzero(~bad)
        if len(ok):
            self._object_grids(z[ok], p[ok], s + ok, out, mags, flags)

    # -- shared helpers --------------------------------------------------------------------
    def _map_quantiles(self, zq, rows, out):
        """Monotone quantities: a quantile of z is a quantile of f(z) (reversed if f falls)."""
        f = self._functions(zq)
        for (stem, suffix, *_r, increasing), fk in zip(QUANTITIES, f):
            end = f"_{suffix}" if suffix else ""
            cols = (0, 1, 2) if increasing else (2, 1, 0)
            for tag, c in zip(TAGS, cols):
                out[f"{stem}_{tag}{end}"][rows] = fk[:, c]

    def _modes(self, dens, node_mass):
        return post.count_modes(dens, node_mass, self.opts["mode_threshold"],
                                self.opts["mode_min_mass"])

    def _colour(self, b, rows, mags):
        if b.colour is None:
            return None
        return mags[b.colour[0]][rows] - mags[b.colour[1]][rows]

    def _magnitudes(self, z, node_mass, mu, rows, out, mags, flags):
        """M = m - mu(z) - K(z, colour) on every node, weighted by the node's probability."""
        for b in self.bands:
            m = mags[b.name][rows]
            colour = self._colour(b, rows, mags)
            c2 = None if colour is None else np.broadcast_to(colour[:, None], z.shape)
            k = b.kcorrection(np.ascontiguousarray(z), None if c2 is None else
                              np.ascontiguousarray(c2))
            with np.errstate(invalid="ignore"):
                M = m[:, None] - mu - k
            defined = np.isfinite(M)
            weight = np.where(defined, node_mass, 0.0)
            q = post.weighted_quantiles(M, weight, LEVELS)
            with np.errstate(invalid="ignore", divide="ignore"):
                mean = np.where(defined, M * node_mass, 0.0).sum(axis=1) / weight.sum(axis=1)
            self._mag_out(b, q, mean, rows, out)
            partial = ((node_mass > 0) & ~defined).any(axis=1) & np.isfinite(m)
            self._partial(rows, partial, flags)

    def _sample_magnitudes(self, v, rel, row_of, mu, rows, out, mags, flags):
        for b in self.bands:
            m = mags[b.name][rows]
            colour = self._colour(b, rows, mags)
            k = b.kcorrection(v, None if colour is None else colour[row_of])
            with np.errstate(invalid="ignore"):
                M = m[row_of] - mu - k
            defined = np.isfinite(M)
            n_rows = len(rel) - 1
            lengths = np.diff(rel)
            width = int(lengths.max()) if n_rows and lengths.max() > 0 else 1
            mat = np.full((n_rows, width), np.nan)
            wts = np.zeros((n_rows, width))
            col = np.arange(len(v)) - np.repeat(rel[:-1], lengths)
            mat[row_of, col] = M
            wts[row_of, col] = 1.0
            q = post.weighted_quantiles(mat, wts, LEVELS)
            with np.errstate(invalid="ignore", divide="ignore"):
                mean = (np.bincount(row_of[defined], weights=M[defined], minlength=n_rows)
                        / np.bincount(row_of[defined], minlength=n_rows))
            self._mag_out(b, q, mean, rows, out)
            undefined = np.bincount(row_of[~defined], minlength=n_rows) > 0
            self._partial(rows, undefined & np.isfinite(m), flags)

    def _mag_out(self, b, q, mean, rows, out):
        for tag, c in zip(TAGS, range(3)):
            out[f"absolute_magnitude_{b.name}_{tag}_mag"][rows] = q[:, c]
        out[f"absolute_magnitude_{b.name}_mean_mag"][rows] = mean

    @staticmethod
    def _partial(rows, mask, flags):
        flags["redshift_pdf_magnitude_partial"][rows] |= mask


@hookimpl
def register_annotators():
    return [RedshiftPdf]


def _probability_check(values):
    low, high = values["low"], values["high"]
    if not 0.0 <= low < high <= 1.0:
        return f"need 0 <= low < high <= 1, got low={low:g}, high={high:g}"
    return None


@hookimpl
def register_selections(manifest):
    """``undecided``: objects whose reachability is uncertain (low < P < high)."""
    from annotator.sql import Selection, SelectionParameter

    added = {c.get("name") for c in manifest.get("columns_added", [])}
    if "reachable_probability" not in added:
        return []
    return [Selection(
        "undecided",
        "Objects that may or may not be inside our event horizon today: "
        "low < reachable_probability < high (default 0.05 and 0.95).",
        "SELECT * FROM catalogue WHERE reachable_probability > ${low} "
        "AND reachable_probability < ${high}",
        (SelectionParameter("low", "lowest probability (excluded)", default=0.05),
         SelectionParameter("high", "highest probability (excluded)", default=0.95)),
        check=_probability_check,
        note="reachable_probability comes from the redshift posterior when the job had one "
             "(manifest: annotators[redshift_pdf]), else from the Gaussian redshift error.")]
