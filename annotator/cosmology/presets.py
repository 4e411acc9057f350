"""Published parameter sets.

omega_m here always means cold dark matter + baryons, *excluding* massive neutrinos
(their density follows from m_nu); where a paper quotes Omega_m including neutrinos
the subtraction is shown.  All presets are flat (omega_de closes the budget).
"""

from __future__ import annotations

import copy
from types import MappingProxyType

from .errors import CosmologyError

_PRESETS = {
    # Planck Collaboration 2020, A&A 641, A6 ("Planck 2018 results. VI"), Table 2,
    # last column (TT,TE,EE+lowE+lensing+BAO): H0 = 67.66, Omega_m = 0.3111 (including
    # one 0.06 eV neutrino, Omega_nu = 0.00141, hence 0.30966 for CDM + baryons),
    # Omega_b h^2 = 0.02242 (Omega_b = 0.04897); T_CMB = 2.7255 K (Fixsen 2009, ApJ 707,
    # 916), N_eff = 3.046 and minimal masses 0, 0, 0.06 eV as assumed in that paper.
    "planck2018": {
        "name": "planck2018", "h0": 67.66, "omega_m": 0.30966, "omega_b": 0.04897,
        "omega_de": None, "t_cmb": 2.7255, "n_eff": 3.046, "m_nu": (0.0, 0.0, 0.06),
        "w0": -1.0, "wa": 0.0,
    },
    # Planck Collaboration 2016, A&A 594, A13 ("Planck 2015 results. XIII"), Table 4,
    # last column (TT,TE,EE+lowP+lensing+ext): H0 = 67.74, Omega_m = 0.3089 (including
    # one 0.06 eV neutrino, Omega_nu = 0.00140, hence 0.3075), Omega_b h^2 = 0.02230
    # (Omega_b = 0.0486); T_CMB = 2.7255 K, N_eff = 3.046, masses 0, 0, 0.06 eV.
    "planck2015": {
        "name": "planck2015", "h0": 67.74, "omega_m": 0.3075, "omega_b": 0.0486,
        "omega_de": None, "t_cmb": 2.7255, "n_eff": 3.046, "m_nu": (0.0, 0.0, 0.06),
        "w0": -1.0, "wa": 0.0,
    },
    # Hinshaw et al. 2013, ApJS 208, 19 ("Nine-year WMAP observations"), Table 4,
    # WMAP+eCMB+BAO+H0 column: H0 = 69.32, Omega_b = 0.04628, Omega_c = 0.2402
    # (Omega_m = 0.2865); T_CMB = 2.725 K, N_eff = 3.04, massless neutrinos, as used there.
    "wmap9": {
        "name": "wmap9", "h0": 69.32, "omega_m": 0.2865, "omega_b": 0.04628,
        "omega_de": None, "t_cmb": 2.725, "n_eff": 3.04, "m_nu": (),
        "w0": -1.0, "wa": 0.0,
    },
    # The round-number model of textbooks and worked examples (e.g. Hogg 1999,
    # astro-ph/9905116, figures; Davis & Lineweaver 2004, PASA 21, 97): H0 = 70,
    # Omega_m = 0.3, Omega_Lambda = 0.7, flat, no radiation (t_cmb = 0).
    "textbook": {
        "name": "textbook", "h0": 70.0, "omega_m": 0.3, "omega_b": 0.0,
        "omega_de": None, "t_cmb": 0.0, "n_eff": 3.046, "m_nu": (),
        "w0": -1.0, "wa": 0.0,
    },
}

PRESET_SOURCES = MappingProxyType({
    "planck2018": "Planck Collaboration 2020, A&A 641, A6, Table 2 "
                  "(TT,TE,EE+lowE+lensing+BAO)",
    "planck2015": "Planck Collaboration 2016, A&A 594, A13, Table 4 "
                  "(TT,TE,EE+lowP+lensing+ext)",
    "wmap9": "Hinshaw et al. 2013, ApJS 208, 19, Table 4 (WMAP+eCMB+BAO+H0)",
    "textbook": "round-number flat LCDM (H0 = 70, Omega_m = 0.3, no radiation)",
})

# Read-only view: name -> parameter dict (copies are handed out by preset()).
PRESETS = MappingProxyType({name: MappingProxyType(p) for name, p in _PRESETS.items()})

_CACHE = {}


def _preset_params(name):
    if not isinstance(name, str) or name not in _PRESETS:
        raise CosmologyError(
            f"unknown cosmology preset {name!r}; available presets: {', '.join(_PRESETS)}",
            parameter="preset",
        )
    return copy.deepcopy(_PRESETS[name])


def preset(name):
    """The Cosmology of a named preset (one shared, immutable instance per name)."""
    from .model import Cosmology

    params = _preset_params(name)
    cosmo = _CACHE.get(name)
    if cosmo is None:
        cosmo = _CACHE.setdefault(name, Cosmology(**params))
    return cosmo
