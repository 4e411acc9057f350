"""Heliocentric redshifts to the rest frame of the cosmic microwave background.

Cosmological distances belong to the frame in which the CMB is isotropic; catalogues quote
redshifts measured from the Sun (heliocentric, or barycentric: the two differ by ~1e-8).
With ``[columns] redshift_frame = "heliocentric"`` this annotator adds ``redshift_cmb`` and
*redefines* the logical input ``redshift`` as that column, so every later annotator that asks
for "redshift" (distances, times, horizons, uncertainties, ...) uses the CMB-frame value.
When the job has a redshift error it also adds the CMB-frame error and redefines the error
inputs the same way.

The exact relativistic transformation (derivation)
--------------------------------------------------
Let the Sun move with speed beta c towards the dipole apex (unit vector a) relative to the
CMB frame.  A photon from the source arrives along k = -n, n being the unit vector *towards*
the source.  A photon of energy E in the CMB frame has, in the Sun's frame (Lorentz
transformation of the four-momentum, e.g. Jackson 1999, Classical Electrodynamics, 3rd ed.,
eq. 11.19; Rybicki & Lightman 1979, eq. 4.11):

    E_sun = gamma E (1 - beta a.k) = gamma E (1 + beta cos theta_cmb),

with theta_cmb the angle between source and apex *as seen in the CMB frame*.  The inverse
transformation, E = gamma E_sun (1 + beta a.k'), uses the direction k' = -n' the Sun's
observer actually sees: E_sun / E = 1 / (gamma (1 - beta cos theta)), theta being the
observed angle between the source (ra, dec) and the apex.  The two forms are the same number
(they differ by the aberration of the direction, ~beta rad); catalogue positions are observed
directions, so this module uses the second one.  With 1 + z = E_emitted / E_received,

    (1 + z_cmb) / (1 + z_helio) = E_sun / E = gamma (1 + beta cos theta_cmb)
                                            = 1 / (gamma (1 - beta cos theta)).

Sign check: a source towards the apex (theta = 0) is approached by the Sun, so its light is
blueshifted in the Sun's frame; its CMB-frame redshift is LARGER than the heliocentric one,
by the factor gamma (1 + beta) = sqrt((1 + beta) / (1 - beta)) (the longitudinal Doppler
factor).  The Jacobian of the conversion is d z_cmb / d z_helio = (1 + z_cmb) / (1 + z_helio),
the same factor, which is how the redshift error is carried into the CMB frame.

Directions
----------
The dipole is given in galactic coordinates (l, b).  The ICRS -> galactic rotation is the one
the IAU galactic system defines, as transferred to the ICRS for the Hipparcos catalogue
(ESA 1997, The Hipparcos and Tycho Catalogues, ESA SP-1200, Vol. 1, Sect. 1.5.3, eqs. 1.5.9 -
1.5.11): the north galactic pole at ICRS (alpha, delta) = (192.85948 deg, +27.12825 deg) and
the galactic longitude of the ascending node of the galactic plane on the equator
l_Omega = 32.93192 deg (values from memory; the matrix built from them reproduces the matrix
printed there to 5e-11).
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass

import numpy as np
import pyarrow as pa

from annotator import Annotator, ColumnSpec, hookimpl
from annotator.cosmology.constants import C_KM_S
from annotator.errors import ConfigError

from ._redshift import REDSHIFT_HINTS
from .uncertainties import ERROR_HINTS, as_nullable_float64, error_inputs

FRAMES = ("heliocentric", "cmb")
RA_HINTS = ("ra", "ra_deg", "radeg", "ra_icrs", "raj2000")
DEC_HINTS = ("dec", "dec_deg", "decdeg", "dec_icrs", "dej2000", "decj2000")

# The north galactic pole and the ascending node, in the ICRS (ESA 1997, SP-1200, Vol. 1,
# Sect. 1.5.3; from memory).
NGP_RA_DEG = 192.85948
NGP_DEC_DEG = 27.12825
ASCENDING_NODE_L_DEG = 32.93192


@dataclass(frozen=True)
class Dipole:
    """The velocity of the Sun relative to the CMB: speed and apex in galactic coordinates."""

    speed_km_s: float
    l_deg: float
    b_deg: float

    @property
    def beta(self) -> float:
        return self.speed_km_s / C_KM_S

    @property
    def gamma(self) -> float:
        return 1.0 / math.sqrt((1.0 - self.beta) * (1.0 + self.beta))

    def apex_icrs(self) -> np.ndarray:
        """Unit vector towards the apex, ICRS Cartesian."""
        return galactic_to_icrs(self.l_deg, self.b_deg)


# Planck Collaboration 2020, A&A 641, A1 ("Planck 2018 results. I"), Sect. 5.1 / Table 3:
# 369.82 +- 0.11 km/s towards l = 264.021 +- 0.011 deg, b = 48.253 +- 0.005 deg (from memory).
PLANCK2018_DIPOLE = Dipole(speed_km_s=369.82, l_deg=264.021, b_deg=48.253)


def icrs_to_galactic_matrix() -> np.ndarray:
    """The 3x3 rotation taking ICRS Cartesian vectors to galactic Cartesian vectors.

    Rows are the galactic axes x_G (towards l = 0, b = 0), y_G (l = 90 deg) and z_G (the
    north galactic pole), expressed in the ICRS.  The ascending node N of the galactic
    plane on the equator lies at alpha = alpha_NGP + 90 deg, delta = 0, and has galactic
    longitude l_Omega; m = z_G x N lies in the plane at l = l_Omega + 90 deg.
    """
    ra_p, dec_p, l_node = map(math.radians, (NGP_RA_DEG, NGP_DEC_DEG, ASCENDING_NODE_L_DEG))
    z_g = np.array([math.cos(dec_p) * math.cos(ra_p), math.cos(dec_p) * math.sin(ra_p),
                    math.sin(dec_p)])
    node = np.array([math.cos(ra_p + math.pi / 2), math.sin(ra_p + math.pi / 2), 0.0])
    m = np.cross(z_g, node)
    x_g = math.cos(l_node) * node - math.sin(l_node) * m
    y_g = math.sin(l_node) * node + math.cos(l_node) * m
    return np.array([x_g, y_g, z_g])


def galactic_to_icrs(l_deg: float, b_deg: float) -> np.ndarray:
    """ICRS Cartesian unit vector of the direction (l, b) in degrees."""
    lr, br = math.radians(l_deg), math.radians(b_deg)
    g = np.array([math.cos(br) * math.cos(lr), math.cos(br) * math.sin(lr), math.sin(br)])
    return icrs_to_galactic_matrix().T @ g


def valid_position(ra_deg: np.ndarray, dec_deg: np.ndarray) -> np.ndarray:
    """True where 0 <= ra <= 360 and -90 <= dec <= 90 (degrees; false for NaN)."""
    with np.errstate(invalid="ignore"):
        ok = np.abs(ra_deg - 180.0) <= 180.0
        ok &= np.abs(dec_deg) <= 90.0
    return ok


def doppler_factor_minus_one(ra_deg: np.ndarray, dec_deg: np.ndarray,
                             dipole: Dipole = PLANCK2018_DIPOLE) -> np.ndarray:
    """(1 + z_cmb) / (1 + z_helio) - 1 for observed directions (ra, dec) in degrees.

    NaN where the position is invalid.  Computed as (gamma beta mu - (gamma - 1)) /
    (gamma (1 - beta mu)), mu = cos(theta), so that it keeps full relative precision
    (the factor itself is within 1.3e-3 of 1).
    """
    ra = np.asarray(ra_deg, dtype=np.float64)
    dec = np.asarray(dec_deg, dtype=np.float64)
    ok = valid_position(ra, dec)
    beta, gamma = dipole.beta, dipole.gamma
    gamma_minus_one = beta * beta * gamma * gamma / (gamma + 1.0)
    ax, ay, az = dipole.apex_icrs()
    # mu = cos(dec) (ax cos(ra) + ay sin(ra)) + az sin(dec)
    #    = cos(dec) r_xy cos(ra - phi) + az sin(dec),  phi = atan2(ay, ax);
    # cos(dec) = sqrt(1 - sin^2(dec)) as dec is in [-90, 90]: two trig calls per row.
    r_xy = math.hypot(ax, ay)
    phi = math.atan2(ay, ax)
    with np.errstate(invalid="ignore"):
        sin_dec = np.radians(dec)
        np.sin(sin_dec, out=sin_dec)
        cos_dec = np.multiply(sin_dec, sin_dec)
        np.subtract(1.0, cos_dec, out=cos_dec)
        np.sqrt(cos_dec, out=cos_dec)
        mu = np.multiply(ra, math.pi / 180.0)
        mu -= phi
        np.cos(mu, out=mu)
        mu *= cos_dec
        mu *= r_xy
        sin_dec *= az
        mu += sin_dec
        # D - 1 = (1 - gamma (1 - beta mu)) / (gamma (1 - beta mu)); reuse the buffers
        gb = gamma * beta
        den = np.multiply(mu, -gb, out=cos_dec)
        den += gamma
        num = np.multiply(mu, gb, out=mu)
        num -= gamma_minus_one
        num /= den
    if not ok.all():
        num[~ok] = np.nan
    return num


def heliocentric_to_cmb(z_helio, ra_deg, dec_deg,
                        dipole: Dipole = PLANCK2018_DIPOLE) -> np.ndarray:
    """CMB-frame redshift from a heliocentric one at observed (ra, dec) in degrees (ICRS).

    (1 + z_cmb) = (1 + z_helio) / (gamma (1 - beta cos theta)); NaN for an invalid position
    or a NaN redshift.
    """
    z = np.asarray(z_helio, dtype=np.float64)
    dm1 = doppler_factor_minus_one(ra_deg, dec_deg, dipole)
    return z + dm1 * (1.0 + z)


def parse_dipole(value, key: str = "[columns].cmb_dipole") -> Dipole:
    """A dipole from ``{speed_km_s = ..., l_deg = ..., b_deg = ...}``; errors name the key."""
    if value is None:
        return PLANCK2018_DIPOLE
    if not isinstance(value, Mapping):
        raise ConfigError(f"{key}: expected a table {{ speed_km_s = ..., l_deg = ..., "
                          f"b_deg = ... }}, got {value!r}")
    fields = ("speed_km_s", "l_deg", "b_deg")
    unknown = sorted(set(value) - set(fields))
    if unknown:
        raise ConfigError(f"{key}.{unknown[0]}: unknown key (allowed: {', '.join(fields)})")
    missing = [f for f in fields if f not in value]
    if missing:
        raise ConfigError(f"{key}.{missing[0]}: missing (give speed_km_s, l_deg and b_deg)")
    nums = {}
    for f in fields:
        v = value[f]
        if isinstance(v, bool) or not isinstance(v, (int, float)) or not math.isfinite(v):
            raise ConfigError(f"{key}.{f}: expected a finite number, got {v!r}")
        nums[f] = float(v)
    if not 0.0 <= nums["speed_km_s"] < C_KM_S:
        raise ConfigError(f"{key}.speed_km_s: must be in [0, {C_KM_S}) km/s, got "
                          f"{nums['speed_km_s']!r}")
    if not -90.0 <= nums["b_deg"] <= 90.0:
        raise ConfigError(f"{key}.b_deg: must be in [-90, 90] degrees, got {nums['b_deg']!r}")
    return Dipole(**nums)


_ERROR_COLUMNS = {
    "redshift_error": ("redshift_cmb_err", "Uncertainty of redshift_cmb (the redshift error "
                       "times d z_cmb / d z_helio)."),
    "redshift_error_lower": ("redshift_cmb_err_lower", "Lower uncertainty of redshift_cmb "
                             "(the lower redshift error times d z_cmb / d z_helio)."),
    "redshift_error_upper": ("redshift_cmb_err_upper", "Upper uncertainty of redshift_cmb "
                             "(the upper redshift error times d z_cmb / d z_helio)."),
}


class RedshiftFrames(Annotator):
    name = "redshift_frames"
    version = "1.0"
    documentation = "docs/frames-and-uncertainties.md"
    summary = "CMB-frame redshift from a heliocentric one (relativistic, CMB dipole); " \
              "used by every later annotator."
    position = 2
    column_settings = ("redshift_frame", "cmb_dipole")
    input_hints = {"redshift": REDSHIFT_HINTS, "ra": RA_HINTS, "dec": DEC_HINTS, **ERROR_HINTS}

    def __init__(self, dipole: Dipole = PLANCK2018_DIPOLE, errors: tuple[str, ...] = ()):
        self.dipole = dipole
        self.errors = tuple(errors)
        self.requires = ("redshift", "ra", "dec", *self.errors)
        provides = [ColumnSpec(
            "redshift_cmb", pa.float64(), None, "src.redshift",
            "Redshift in the CMB rest frame: (1 + z_cmb) = (1 + z) / (gamma (1 - beta cos "
            "theta)), theta the angle to the CMB dipole apex.")]
        redefines = {"redshift": "redshift_cmb"}
        for logical in self.errors:
            col, desc = _ERROR_COLUMNS[logical]
            provides.append(ColumnSpec(col, pa.float64(), None, "stat.error;src.redshift", desc))
            redefines[logical] = col
        self.provides = tuple(provides)
        self.redefines = redefines
        flags = {"position_invalid": "ra or dec is missing or outside [0, 360] / [-90, 90] "
                                     "degrees: no CMB-frame redshift."}
        if self.errors:
            flags["redshift_error_invalid"] = ("The redshift error is missing, NaN, infinite "
                                               "or negative: no propagated errors.")
        self.flags = flags

    @classmethod
    def configure(cls, setup):
        frame = setup.columns.get("redshift_frame")
        dipole_given = "cmb_dipole" in setup.columns
        if frame is None:
            if dipole_given:
                raise ConfigError('[columns].cmb_dipole: only used with [columns] '
                                  'redshift_frame = "heliocentric"')
            return setup.does_not_apply('no [columns] redshift_frame: the redshifts are used '
                                        'as given (set "heliocentric" to convert to the CMB frame)')
        if frame not in FRAMES:
            raise ConfigError(f"[columns].redshift_frame: {frame!r} is not one of "
                              f"{', '.join(repr(f) for f in FRAMES)}")
        setup.reject_unknown_options(())
        if frame == "cmb":
            # Already in the CMB frame: nothing to add (no copy of the redshift column).
            if dipole_given:
                raise ConfigError('[columns].cmb_dipole: only used with redshift_frame = '
                                  '"heliocentric" (this job says "cmb")')
            return setup.does_not_apply('redshift_frame = "cmb": the redshifts are already in '
                                        'the CMB frame')
        return cls(parse_dipole(setup.columns.get("cmb_dipole")), error_inputs(setup))

    def annotate(self, batch):
        z = batch.values("redshift")
        dm1 = doppler_factor_minus_one(batch.values("ra"), batch.values("dec"), self.dipole)
        with np.errstate(invalid="ignore"):
            batch.flag("position_invalid", np.isnan(dm1))
            z_cmb = 1.0 + z
            z_cmb *= dm1
            z_cmb += z
            out = {"redshift_cmb": z_cmb}
            if self.errors:
                sigmas = [batch.values(logical) for logical in self.errors]
                # One bad half of a lower/upper pair voids both (as in the uncertainties).
                good = np.ones(batch.num_rows, dtype=bool)
                for sigma in sigmas:
                    good &= sigma >= 0.0  # false for NaN
                    good &= sigma < np.inf
                for logical, sigma in zip(self.errors, sigmas):
                    err = dm1 + 1.0
                    err *= sigma
                    if not good.all():
                        err[~good] = np.nan
                    out[_ERROR_COLUMNS[logical][0]] = as_nullable_float64(err)
                usable = z_cmb >= 0.0  # false for NaN
                usable &= ~good
                batch.flag("redshift_error_invalid", usable)
        return out


@hookimpl
def register_annotators():
    return [RedshiftFrames]
