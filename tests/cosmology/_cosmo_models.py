"""Shared model set for the cosmology engine tests (a uniquely named module, so that
other test folders' conftest.py files can never shadow it)."""

from __future__ import annotations

from _cosmo_reference import Reference

from annotator.cosmology import Cosmology

# Flat, open and closed; with and without radiation and massive neutrinos; constant
# and evolving w; with and without an event horizon; one with a big rip.
MODELS = {
    "flat_lcdm_norad": dict(h0=70.0, omega_m=0.3),
    "planck_like": dict(h0=67.66, omega_m=0.30966, omega_b=0.04897, t_cmb=2.7255,
                        n_eff=3.046, m_nu=[0.0, 0.0, 0.06]),
    "flat_massless_nu": dict(h0=69.32, omega_m=0.2865, t_cmb=2.725, n_eff=3.04),
    "open_w_nu": dict(h0=70.0, omega_m=0.3, omega_de=0.6, t_cmb=2.7255,
                      m_nu=[0.05, 0.01, 0.0], w0=-0.9),
    "closed_cpl_nu": dict(h0=70.0, omega_m=0.35, omega_de=0.75, t_cmb=2.7255,
                          m_nu=[0.0, 0.0, 0.06], w0=-1.1, wa=0.3),
    "flat_cpl_no_horizon": dict(h0=68.0, omega_m=0.31, t_cmb=2.7255, m_nu=[0.0, 0.0, 0.06],
                                w0=-0.75, wa=-0.9),
    "open_cpl_norad": dict(h0=72.0, omega_m=0.25, omega_de=0.65, w0=-0.8, wa=0.2),
    "closed_lcdm_norad": dict(h0=65.0, omega_m=0.4, omega_de=0.8),
    "flat_phantom_rad": dict(h0=70.0, omega_m=0.3, t_cmb=2.7255, w0=-1.2),
}

_BUILT = {}


def built(name):
    """(Cosmology, Reference) for a model of MODELS, cached for the session."""
    if name not in _BUILT:
        _BUILT[name] = (Cosmology(name=name, **MODELS[name]).build(), Reference(**MODELS[name]))
    return _BUILT[name]
