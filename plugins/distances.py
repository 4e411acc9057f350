"""Cosmological distances of each object (Hogg 1999, astro-ph/9905116, eqs. 15-25)."""

from __future__ import annotations

import pyarrow as pa

from annotator import ColumnSpec, hookimpl

from ._redshift import CosmologicalAnnotator

UCD_DIST = "pos.distance;phys.cosmology"


class Distances(CosmologicalAnnotator):
    name = "distances"
    version = "1.0"
    summary = "Comoving, transverse comoving, angular-diameter and luminosity distances; " \
              "distance modulus."
    position = 10
    provides = (
        ColumnSpec("comoving_distance_mpc", pa.float64(), "Mpc", UCD_DIST,
                   "Line-of-sight comoving distance D_C."),
        ColumnSpec("transverse_comoving_distance_mpc", pa.float64(), "Mpc", UCD_DIST,
                   "Transverse comoving distance D_M (equals D_C in a flat universe)."),
        ColumnSpec("angular_diameter_distance_mpc", pa.float64(), "Mpc", UCD_DIST,
                   "Angular-diameter distance D_A = D_M / (1 + z)."),
        ColumnSpec("luminosity_distance_mpc", pa.float64(), "Mpc", UCD_DIST,
                   "Luminosity distance D_L = (1 + z) D_M."),
        ColumnSpec("distance_modulus_mag", pa.float64(), "mag", "phot.mag.distMod",
                   "Distance modulus 5 log10(D_L / 10 pc)."),
    )

    def compute(self, z):
        c = self.cosmology
        dm = c.transverse_comoving_distance_mpc(z)
        return {
            "comoving_distance_mpc": c.comoving_distance_mpc(z),
            "transverse_comoving_distance_mpc": dm,
            "angular_diameter_distance_mpc": dm / (1.0 + z),
            "luminosity_distance_mpc": dm * (1.0 + z),
            "distance_modulus_mag": c.distance_modulus_mag(z),
        }


@hookimpl
def register_annotators():
    return [Distances]
