"""SQL functions of the recorded cosmology, and ready-made selections, for ``annotator query``.

Every function is named after the output column it mirrors and takes a redshift (the inverses
take a distance or a time), so ``SELECT comoving_distance_mpc(z)`` on an old output evaluates
with the cosmology recorded in that output's manifest. Results follow the annotators' rules:
NULL for a NULL, NaN, infinite or negative redshift.
"""

from __future__ import annotations

import re

import numpy as np

from annotator import hookimpl
from annotator.sql import Selection, SelectionParameter, SqlFunction, quote_identifier

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


@hookimpl
def register_sql_functions(cosmology) -> list[SqlFunction]:
    functions = [
        SqlFunction(name, _OfRedshift(cosmology, name), (("z", "DOUBLE"),), "DOUBLE", unit, desc)
        for name, unit, desc in _FORWARD
    ]
    functions.append(SqlFunction(
        "reachable", _OfRedshift(cosmology, "reachable", boolean=True), (("z", "DOUBLE"),),
        "BOOLEAN", None,
        "True if a source seen at z lies inside our event horizon today (a signal sent now "
        "reaches it)."))
    functions += [
        SqlFunction(name, _Inverse(cosmology, name), ((arg, "DOUBLE"),), "DOUBLE", None, desc)
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
