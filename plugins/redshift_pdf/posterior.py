"""Posterior summaries of per-object redshift distributions, vectorised over a batch.

Pure numpy, no plugin machinery, no I/O. Three representations arrive here:

* **gridded**: densities ``p`` (rows x G) at redshift nodes ``z`` (shared, shape (G,), or per
  object, shape (rows, G)). Between nodes the density is the straight line through its node
  values (linear interpolation), so the CDF is piecewise quadratic and every probability,
  quantile and mean below is exact for that interpolant;
* **samples**: posterior draws, concatenated with per-row offsets (as an Arrow list array);
  quantiles follow ``numpy.percentile``'s default ("linear", Hyndman & Fan 1996 definition 7);
* **quantile columns**: redshifts at stated CDF levels, turned into a gridded density by
  :func:`quantiles_to_grid` (monotone cubic Hermite CDF, Fritsch & Carlson 1980).

Normalisation: densities need not integrate to 1; every result divides by the integral.
"""

from __future__ import annotations

import numpy as np

__all__ = [
    "trapezoid_weights", "weights_below", "grid_cdf", "grid_quantiles", "grid_probability_below",
    "sample_quantiles", "sample_fraction_below", "sample_means", "weighted_quantiles",
    "quantiles_to_grid", "count_modes", "histogram_density",
]


# -- gridded -------------------------------------------------------------------------------
def trapezoid_weights(z: np.ndarray) -> np.ndarray:
    """Node weights w with sum(p * w) = the integral of the linear interpolant of p.

    ``z`` is (G,) or (rows, G); the result has the same shape.
    """
    h = np.diff(z, axis=-1)
    w = np.zeros(z.shape, dtype=np.float64)
    w[..., :-1] += 0.5 * h
    w[..., 1:] += 0.5 * h
    return w


def weights_below(z: np.ndarray, x: float) -> np.ndarray:
    """Node weights w (shape (G,)) with sum(p * w) = integral of the interpolant below x.

    In the interval [z_i, z_i + h] holding x, with t = (x - z_i)/h, the linear density
    integrates to h (p_i (t - t^2/2) + p_{i+1} t^2/2).
    """
    z = np.asarray(z, dtype=np.float64)
    w = np.zeros(z.shape, dtype=np.float64)
    if x <= z[0]:
        return w
    if x >= z[-1]:
        return trapezoid_weights(z)
    i = int(np.searchsorted(z, x, side="right")) - 1
    w[: i + 1] = trapezoid_weights(z[: i + 1])
    h = z[i + 1] - z[i]
    t = (x - z[i]) / h
    w[i] += h * (t - 0.5 * t * t)
    w[i + 1] += h * 0.5 * t * t
    return w


def grid_cdf(z: np.ndarray, p: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Unnormalised CDF at the nodes (rows x G, first column 0) and the total per row."""
    h = np.diff(z, axis=-1)
    cell = p[:, :-1] + p[:, 1:]
    cell *= 0.5 * h
    cdf = np.empty(p.shape, dtype=np.float64)
    cdf[:, 0] = 0.0
    np.cumsum(cell, axis=1, out=cdf[:, 1:])
    return cdf, cdf[:, -1].copy()


def _row_search(cdf_norm: np.ndarray, targets: np.ndarray) -> np.ndarray:
    """For each row r and target t (rows x L): the first node index i with cdf[r, i] >= t.

    One ``searchsorted`` over the flattened rows: adding 2 r to row r makes the whole array
    non-decreasing (each row lies in [0, 1]).
    """
    rows, g = cdf_norm.shape
    offset = 2.0 * np.arange(rows, dtype=np.float64)
    flat = np.nan_to_num(cdf_norm, nan=0.0)  # rows without a usable CDF (set aside later)
    np.clip(flat, 0.0, 1.0, out=flat)
    flat += offset[:, None]
    flat = flat.ravel()
    pos = np.searchsorted(flat, (targets + offset[:, None]).ravel(), side="left")
    return pos.reshape(targets.shape) - (np.arange(rows) * g)[:, None]


def grid_quantiles(z: np.ndarray, p: np.ndarray, cdf: np.ndarray, total: np.ndarray,
                   levels: np.ndarray) -> np.ndarray:
    """Redshift quantiles (rows x L) of the linearly interpolated densities, exactly.

    In the interval [z_i, z_i + h] the CDF is F_i + h (p_i t + (p_{i+1} - p_i) t^2/2); the
    quantile solves that quadratic in t with the cancellation-free root
    t = 2c / (b + sqrt(b^2 - 4ac))... written here for a t^2 + b t = c.
    """
    rows, g = p.shape
    levels = np.asarray(levels, dtype=np.float64)
    with np.errstate(invalid="ignore", divide="ignore"):
        norm = cdf / total[:, None]
        targets = np.broadcast_to(levels, (rows, len(levels)))
        idx = _row_search(norm, targets)
        i = np.clip(idx - 1, 0, g - 2)
        r = np.arange(rows)[:, None]
        zz = np.broadcast_to(z, p.shape) if z.ndim == 1 else z
        z_i = zz[r, i]
        h = zz[r, i + 1] - z_i
        p_i = p[r, i] / total[:, None]
        p_j = p[r, i + 1] / total[:, None]
        c = targets - norm[r, i]
        a = 0.5 * h * (p_j - p_i)
        b = h * p_i
        disc = np.sqrt(np.maximum(b * b + 4.0 * a * c, 0.0))
        denom = b + disc
        t = np.where(denom > 0.0, 2.0 * c / denom, 0.0)
        np.clip(t, 0.0, 1.0, out=t)
    return z_i + t * h


def grid_probability_below(z: np.ndarray, p: np.ndarray, cdf: np.ndarray, total: np.ndarray,
                           x: float) -> np.ndarray:
    """P(z < x) per row for per-object grids (rows x G), exact for the linear interpolant."""
    rows, g = p.shape
    with np.errstate(invalid="ignore", divide="ignore"):
        idx = (z < x).sum(axis=1)  # nodes below x
        i = np.clip(idx - 1, 0, g - 2)
        r = np.arange(rows)
        h = z[r, i + 1] - z[r, i]
        t = np.clip(np.where(h > 0, (x - z[r, i]) / h, 0.0), 0.0, 1.0)
        part = cdf[r, i] + h * (p[r, i] * (t - 0.5 * t * t) + p[r, i + 1] * 0.5 * t * t)
        part = np.where(idx == 0, 0.0, np.where(idx == g, total, part))
        out = part / total
    return np.clip(out, 0.0, 1.0)


# -- samples -------------------------------------------------------------------------------
def _sorted_rows(values: np.ndarray, offsets: np.ndarray) -> np.ndarray:
    """The draws sorted within each row (rows given by ``offsets``, length rows + 1)."""
    lengths = np.diff(offsets)
    if len(lengths) and (lengths == lengths[0]).all() and lengths[0] > 0:
        return np.sort(values[offsets[0]: offsets[-1]].reshape(len(lengths), lengths[0]),
                       axis=1).ravel()
    rows = np.repeat(np.arange(len(lengths)), lengths)
    order = np.lexsort((values[offsets[0]: offsets[-1]], rows))
    return values[offsets[0]: offsets[-1]][order]


def sample_quantiles(values: np.ndarray, offsets: np.ndarray, levels: np.ndarray,
                     *, sorted_values: np.ndarray | None = None) -> np.ndarray:
    """Per-row quantiles of the draws, as ``numpy.percentile(x, 100 * level)`` (linear).

    Rows with no draws give NaN. ``values`` float64; ``offsets`` int64 of length rows + 1.
    """
    s = _sorted_rows(values, offsets) if sorted_values is None else sorted_values
    start = offsets[:-1] - offsets[0]
    n = np.diff(offsets)
    levels = np.asarray(levels, dtype=np.float64)
    pos = levels[None, :] * (n[:, None] - 1).astype(np.float64)
    lo = np.floor(pos).astype(np.int64)
    frac = pos - lo
    lo = np.clip(lo, 0, None)
    hi = np.minimum(lo + 1, np.maximum(n[:, None] - 1, 0))
    empty = n == 0
    base = start[:, None]
    a = s[np.where(empty[:, None], 0, base + lo)] if len(s) else np.full(pos.shape, np.nan)
    b = s[np.where(empty[:, None], 0, base + hi)] if len(s) else np.full(pos.shape, np.nan)
    # numpy's _lerp: a + (b - a) t, evaluated from the nearer end
    diff = b - a
    out = np.where(frac >= 0.5, b - diff * (1.0 - frac), a + diff * frac)
    out[empty] = np.nan
    return out


def sample_fraction_below(values: np.ndarray, offsets: np.ndarray, x: float) -> np.ndarray:
    """Fraction of each row's draws below x (NaN for rows without draws)."""
    n = np.diff(offsets)
    below = np.concatenate(([0], np.cumsum(values[offsets[0]: offsets[-1]] < x)))
    start = offsets[:-1] - offsets[0]
    count = below[start + n] - below[start]
    with np.errstate(invalid="ignore", divide="ignore"):
        return count / n


def sample_means(values: np.ndarray, offsets: np.ndarray) -> np.ndarray:
    """Per-row mean of the draws (NaN without draws; inf/NaN propagate)."""
    n = np.diff(offsets)
    rows = np.repeat(np.arange(len(n)), n)
    v = values[offsets[0]: offsets[-1]]
    finite = np.isfinite(v)
    sums = np.bincount(rows[finite], weights=v[finite], minlength=len(n))
    bad = np.bincount(rows[~finite], minlength=len(n)) > 0
    with np.errstate(invalid="ignore", divide="ignore"):
        out = sums / n
    out[bad] = np.nan
    return out


# -- weighted values (non-monotone functions of z) ---------------------------------------
def weighted_quantiles(values: np.ndarray, weights: np.ndarray, levels: np.ndarray
                       ) -> np.ndarray:
    """Per-row quantiles of ``values`` (rows x K) carrying probability ``weights`` (rows x K).

    Each value is the centre of its probability: after sorting, the CDF at the k-th value is
    the weight below it plus half its own, and quantiles interpolate linearly between those
    points (clamped to the extreme values). Non-finite values are dropped with their weight.
    """
    rows, k = values.shape
    v = np.where(np.isfinite(values), values, np.inf)
    w = np.where(np.isfinite(values), weights, 0.0)
    order = np.argsort(v, axis=1, kind="stable")
    v = np.take_along_axis(v, order, axis=1)
    w = np.take_along_axis(w, order, axis=1)
    total = w.sum(axis=1)
    with np.errstate(invalid="ignore", divide="ignore"):
        cum = (np.cumsum(w, axis=1) - 0.5 * w) / total[:, None]
        cum = np.maximum.accumulate(np.where(np.isnan(cum), 2.0, cum), axis=1)
        levels = np.asarray(levels, dtype=np.float64)
        targets = np.broadcast_to(levels, (rows, len(levels)))
        idx = _row_search(np.clip(cum, 0.0, 1.0 + 1e-12) * (1.0 - 1e-15), targets)
        hi = np.clip(idx, 0, k - 1)
        lo = np.clip(idx - 1, 0, k - 1)
        r = np.arange(rows)[:, None]
        c_lo, c_hi = cum[r, lo], cum[r, hi]
        v_lo, v_hi = v[r, lo], v[r, hi]
        t = np.where(c_hi > c_lo, (targets - c_lo) / (c_hi - c_lo), 0.0)
        t = np.clip(t, 0.0, 1.0)
        out = v_lo + t * (v_hi - v_lo)
        out = np.where(np.isfinite(out), out, np.where(t >= 1.0, v_hi, v_lo))
    out[~(total > 0)] = np.nan
    out[~np.isfinite(out)] = np.nan
    return out


# -- quantile columns -----------------------------------------------------------------------
def _pchip_slopes(x: np.ndarray, y: np.ndarray) -> np.ndarray:
    """Node derivatives of the monotone piecewise-cubic Hermite interpolant, per row.

    Fritsch & Carlson (1980, SIAM J. Numer. Anal. 17, 238) with the weighted harmonic mean of
    Fritsch & Butland (1984) at interior nodes and the three-point end formula (the choice of
    scipy.interpolate.PchipInterpolator); zero where neighbouring secants change sign or vanish.
    """
    h = np.diff(x, axis=1)
    delta = np.diff(y, axis=1) / h
    d = np.zeros_like(y)
    w1 = 2.0 * h[:, 1:] + h[:, :-1]
    w2 = h[:, 1:] + 2.0 * h[:, :-1]
    d0, d1 = delta[:, :-1], delta[:, 1:]
    with np.errstate(invalid="ignore", divide="ignore"):
        hm = (w1 + w2) / (w1 / d0 + w2 / d1)
    same = (d0 > 0) & (d1 > 0)
    d[:, 1:-1] = np.where(same, hm, 0.0)

    def end(h0, h1, m0, m1):
        e = ((2.0 * h0 + h1) * m0 - h0 * m1) / (h0 + h1)
        e = np.where(np.sign(e) != np.sign(m0), 0.0, e)
        return np.where((np.sign(m0) != np.sign(m1)) & (np.abs(e) > 3.0 * np.abs(m0)),
                        3.0 * m0, e)

    d[:, 0] = end(h[:, 0], h[:, 1], delta[:, 0], delta[:, 1])
    d[:, -1] = end(h[:, -1], h[:, -2], delta[:, -1], delta[:, -2])
    return d


def quantiles_to_grid(zq: np.ndarray, levels: np.ndarray, per_interval: int = 16
                      ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """A gridded density from redshift quantiles ``zq`` (rows x L) at CDF ``levels`` (L,).

    The CDF passes through (z_k, level_k); it is extended to 0 below the lowest and to 1 above
    the highest quantile by straight lines continuing the outer secants (a uniform density in
    each tail; the lower end is clipped at z = 0 and the tail's mass then put into the
    remaining span). Through those L + 2 points the CDF is the monotone piecewise-cubic
    Hermite interpolant (PCHIP, Fritsch & Carlson 1980), so it never decreases and passes
    through every given quantile. Its derivative, the density, is sampled at ``per_interval``
    equal steps per interval.

    Rows whose quantiles do not strictly increase are returned as NaN (the caller flags them).
    :return: the node redshifts (rows x G), densities (rows x G) and a mask of bad rows.
    """
    zq = np.asarray(zq, dtype=np.float64)
    levels = np.asarray(levels, dtype=np.float64)
    rows, n_l = zq.shape
    with np.errstate(invalid="ignore"):
        bad = ~(np.isfinite(zq).all(axis=1) & (np.diff(zq, axis=1) > 0).all(axis=1)
                & (zq[:, 0] >= 0))
    zq = np.where(bad[:, None], np.linspace(1.0, 2.0, n_l)[None, :], zq)
    lo_slope = (levels[1] - levels[0]) / (zq[:, 1] - zq[:, 0])
    hi_slope = (levels[-1] - levels[-2]) / (zq[:, -1] - zq[:, -2])
    z_lo = np.maximum(zq[:, 0] - levels[0] / lo_slope, 0.0)
    z_lo = np.minimum(z_lo, zq[:, 0] * (1.0 - 1e-9))
    z_lo = np.where(zq[:, 0] > 0, z_lo, 0.0)
    z_hi = zq[:, -1] + (1.0 - levels[-1]) / hi_slope
    x = np.concatenate([z_lo[:, None], zq, z_hi[:, None]], axis=1)
    y = np.concatenate([np.zeros((rows, 1)), np.broadcast_to(levels, (rows, n_l)),
                        np.ones((rows, 1))], axis=1)
    if (zq[:, 0] == 0).any():  # no room for a lower tail: start the CDF at the first level
        y = y.copy()
        y[zq[:, 0] == 0, 0] = 0.0
        x[zq[:, 0] == 0, 0] = -1e-12  # a vanishing lower interval (its mass is negligible)
    d = _pchip_slopes(x, y)
    t = np.arange(per_interval) / per_interval
    # derivative of the cubic Hermite basis, divided by h: density at x_k + t h
    dh00 = 6.0 * t * t - 6.0 * t
    dh10 = 3.0 * t * t - 4.0 * t + 1.0
    dh01 = -dh00
    dh11 = 3.0 * t * t - 2.0 * t
    h = np.diff(x, axis=1)
    y0, y1 = y[:, :-1, None], y[:, 1:, None]
    d0, d1 = d[:, :-1, None], d[:, 1:, None]
    hh = h[:, :, None]
    dens = (dh00 * y0 + dh01 * y1) / hh + dh10 * d0 + dh11 * d1
    nodes = x[:, :-1, None] + t * hh
    nodes = np.concatenate([nodes.reshape(rows, -1), x[:, -1:]], axis=1)
    dens = np.concatenate([dens.reshape(rows, -1), d[:, -1:]], axis=1)
    np.maximum(dens, 0.0, out=dens)
    nodes = np.maximum(nodes, 0.0)
    nodes[bad] = np.nan
    dens[bad] = np.nan
    return nodes, dens, bad


# -- modes ---------------------------------------------------------------------------------
def count_modes(p: np.ndarray, weights: np.ndarray, threshold: float, min_mass: float,
                top: np.ndarray | None = None) -> tuple[np.ndarray, np.ndarray]:
    """Separate peaks of each row's density and the probability of the second-largest one.

    A peak is a maximal run of consecutive nodes whose density is at least ``threshold``
    times the row's highest density, holding at least ``min_mass`` of the row's probability.
    A peak's probability is that of its basin: the low-density gap between two runs is split
    at its lowest node (nodes up to the minimum go to the left peak, the rest to the right);
    probability before the first and after the last run goes to those runs.

    ``weights`` are the node weights (shape (G,) or like ``p``): a node's probability is
    density x weight. ``top`` may pass the rows' highest densities when already known.

    :return: the count of peaks (int) and the mass of the second-largest (0 when one peak).
    """
    rows, g = p.shape
    with np.errstate(invalid="ignore", divide="ignore"):
        if top is None:
            top = p.max(axis=1)
        level = np.maximum(threshold * top, np.finfo(np.float64).tiny).astype(p.dtype)
        above = p >= level[:, None]
    # a run starts where a node is above and its left neighbour is not
    runs = np.count_nonzero(above[:, 1:] > above[:, :-1], axis=1) + above[:, 0]
    modes = np.minimum(runs, 1)
    second = np.zeros(rows)
    multi = np.flatnonzero(runs > 1)
    if len(multi):
        modes[multi], second[multi] = _basin_masses(p[multi], above[multi], runs[multi],
                                                    weights[multi] if np.ndim(weights) == 2
                                                    else weights, min_mass)
    modes = np.where(np.isfinite(top) & (top > 0), modes, 0)
    return modes, second


def _basin_masses(p: np.ndarray, above: np.ndarray, runs: np.ndarray, weights: np.ndarray,
                  min_mass: float) -> tuple[np.ndarray, np.ndarray]:
    """:func:`count_modes` for rows with two or more runs: the basins' probabilities.

    Work is done on the run boundaries and the gaps between runs only: each gap's split node
    (its first lowest node, which goes to the right-hand peak) by a segmented minimum over the
    gap nodes, and each basin's probability as a difference of the row's cumulative mass.
    """
    m, g = p.shape
    # run starts and ends as flat indices into the m x g rows (row-major order: runs in order)
    edge = np.zeros((m, g + 1), dtype=np.int8)
    edge[:, 1:] = above
    step = np.diff(edge, axis=1, append=0)  # +1 at a run's first node, -1 after its last
    starts = np.flatnonzero(step[:, :-1] == 1)  # as indices into (m, g)
    ends = np.flatnonzero(step == -1)  # the node after each run, as indices into (m, g + 1)
    row_of_end = ends // (g + 1)
    ends = ends - row_of_end  # now indices into (m, g) of the node after the run
    # interior gaps: after run k up to the start of run k + 1 on the same row
    last_run = np.cumsum(runs) - 1  # position of each row's last run in the run arrays
    interior = np.ones(len(starts), dtype=bool)
    interior[last_run] = False
    gap_lo = ends[interior]  # first gap node (flat)
    gap_hi = starts[1:][interior[:-1]]  # first node of the next run: the gap ends before it
    flat = np.ascontiguousarray(p).reshape(-1)
    lens = gap_hi - gap_lo
    # the first lowest node of each gap: segmented minimum, then the first node equal to it
    bounds = np.empty(2 * len(gap_lo), dtype=np.int64)
    bounds[0::2] = gap_lo
    bounds[1::2] = gap_hi
    seg_min = np.fmin.reduceat(flat, bounds)[0::2]
    gap_id = np.repeat(np.arange(len(gap_lo)), lens)
    node = np.arange(len(gap_id)) - np.repeat(np.cumsum(lens) - lens, lens) + gap_lo[gap_id]
    hit = np.flatnonzero(flat[node] == seg_min[gap_id])
    first = np.ones(len(hit), dtype=bool)
    first[1:] = gap_id[hit[1:]] != gap_id[hit[:-1]]
    split = gap_lo.copy()  # a gap of NaN densities only: split at its start
    split[gap_id[hit[first]]] = node[hit[first]]
    # cumulative mass before each node: basin k holds [split_{k-1}, split_k) on its row
    mass = p * weights
    cum = np.zeros((m, g + 1))
    np.cumsum(mass, axis=1, out=cum[:, 1:])
    cum_flat = cum.reshape(-1)
    row_of_split = split // g
    right = cum_flat[split + row_of_split]  # mass before the split node, on its row
    total = cum[:, -1]
    # each basin's mass: boundaries 0, split_1, ..., split_{runs-1}, total per row
    edges = np.zeros(len(starts) + m)  # per row: runs + 1 boundary values
    row_first = np.cumsum(runs + 1) - (runs + 1)
    pos_split = np.flatnonzero(interior) + np.repeat(np.arange(m), runs - 1) + 1
    edges[pos_split] = right
    edges[row_first + runs] = total
    basin = np.diff(edges)
    keep = np.ones(len(basin), dtype=bool)
    keep[row_first[1:] - 1] = False  # drop the differences across rows
    basin = basin[keep]
    row_of_run = np.repeat(np.arange(m), runs)
    with np.errstate(invalid="ignore", divide="ignore"):
        share = basin / total[row_of_run]
    big = share >= min_mass
    modes = np.maximum(np.bincount(row_of_run[big], minlength=m), 1)
    order = np.lexsort((np.where(big, share, 0.0), row_of_run))
    ranked = np.where(big, share, 0.0)[order]
    second = ranked[last_run - 1]
    return modes, second


def histogram_density(values: np.ndarray, offsets: np.ndarray, bins: int
                      ) -> tuple[np.ndarray, np.ndarray]:
    """Per-row histogram of draws in ``bins`` equal bins spanning the row's range, smoothed
    with the (1, 2, 1)/4 kernel; returned as densities (rows x bins) and equal node masses.
    Only used to find peaks of sample-based posteriors."""
    n = np.diff(offsets)
    rows = np.repeat(np.arange(len(n)), n)
    v = values[offsets[0]: offsets[-1]]
    lo = np.full(len(n), np.inf)
    hi = np.full(len(n), -np.inf)
    np.minimum.at(lo, rows, v) if len(v) else None
    np.maximum.at(hi, rows, v) if len(v) else None
    span = np.where(hi > lo, hi - lo, 1.0)
    b = np.clip(((v - lo[rows]) / span[rows] * bins).astype(np.int64), 0, bins - 1)
    counts = np.bincount(rows * bins + b, minlength=len(n) * bins).reshape(len(n), bins)
    counts = counts.astype(np.float64)
    padded = np.pad(counts, ((0, 0), (1, 1)))
    smooth = 0.25 * padded[:, :-2] + 0.5 * padded[:, 1:-1] + 0.25 * padded[:, 2:]
    return smooth, np.ones(bins)


def coarse_weights(z: np.ndarray, block: int) -> tuple[np.ndarray, np.ndarray]:
    """For a shared grid: the node indices every ``block`` nodes (the last block ending on
    the last node) and the weights (G x K) whose product with a density row is its CDF at
    those nodes."""
    g = len(z)
    # every block at most ``block`` cells and the last exactly ``block`` (when the grid has
    # that many), so a window of block + 1 nodes from any coarse node stays on the grid
    last = max(g - 1 - block, 0)
    nodes = np.unique(np.concatenate([np.arange(0, last, block), [last, g - 1]]))
    w = np.column_stack([weights_below(z, z[i]) if i < g - 1 else trapezoid_weights(z)
                         for i in nodes])
    return nodes, w


def shared_grid_quantiles(z: np.ndarray, p: np.ndarray, coarse_cdf: np.ndarray,
                          nodes: np.ndarray, levels: np.ndarray) -> np.ndarray:
    """Quantiles for a shared grid from the CDF at coarse nodes (a matrix product), refined
    inside the one coarse block holding each level: the same exact inversion of the linear
    interpolant's CDF as :func:`grid_quantiles`, with about G / block + block work per level
    instead of a full cumulative sum.

    ``p`` may be float32: only the block's nodes are read from it, in double precision. All
    levels are found together: each (row, level) pair reads the ``block + 1`` densities of
    its block (a window of the row, padded with one empty cell so every array is contiguous),
    sums its cells with one matrix product and inverts the quadratic of the cell holding the
    level.
    """
    rows, g = p.shape
    total = coarse_cdf[:, -1]
    levels = np.asarray(levels, dtype=np.float64)
    n_l = len(levels)
    block = int(np.max(np.diff(nodes)))
    w = block + 1
    h_grid = np.append(np.diff(z), np.zeros(w))
    # per block: half cell widths on a window of w nodes, the last (w-th) cell empty
    cell = nodes[:-1, None] + np.arange(w)[None, :]
    half = 0.5 * h_grid[cell]
    half[:, -1] = 0.0
    upper = np.triu(np.ones((w, w)))
    # coarse_weights' nodes always leave a full window; other nodes may not
    padded = p if nodes[-2] + block < g else np.pad(p, ((0, 0), (0, block)))
    windows = np.lib.stride_tricks.sliding_window_view(padded, w, axis=1)
    with np.errstate(invalid="ignore", divide="ignore"):
        target = (levels[:, None] * total[None, :])  # L x rows
        j = (coarse_cdf.T[:, None, :] < target[None, :, :]).sum(axis=0) - 1  # L x rows
        np.clip(j, 0, len(nodes) - 2, out=j)
        j = j.T.ravel()  # pair = row * L + level
        row = np.repeat(np.arange(rows), n_l)
        start = nodes[j]
        pp = windows[row, start].astype(np.float64)  # N x w
        flat = pp.ravel()
        cells = np.empty_like(pp)
        cf = cells.ravel()
        np.add(flat[:-1], flat[1:], out=cf[:-1])
        cf[-1] = 0.0
        cells *= half[j]
        local = cells @ upper  # N x w: CDF within the window after each cell
        base = coarse_cdf.ravel()[row * coarse_cdf.shape[1] + j]
        need = target.T.ravel() - base
        k = np.count_nonzero(local < need[:, None], axis=1)
        np.minimum(k, block - 1, out=k)
        n = np.arange(len(k))
        below = np.where(k > 0, local[n, np.maximum(k - 1, 0)], 0.0)
        node = start + k
        z_i = z[np.minimum(node, g - 1)]
        hk = h_grid[node]
        p_i = pp[n, k]
        p_j = pp[n, k + 1]
        inv = 1.0 / np.repeat(total, n_l)
        c = (need - below) * inv
        a = 0.5 * hk * (p_j - p_i) * inv
        b = hk * p_i * inv
        disc = np.sqrt(np.maximum(b * b + 4.0 * a * c, 0.0))
        denom = b + disc
        t = np.where(denom > 0.0, 2.0 * c / denom, 0.0)
        np.clip(t, 0.0, 1.0, out=t)
    return (z_i + t * hk).reshape(rows, n_l)
