"""The flags column against a row-by-row reference (a consistency check of the fast path)."""

import numpy as np
import pytest

from annotator.pipeline import FLAG_SEPARATOR, Pipeline


def reference(reasons: list[str], bits: np.ndarray) -> tuple[list[str], dict[str, int]]:
    """Row by row, the obvious way: the reasons whose bit is set, in declaration order."""
    labels, counts = [], {}
    for row in range(bits.shape[1]):
        on = [r for i, r in enumerate(reasons) if (int(bits[i // 64, row]) >> (i % 64)) & 1]
        labels.append(FLAG_SEPARATOR.join(on))
        for r in on:
            counts[r] = counts.get(r, 0) + 1
    return labels, counts


@pytest.mark.parametrize("n_reasons,flagged_fraction", [(3, 0.0), (3, 0.05), (10, 0.5),
                                                        (64, 0.3), (70, 0.3), (130, 1.0)])
def test_flags_column_matches_row_by_row_reference(n_reasons, flagged_fraction):
    rng = np.random.default_rng(n_reasons)
    reasons = [f"reason_{i}" for i in range(n_reasons)]
    pipeline = Pipeline([], None, reasons)
    n = 2_000
    n_words = max(1, (n_reasons + 63) // 64)
    bits = np.zeros((n_words, n), dtype=np.uint64)
    rows = np.flatnonzero(rng.random(n) < flagged_fraction)
    for row in rows:  # one to three reasons per flagged row, from a small set of patterns
        for i in rng.choice(min(n_reasons, 6), size=rng.integers(1, 4), replace=False):
            i = int(i) if n_reasons <= 6 else int(i * (n_reasons // 6))
            bits[i // 64, row] |= np.uint64(1 << (i % 64))
    column, counts = pipeline._flags(bits)
    want_labels, want_counts = reference(reasons, bits)
    assert column.to_pylist() == want_labels
    assert counts == want_counts


def test_empty_batch_gives_empty_flags():
    column, counts = Pipeline([], None, ["a"])._flags(np.zeros((1, 0), dtype=np.uint64))
    assert len(column) == 0 and counts == {}
