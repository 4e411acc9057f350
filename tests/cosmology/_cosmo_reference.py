"""Independent reference for the cosmology tests: E(z) written out from the raw
parameters, and every integral by scipy.integrate.quad (adaptive Gauss-Kronrod) per
value, with tolerances far tighter than the engine's.  Shares no code with the engine
with the engine: its constants are its own (_reference_constants.py, from the published
standards), not the engine's constants module."""

from __future__ import annotations

import math

import numpy as np
from scipy.integrate import quad
from scipy.optimize import brentq

import _reference_constants as RC

KOMATSU_A, KOMATSU_P = 0.3173, 1.83  # Komatsu et al. 2011, ApJS 192, 18, eq. 26
QUAD = dict(epsabs=0.0, epsrel=1e-13, limit=400)


class Reference:
    def __init__(self, h0=70.0, omega_m=0.3, omega_de=None, omega_b=0.0, t_cmb=0.0,
                 n_eff=3.046, m_nu=(), w0=-1.0, wa=0.0, name=None):
        self.h0, self.om, self.w0, self.wa = h0, omega_m, w0, wa
        h0_si = h0 * 1e3 / RC.MEGAPARSEC_M
        rho_c = 3 * h0_si**2 / (8 * math.pi * RC.NEWTON_G_SI)
        self.og = 4 * RC.STEFAN_BOLTZMANN_SI / RC.SPEED_OF_LIGHT_M_S**3 * t_cmb**4 / rho_c
        per = 7 / 8 * (4 / 11) ** (4 / 3) * self.og
        m_nu = list(m_nu)
        if not m_nu:
            self.orad = self.og + per * n_eff
            self.nu = []
            self.nu_w = 0.0
        else:
            w = n_eff / len(m_nu)
            massive = [m for m in m_nu if m > 0]
            self.orad = self.og + per * w * (len(m_nu) - len(massive))
            t_nu = (4 / 11) ** (1 / 3) * t_cmb * RC.BOLTZMANN_EV_PER_K
            self.nu = [m / t_nu for m in massive]  # y today
            self.nu_w = per * w
        self.onu0 = self._nu(1.0)
        if omega_de is None:
            self.ode = 1 - omega_m - self.orad - self.onu0
            self.ok = 0.0
        else:
            self.ode = omega_de
            self.ok = 1 - omega_m - omega_de - self.orad - self.onu0
        self.dh = RC.SPEED_OF_LIGHT_KM_S / h0
        self.th = RC.MEGAPARSEC_KM / h0 / RC.GIGAYEAR_S

    def _nu(self, a):
        return self.nu_w * sum((1 + (KOMATSU_A * y * a) ** KOMATSU_P) ** (1 / KOMATSU_P)
                               for y in self.nu) / a**4

    def e_a(self, a):
        try:
            de = self.ode * a ** (-3 * (1 + self.w0 + self.wa)) * math.exp(-3 * self.wa * (1 - a))
            return math.sqrt(self.orad / a**4 + self.om / a**3 + self.ok / a**2 + de
                             + self._nu(a))
        except OverflowError:  # far future of a growing dark energy: H is infinite
            return math.inf

    def expansion_rate(self, z):
        return self.e_a(1 / (1 + z))

    # --- integrals in x = ln a (dimensionless: c/H0 and 1/H0) --------------------
    def _deta(self, x):
        return math.exp(-x) / self.e_a(math.exp(x))

    def _dt(self, x):
        return 1.0 / self.e_a(math.exp(x))

    def chi(self, z):
        return quad(self._deta, -math.log1p(z), 0.0, **QUAD)[0]

    def age_x(self, x):
        """Cosmic time at x = ln a (any sign), units 1/H0."""
        head = quad(self._dt, -100.0, min(x, 0.0), **QUAD)[0]
        if x > 0:
            head += quad(self._dt, 0.0, x, **QUAD)[0]
        return head

    def eta_x(self, x):
        head = quad(self._deta, -100.0, min(x, 0.0), **QUAD)[0]
        if x > 0:
            head += quad(self._deta, 0.0, x, **QUAD)[0]
        return head

    def remaining_eta(self, x):
        """R(x) = integral of d eta from x to infinity (event horizon at x)."""
        # the integrand falls at least as exp(-0.5 x) for the models tested
        return sum(quad(self._deta, lo, lo + 10.0, **QUAD)[0] for lo in x + 10.0 * np.arange(12))

    # --- quantities in Mpc / Gyr -------------------------------------------------
    def comoving_distance(self, z):
        return self.chi(z) * self.dh

    def transverse(self, z):
        c = self.chi(z)
        if self.ok > 0:
            s = math.sqrt(self.ok)
            return math.sinh(s * c) / s * self.dh
        if self.ok < 0:
            s = math.sqrt(-self.ok)
            return math.sin(s * c) / s * self.dh
        return c * self.dh

    def lookback(self, z):
        return quad(self._dt, -math.log1p(z), 0.0, **QUAD)[0] * self.th

    def age(self, z):
        return self.age_x(-math.log1p(z)) * self.th

    def volume(self, z):
        """4 pi integral of D_M^2 dD_C (Hogg 1999 eq. 29 in integral form)."""
        def f(zz):
            return self.transverse(zz) ** 2 * self.dh / self.expansion_rate(zz)
        # nested quadrature is slow; integrate in ln(1+z)
        return 4 * math.pi * quad(lambda u: f(math.expm1(u)) * math.exp(u), 0,
                                  math.log1p(z), epsabs=0, epsrel=1e-11, limit=200)[0]

    def event_horizon(self):
        return self.remaining_eta(0.0) * self.dh

    def particle_horizon(self):
        return self.eta_x(0.0) * self.dh

    def crossing_age(self, z):
        """Age when chi(z) equals the event horizon: R(x_c) = chi."""
        c = self.chi(z)
        xc = brentq(lambda x: self.remaining_eta(x) - c, -30.0, 60.0, xtol=1e-14, rtol=1e-15)
        return self.age_x(xc) * self.th

    def arrival_age(self, z):
        """Age when a signal sent now reaches chi(z): eta(x_a) - eta0 = chi."""
        c = self.chi(z)
        xa = brentq(lambda x: quad(self._deta, 0.0, x, **QUAD)[0] - c, 0.0, 60.0,
                    xtol=1e-14, rtol=1e-15)
        return self.age_x(xa) * self.th
