"""Uncertainties of the cosmological quantities, propagated from the redshift error, and the
probability that each object is reachable (inside our event horizon today).

Propagation is first order with the exact derivatives of the cosmology (no finite
differences): for a quantity f(z), sigma_f = |df/dz| sigma_z, with

    dD_C/dz = c / H(z)                                    (Hogg 1999, astro-ph/9905116, eq. 15)
    dD_M/dz = cosh or cos(sqrt|Omega_k| D_C / D_H) dD_C/dz (from eq. 16; = dD_C/dz when flat)
    dD_L/dz = D_M + (1 + z) dD_M/dz                       (from D_L = (1 + z) D_M, eq. 21)
    dmu/dz  = 5 / ln 10 * (dD_L/dz) / D_L                 (from mu = 5 log10(D_L / 10 pc))
    dt_L/dz = 1 / ((1 + z) H(z)) = -d t_emission / dz     (Hogg 1999 eq. 30)

The redshift error is Gaussian (``redshift_error``) or split-normal (``redshift_error_lower``
and ``redshift_error_upper``: a two-piece normal with its mode at the catalogue redshift, the
lower half of width sigma_lower and the upper of width sigma_upper; John 1982, Commun.
Statist. Theory Meth. 11, 879; Wallis 2014, Statist. Sci. 29, 106).  Every quantity here
increases with z except the age at emission, so its lower error comes from the upper
redshift error and vice versa.

``reachable_probability`` = P(z_true < z_EH), z_EH the redshift of today's event horizon.  A
true cosmological redshift cannot be negative, so by default the error distribution is
truncated at z = 0 and renormalised: P = (F(z_EH) - F(0)) / (1 - F(0)), F the CDF of the error
distribution.  ``[annotators.uncertainties] truncate_at_zero = false`` gives the plain F(z_EH)
instead.  A model without an event horizon gives 1 for every usable row.

When ``[columns] redshift_frame = "heliocentric"`` the frames annotator converts the error to
the CMB frame (times d z_cmb / d z_helio) and redefines the error inputs, so this annotator
always sees the redshift and the error of the same frame.
"""

from __future__ import annotations

import math

import numpy as np
import pyarrow as pa

from annotator import Annotator, ColumnSpec, hookimpl
from annotator.errors import ConfigError

from ._redshift import REDSHIFT_HINTS

SYMMETRIC = ("redshift_error",)
PAIR = ("redshift_error_lower", "redshift_error_upper")
ERROR_HINTS = {
    "redshift_error": ("z_err", "zerr", "z_error", "redshift_err", "e_z", "sigma_z", "z_sigma"),
    "redshift_error_lower": ("z_err_lower", "z_err_lo", "zerr_lo", "z_err_minus", "e_z_lo"),
    "redshift_error_upper": ("z_err_upper", "z_err_hi", "zerr_hi", "z_err_plus", "e_z_hi"),
}
FIVE_OVER_LN10 = 5.0 / math.log(10.0)

# (column stem, unit suffix, VOUnit, UCD, quantity, increases with z)
QUANTITIES = (
    ("comoving_distance", "mpc", "Mpc", "stat.error;pos.distance",
     "the line-of-sight comoving distance", True),
    ("luminosity_distance", "mpc", "Mpc", "stat.error;pos.distance",
     "the luminosity distance", True),
    ("distance_modulus", "mag", "mag", "stat.error;phot.mag.distMod",
     "the distance modulus", True),
    ("lookback_time", "gyr", "Gyr", "stat.error;time.age",
     "the lookback time", True),
    ("age_at_emission", "gyr", "Gyr", "stat.error;time.age",
     "the age of the universe at emission", False),
)

FLAG_ERROR = "redshift_error_invalid"
FLAG_ERROR_TEXT = ("The redshift error is missing, NaN, infinite or negative: no propagated "
                   "errors.")


def as_nullable_float64(values: np.ndarray) -> pa.Array:
    """A float64 Arrow array over ``values`` (no copy), null where NaN.

    The same result as ``pa.array(values, from_pandas=True)`` at a sixth of its cost: one
    ``isnan`` pass and a packed validity bitmap.  ``values`` must be C-contiguous float64 and
    must not be modified afterwards (the array shares its memory).
    """
    values = np.ascontiguousarray(values, dtype=np.float64)
    nan = np.isnan(values)
    nulls = int(np.count_nonzero(nan))
    validity = None
    if nulls:
        np.logical_not(nan, out=nan)
        validity = pa.py_buffer(np.packbits(nan, bitorder="little"))
    return pa.Array.from_buffers(pa.float64(), len(values), [validity, pa.py_buffer(values)],
                                 null_count=nulls)


def _numeric(typ: pa.DataType) -> bool:
    return pa.types.is_integer(typ) or pa.types.is_floating(typ) or pa.types.is_decimal(typ)


def _detected(setup, logical: str) -> bool:
    """Whether the planner would find ``logical`` by name among the catalogue's columns."""
    lower = {n.lower(): n for n in setup.catalogue_schema.names}
    for cand in (logical, *ERROR_HINTS[logical]):
        name = cand if cand in setup.catalogue_schema.names else lower.get(cand.lower())
        if name is not None:
            return _numeric(setup.catalogue_schema.field(name).type)
    return False


def error_inputs(setup) -> tuple[str, ...]:
    """The redshift-error inputs of this job: ``("redshift_error",)``, the lower/upper pair,
    or ``()``.  Mappings in ``[columns]`` win over detection; a detected pair wins over a
    detected symmetric error.  Shared with the frames annotator."""
    mapped = {k for k in (*SYMMETRIC, *PAIR) if k in setup.columns}
    if "redshift_error" in mapped and mapped & set(PAIR):
        other = sorted(mapped & set(PAIR))[0]
        raise ConfigError(f"[columns].{other}: give either redshift_error or "
                          f"redshift_error_lower and redshift_error_upper, not both")
    if mapped & set(PAIR):
        missing = [k for k in PAIR if k not in mapped]
        if missing:
            have = sorted(mapped & set(PAIR))[0]
            raise ConfigError(f"[columns].{missing[0]}: missing; {have} needs its other half")
        return PAIR
    if mapped:
        return SYMMETRIC
    if all(_detected(setup, k) for k in PAIR):
        return PAIR
    if _detected(setup, "redshift_error"):
        return SYMMETRIC
    return ()


def reachable_probability_gaussian(z: np.ndarray, sigma: np.ndarray, z_eh: float | None,
                                   truncate_at_zero: bool = True) -> np.ndarray:
    """P(z_true < z_eh) for z_true ~ N(z, sigma^2), optionally truncated to z_true >= 0.

    P = (Phi((z_eh - z)/sigma) - Phi(-z/sigma)) / (1 - Phi(-z/sigma)) when truncated (the
    difference form keeps relative precision for objects far beyond the horizon, and
    1 - Phi(-z/sigma) >= 1/2 since z >= 0).  NaN where z is not a finite non-negative number
    or sigma is not a finite non-negative number; sigma = 0 gives a step: 1 below z_eh, 0 at
    or above it (as ``Cosmology.reachable``).
    """
    z = np.array(z, dtype=np.float64, ndmin=1)
    sigma = np.asarray(sigma, dtype=np.float64)
    with np.errstate(invalid="ignore"):
        bad = ~((z >= 0.0) & (z < np.inf) & (sigma >= 0.0) & (sigma < np.inf))
    z[bad] = np.nan
    return _gaussian_probability(z, sigma, z_eh, truncate_at_zero)


# Phi(a) rounds to exactly 1.0 in double precision for a >= 8.3 (1 - Phi(-8.3) = 1 - 5.2e-17)
# and underflows to 0.0 for a <= -38.5; most rows of a catalogue lie there, so ndtr is only
# evaluated in between.
PHI_IS_ONE = 8.3
PHI_IS_ZERO = -38.5
# Phi(-z/sigma) <= Phi(-8.3) = 5.2e-17 changes P by less than 1e-15 (relative) where P >= 0.05.
TRUNCATION_NEGLIGIBLE_P = 0.05


_ndtr = None


def _scipy_ndtr():
    """scipy.special.ndtr itself (the same ufunc object), loaded without running
    ``scipy/special/__init__.py``.

    That ``__init__`` costs about 0.2 s (its array-API layer builds and compiles module
    clones), most of a small run's start-up, while the ufunc lives in the extension module
    ``scipy.special._ufuncs``, which loads in about 20 ms. So the package is stood in for by
    an empty module with its path while ``_ufuncs`` loads, under the import system's lock for
    ``scipy.special`` (a thread importing scipy.special meanwhile waits, then gets the real
    package, which reuses the loaded ``_ufuncs``). Any failure falls back to the plain import.
    """
    import importlib.util
    import sys
    import types

    try:
        import scipy

        with importlib._bootstrap._ModuleLockManager("scipy.special"):  # type: ignore
            if "scipy.special" not in sys.modules:
                spec = importlib.util.find_spec("scipy.special")
                stand_in = types.ModuleType("scipy.special")
                stand_in.__path__ = list(spec.submodule_search_locations)
                stand_in.__spec__ = importlib.util.spec_from_loader("scipy.special", None,
                                                                    is_package=True)
                stand_in.__spec__._initializing = True
                sys.modules["scipy.special"] = stand_in
                try:
                    from scipy.special._ufuncs import ndtr as found
                finally:
                    if sys.modules.get("scipy.special") is stand_in:
                        del sys.modules["scipy.special"]
                    if vars(scipy).get("special") is stand_in:  # getattr would import it
                        del scipy.special
                return found
    except Exception:  # a scipy laid out differently: the ordinary import
        pass
    from scipy.special import ndtr as found

    return found


def ndtr(x: np.ndarray) -> np.ndarray:
    """scipy.special.ndtr, loaded on first use (see :func:`_scipy_ndtr`: importing
    scipy.special would cost every run ~0.2 s)."""
    global _ndtr
    if _ndtr is None:
        _ndtr = _scipy_ndtr()
    return _ndtr(x)


def _phi(a: np.ndarray) -> np.ndarray:
    """Standard normal CDF (scipy.special.ndtr), skipping the rows where it is exactly 0 or 1."""
    with np.errstate(invalid="ignore"):
        out = np.greater_equal(a, PHI_IS_ONE).astype(np.float64)
        mid = a > PHI_IS_ZERO
        mid &= a < PHI_IS_ONE
    out[mid] = ndtr(a[mid])
    out[np.isnan(a)] = np.nan
    return out


def _gaussian_probability(z, sigma, z_eh, truncate_at_zero):
    """The kernel of :func:`reachable_probability_gaussian`: z already NaN where unusable."""
    if z_eh is None:
        p = np.zeros_like(z)
        p += 1.0
        p[np.isnan(z)] = np.nan
        return p
    with np.errstate(invalid="ignore", divide="ignore"):
        inv = np.divide(1.0, sigma)  # sigma = 0: inf (fixed below)
        arg = np.subtract(z_eh, z)
        arg *= inv
        p = _phi(arg)
        if truncate_at_zero:
            # P = (Phi(a) - F0) / (1 - F0), F0 = Phi(-z/sigma); only where F0 matters
            x = np.multiply(z, inv, out=arg)
            need = x < -PHI_IS_ZERO
            need &= (x < PHI_IS_ONE) | (p < TRUNCATION_NEGLIGIBLE_P)
            f0 = ndtr(-x[need])
            p[need] = (p[need] - f0) / (1.0 - f0)
        exact = sigma == 0.0
        if exact.any():
            zx = z[exact]
            p[exact] = np.where(np.isnan(zx), np.nan, np.where(zx < z_eh, 1.0, 0.0))
        np.minimum(p, 1.0, out=p)
        np.maximum(p, 0.0, out=p)  # keeps NaN
    return p


def reachable_probability_split(z: np.ndarray, lower: np.ndarray, upper: np.ndarray,
                                z_eh: float | None, truncate_at_zero: bool = True
                                ) -> np.ndarray:
    """P(z_true < z_eh) for a split-normal z_true (mode z, widths lower below, upper above).

    CDF (Wallis 2014, eq. 1 integrated): F(x) = 2 s1/(s1+s2) Phi((x-z)/s1) for x <= z and
    1 - 2 s2/(s1+s2) Phi((z-x)/s2) above.  Truncated at 0 (z >= 0 puts x = 0 on the lower
    branch): P = (F(z_eh) - F(0)) / (1 - F(0)).  A zero width makes its half a point mass
    at the mode (weight 0), so s1 = s2 = 0 is a step, as in the Gaussian case.
    """
    z = np.asarray(z, dtype=np.float64)
    s1 = np.asarray(lower, dtype=np.float64)
    s2 = np.asarray(upper, dtype=np.float64)
    with np.errstate(invalid="ignore", divide="ignore"):
        valid = (z >= 0.0) & (s1 >= 0.0) & np.isfinite(s1) & (s2 >= 0.0) & np.isfinite(s2)
        if z_eh is None:
            return np.where(valid, 1.0, np.nan)
        both_zero = (s1 == 0.0) & (s2 == 0.0)
        total = np.where(both_zero, 1.0, s1 + s2)
        w1 = 2.0 * s1 / total  # 0 when s1 = 0: the lower half carries no probability
        w2 = 2.0 * s2 / total
        s1_safe = np.where(s1 > 0.0, s1, 1.0)
        s2_safe = np.where(s2 > 0.0, s2, 1.0)
        d = z_eh - z
        f_eh = np.where(d <= 0.0, w1 * ndtr(d / s1_safe), 1.0 - w2 * ndtr(-d / s2_safe))
        if truncate_at_zero:
            f0 = w1 * ndtr(-z / s1_safe)
            p = (f_eh - f0) / (1.0 - f0)
        else:
            p = f_eh
        p = np.clip(p, 0.0, 1.0)
        p[~valid] = np.nan
    return p


class Uncertainties(Annotator):
    name = "uncertainties"
    version = "1.0"
    documentation = "docs/frames-and-uncertainties.md"
    summary = "Errors of distances, distance modulus and times propagated from the redshift " \
              "error; probability of being reachable."
    position = 50
    input_hints = {"redshift": REDSHIFT_HINTS, **ERROR_HINTS}
    OPTIONS = ("truncate_at_zero",)

    def __init__(self, cosmology=None, errors: tuple[str, ...] = SYMMETRIC,
                 truncate_at_zero: bool = True):
        self.cosmology = cosmology
        self.errors = tuple(errors)
        self.truncate_at_zero = bool(truncate_at_zero)
        self.requires = ("redshift", *self.errors)
        self.flags = {FLAG_ERROR: FLAG_ERROR_TEXT}
        provides = []
        sides = ("",) if self.errors == SYMMETRIC else ("_lower", "_upper")
        for stem, suffix, unit, ucd, what, _ in QUANTITIES:
            for side in sides:
                which = {"": "Uncertainty", "_lower": "Lower uncertainty",
                         "_upper": "Upper uncertainty"}[side]
                provides.append(ColumnSpec(
                    f"{stem}_err{side}_{suffix}", pa.float64(), unit, ucd,
                    f"{which} of {what}, first-order propagation of the redshift error."))
        dist = "Gaussian" if self.errors == SYMMETRIC else "split-normal"
        trunc = " truncated to z >= 0" if self.truncate_at_zero else ""
        provides.append(ColumnSpec(
            "reachable_probability", pa.float64(), None, "stat.probability",
            f"Probability that the true redshift is below the event-horizon redshift (the "
            f"object is reachable), for a {dist} redshift error{trunc}."))
        self.provides = tuple(provides)
        self.z_eh: float | None = None
        self._prepared = False

    @classmethod
    def configure(cls, setup):
        setup.reject_unknown_options(cls.OPTIONS)
        truncate = setup.options.get("truncate_at_zero", True)
        if not isinstance(truncate, bool):
            raise setup.error("truncate_at_zero", f"expected true or false, got {truncate!r}")
        errors = error_inputs(setup)
        if not errors:
            return setup.does_not_apply("no redshift error column (map [columns] redshift_error, "
                                        "or redshift_error_lower and redshift_error_upper)")
        return cls(setup.cosmology, errors, truncate)

    def prepare(self):
        self.z_eh = self.cosmology.derived()["event_horizon_redshift"]
        self._prepared = True

    def __getstate__(self):
        state = self.__dict__.copy()
        state["_prepared"] = False
        return state

    def slopes(self, z: np.ndarray) -> dict[str, np.ndarray]:
        """|d quantity / dz| at z (NaN where z is NaN), by column stem; fresh arrays."""
        c = self.cosmology
        ddc = c.dcomoving_distance_dz_mpc(z)
        ddm = ddc if c.flat_space else c.dtransverse_comoving_distance_dz_mpc(z)
        dm = c.transverse_comoving_distance_mpc(z)
        one_plus_z = z + 1.0
        ddl = np.multiply(ddm, one_plus_z)
        ddl += dm
        dl = np.multiply(dm, one_plus_z, out=dm)
        with np.errstate(divide="ignore", invalid="ignore"):
            dmu = np.divide(ddl, dl, out=one_plus_z)
            dmu *= FIVE_OVER_LN10
            at_zero = dl == 0.0
        if at_zero.any():
            dmu[at_zero] = np.nan  # mu = -inf at z = 0: no finite error
        dt = c.dlookback_time_dz_gyr(z)
        return {"comoving_distance": ddc, "luminosity_distance": ddl,
                "distance_modulus": dmu, "lookback_time": dt, "age_at_emission": dt}

    def annotate(self, batch):
        if not self._prepared:
            self.prepare()
        z = batch.values("redshift")
        sigmas = [batch.values(name) for name in self.errors]
        with np.errstate(invalid="ignore"):
            z_ok = z >= 0.0  # false for NaN
            z_ok &= z < np.inf
            err_ok = np.ones(batch.num_rows, dtype=bool)
            for s in sigmas:
                err_ok &= s >= 0.0
                err_ok &= s < np.inf
        batch.flag(FLAG_ERROR, z_ok & ~err_ok)
        z_ok &= err_ok
        z_use = np.array(z)  # copy: the input may be a read-only view or another's column
        if not z_ok.all():
            z_use[~z_ok] = np.nan
        slopes = self.slopes(z_use)
        out = {}
        if self.errors == SYMMETRIC:
            (sigma,) = sigmas
            for stem, suffix, *_ in QUANTITIES:
                if stem == "age_at_emission":
                    out[f"{stem}_err_{suffix}"] = out["lookback_time_err_gyr"]
                    continue
                err = slopes[stem]
                err *= sigma
                out[f"{stem}_err_{suffix}"] = err
            prob = _gaussian_probability(z_use, sigma, self.z_eh, self.truncate_at_zero)
        else:
            lower, upper = sigmas
            for stem, suffix, _, _, _, increasing in QUANTITIES:
                lo, hi = (lower, upper) if increasing else (upper, lower)
                out[f"{stem}_err_lower_{suffix}"] = slopes[stem] * lo
                out[f"{stem}_err_upper_{suffix}"] = slopes[stem] * hi
            prob = reachable_probability_split(z_use, lower, upper, self.z_eh,
                                               self.truncate_at_zero)
        out["reachable_probability"] = prob
        return {name: as_nullable_float64(v) for name, v in out.items()}


@hookimpl
def register_annotators():
    return [Uncertainties]
