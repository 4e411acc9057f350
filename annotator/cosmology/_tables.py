"""Piecewise cubic Hermite tables on uniform grids, and build-time helpers.

A :class:`UniformTable` holds one cubic per grid interval, built from exact values
and exact derivatives at the nodes (the derivatives of every tabulated quantity are
known in closed form from E(z)), so the interpolation error is O(h^4) with a small
constant.  Evaluation is a handful of vectorised numpy passes:

    s = (v - v0) / h;  i = floor(s);  t = s - i;  p = ((c3 t + c2) t + c1) t + c0

Row 0 and row n+1 of the coefficient array are NaN sentinels (interval j is row
j + 1), and the gather uses
``mode='clip'``, so any input below the table, above it, NaN or infinite produces NaN
without any branch or mask: nothing is ever clamped to the end of the table.
"""

from __future__ import annotations

import numpy as np

_NAN_ROW = np.full(4, np.nan)


class UniformTable:
    """Cubic Hermite interpolant of y(v) on the uniform grid v0 + j h, j = 0..n."""

    __slots__ = ("v0", "h", "n", "inv_h", "shift", "coef", "v_end")

    def __init__(self, v0, h, y, dy, scale=1.0, shift=0.0):
        y = np.asarray(y, dtype=float) * scale + shift
        d = np.asarray(dy, dtype=float) * (scale * h)  # derivative per unit t
        y0, y1, d0, d1 = y[:-1], y[1:], d[:-1], d[1:]
        dy_ = y1 - y0
        coef = np.empty((len(y0) + 2, 4))
        coef[0] = _NAN_ROW
        coef[-1] = _NAN_ROW
        coef[1:-1, 0] = y0
        coef[1:-1, 1] = d0
        coef[1:-1, 2] = 3.0 * dy_ - 2.0 * d0 - d1
        coef[1:-1, 3] = d0 + d1 - 2.0 * dy_
        self.coef = coef
        self.v0 = float(v0)
        self.h = float(h)
        self.n = len(y0)
        self.inv_h = 1.0 / self.h
        self.shift = -self.v0 * self.inv_h
        self.v_end = self.v0 + self.n * self.h

    def scaled(self, scale, shift=0.0):
        """A copy whose output is scale * y + shift (coefficients rescaled)."""
        new = object.__new__(UniformTable)
        for name in ("v0", "h", "n", "inv_h", "shift", "v_end"):
            setattr(new, name, getattr(self, name))
        coef = self.coef * scale
        coef[1:-1, 0] += shift
        new.coef = coef
        return new

    def eval_into(self, v, out, idx, cbuf):
        """out[:] = y(v); v is overwritten.  idx/cbuf are scratch buffers.

        The interval index is floor((v - v0)/h) + 1, taken *before* the sentinel
        offset is added so that an input a rounding error below v0 (e.g. z = -1e-300)
        still lands on the NaN row.
        """
        np.multiply(v, self.inv_h, out=v)
        if self.shift:
            np.add(v, self.shift, out=v)
        np.floor(v, out=out)
        np.subtract(v, out, out=v)  # t in [0, 1)
        np.add(out, 1.0, out=out)
        np.copyto(idx, out, casting="unsafe")  # NaN/inf give garbage indices: clipped
        np.take(self.coef, idx, axis=0, mode="clip", out=cbuf)
        np.multiply(cbuf[:, 3], v, out=out)
        np.add(out, cbuf[:, 2], out=out)
        np.multiply(out, v, out=out)
        np.add(out, cbuf[:, 1], out=out)
        np.multiply(out, v, out=out)
        np.add(out, cbuf[:, 0], out=out)
        return out

    def __call__(self, v):
        """Convenience (slow path): evaluate at an array of v."""
        v = np.array(v, dtype=float, copy=True).ravel()
        n = v.size
        out = np.empty(n)
        with np.errstate(all="ignore"):
            self.eval_into(v, out, np.empty(n, np.intp), np.empty((n, 4)))
        return out


# ----------------------------------------------------------------- build-time helpers
_GL_CACHE = {}


def _leggauss(order):
    if order not in _GL_CACHE:
        _GL_CACHE[order] = np.polynomial.legendre.leggauss(order)
    return _GL_CACHE[order]


def gauss_legendre_intervals(edges, integrand, order=8):
    """Integrals of integrand(x) over each interval [edges[i], edges[i+1]].

    ``integrand`` maps an array of points to a tuple of arrays (several integrands
    sharing one evaluation); returns a tuple of per-interval integrals.
    Gauss-Legendre of the given order on every interval (exact for polynomials of
    degree 2*order-1; the intervals are short compared with every feature of the
    integrands, so the result is accurate to rounding).
    """
    nodes, weights = _leggauss(order)
    lo, hi = edges[:-1], edges[1:]
    half = 0.5 * (hi - lo)
    mid = 0.5 * (hi + lo)
    pts = mid[:, None] + half[:, None] * nodes[None, :]
    return tuple(half * (vals @ weights) for vals in integrand(pts))


def hermite_nonuniform(xk, yk, dk, x):
    """Cubic Hermite interpolant through (xk, yk, dk), xk increasing; at points x.

    Returns (value, derivative).  Points outside [xk[0], xk[-1]] give NaN.
    """
    x = np.asarray(x, dtype=float)
    i = np.clip(np.searchsorted(xk, x, side="right") - 1, 0, len(xk) - 2)
    h = xk[i + 1] - xk[i]
    t = (x - xk[i]) / h
    y0, y1 = yk[i], yk[i + 1]
    d0, d1 = dk[i] * h, dk[i + 1] * h
    dy = y1 - y0
    c2 = 3.0 * dy - 2.0 * d0 - d1
    c3 = d0 + d1 - 2.0 * dy
    val = ((c3 * t + c2) * t + d0) * t + y0
    der = ((3.0 * c3 * t + 2.0 * c2) * t + d0) / h
    bad = (x < xk[0]) | (x > xk[-1]) | ~np.isfinite(x)
    if np.any(bad):
        val = np.where(bad, np.nan, val)
        der = np.where(bad, np.nan, der)
    return val, der


def quintic_nonuniform(xk, yk, dk, d2k, x):
    """Quintic Hermite interpolant through values, first and second derivatives.

    Error O(h^6); used at build time to solve for grid nodes of derived tables.
    Returns (value, derivative); points outside [xk[0], xk[-1]] give NaN.
    """
    x = np.asarray(x, dtype=float)
    i = np.clip(np.searchsorted(xk, x, side="right") - 1, 0, len(xk) - 2)
    h = xk[i + 1] - xk[i]
    t = (x - xk[i]) / h
    t2 = t * t
    t3 = t2 * t
    t4 = t3 * t
    t5 = t4 * t
    b0 = 1 - 10 * t3 + 15 * t4 - 6 * t5
    b1 = t - 6 * t3 + 8 * t4 - 3 * t5
    b2 = 0.5 * (t2 - 3 * t3 + 3 * t4 - t5)
    b3 = 0.5 * (t3 - 2 * t4 + t5)
    b4 = -4 * t3 + 7 * t4 - 3 * t5
    b5 = 10 * t3 - 15 * t4 + 6 * t5
    db0 = -30 * t2 + 60 * t3 - 30 * t4
    db1 = 1 - 18 * t2 + 32 * t3 - 15 * t4
    db2 = 0.5 * (2 * t - 9 * t2 + 12 * t3 - 5 * t4)
    db3 = 0.5 * (3 * t2 - 8 * t3 + 5 * t4)
    db4 = -12 * t2 + 28 * t3 - 15 * t4
    db5 = -db0
    y0, y1 = yk[i], yk[i + 1]
    d0, d1 = dk[i] * h, dk[i + 1] * h
    s0, s1 = d2k[i] * h * h, d2k[i + 1] * h * h
    val = y0 * b0 + d0 * b1 + s0 * b2 + s1 * b3 + d1 * b4 + y1 * b5
    der = (y0 * db0 + d0 * db1 + s0 * db2 + s1 * db3 + d1 * db4 + y1 * db5) / h
    bad = (x < xk[0]) | (x > xk[-1]) | ~np.isfinite(x)
    if np.any(bad):
        val = np.where(bad, np.nan, val)
        der = np.where(bad, np.nan, der)
    return val, der


def invert_monotone(xk, fk, dfk, d2fk, targets, newton_steps=2):
    """Solve f(x) = target for x, f tabulated (fk, dfk, d2fk) on nodes xk, increasing.

    The first guess is the cubic Hermite interpolant of the inverse function (nodes
    fk, values xk, derivatives 1/dfk); Newton steps on the quintic forward interpolant
    then converge to its root, so the answer carries the O(h^6) forward error only.
    Targets outside the range give NaN.
    """
    targets = np.asarray(targets, dtype=float)
    x, _ = hermite_nonuniform(fk, xk, 1.0 / dfk, targets)
    for _ in range(newton_steps):
        f, df = quintic_nonuniform(xk, fk, dfk, d2fk, np.clip(x, xk[0], xk[-1]))
        x = x - (f - targets) / df
    out_of_range = (targets < fk[0]) | (targets > fk[-1])
    return np.where(out_of_range, np.nan, np.clip(x, xk[0], xk[-1]))
