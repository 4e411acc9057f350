"""SQL functions of the recorded cosmology, and ready-made selections, for ``annotator query``.

Every function is named after the output column it mirrors and takes a redshift (the inverses
take a distance or a time), so ``SELECT comoving_distance_mpc(z)`` on an old output evaluates
with the cosmology recorded in that output's manifest. Results follow the annotators' rules:
NULL for a NULL, NaN, infinite or negative redshift.

Each function is also evaluated by DuckDB itself, on all its threads (``SqlApproximation``:
piecewise polynomials fitted to the engine when a query first uses the function, checked
against it to ``RTOL`` at every check point; the engine answers outside ``Z_NATIVE`` and
wherever a segment would not pass). The form fitted takes out what a polynomial cannot
follow: the zero at z = 0 of a distance, time or velocity (``power``), the decades an age or
H(z) spans (``log``), the logarithm of the distance modulus (``outer``). ``reachable`` is exact SQL: a
comparison with the event-horizon redshift.
"""

from __future__ import annotations

import re

import numpy as np

from annotator import hookimpl
from annotator.sql import (Selection, SelectionParameter, SqlApproximation, SqlFunction,
                           quote_identifier)

Z_NATIVE = 30.0  # redshifts up to this are evaluated natively (the engine answers above)
Z_INVERSE_LOW = 1e-3  # redshift_at_age: natively for z in [Z_INVERSE_LOW, Z_NATIVE]
RTOL = 1e-9  # tolerance of the native forms against the engine (the engine: 1e-10 of quadrature)
MU_ATOL = 1e-9  # mag: the distance modulus' tolerance (absolute: it crosses zero near 10 pc)
_MU_OUTER = ("(5 * log10({}) + 25)", lambda g: 5.0 * np.log10(g) + 25.0,
             lambda mu: 10.0 ** ((mu - 25.0) / 5.0))
# how each forward function is fitted (see the module text)
_FORMS = {
    "comoving_distance_mpc": {"power": 1},
    "transverse_comoving_distance_mpc": {"power": 1},
    "angular_diameter_distance_mpc": {"power": 1},
    "luminosity_distance_mpc": {"power": 1},
    "distance_modulus_mag": {"power": 1, "outer": _MU_OUTER, "rtol": 0.0, "atol": MU_ATOL},
    "lookback_time_gyr": {"power": 1},
    "age_at_emission_gyr": {"log": True},
    "comoving_volume_mpc3": {"power": 3},
    "differential_comoving_volume_mpc3_sr": {"power": 2},
    "hubble_parameter_km_s_mpc": {"log": True},
    "recession_velocity_now_c": {"power": 1},
    "recession_velocity_at_emission_c": {"power": 1},
    # the crossing age diverges like -ln z at z = 0: fitted from Z_CROSSING_LOW, on geometric
    # segments; the arrival age diverges at the event horizon and is NaN beyond it
    "horizon_crossing_age_gyr": {"log": True, "null_where_nan": True},
    "signal_arrival_age_gyr": {"log": True, "null_where_nan": True},
}
Z_CROSSING_LOW = 1e-3

ABSOLUTE_MAGNITUDE = re.compile(r"^absolute_magnitude_([a-z0-9_]+)_mag$")
K_SHELL_OBJECTS = 101  # objects nearest z_max (either side) whose median K stands for K(z_max)


class _OfRedshift:
    """``cosmology.<method>(z)``; picklable (a class, not a closure).

    The engine returns NaN for a NaN, infinite or negative redshift (NULL in SQL, as in the
    annotated columns); for ``reachable``, which is False there, such rows are masked.
    """

    def __init__(self, cosmology, method: str, boolean: bool = False):
        self.cosmology = cosmology
        self.method = method
        self.boolean = boolean

    def __call__(self, z: np.ndarray):
        out = getattr(self.cosmology, self.method)(z)
        if self.boolean:
            return np.ma.MaskedArray(np.asarray(out, dtype=bool),
                                     mask=~(z >= 0) | np.isinf(z))
        return out


class _Inverse:
    """``cosmology.<method>(x)`` for a distance or time (the engine returns NaN outside)."""

    def __init__(self, cosmology, method: str):
        self.cosmology = cosmology
        self.method = method

    def __call__(self, x: np.ndarray):
        return getattr(self.cosmology, self.method)(x)


# name, unit, description (of z)
_FORWARD = (
    ("comoving_distance_mpc", "Mpc", "Line-of-sight comoving distance D_C at redshift z."),
    ("transverse_comoving_distance_mpc", "Mpc",
     "Transverse comoving distance D_M at redshift z."),
    ("angular_diameter_distance_mpc", "Mpc", "Angular-diameter distance D_A = D_M / (1 + z)."),
    ("luminosity_distance_mpc", "Mpc", "Luminosity distance D_L = (1 + z) D_M."),
    ("distance_modulus_mag", "mag", "Distance modulus 5 log10(D_L / 10 pc)."),
    ("lookback_time_gyr", "Gyr", "Time since light left a source at redshift z."),
    ("age_at_emission_gyr", "Gyr", "Cosmic age when light left a source at redshift z."),
    ("comoving_volume_mpc3", "Mpc3", "All-sky comoving volume out to redshift z."),
    ("differential_comoving_volume_mpc3_sr", "Mpc3/sr",
     "Comoving volume per unit redshift per steradian, dV_C / dz / dOmega, at z."),
    ("hubble_parameter_km_s_mpc", "km/s/Mpc", "Hubble parameter H(z)."),
    ("recession_velocity_now_c", "c",
     "Proper recession velocity today, in units of c, of a source seen at redshift z."),
    ("recession_velocity_at_emission_c", "c",
     "Proper recession velocity at emission, in units of c, of a source seen at redshift z."),
    ("horizon_crossing_age_gyr", "Gyr",
     "Cosmic age at which a source seen at z crosses our event horizon."),
    ("signal_arrival_age_gyr", "Gyr",
     "Cosmic age at which a light signal sent from us today reaches a source seen at z "
     "(NULL when unreachable)."),
)
_INVERSE = (
    ("redshift_at_comoving_distance", "d_mpc",
     "Redshift at which the comoving distance is d_mpc (Mpc)."),
    ("redshift_at_lookback_time", "t_gyr", "Redshift at which the lookback time is t_gyr (Gyr)."),
    ("redshift_at_age", "t_gyr", "Redshift at which the cosmic age was t_gyr (Gyr)."),
)


def _forward(name: str) -> SqlApproximation:
    form = {"rtol": RTOL, "geometric_from": 1.0, **_FORMS[name]}
    if name == "horizon_crossing_age_gyr":
        return SqlApproximation((Z_CROSSING_LOW, Z_NATIVE), **(form | {
            "geometric_from": Z_CROSSING_LOW}))
    return SqlApproximation((0.0, Z_NATIVE), **form)


def _inverse(cosmology, name: str) -> SqlApproximation | None:
    """The argument range of each inverse over Z_NATIVE (redshift_at_age stops short of today,
    where its redshift falls to zero and a relative tolerance cannot be held)."""
    with np.errstate(all="ignore"):
        if name == "redshift_at_comoving_distance":
            lo, hi = 0.0, float(cosmology.comoving_distance_mpc(Z_NATIVE))
            power = 1
        elif name == "redshift_at_lookback_time":
            lo, hi = 0.0, float(cosmology.lookback_time_gyr(Z_NATIVE))
            power = 1
        else:
            lo = float(cosmology.age_at_emission_gyr(Z_NATIVE))
            hi = float(cosmology.age_at_emission_gyr(Z_INVERSE_LOW))
            power = 0
    if not (np.isfinite(lo) and np.isfinite(hi) and hi > lo):
        return None
    return SqlApproximation((lo, hi), power=power, rtol=RTOL)


def _reachable_sql(cosmology) -> str:
    """``reachable`` in SQL: z >= 0 and below the event-horizon redshift (NULL for a NULL,
    NaN, infinite or negative z, as the Python form; NaN compares above every number in
    DuckDB)."""
    zeh = cosmology.derived().get("event_horizon_redshift")
    inside = "TRUE" if zeh is None or not np.isfinite(zeh) else f"z < {float(zeh):.17e}"
    return f"CASE WHEN z >= 0 AND z < 'inf'::DOUBLE THEN {inside} END"


@hookimpl
def register_sql_functions(cosmology) -> list[SqlFunction]:
    functions = [
        SqlFunction(name, _OfRedshift(cosmology, name), (("z", "DOUBLE"),), "DOUBLE", unit, desc,
                    approximation=_forward(name))
        for name, unit, desc in _FORWARD
    ]
    functions.append(SqlFunction(
        "reachable", _OfRedshift(cosmology, "reachable", boolean=True), (("z", "DOUBLE"),),
        "BOOLEAN", None,
        "True if a source seen at z lies inside our event horizon today (a signal sent now "
        "reaches it).", native_sql=_reachable_sql(cosmology)))
    functions += [
        SqlFunction(name, _Inverse(cosmology, name), ((arg, "DOUBLE"),), "DOUBLE", None, desc,
                    approximation=_inverse(cosmology, name))
        for name, arg, desc in _INVERSE
    ]
    return functions


# --------------------------------------------------------------------------- selections
def _slice_check(values: dict) -> str | None:
    if values["zmin"] < 0:
        return f"zmin = {values['zmin']} is negative"
    if values["zmax"] <= values["zmin"]:
        return f"zmax = {values['zmax']} must be above zmin = {values['zmin']}"
    return None


@hookimpl
def register_selections(manifest) -> list[Selection]:
    added = {c.get("name") for c in manifest.get("columns_added", [])}
    redshift = None
    for rec in manifest.get("annotators", []):
        if "comoving_distance_mpc" in rec.get("columns", []):
            redshift = (rec.get("inputs") or {}).get("redshift")
    redshift = redshift or (manifest.get("column_mapping") or {}).get("redshift")
    out: list[Selection] = [
        Selection("clean", "Rows annotated without any flag.",
                  "SELECT * FROM catalogue WHERE annotation_flags = ''"),
        Selection("flagged", "Rows with at least one flag (see annotation_flags).",
                  "SELECT * FROM catalogue WHERE annotation_flags <> ''"),
    ]
    if "reachable" in added:
        out += [
            Selection("reachable",
                      "Objects inside our cosmic event horizon today (a signal sent now "
                      "reaches them).",
                      "SELECT * FROM catalogue WHERE reachable",
                      note="Rows without a usable redshift (reachable is NULL) are in neither "
                           "reachable nor unreachable."),
            Selection("unreachable",
                      "Objects beyond our cosmic event horizon today (no signal sent now "
                      "ever reaches them).",
                      "SELECT * FROM catalogue WHERE NOT reachable",
                      note="Rows without a usable redshift (reachable is NULL) are in neither "
                           "reachable nor unreachable."),
        ]
    if redshift:
        zq = quote_identifier(redshift)
        out.append(Selection(
            "redshift_slice", f"Objects with zmin <= {redshift} < zmax.",
            f"SELECT * FROM catalogue WHERE {zq} >= ${{zmin}} AND {zq} < ${{zmax}}",
            (SelectionParameter("zmin", "lowest redshift (included)"),
             SelectionParameter("zmax", "highest redshift (excluded)")),
            check=_slice_check))
    bands = sorted(m.group(1) for name in added if name and (m := ABSOLUTE_MAGNITUDE.match(name))
                   and not (m.group(1).endswith("_err")
                            and f"absolute_magnitude_{m.group(1)[:-4]}_mag" in added))
    if redshift and bands and "distance_modulus_mag" in added:
        out.append(_volume_limited(redshift, bands, [b for b in bands
                                                     if f"kcorrection_{b}_mag" in added]))
    return out


def _volume_limited(redshift: str, bands: list[str], with_k: list[str]) -> Selection:
    """M <= mlim - mu(zmax) - K(zmax), for objects with 0 < z <= zmax.

    The band is a checked identifier (one of ``bands``), so it is placed inside the quoted
    column names; K(zmax) defaults to the median K of the objects whose redshift is nearest
    zmax.
    """
    zq = quote_identifier(redshift)
    kmax_sql = (f'SELECT median("kcorrection_${{band}}_mag") FROM (SELECT '
                f'"kcorrection_${{band}}_mag" FROM catalogue WHERE {zq} > 0 '
                f'AND "kcorrection_${{band}}_mag" IS NOT NULL ORDER BY abs({zq} - ${{zmax}}) '
                f'LIMIT {K_SHELL_OBJECTS})')

    def check(values: dict) -> str | None:
        if values["zmax"] <= 0:
            return f"zmax = {values['zmax']} must be above 0"
        if "kmax" not in values and values["band"] not in with_k:
            return (f"this output has no kcorrection_{values['band']}_mag column to estimate "
                    f"K(zmax) from: give --param kmax=VALUE")
        return None

    return Selection(
        "volume_limited",
        "Objects up to zmax bright enough to be seen anywhere out to zmax: "
        "M <= mlim - mu(zmax) - K(zmax).",
        f"SELECT * FROM catalogue WHERE {zq} > 0 AND {zq} <= ${{zmax}}\n"
        f'  AND "absolute_magnitude_${{band}}_mag" <= ${{mlim}} - distance_modulus_mag(${{zmax}})'
        f" - ${{kmax}}",
        (SelectionParameter("band", "band of the absolute magnitude", kind="choice",
                            default="r" if "r" in bands else bands[0], choices=tuple(bands)),
         SelectionParameter("mlim", "apparent-magnitude limit of the survey in that band"),
         SelectionParameter("zmax", "the sample's maximum redshift"),
         SelectionParameter("kmax", "K-correction at zmax in mag",
                            default_sql=kmax_sql if with_k else None)),
        check=check,
        note=(f"K(zmax) depends on each object's spectrum, so it is not known at zmax for every "
              f"object; unless kmax is given it is estimated as the median K-correction of the "
              f"{K_SHELL_OBJECTS} objects with one whose redshifts are nearest zmax (on either "
              f"side: the median then sits at zmax when K varies smoothly with z)."))
