"""Tabulation of one cosmology: integrals on a grid in x = ln a, then the tables.

All work is dimensionless here (distances in c/H0, times in 1/H0); the caller scales
the tables to Mpc and Gyr.  Grid layout (x = ln a):

* an extension far into the past, [X_PAST - 16, X_PAST], spacing 1/4, that only
  feeds the integrals (its start carries an analytic power-law tail);
* the tabulated past, [X_PAST, 0], spacing H = 1/128, X_PAST = -ln(1 + z_max);
* the future, [0, 8] at spacing H, then blocks of 8 at spacing 1/32 until the
  horizon integrals have converged (capped at x = 400).
"""

from __future__ import annotations

import math

import numpy as np

from ._tables import UniformTable, gauss_legendre_intervals, hermite_nonuniform, invert_monotone

H = 1.0 / 128.0  # grid spacing in ln(1+z) of every table in z
Z_MAX_TARGET = 1.0e10  # tables in z reach at least this redshift
N_PAST = int(math.ceil(math.log1p(Z_MAX_TARGET) / H))
U_MAX = N_PAST * H  # ln(1 + z_max_tabulated)
EXT_WIDTH, EXT_STEP = 16.0, 0.25
FUT_NEAR, FUT_STEP, FUT_BLOCK, FUT_CAP = 8.0, 1.0 / 32.0, 8.0, 400.0
GL_ORDER = 8
R_FLOOR = 1e-13  # the future grid ends where the remaining conformal time is below this
#                   fraction of the event horizon


class Tables:
    """Integrals and interpolation tables of one background (dimensionless)."""

    def __init__(self, bg):
        self.bg = bg
        fate = bg.future_fate()
        self.has_eh = fate[1]
        self.finite_future = fate[2]
        self._integrate()
        self._z_tables()
        self._inverse_tables()
        self._horizon_tables()

    # ------------------------------------------------------------ integration
    def _g_eta(self, x):
        return self._g(x)[0]

    def _g_t(self, x):
        return self._g(x)[1]

    def _g(self, x):
        """Integrands in x: d eta/dx = 1/(a E), dt/dx = 1/E."""
        with np.errstate(over="ignore", under="ignore"):
            half = 0.5 * self.bg.ln_e2(x)
            return np.exp(-x - half), np.exp(-half)

    def _integrate(self):
        bg = self.bg
        x_ext = np.linspace(-U_MAX - EXT_WIDTH, -U_MAX, int(EXT_WIDTH / EXT_STEP) + 1)
        x_past = -U_MAX + H * np.arange(N_PAST + 1)
        x_past[-1] = 0.0
        x_near = H * np.arange(int(FUT_NEAR / H) + 1)
        past_nodes = np.concatenate([x_ext[:-1], x_past])
        i0 = len(past_nodes) - 1  # index of x = 0
        self.i_tab0 = len(x_ext) - 1  # index of x = -U_MAX

        # Past: forward from the far-past tail (eta, t) and backward from today (chi, lookback).
        d_eta, d_t = gauss_legendre_intervals(past_nodes, self._g, GL_ORDER)
        x0 = past_nodes[0]
        ge0, gt0 = self._g(np.array([x0]))
        p = bg.early_slope(x0)  # E ~ a^-p at the start; p > 1 checked at construction
        eta_tail = float(ge0[0]) / (p - 1.0)
        t_tail = float(gt0[0]) / p
        eta_past = eta_tail + np.concatenate([[0.0], np.cumsum(d_eta)])
        t_past = t_tail + np.concatenate([[0.0], np.cumsum(d_t)])
        chi_past = np.concatenate([np.cumsum(d_eta[::-1])[::-1], [0.0]])
        lb_past = np.concatenate([np.cumsum(d_t[::-1])[::-1], [0.0]])
        eta0 = eta_past[-1]
        t0 = t_past[-1]
        self.eta0, self.t0 = float(eta0), float(t0)

        # Future: blocks until converged.
        fut = [x_near]
        d_eta_n, d_t_n = gauss_legendre_intervals(x_near, self._g, GL_ORDER)
        fut_deta, fut_dt = [d_eta_n], [d_t_n]
        n_blk = int(FUT_BLOCK / FUT_STEP)
        while True:
            x_end = fut[-1][-1]
            eta_sum = float(sum(np.sum(d) for d in fut_deta))
            lne2, sl = bg.ln_e2(np.array([x_end]), slope=True)
            g_end = float(self._g(np.array([x_end]))[0][0])
            rate = 1.0 + 0.5 * float(sl[0])  # d eta/dx ~ exp(-rate x)
            if self.has_eh:
                if rate > 0.0 and g_end / rate <= R_FLOOR * eta_sum:
                    break
            elif eta_sum >= 1.05 * eta0:
                break
            if x_end >= FUT_CAP:
                break
            blk = x_end + FUT_STEP * np.arange(n_blk + 1)
            fut.append(blk[1:])
            d_eta_b, d_t_b = gauss_legendre_intervals(blk, self._g, GL_ORDER)
            fut_deta.append(d_eta_b)
            fut_dt.append(d_t_b)
        x_fut = np.concatenate(fut)
        d_eta_f = np.concatenate(fut_deta)
        d_t_f = np.concatenate(fut_dt)
        eta_fut = eta0 + np.concatenate([[0.0], np.cumsum(d_eta_f)])
        t_fut = t0 + np.concatenate([[0.0], np.cumsum(d_t_f)])
        x_end = float(x_fut[-1])
        lne2_end, sl_end = bg.ln_e2(np.array([x_end]), slope=True)
        g_eta_end, g_t_end = (float(v[0]) for v in self._g(np.array([x_end])))

        # Whole grid.
        self.x = np.concatenate([past_nodes, x_fut[1:]])
        self.i0 = i0
        self.eta = np.concatenate([eta_past, eta_fut[1:]])
        self.t = np.concatenate([t_past, t_fut[1:]])
        self.chi_past = chi_past
        self.lb_past = lb_past
        lne2_all, sl_all = bg.ln_e2(self.x, slope=True)
        self.ln_e2 = lne2_all
        self.slope = sl_all  # d ln E^2 / dx
        self.g_eta = np.exp(-self.x - 0.5 * lne2_all)
        self.g_t = np.exp(-0.5 * lne2_all)
        self.x_end = x_end

        # Remaining conformal time R(x) = eta_inf - eta(x) (event horizon at x).
        if self.has_eh:
            rate = 1.0 + 0.5 * float(sl_end[0])
            r_tail = g_eta_end / rate if rate > 0 else 0.0
            d_all = np.concatenate([d_eta, d_eta_f])
            self.R = r_tail + np.concatenate([np.cumsum(d_all[::-1])[::-1], [0.0]])
            self.R0 = float(self.R[i0])
            self.eta_inf = self.eta0 + self.R0
        else:
            self.R = None
            self.R0 = math.inf
            self.eta_inf = math.inf
        if self.finite_future:
            pf = 0.5 * float(sl_end[0])  # E ~ a^pf, pf > 0
            self.t_end = float(self.t[-1]) + (g_t_end / pf if pf > 0 else 0.0)
        else:
            self.t_end = math.inf

    # --------------------------------------------------------------- z tables
    def _z_tables(self):
        bg = self.bg
        sl = slice(self.i_tab0, self.i0 + 1)
        x = self.x[sl][::-1]  # u = -x increasing from 0
        u = -x
        u[0] = 0.0
        lne = 0.5 * self.ln_e2[sl][::-1]
        dlne = -0.5 * self.slope[sl][::-1]  # d ln E / du
        e = np.exp(lne)
        chi = self.chi_past[sl][::-1].copy()
        chi[0] = 0.0
        dchi = np.exp(u - lne)  # d chi / du = (1+z)/E
        t = self.t[sl][::-1]
        lb = self.lb_past[sl][::-1].copy()
        lb[0] = 0.0
        self.u_nodes = u
        self.z_max = float(math.expm1(U_MAX))

        T = {}
        # Quantities that vanish at z = 0 are tabulated as f(u)/u (marked "/u"), which
        # keeps the interpolation error relative even in the first intervals.
        T["ln_e"] = UniformTable(0.0, H, lne, dlne)
        T["chi/u"] = _over_u(u, chi, dchi)
        T["lookback/u"] = _over_u(u, lb, 1.0 / e)
        T["ln_age"] = UniformTable(0.0, H, np.log(t), -1.0 / (e * t))
        T["ln_dchi_dz"] = UniformTable(0.0, H, -lne, -dlne)
        T["ln_dt_dz"] = UniformTable(0.0, H, -lne - u, -dlne - 1.0)

        ok = bg.omega_k
        sq = math.sqrt(abs(ok))
        y = sq * chi
        if ok > 0:
            dm, cosn = np.sinh(y) / sq, np.cosh(y)
        elif ok < 0:
            dm, cosn = np.sin(y) / sq, np.cos(y)
        else:
            dm, cosn = chi, np.ones_like(chi)
        ddm = cosn * dchi
        T["dm/u"] = _over_u(u, dm, ddm)
        T["da/u"] = _over_u(u, dm * np.exp(-u), (ddm - dm) * np.exp(-u))
        T["dl/u"] = _over_u(u, dm * np.exp(u), (ddm + dm) * np.exp(u))
        m = cosn / e
        T["ddm_dz"] = UniformTable(0.0, H, m, ok * dm * dchi / e - m * dlne)
        # Comoving volume: tabulate g = (3 V / 4 pi)^(1/3), smooth and ~chi near z = 0.
        g = _volume_root(chi, ok)
        dg = np.empty_like(g)
        dg[1:] = (dm[1:] / g[1:]) ** 2 * dchi[1:]
        dg[0] = dchi[0]
        T["vol_root/u"] = _over_u(u, g, dg)
        # dV/dz/dOmega = D_M^2 / E: tabulate its square root.
        rs = np.exp(-0.5 * lne)
        q = dm * rs
        T["dvol_root/u"] = _over_u(u, q, ddm * rs - 0.5 * q * dlne)
        # Recession velocity at emission, chi E / (1+z), in units of c.
        ve = chi * e * np.exp(-u)
        T["v_emit/u"] = _over_u(u, ve, 1.0 + ve * (dlne - 1.0))
        self.T = T
        # For the derived constants.
        self.chi_max = float(chi[-1])

    # -------------------------------------------------------- inverse tables
    def _inverse_tables(self):
        # Nodes: whole past (with extension), ln eta and ln t increasing in x.
        xs = self.x[: self.i0 + 1]
        eta = self.eta[: self.i0 + 1]
        t = self.t[: self.i0 + 1]
        self._ln_eta = (xs, np.log(eta), self.g_eta[: self.i0 + 1] / eta)
        self._ln_t = (self.x, np.log(self.t), self.g_t / self.t)
        # z at comoving distance chi: variable y = ln(1 + eta0 chi / eta_e), eta_e = eta0 - chi
        # the conformal time at emission.  dy/dchi = 1 at chi = 0 (so near z = 0, u(y)
        # varies on the same scale as the forward tables), and y ~ -ln(eta_e) at high z.
        i_tab0 = self.i_tab0
        e0 = self.eta0
        sl = slice(i_tab0, self.i0 + 1)
        u_n = -xs[sl][::-1].copy()
        u_n[0] = 0.0
        chi_n = self.chi_past[sl][::-1].copy()
        chi_n[0] = 0.0
        eta_n = eta[sl][::-1]
        y_n = np.log1p(e0 * chi_n / eta_n)
        dy_deta = (1.0 - e0) / (eta_n + e0 * chi_n) - 1.0 / eta_n
        dy_du = -dy_deta * self.g_eta[sl][::-1]
        n = int(math.floor(y_n[-1] / H))
        y = H * np.arange(n + 1)
        uy = invert_monotone(u_n, y_n, dy_du, y)
        uy[0] = 0.0
        lne2 = self.bg.ln_e2(-uy)
        g_eta = np.exp(uy - 0.5 * lne2)
        # recover eta_e at the nodes from y: e^y = 1 + e0 chi / eta = 1 + e0 (e0 - eta)/eta
        eta_y = e0 * e0 / (np.exp(y) - 1.0 + e0)
        chi_y = e0 - eta_y
        dyde = (1.0 - e0) / (eta_y + e0 * chi_y) - 1.0 / eta_y
        du_dy = 1.0 / (-dyde * g_eta)
        # u(y) vanishes at y = 0: tabulate u / y for relative accuracy at small z.
        self.T_inv_chi = _over_u(y, uy, du_dy)
        # z at age / lookback: variable w = -ln(t_emit / t0).
        w_max = -math.log(t[i_tab0] / self.t0)
        n = int(math.floor(w_max / H))
        w = H * np.arange(n + 1)
        xw = invert_monotone(xs, np.log(t), self.g_t[: self.i0 + 1] / t, math.log(self.t0) - w)
        xw[0] = 0.0
        lne2 = self.bg.ln_e2(xw)
        e = np.exp(0.5 * lne2)
        self.T_inv_t = _over_u(w, -xw, e * self.t0 * np.exp(-w))

    def redshift_where_chi(self, chi):
        """Scalar: z with D_C(z) = chi (dimensionless), or None beyond the grid."""
        target = self.eta0 - chi
        xs, f, df = self._ln_eta
        if not target > math.exp(f[0]):
            return None
        xv = float(invert_monotone(xs, f, df, np.array([math.log(target)]))[0])
        return float(math.expm1(-xv))

    # ------------------------------------------------------- horizon tables
    def _horizon_tables(self):
        bg = self.bg
        self.T_cross = None
        self.T_arrive_eta = None
        if self.has_eh:
            # Variable tau = ln(eta / R): elapsed over remaining conformal time.  It is
            # asymptotically linear in ln a both near the big bang and in the far
            # future, so ln t(tau) is smooth everywhere.  Crossing: R = chi, eta =
            # eta_inf - chi; arrival: R = R0 - chi, eta = eta0 + chi.
            ok = self.R > 1e-3 * R_FLOOR * self.R0
            xs = self.x[ok]
            r, eta, g = self.R[ok], self.eta[ok], self.g_eta[ok]
            f = np.log(eta) - np.log(r)  # tau(x), increasing
            df = g * (1.0 / eta + 1.0 / r)
            tau_lo = math.log(self.R0 / self.eta0)  # at R = eta0 (chi can not exceed eta0)
            tau_hi = min(float(f[-1]), math.log(self.eta_inf / (R_FLOOR * self.R0)))
            n = int(math.floor((tau_hi - tau_lo) / H))
            tau = tau_lo + H * np.arange(n + 1)
            xs_s = invert_monotone(xs, f, df, tau)
            lnt, _ = hermite_nonuniform(*self._ln_t, xs_s)
            # dt/dtau = a R eta / eta_inf, with R = eta_inf / (1 + e^tau)
            r_s = self.eta_inf / (1.0 + np.exp(tau))
            eta_s = self.eta_inf - r_s
            dlnt = np.exp(xs_s - lnt) * r_s * eta_s / self.eta_inf
            self.T_cross = UniformTable(tau_lo, H, lnt, dlnt)
        else:
            # Signal arrival without an event horizon: t at eta = eta0 + q, q uniform.
            xf = self.x[self.i0:]
            eta_f = self.eta[self.i0:]
            q_max = min(self.chi_max, float(eta_f[-1]) - self.eta0)
            n = 4096
            hq = q_max / n
            q = hq * np.arange(n + 1)
            xq = invert_monotone(xf, eta_f, self.g_eta[self.i0:], self.eta0 + q)
            xq[0] = 0.0
            lnt, _ = hermite_nonuniform(*self._ln_t, xq)
            tt = np.exp(lnt)
            tt[0] = self.t0
            self.T_arrive_eta = UniformTable(0.0, hq, tt, np.exp(xq))


def _over_u(u, f, df):
    """Table of g = f/u for f(0) = 0 on a uniform grid u (u[0] = 0).

    g' = (f' - g)/u; at u = 0, g = f'(0) and g' = f''(0)/2, with f''(0) from a
    one-sided five-point stencil of the exact f' (error O(h^4), negligible here).
    """
    g = np.empty_like(f)
    dg = np.empty_like(f)
    g[1:] = f[1:] / u[1:]
    dg[1:] = (df[1:] - g[1:]) / u[1:]
    g[0] = df[0]
    h = u[1] - u[0]
    d2 = (-25.0 * df[0] + 48.0 * df[1] - 36.0 * df[2] + 16.0 * df[3] - 3.0 * df[4]) / (12.0 * h)
    dg[0] = 0.5 * d2
    return UniformTable(0.0, h, g, dg)


def _volume_root(chi, ok):
    """(3 V / (4 pi))^(1/3) for comoving distance chi (units c/H0), curvature ok.

    V = 4 pi int_0^chi D_M^2 dchi (Hogg 1999 eq. 29 in integral form, valid past the
    equator of a closed space), so 3V/(4 pi) = 3 F(y) / |ok|^(3/2), y = sqrt|ok| chi,
    F = (sinh y cosh y - y)/2 (open) or (y - sin y cos y)/2 (closed).
    """
    if ok == 0:
        return chi.copy()
    sq = math.sqrt(abs(ok))
    y = sq * chi
    sign = 1.0 if ok > 0 else -1.0
    with np.errstate(over="ignore"):
        if ok > 0:
            three_f = 1.5 * (np.sinh(y) * np.cosh(y) - y)
        else:
            three_f = 1.5 * (y - np.sin(y) * np.cos(y))
    # Series for small y: 3F = (3/4) sum_k (+-1)^(k+1) (2y)^(2k+1) / (2k+1)!
    small = y < 0.05
    if np.any(small):
        ys = 2.0 * y[small]
        ser = np.zeros_like(ys)
        fact = 1.0
        for kk in range(1, 7):
            fact *= (2 * kk) * (2 * kk + 1)
            ser += sign ** (kk + 1) * ys ** (2 * kk + 1) / fact
        three_f[small] = 0.75 * ser
    return np.cbrt(three_f) / sq
