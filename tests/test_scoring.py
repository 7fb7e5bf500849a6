"""Univariate scores against closed forms."""

import numpy as np
import pytest
from scipy.stats import norm

from cvdesign.score.univariate import Histograms, bin_counts, fisher_ratio, overlap_coefficient


def test_fisher_ratio_two_states_closed_form():
    # Two equally weighted states with a common spread sigma: J = (delta mu / 2 sigma)^2.
    # The ratio is Fisher's (Fisher 1936, Ann. Eugen. 7:179); the closed form is our own
    # algebra: each mean lies |delta mu| / 2 from the grand mean, so the between-state
    # variance is (delta mu / 2)^2 and the within-state variance sigma^2.
    J = fisher_ratio([[0.0, 1.0], [3.0, 1.0]], [[4.0, 1.0], [4.0, 1.0]])
    assert J[0] == pytest.approx((3.0 / 4.0) ** 2)
    assert J[1] == 0.0


def test_fisher_ratio_of_constant_feature_is_zero():
    assert fisher_ratio([[1.0], [1.0]], [[0.0], [0.0]]).tolist() == [0.0]


def test_overlap_of_two_gaussians_matches_analytic_value():
    # Overlapping coefficient of N(0,1) and N(d,1) is 2 Phi(-d/2)
    # (Inman and Bradley 1989, Commun. Stat. Theory Methods 18:3851).
    rng = np.random.default_rng(0)
    d = 1.5
    a = rng.normal(0, 1, 200_000)
    b = rng.normal(d, 1, 200_000)
    h = Histograms([-5.0], [6.5], n_states=2, n_bins=200)
    h.add(np.r_[a, b][:, None], np.repeat([0, 1], a.size))
    assert overlap_coefficient(h.counts)[0] == pytest.approx(2 * norm.cdf(-d / 2), abs=0.01)


def test_histograms_merge_equals_single_pass():
    rng = np.random.default_rng(1)
    x = rng.normal(size=(500, 3))
    s = rng.integers(0, 3, 500)
    whole = Histograms(x.min(0), x.max(0), n_states=3, n_bins=10)
    whole.add(x, s)
    a = Histograms(x.min(0), x.max(0), n_states=3, n_bins=10)
    b = Histograms(x.min(0), x.max(0), n_states=3, n_bins=10)
    a.add(x[:123], s[:123])
    b.add(x[123:], s[123:])
    np.testing.assert_array_equal(a.merge(b).counts, whole.counts)
    assert whole.counts.sum() == 500 * 3


def test_overlap_reports_worst_pair_of_three_states():
    c = np.zeros((3, 1, 3))
    c[0, 0] = [1, 0, 0]
    c[1, 0] = [0, 1, 0]
    c[2, 0] = [0, 1, 1]
    assert overlap_coefficient(c)[0] == pytest.approx(0.5)


def _masked_histograms(x, states, low, high, n_states, n_bins, weights=None):
    """The former Histograms.add: one bincount per state through a boolean mask."""
    counts = np.zeros((n_states, x.shape[1], n_bins))
    width = high - low
    b = np.floor((x - low) / width * n_bins).astype(np.intp)
    np.clip(b, 0, n_bins - 1, out=b)
    b += np.arange(x.shape[1]) * n_bins
    for s in np.unique(states):
        rows = states == s
        w = None if weights is None else np.repeat(weights[rows], x.shape[1])
        counts[s] += np.bincount(b[rows].ravel(), weights=w,
                                 minlength=x.shape[1] * n_bins).reshape(x.shape[1], n_bins)
    return counts


@pytest.mark.parametrize("weighted", [False, True])
def test_histograms_one_bincount_equals_per_state_masks_bit_for_bit(weighted):
    # values on the bin edges, outside the range and in every state, features binned in
    # several blocks: the combined index gives the same counts as one mask per state
    rng = np.random.default_rng(7)
    x = rng.normal(size=(300, 11))
    x[:20] = np.round(x[:20] * 4) / 4          # many values exactly on bin edges
    x[20:25] *= 10                              # outside the range
    states = rng.integers(0, 3, 300)
    low, high = np.full(11, -1.0), np.full(11, 1.0)
    w = rng.uniform(0, 2, 300) if weighted else None
    h = Histograms(low, high, n_states=4, n_bins=8)
    h.add(x[:150], states[:150], None if w is None else w[:150], block=4)
    h.add(x[150:], states[150:], None if w is None else w[150:], block=4)
    ref = (_masked_histograms(x[:150], states[:150], low, high, 4, 8, None if w is None else w[:150])
           + _masked_histograms(x[150:], states[150:], low, high, 4, 8,
                                None if w is None else w[150:]))
    assert np.array_equal(h.counts, ref)
    assert h.counts.sum() == pytest.approx(11 * (300 if w is None else w.sum()))
    assert not h.counts[3].any()


def test_bin_counts_of_few_rows_added_in_place_equal_one_bincount():
    # fewer rows than bins: each row is added in place; the counts equal a bincount
    rng = np.random.default_rng(8)
    x = rng.normal(size=(6, 300))
    groups = np.array([1, 0, 1, 1, 2, 0])
    low, high = np.full(300, -1.5), np.full(300, 1.5)
    got = bin_counts(x, low, high, 40, groups, 3, block=64)
    idx = np.clip(np.floor((x - low) / (high - low) * 40).astype(int), 0, 39)
    want = np.zeros((3, 300, 40))
    for r in range(6):
        want[groups[r], np.arange(300), idx[r]] += 1
    assert np.array_equal(got, want) and got.sum() == 6 * 300
    again = bin_counts(x, low, high, 40, groups, 3, out=got.copy())
    assert np.array_equal(again, 2 * want)
