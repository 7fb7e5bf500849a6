"""Mergeable moments: merging chunks in any grouping equals the moments of the whole."""

import numpy as np
import pytest

from cvdesign.stats.moments import DiagonalMoments, Moments, merge_all


def _reference(x, w=None):
    # Independent two-pass computation in float64.
    w = np.ones(len(x)) if w is None else w
    mean = (w[:, None] * x).sum(0) / w.sum()
    d = x - mean
    return w.sum(), mean, (w[:, None] * d).T @ d


@pytest.mark.parametrize("weighted", [False, True])
def test_merge_in_any_grouping_equals_whole_to_1e12(weighted):
    rng = np.random.default_rng(0)
    # An offset far from zero makes naive one-pass sums lose digits; the pairwise
    # update must not.
    x = rng.normal(size=(1000, 6)) * [1, 10, 0.1, 1, 5, 2] + 1e3
    w = rng.uniform(0.1, 2.0, size=1000) if weighted else None
    count, mean, scatter = _reference(x, w)
    for trial in range(5):
        cuts = np.sort(rng.choice(np.arange(1, 1000), size=rng.integers(1, 40), replace=False))
        pieces = np.split(np.arange(1000), cuts)
        rng.shuffle(pieces)
        parts = [Moments.from_data(x[p], None if w is None else w[p]) for p in pieces]
        if trial % 2:
            m = parts[0]
            for p in parts[1:]:
                m = m.merge(p)
        else:
            m = merge_all(parts)
        assert m.count == pytest.approx(count, rel=1e-12)
        np.testing.assert_allclose(m.mean, mean, rtol=1e-12)
        np.testing.assert_allclose(m.scatter, scatter, rtol=1e-12, atol=1e-12 * np.abs(scatter).max())


def test_diagonal_moments_match_full_diagonal_and_extremes():
    rng = np.random.default_rng(1)
    x = rng.normal(size=(300, 4)) + 50
    parts = np.split(x, [7, 100, 101, 250])
    d = merge_all(DiagonalMoments.from_data(p) for p in parts)
    full = Moments.from_data(x)
    np.testing.assert_allclose(d.variance, full.variance, rtol=1e-12)
    np.testing.assert_allclose(d.mean, x.mean(0), rtol=1e-12)
    np.testing.assert_array_equal(d.minimum, x.min(0))
    np.testing.assert_array_equal(d.maximum, x.max(0))


def test_covariance_equals_numpy_biased_covariance():
    x = np.random.default_rng(2).normal(size=(200, 3))
    np.testing.assert_allclose(Moments.from_data(x).covariance, np.cov(x.T, bias=True),
                               rtol=1e-12)


def test_empty_blocks_merge_as_identity():
    x = np.random.default_rng(3).normal(size=(10, 2))
    m = Moments.from_data(x)
    e = Moments.from_data(np.zeros((0, 2)))
    for merged in (m.merge(e), e.merge(m)):
        np.testing.assert_array_equal(merged.mean, m.mean)
        np.testing.assert_array_equal(merged.scatter, m.scatter)


def test_subset_is_exact():
    x = np.random.default_rng(4).normal(size=(50, 5))
    m = Moments.from_data(x).subset([3, 1])
    np.testing.assert_allclose(m.covariance, np.cov(x[:, [3, 1]].T, bias=True), rtol=1e-12)


def test_merge_rejects_other_feature_count():
    with pytest.raises(ValueError, match="cannot merge moments of 3 features into 2"):
        Moments(2).merge(Moments.from_data(np.ones((2, 3))))


def test_negative_weights_are_refused():
    with pytest.raises(ValueError, match="non-negative"):
        Moments.from_data(np.ones((2, 1)), weights=[1.0, -1.0])


def test_the_merge_keeps_the_scatter_symmetric_to_the_last_bit():
    # each entry of the rank-one update of the merge is (x_i x_j) alpha: the same bits for
    # (i, j) and (j, i), so merged scatter matrices stay exactly symmetric (the update runs
    # by blocks of rows, here several)
    from cvdesign.stats import moments as mod

    rng = np.random.default_rng(4)
    x = rng.normal(size=(300, 70)) * rng.uniform(0.01, 100.0, 70) + rng.normal(0, 50, 70)
    old = mod._OUTER_BLOCK
    try:
        mod._OUTER_BLOCK = 7 * 70  # blocks of 7 rows
        merged = mod.Moments.from_data(x[:137]).merge(mod.Moments.from_data(x[137:]))
    finally:
        mod._OUTER_BLOCK = old
    a, b = mod.Moments.from_data(x[:137]), mod.Moments.from_data(x[137:])
    np.testing.assert_array_equal(merged.scatter, merged.scatter.T)
    delta = b.mean - a.mean
    expected = a.scatter + b.scatter + np.outer(delta, delta) * (137 * 163 / 300)
    np.testing.assert_allclose(merged.scatter, expected, rtol=1e-12, atol=1e-9)
    np.testing.assert_allclose(merged.scatter, np.cov(x.T, bias=True) * 300, rtol=1e-10,
                               atol=1e-8)
