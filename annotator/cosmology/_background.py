"""The expansion history E(a)^2 = H(a)^2 / H0^2 of an FLRW model.

Everything here is dimensionless and works in x = ln a.  E^2 is evaluated in log
space (a signed log-sum-exp) so that the far past (a ~ 1e-17) and the far future
(a ~ e^400, super-exponential dark energy) neither overflow nor lose precision.
"""

from __future__ import annotations

import math

import numpy as np

from . import constants as k

# Fitting formula for the energy density of a massive neutrino species relative to a
# massless one, Komatsu et al. 2011, ApJS 192, 18, eq. (26):
#     f(y) = [1 + (A y)^p]^(1/p),  y = m_nu a / (k_B T_nu0),
#     A = 180 zeta(3) / (7 pi^4),  p = 1.83.
# The paper prints A = 0.3173 (the exact expression is 0.31732...); the fit itself is
# good to a few 1e-3, so the fifth digit carries no physics.  We use the printed value,
# as other implementations of the same published formula do.
KOMATSU_A = 0.3173
APERY_ZETA3 = 1.2020569031595942  # zeta(3), Apery's constant (OEIS A002117)
KOMATSU_A_EXACT = 180.0 * APERY_ZETA3 / (7.0 * math.pi**4)  # for reference only
KOMATSU_P = 1.83

# A curvature density this small is treated as exactly flat (it is rounding noise
# left by the closure relation and would otherwise decide the far future).
FLAT_TOLERANCE = 1e-12


class Background:
    """Density parameters today and the dimensionless E^2(x), x = ln a."""

    __slots__ = (
        "omega_m", "omega_de", "omega_k", "omega_gamma", "omega_rad", "omega_nu",
        "nu_prefactor", "nu_lny", "w0", "wa", "_terms",
    )

    def __init__(self, *, h0, omega_m, omega_de, t_cmb, n_eff, m_nu, w0, wa):
        # Photon density from the CMB temperature: rho_gamma = (4 sigma/c^3) T^4, in
        # units of the critical density 3 H0^2 / (8 pi G).
        h0_si = h0 / k.MPC_KM  # s^-1
        rho_crit = 3.0 * h0_si**2 / (8.0 * math.pi * k.G_SI)
        self.omega_gamma = k.A_RAD_KG_M3_K4 * t_cmb**4 / rho_crit
        n_species = len(m_nu)
        massive = [m for m in m_nu if m > 0.0]
        n_massless = n_species - len(massive) if n_species else None
        per_species = k.RHO_NU_OVER_RHO_GAMMA_PER_SPECIES * self.omega_gamma
        if n_species == 0:
            # No masses listed: all of n_eff is massless radiation.
            omega_nu_massless = per_species * n_eff
            self.nu_prefactor = 0.0
        else:
            # Each listed species carries n_eff / len(m_nu) of the effective number.
            weight = n_eff / n_species
            omega_nu_massless = per_species * weight * n_massless
            self.nu_prefactor = per_species * weight
        self.omega_rad = self.omega_gamma + omega_nu_massless
        if massive and self.omega_gamma > 0.0:
            t_nu_ev = k.K_B_EV_K * k.T_NU_OVER_T_CMB * t_cmb
            # ln(A y0) for each massive species; A y = exp(nu_lny + x).
            self.nu_lny = np.log(KOMATSU_A * np.asarray(massive, float) / t_nu_ev)
            self.omega_nu = self.nu_prefactor * float(np.sum(_komatsu_f_ln(self.nu_lny, 0.0)))
        else:
            self.nu_lny = np.zeros(0)
            self.omega_nu = 0.0
        self.omega_m = float(omega_m)
        if omega_de is None:
            omega_de = 1.0 - self.omega_m - self.omega_rad - self.omega_nu
            omega_k = 0.0
        else:
            omega_k = 1.0 - self.omega_m - omega_de - self.omega_rad - self.omega_nu
            if abs(omega_k) < FLAT_TOLERANCE:
                omega_k = 0.0
        self.omega_de = float(omega_de)
        self.omega_k = float(omega_k)
        self.w0 = float(w0)
        self.wa = float(wa)
        # (log coefficient, sign, power of a) for the pure power-law terms.
        terms = []
        if self.omega_rad > 0.0:
            terms.append((math.log(self.omega_rad), 1.0, -4.0))
        if self.omega_m > 0.0:
            terms.append((math.log(self.omega_m), 1.0, -3.0))
        if self.omega_k != 0.0:
            terms.append((math.log(abs(self.omega_k)), math.copysign(1.0, self.omega_k), -2.0))
        self._terms = terms

    # ------------------------------------------------------------------ E^2(x)
    def ln_e2(self, x, slope=False):
        """ln E^2 at x = ln a (array); with slope=True also d ln E^2 / dx.

        Where E^2 <= 0 the log is NaN (the caller treats that as no solution).
        """
        x = np.asarray(x, dtype=float)
        logs, signs, slopes = [], [], []
        for c, s, p in self._terms:
            logs.append(c + p * x)
            signs.append(s)
            slopes.append(p)
        if self.omega_de > 0.0:
            q = -3.0 * (1.0 + self.w0 + self.wa)
            if self.wa != 0.0:
                ex = np.exp(x)
                logs.append(math.log(self.omega_de) + q * x + 3.0 * self.wa * (ex - 1.0))
                slopes.append(q + 3.0 * self.wa * ex)
            else:
                logs.append(math.log(self.omega_de) + q * x)
                slopes.append(q)
            signs.append(1.0)
        if self.nu_prefactor > 0.0:
            lnpref = math.log(self.nu_prefactor)
            for lny in self.nu_lny:
                arg = KOMATSU_P * (lny + x)
                logs.append(lnpref - 4.0 * x + np.logaddexp(0.0, arg) / KOMATSU_P)
                slopes.append(-4.0 + _sigmoid(arg))
                signs.append(1.0)
        logs = [np.broadcast_to(lg, x.shape) for lg in logs]
        big = logs[0]
        for lg in logs[1:]:
            big = np.maximum(big, lg)
        total = np.zeros(x.shape)
        dtotal = np.zeros(x.shape)
        with np.errstate(over="ignore", invalid="ignore"):
            for lg, sg, sl in zip(logs, signs, slopes):
                w = sg * np.exp(lg - big)
                total += w
                dtotal += w * sl
            out = big + np.log(np.where(total > 0.0, total, np.nan))
            if slope:
                return out, dtotal / total
        return out

    def e2_linear(self, x):
        """E^2 a^2 (= (da/dt)^2 / H0^2) as a plain float, for root/minimum searches."""
        a = math.exp(x)
        val = self.omega_rad / a**2 + self.omega_m / a + self.omega_k
        if self.omega_de > 0.0:
            q = -3.0 * (1.0 + self.w0 + self.wa)
            val += self.omega_de * math.exp((q + 2.0) * x + 3.0 * self.wa * (a - 1.0))
        if self.nu_prefactor > 0.0:
            val += self.nu_prefactor / a**2 * float(np.sum(_komatsu_f_ln(self.nu_lny, x)))
        return val

    # ------------------------------------------------------------ asymptotics
    def future_fate(self):
        """Analytic late-time behaviour as a -> infinity.

        Returns (recollapses, has_event_horizon, finite_future):
        the late-time dominant term decides (power laws a^-4, a^-3, a^-2 and the
        dark-energy term a^(-3(1+w0+wa)) exp(3 wa (a-1))).
        """
        de = self.omega_de > 0.0
        if de and self.wa > 0.0:
            return False, True, True  # dark energy grows super-exponentially: big rip
        if de and self.wa == 0.0:
            q = -3.0 * (1.0 + self.w0)
            if q > -2.0:  # w0 < -1/3: dark energy dominates, accelerating forever
                return False, True, q > 0.0  # q > 0 (w0 < -1): finite future (big rip)
            if q == -2.0:  # w0 = -1/3: dark energy scales like curvature
                eff = self.omega_de + self.omega_k
                if eff != 0.0:
                    return eff < 0.0, False, False
                return False, False, False
        # Dark energy fades faster than curvature: curvature decides.
        if self.omega_k < 0.0:
            return True, False, False
        return False, False, False

    def early_slope(self, x):
        """-d ln E / d ln a at x (positive when E grows into the past)."""
        _, s = self.ln_e2(np.array([x]), slope=True)
        return -0.5 * float(s[0])


def _sigmoid(v):
    return 0.5 * (1.0 + np.tanh(0.5 * v))


def _komatsu_f_ln(nu_lny, x):
    """f(y) of Komatsu et al. 2011 eq. (26) for each species, at x = ln a."""
    arg = KOMATSU_P * (np.asarray(nu_lny) + x)
    return np.exp(np.logaddexp(0.0, arg) / KOMATSU_P)
