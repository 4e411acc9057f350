"""SQL functions evaluated by DuckDB itself: piecewise polynomials fitted to a Python function.

A DuckDB Python function is called once per vector of 2 048 rows while holding the interpreter
lock, so a query that calls one runs at the speed of one core however many DuckDB has (two
threads calling it take turns for the lock at a high cost). A :class:`SqlApproximation` lets
a one-argument :class:`~annotator.sql.SqlFunction` be evaluated natively instead: when a
statement of a session first uses the function, :func:`fit` samples it over the
approximation's domain, fits a polynomial on each of a few segments and checks every segment
against the function itself (:func:`_check_points`); :func:`macro_body` turns the result into
a DuckDB macro (``CASE`` over the segments, Horner's rule in each) that runs on every DuckDB
thread.

Nothing is lost to the approximation:

* a segment is kept only when its polynomial agrees with the Python function to the stated
  ``rtol`` / ``atol`` at every check point (the low end, the points midway between the
  fitting nodes, a uniform sweep, and points closing in on both ends, where such a fit errs
  most: about ``CHECKS_PER_SEGMENT`` in all), otherwise it is split, down to ``min_width``;
* a segment that cannot be fitted (a singularity, a NaN boundary) and every argument outside
  the domain, NULL or NaN are handed to the Python function itself (the macro's fallback), so
  results there are exactly the Python function's.

The form fitted is ``f(x) = outer(x**power * g(x))`` with ``g = P`` or ``g = exp(P)`` (``log``)
and ``P`` a polynomial per segment: ``power`` takes out a zero at x = 0 (distances vanish like
z), ``log`` a function that spans decades, ``outer`` a closed-form last step (a magnitude from
a distance). The plugin that knows the function says which form suits it; the fit and its
check are generic and know nothing of cosmology.
"""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass

import numpy as np

__all__ = ["SqlApproximation", "Segment", "Fitted", "fit", "macro_body"]

CHECKS_PER_SEGMENT = 96
MAX_ATTEMPTS = 400  # polynomial fits tried per function before the rest is left to Python


@dataclass(frozen=True)
class SqlApproximation:
    """How DuckDB may evaluate a one-argument SQL function natively (see the module text).

    :param domain: ``(lo, hi)``; arguments outside it go to the Python function.
    :param power: ``f = outer(x**power * g)``: a zero of that order at x = 0 taken out.
    :param log: fit ``ln g`` (``g > 0`` spanning decades) instead of ``g``.
    :param outer: ``(sql, forward, inverse)``: the last step as a SQL template with one ``{}``
        and its numpy form and inverse, or ``None``.
    :param rtol: tolerance relative to ``|f|`` at every check point ...
    :param atol: ... plus this absolute tolerance (in the unit of f).
    :param degree: polynomial degree per segment.
    :param max_segments: at most this many fitted segments (the rest falls back to Python).
    :param min_width: a segment narrower than this fraction of the domain is not split again:
        it falls back to Python.
    :param geometric_from: segments above this argument are split at their geometric mean
        (where the function changes on a logarithmic scale), below it at their midpoint; a
        segment from 0 reaching beyond four times it is first cut at an eighth of its width.
    :param null_where_nan: a segment where the function is NaN at every node and check point
        is NULL natively (for a function NaN over whole intervals, e.g. beyond a horizon);
        otherwise such a segment is left to the Python function.
    """

    domain: tuple[float, float]
    power: int = 0
    log: bool = False
    outer: tuple[str, Callable, Callable] | None = None
    rtol: float = 1e-9
    atol: float = 0.0
    degree: int = 14
    max_segments: int = 32
    min_width: float = 1e-7
    geometric_from: float = math.inf
    null_where_nan: bool = False

    def __post_init__(self) -> None:
        lo, hi = self.domain
        if not (math.isfinite(lo) and math.isfinite(hi) and hi > lo):
            raise ValueError(f"SqlApproximation: domain {self.domain!r} must be finite, lo < hi")
        if self.power < 0 or self.degree < 1 or self.max_segments < 1:
            raise ValueError("SqlApproximation: power >= 0, degree >= 1, max_segments >= 1")
        if self.rtol < 0 or self.atol < 0 or (self.rtol == 0 and self.atol == 0):
            raise ValueError("SqlApproximation: rtol and atol >= 0, not both 0")


@dataclass(frozen=True)
class Segment:
    """``[lo, hi)``; ``coefficients`` (lowest order first, in ``t = scale * x + shift``),
    ``None`` where the Python function is called, or ``()`` where the result is NULL."""

    lo: float
    hi: float
    coefficients: tuple[float, ...] | None
    scale: float = 1.0
    shift: float = 0.0
    worst: float = math.nan  # largest error at the check points / tolerance there


@dataclass(frozen=True)
class Fitted:
    segments: tuple[Segment, ...]
    approximation: SqlApproximation

    @property
    def native_fraction(self) -> float:
        """Fraction of the domain's width evaluated natively."""
        lo, hi = self.approximation.domain
        return sum(s.hi - s.lo for s in self.segments if s.coefficients is not None) / (hi - lo)

    @property
    def fitted_segments(self) -> int:
        return sum(1 for s in self.segments if s.coefficients)

    def evaluate(self, x: np.ndarray, function: Callable) -> np.ndarray:
        """The macro's arithmetic in numpy (same operations, same order): what DuckDB returns."""
        x = np.asarray(x, dtype=np.float64)
        lo, hi = self.approximation.domain
        out = np.full(x.shape, np.nan)
        inside = (x >= lo) & (x < hi)  # the macro's guard: outside it, and NaN, the function
        todo = inside.copy()
        for s in self.segments:
            sel = todo & (x < s.hi)
            todo &= ~sel
            if not sel.any():
                continue
            xs = x[sel]
            if s.coefficients is None:
                out[sel] = _call(function, xs)
            elif not s.coefficients:
                out[sel] = np.nan
            else:
                out[sel] = _assemble(self.approximation, xs,
                                     _horner(s.coefficients, xs * s.scale + s.shift))
        rest = ~inside | todo
        if rest.any():
            out[rest] = _call(function, x[rest])
        return out


def _call(function: Callable, x: np.ndarray) -> np.ndarray:
    with np.errstate(all="ignore"):
        out = function(x)
    out = np.ma.filled(np.ma.asarray(out, dtype=np.float64), np.nan)
    return np.broadcast_to(out, x.shape).astype(np.float64)


def _horner(coefficients, t: np.ndarray) -> np.ndarray:
    acc = np.full(t.shape, coefficients[-1])
    for c in coefficients[-2::-1]:
        acc = acc * t + c
    return acc


def _assemble(a: SqlApproximation, x: np.ndarray, p: np.ndarray) -> np.ndarray:
    with np.errstate(all="ignore"):
        g = np.exp(p) if a.log else p
        for _ in range(a.power):
            g = x * g
        return a.outer[1](g) if a.outer is not None else g


def _target(a: SqlApproximation, x: np.ndarray, f: np.ndarray) -> np.ndarray:
    """What the polynomial is fitted to, from x and f (the inverse of :func:`_assemble`)."""
    with np.errstate(all="ignore"):
        g = a.outer[2](f) if a.outer is not None else f
        if a.power:
            g = g / x ** a.power
        return np.log(g) if a.log else g


def _check_points(lo: float, hi: float, nodes_t: np.ndarray) -> np.ndarray:
    """Where a segment ``[lo, hi)`` fitted at ``nodes_t`` (on [-1, 1]) is checked: the low end,
    midway between the nodes, a uniform sweep, and points closing in on both ends."""
    half, mid = 0.5 * (hi - lo), 0.5 * (hi + lo)
    between = 0.5 * (nodes_t[1:] + nodes_t[:-1])
    sweep = np.linspace(-1.0, 1.0, CHECKS_PER_SEGMENT - len(between))
    ends = 1.0 - 10.0 ** -np.arange(2.0, 13.0, 2.0)  # the ends, where such a fit errs most
    xc = np.concatenate([[lo], mid + half * between, mid + half * sweep, mid + half * ends,
                         mid - half * ends, [np.nextafter(hi, lo)]])
    return xc[(xc >= lo) & (xc < hi)]


def _fit_one(a: SqlApproximation, function: Callable, lo: float, hi: float) -> Segment | None:
    """The segment's polynomial (or a NULL segment) if it passes the check, else None."""
    n = a.degree
    k = np.arange(n + 1)
    nodes_t = np.cos(np.pi * (k + 0.5) / (n + 1))[::-1]  # Chebyshev points of the first kind
    half, mid = 0.5 * (hi - lo), 0.5 * (hi + lo)
    x = mid + half * nodes_t
    f = _call(function, x)
    if a.null_where_nan and np.all(np.isnan(f)):
        xc = _check_points(lo, hi, nodes_t)
        if np.all(np.isnan(_call(function, xc))):
            return Segment(float(lo), float(hi), ())
        return None
    g = _target(a, x, f)
    if not np.all(np.isfinite(g)):
        return None
    cheb = np.polynomial.chebyshev.chebfit(nodes_t, g, n)
    mono = np.polynomial.chebyshev.cheb2poly(cheb)
    scale, shift = 1.0 / half, -mid / half
    xc = _check_points(lo, hi, nodes_t)
    fc = _call(function, xc)
    approx = _assemble(a, xc, _horner(mono, xc * scale + shift))
    with np.errstate(invalid="ignore"):
        tol = a.rtol * np.abs(fc) + a.atol
        err = np.abs(approx - fc)
        same = approx == fc  # also where both are the same infinity (a magnitude at z = 0)
        good = same | (np.isfinite(fc) & (err <= tol))
    if not np.all(good):
        return None
    with np.errstate(invalid="ignore", divide="ignore"):
        worst = float(np.max(np.where(same, 0.0, err / tol)))
    return Segment(float(lo), float(hi), tuple(float(c) for c in mono), scale, shift, worst)


def fit(function: Callable, a: SqlApproximation) -> Fitted:
    """Fit ``function`` (numpy in, numpy out) as ``a`` describes; see the module text."""
    lo, hi = a.domain
    min_width = a.min_width * (hi - lo)
    out: list[Segment] = []
    stack = [(float(lo), float(hi))]  # segments to try; the left half is pushed last
    fitted = attempts = 0
    while stack:
        s_lo, s_hi = stack.pop()
        attempts += 1
        seg = (_fit_one(a, function, s_lo, s_hi)
               if fitted < a.max_segments and attempts <= MAX_ATTEMPTS else None)
        if seg is not None:
            out.append(seg)
            fitted += 1
            continue
        if s_hi - s_lo <= min_width or fitted >= a.max_segments or attempts > MAX_ATTEMPTS:
            out.append(Segment(s_lo, s_hi, None))
            continue
        if s_lo >= a.geometric_from and s_lo > 0:
            cut = math.sqrt(s_lo * s_hi)
        elif s_lo == 0 and s_hi > a.geometric_from * 4:
            cut = s_hi / 8
        else:
            cut = 0.5 * (s_lo + s_hi)
        stack.append((cut, s_hi))
        stack.append((s_lo, cut))
    return Fitted(tuple(_merge(out)), a)


def _merge(segments: list[Segment]) -> list[Segment]:
    """Adjacent fallback segments as one."""
    merged: list[Segment] = []
    for s in segments:
        if (merged and not s.coefficients and merged[-1].coefficients == s.coefficients):
            merged[-1] = Segment(merged[-1].lo, s.hi, s.coefficients)
        else:
            merged.append(s)
    return merged


def _num(v: float) -> str:
    """A DOUBLE literal that round-trips (DuckDB reads a plain decimal as DECIMAL)."""
    return f"{v:.17e}"


def _segment_sql(a: SqlApproximation, s: Segment, arg: str, fallback: str) -> str:
    if s.coefficients is None:
        return f"{fallback}({arg})"
    if not s.coefficients:
        return "CAST(NULL AS DOUBLE)"
    t = f"({arg} * {_num(s.scale)} + {_num(s.shift)})"
    poly = _num(s.coefficients[-1])
    for c in s.coefficients[-2::-1]:
        poly = f"({poly} * {t} + {_num(c)})"
    g = f"exp({poly})" if a.log else poly
    for _ in range(a.power):
        g = f"{arg} * {g}"
    return a.outer[0].format(g) if a.outer is not None else g


FLAT_SEGMENTS = 4  # up to this many segments in one CASE (in order); more as a binary tree


def _weight(a: SqlApproximation, s: Segment) -> float:
    """A segment's share of a catalogue's rows, as the fit measures the domain: its width, or
    its width in ln x above ``geometric_from`` (common practice: redshifts spread over decades)."""
    if s.lo >= a.geometric_from and s.lo > 0:
        return math.log(s.hi / s.lo) * a.geometric_from
    return s.hi - s.lo


def _flat(a: SqlApproximation, segs: tuple[Segment, ...], arg: str, fallback: str,
          first: str = "") -> str:
    """One ``CASE`` over ``segs`` in order (``first``: a WHEN clause put before them)."""
    whens = [first] if first else []
    whens += [f"WHEN {arg} < {_num(s.hi)} THEN {_segment_sql(a, s, arg, fallback)}"
              for s in segs[:-1]]
    last = _segment_sql(a, segs[-1], arg, fallback)
    return f"CASE {' '.join(whens)} ELSE {last} END" if whens else last


def _tree(a: SqlApproximation, segs: tuple[Segment, ...], arg: str, fallback: str) -> str:
    if len(segs) <= FLAT_SEGMENTS:
        return _flat(a, segs, arg, fallback)
    # split where the weights balance, so the wide segments (most rows) sit near the root
    cum = np.cumsum([_weight(a, s) for s in segs])
    half = int(np.clip(np.searchsorted(cum, 0.5 * cum[-1]) + 1, 1, len(segs) - 1))
    return (f"CASE WHEN {arg} < {_num(segs[half].lo)} THEN {_tree(a, segs[:half], arg, fallback)}"
            f" ELSE {_tree(a, segs[half:], arg, fallback)} END")


def macro_body(fitted: Fitted, arg: str, fallback: str) -> str:
    """The SQL expression of the macro: ``arg`` is its parameter, ``fallback`` the name of the
    Python function (called for arguments outside the fitted segments, NULL and NaN).

    Up to ``FLAT_SEGMENTS`` segments are one ``CASE`` in order of the argument; more are a
    binary tree of ``CASE``, split where the segments' widths balance (:func:`_weight`), so
    the wide segments, where most rows lie, are reached in few comparisons.
    A DuckDB ``CASE`` evaluates each branch only for its rows, so the Python function is called
    only for the rows it is left.
    """
    a = fitted.approximation
    lo, hi = a.domain
    # NaN compares above every number in DuckDB: it takes the first branch, with NULL
    guard = f"WHEN NOT ({arg} >= {_num(lo)} AND {arg} < {_num(hi)}) THEN {fallback}({arg})"
    segs = fitted.segments
    if len(segs) > FLAT_SEGMENTS:
        return f"CASE {guard} ELSE {_tree(a, segs, arg, fallback)} END"
    return _flat(a, segs, arg, fallback, first=guard)  # one CASE: measured faster than two
