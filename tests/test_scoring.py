"""Univariate scores against closed forms."""

import numpy as np
import pytest
from scipy.stats import norm

from cvdesign.score.univariate import Histograms, fisher_ratio, overlap_coefficient


def test_fisher_ratio_two_states_closed_form():
    # Two equally weighted states with a common spread sigma: J = (delta mu / 2 sigma)^2.
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
