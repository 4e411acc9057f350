"""The vectorised posterior kernels against plain references: the peak finder against a
row-by-row loop of its documented definition, and the shared-grid quantiles (coarse CDF by a
matrix product, refined in one block) against the full cumulative sum and closed forms."""

from __future__ import annotations

import numpy as np
import pytest

from annotator_plugins.redshift_pdf import posterior as post


def _reference_modes(p, w, threshold, min_mass):
    """count_modes' definition (its docstring), one row at a time in plain Python: runs of
    nodes at least threshold x the row's peak; each gap between runs split at its first
    lowest node (that node goes right); basins' probabilities from density x weight."""
    modes, second = [], []
    for r, row in enumerate(p):
        row = [float(x) for x in row]
        wr = w[r] if np.ndim(w) == 2 else w
        top = max(row)
        if not (np.isfinite(top) and top > 0):
            modes.append(0)
            second.append(0.0)
            continue
        above = [x >= threshold * top for x in row]
        runs, i = [], 0
        while i < len(row):
            if above[i]:
                j = i
                while j < len(row) and above[j]:
                    j += 1
                runs.append((i, j))
                i = j
            else:
                i += 1
        if len(runs) < 2:
            modes.append(len(runs))
            second.append(0.0)
            continue
        cuts = [0]
        for (_, end), (start, _) in zip(runs, runs[1:]):
            gap = row[end:start]
            cuts.append(end + gap.index(min(gap)))
        cuts.append(len(row))
        mass = [row[k] * wr[k] for k in range(len(row))]
        total = sum(mass)
        shares = sorted(s for s in (sum(mass[a:b]) / total for a, b in zip(cuts, cuts[1:]))
                        if s >= min_mass)
        modes.append(max(len(shares), 1))
        second.append(shares[-2] if len(shares) >= 2 else 0.0)
    return np.array(modes), np.array(second)


def _bimodal(rng, rows, grid):
    z1 = rng.uniform(0.2, 4.0, rows)
    z2 = rng.uniform(0.2, 5.5, rows)
    s1 = rng.uniform(0.05, 0.4, rows)
    w2 = rng.uniform(0.0, 0.6, rows)
    g = grid[None, :]
    return ((1 - w2)[:, None] * np.exp(-0.5 * ((g - z1[:, None]) / s1[:, None]) ** 2)
            + w2[:, None] * np.exp(-0.5 * ((g - z2[:, None]) / (1.5 * s1[:, None])) ** 2))


@pytest.mark.parametrize("kind", ["smooth", "noisy", "ties", "float32", "per-row weights"])
def test_peak_finder_against_a_row_by_row_reference(kind):
    rng = np.random.default_rng(41)
    grid = np.sort(np.concatenate([[0.0, 6.0], rng.uniform(0, 6, 118)]))
    p = _bimodal(rng, 400, grid)
    w = post.trapezoid_weights(grid)
    if kind == "noisy":  # many runs per row, several gaps each
        p = p + rng.uniform(0, 0.25, p.shape) * p.max(axis=1, keepdims=True)
    elif kind == "ties":  # equal lowest nodes in a gap: the first one is the split
        p = np.round(p * 6) / 6
    elif kind == "float32":
        p = p.astype(np.float32)
    elif kind == "per-row weights":
        w = np.broadcast_to(w, p.shape) * rng.uniform(0.5, 2.0, p.shape)
    p[0] = 0.0  # no peak at all
    p[1, 5] = np.nan  # a NaN row: no exception (the plugin sets such rows aside)
    for threshold, min_mass in ((0.05, 0.0123), (0.3, 0.0), (0.6, 0.0871)):
        got_modes, got_second = post.count_modes(p, w, threshold, min_mass)
        ref_modes, ref_second = _reference_modes(p[2:], w[2:] if np.ndim(w) == 2 else w,
                                                 threshold, min_mass)
        assert got_modes[0] == 0
        np.testing.assert_array_equal(got_modes[2:], ref_modes)
        np.testing.assert_allclose(got_second[2:], ref_second, rtol=1e-9, atol=1e-12)
        assert (got_modes[2:] >= 2).any() and (got_modes[2:] == 1).any()


@pytest.mark.parametrize("g, block", [(200, 10), (200, 16), (121, 7), (12, 10), (11, 10),
                                      (5, 10), (3, 2)])
def test_shared_grid_quantiles_equal_the_full_cumulative_sum(g, block):
    """The coarse-CDF kernel against grid_quantiles (every node's CDF by a cumulative sum),
    on a non-uniform grid, for float64 and float32 densities."""
    rng = np.random.default_rng(g * 100 + block)
    grid = np.sort(np.concatenate([[0.0, 6.0], rng.uniform(0, 6, g - 2)]))
    p = _bimodal(rng, 300, grid) + 1e-3 * rng.random((300, g))
    levels = np.array([0.001, 0.025, 0.16, 0.5, 0.84, 0.975, 0.999])
    cdf, total = post.grid_cdf(grid, p)
    exact = post.grid_quantiles(grid, p, cdf, total, levels)
    nodes, weights = post.coarse_weights(grid, block)
    assert nodes[0] == 0 and nodes[-1] == g - 1 and np.diff(nodes).max() <= block
    coarse = p @ weights
    np.testing.assert_allclose(coarse[:, -1], total, rtol=1e-12)
    for dens in (p, p.astype(np.float32)):
        c = coarse if dens.dtype == np.float64 else dens.astype(np.float64) @ weights
        got = post.shared_grid_quantiles(grid, dens, c, nodes, levels)
        ref = exact if dens.dtype == np.float64 else post.grid_quantiles(
            grid, dens.astype(np.float64), *post.grid_cdf(grid, dens.astype(np.float64)),
            levels)
        np.testing.assert_allclose(got, ref, rtol=0, atol=1e-11)


def test_shared_grid_quantiles_of_a_linear_density_in_closed_form():
    """A density linear in z is its own interpolant: p = a + b z on [0, Z] has the CDF
    (a x + b x^2 / 2) / (a Z + b Z^2 / 2), whose inverse is the root of a quadratic (closed
    form, common practice)."""
    rng = np.random.default_rng(3)
    grid = np.sort(np.concatenate([[0.0, 4.0], rng.uniform(0, 4, 98)]))
    a = rng.uniform(0.1, 2.0, 50)
    b = rng.uniform(-0.02, 1.0, 50)
    p = a[:, None] + b[:, None] * grid[None, :]
    levels = np.array([0.05, 0.16, 0.5, 0.84, 0.95])
    nodes, weights = post.coarse_weights(grid, 10)
    got = post.shared_grid_quantiles(grid, p, p @ weights, nodes, levels)
    norm = a * 4.0 + b * 8.0
    c = levels[None, :] * norm[:, None]
    ref = np.where(np.abs(b[:, None]) > 0,
                   (-a[:, None] + np.sqrt(a[:, None] ** 2 + 2 * b[:, None] * c)) / b[:, None],
                   c / a[:, None])
    np.testing.assert_allclose(got, ref, rtol=1e-12, atol=1e-13)
