"""Constants of the test references, written out from the published standards.

They are deliberately NOT imported from annotator.cosmology.constants: a wrong constant in
the engine must show up as a disagreement with these references.

* c: exact, SI 2019 / CODATA 2018 (Tiesinga et al. 2021, Rev. Mod. Phys. 93, 025010).
* au: exactly 149 597 870 700 m (IAU 2012 Resolution B2).
* parsec: exactly 648 000 / pi au (IAU 2015 Resolution B2), so 1 Mpc = 1e6 pc.
* Julian year: exactly 365.25 days of 86 400 s (IAU); Gyr = 1e9 Julian years.
* G: CODATA 2018, 6.674 30e-11 m^3 kg^-1 s^-2.
* Stefan-Boltzmann sigma, k_B, e: CODATA 2018 (k_B and e exact in SI 2019).
"""

from __future__ import annotations

import math

SPEED_OF_LIGHT_M_S = 299792458.0
SPEED_OF_LIGHT_KM_S = 299792.458
ASTRONOMICAL_UNIT_M = 149597870700.0
PARSEC_M = ASTRONOMICAL_UNIT_M * 648000.0 / math.pi
MEGAPARSEC_M = 1e6 * PARSEC_M
MEGAPARSEC_KM = 1e3 * PARSEC_M
JULIAN_YEAR_S = 365.25 * 86400.0
GIGAYEAR_S = 1e9 * JULIAN_YEAR_S
NEWTON_G_SI = 6.67430e-11
STEFAN_BOLTZMANN_SI = 5.670374419e-8
BOLTZMANN_EV_PER_K = 1.380649e-23 / 1.602176634e-19
TEN_PARSEC_MPC = 1e-5
GIGA_LIGHT_YEAR_M = 1e9 * SPEED_OF_LIGHT_M_S * JULIAN_YEAR_S
