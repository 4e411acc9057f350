"""Physical and astronomical constants used by the cosmology engine.

Every number here is either exact by definition or taken from a published
standard; the source is given beside each one.  Nothing else in the engine
hard-codes a physical constant.

Sources
-------
* SI 2019: the revised SI (BIPM, SI Brochure, 9th edition, 2019) fixes c, h,
  e and k_B exactly.
* CODATA 2018: Tiesinga et al. 2021, Rev. Mod. Phys. 93, 025010.
* IAU 2012 Resolution B2: the astronomical unit is exactly 149 597 870 700 m.
* IAU 2015 Resolution B2: the parsec is exactly 648 000 / pi au.
* IAU Style Manual (Wilkins 1989) and the IAU recommendation on the light-year:
  the Julian year is exactly 365.25 days of 86 400 s and the light-year is the
  distance light travels in vacuum in one Julian year.
"""

from __future__ import annotations

import math

# --- defining constants -----------------------------------------------------
C_M_S = 299_792_458.0  # speed of light in vacuum, m/s (exact; SI 2019, CODATA 2018)
C_KM_S = C_M_S / 1.0e3  # 299 792.458 km/s (exact)

K_B_J_K = 1.380649e-23  # Boltzmann constant, J/K (exact; SI 2019)
E_CHARGE_C = 1.602176634e-19  # elementary charge, C (exact; SI 2019)
K_B_EV_K = K_B_J_K / E_CHARGE_C  # Boltzmann constant, eV/K (exact ratio, 8.617333262e-5)

G_SI = 6.67430e-11  # Newtonian constant of gravitation, m^3 kg^-1 s^-2 (CODATA 2018)
SIGMA_SB_SI = 5.670374419e-8  # Stefan-Boltzmann constant, W m^-2 K^-4 (CODATA 2018,
#                               exact to the digits given since h, c, k_B are exact)

# --- lengths ------------------------------------------------------------------
AU_M = 149_597_870_700.0  # astronomical unit, m (exact; IAU 2012 Resolution B2)
PARSEC_M = AU_M * 648_000.0 / math.pi  # parsec, m (exact; IAU 2015 Resolution B2)
KPC_M = 1.0e3 * PARSEC_M  # kiloparsec, m
MPC_M = 1.0e6 * PARSEC_M  # megaparsec, m (3.0856775814913673e22)
GPC_M = 1.0e9 * PARSEC_M  # gigaparsec, m
MPC_KM = MPC_M / 1.0e3  # megaparsec, km
TEN_PC_IN_MPC = 1.0e-5  # 10 pc in Mpc (the distance-modulus zero point)

# --- times ----------------------------------------------------------------------
DAY_S = 86_400.0  # day, s (exact; SI)
JULIAN_YEAR_S = 365.25 * DAY_S  # Julian year, s (exact; IAU Style Manual)
GYR_S = 1.0e9 * JULIAN_YEAR_S  # gigayear (Julian), s
MYR_S = 1.0e6 * JULIAN_YEAR_S  # megayear (Julian), s

# --- light-years ---------------------------------------------------------------
LY_M = C_M_S * JULIAN_YEAR_S  # light-year, m (exact; IAU: c times one Julian year)
GLY_M = 1.0e9 * LY_M  # billion light-years, m
MPC_IN_LY = MPC_M / LY_M  # 1 Mpc in light-years (about 3.2616 million)
MPC_IN_GLY = MPC_M / GLY_M  # 1 Mpc in Gly (about 3.2616e-3)
GLY_IN_MPC = GLY_M / MPC_M  # 1 Gly in Mpc (about 306.6)

# --- radiation and neutrinos -----------------------------------------------------
# Radiation constant divided by c^2: rho_gamma = A_RAD_KG_M3_K4 * T^4 (mass density),
# from a = 4 sigma / c (Stefan-Boltzmann law), so a / c^2 = 4 sigma / c^3.
A_RAD_KG_M3_K4 = 4.0 * SIGMA_SB_SI / C_M_S**3
# Neutrino-to-photon temperature ratio after e+e- annihilation, (4/11)^(1/3), and the
# energy density per massless species relative to photons, (7/8)(4/11)^(4/3)
# (standard thermal history; e.g. Komatsu et al. 2011, ApJS 192, 18, section 3.3,
# where the latter appears as 0.2271).
T_NU_OVER_T_CMB = (4.0 / 11.0) ** (1.0 / 3.0)
RHO_NU_OVER_RHO_GAMMA_PER_SPECIES = 7.0 / 8.0 * (4.0 / 11.0) ** (4.0 / 3.0)

__all__ = [name for name in dir() if name.isupper()]
