"""Block bootstrap: reproducible, and calibrated on a synthetic Gaussian case."""

import warnings

import numpy as np
import pytest

from cvdesign.stats.bootstrap import block_bootstrap, merge_blocks, percentile_interval
from cvdesign.stats.moments import Moments
from cvdesign.score.univariate import fisher_ratio


def _ar1_blocks(rng, mean, n_blocks, block, phi):
    """Blocks of a stationary AR(1) series (unit innovations) around `mean`."""
    x = np.empty(n_blocks * block)
    x[0] = rng.normal() / np.sqrt(1 - phi**2)
    e = rng.normal(size=x.size)
    for t in range(1, x.size):
        x[t] = phi * x[t - 1] + e[t]
    x += mean
    return [Moments.from_data(x[i * block:(i + 1) * block, None]) for i in range(n_blocks)]


def _fisher(merged):
    means = np.array([m.mean for m in merged])
    var = np.array([m.variance for m in merged])
    return fisher_ratio(means, var)[0]


def test_bootstrap_intervals_cover_the_true_fisher_ratio_about_95_percent_of_the_time():
    # Two states, AR(1) frames (phi = 0.5, stationary variance 1 / (1 - phi^2)), mean
    # difference delta: the true Fisher ratio with equal weights is (delta / 2 sigma)^2.
    # Blocks of 40 frames are much longer than the correlation time (~1.5 frames).
    # Coarse calibration: over 120 repeats the 95 % percentile interval must cover the
    # true value in 85 % to 99.5 % of them (binomial sd ~2 %; percentile intervals of a
    # ratio under-cover slightly at finite n; tolerance is common practice, not a theorem).
    phi, delta = 0.5, 1.0
    sigma = np.sqrt(1 / (1 - phi**2))
    true = (delta / (2 * sigma)) ** 2
    rng = np.random.default_rng(0)
    hits = 0
    repeats = 120
    for r in range(repeats):
        groups = [_ar1_blocks(rng, 0.0, 30, 40, phi), _ar1_blocks(rng, delta, 30, 40, phi)]
        res = block_bootstrap(groups, _fisher, n_boot=200, seed=r)
        hits += bool(res.low <= true <= res.high)
    assert 0.85 <= hits / repeats <= 0.995, hits / repeats


def test_same_seed_same_replicates_and_other_seed_differs():
    rng = np.random.default_rng(1)
    groups = [_ar1_blocks(rng, 0.0, 10, 20, 0.3), _ar1_blocks(rng, 2.0, 10, 20, 0.3)]
    a = block_bootstrap(groups, _fisher, n_boot=50, seed=7)
    b = block_bootstrap(groups, _fisher, n_boot=50, seed=7)
    c = block_bootstrap(groups, _fisher, n_boot=50, seed=8)
    np.testing.assert_array_equal(a.replicates, b.replicates)
    assert not np.array_equal(a.replicates, c.replicates)
    assert a.estimate == pytest.approx(_fisher([merge_blocks(g) for g in groups]))


def test_failing_replicates_are_nan_and_ignored_by_the_interval():
    calls = {"n": 0}

    def stat(merged):
        calls["n"] += 1
        if calls["n"] % 3 == 0:
            raise np.linalg.LinAlgError("singular resample")
        return merged[0].mean[0]

    rng = np.random.default_rng(2)
    res = block_bootstrap([_ar1_blocks(rng, 0.0, 10, 10, 0.0)], stat, n_boot=30, seed=0)
    assert np.isnan(res.replicates).sum() > 0
    assert np.isfinite(res.low) and np.isfinite(res.high)


def test_percentile_interval_of_all_nan_column_is_nan_without_warning(recwarn):
    lo, hi = percentile_interval(np.array([[1.0, np.nan], [2.0, np.nan], [3.0, np.nan]]))
    assert np.isnan(lo[1]) and np.isnan(hi[1]) and lo[0] == pytest.approx(1.05)
    assert not [w for w in recwarn if issubclass(w.category, RuntimeWarning)]


def test_bad_arguments_are_named():
    with pytest.raises(ValueError, match="every group needs at least one block"):
        block_bootstrap([[]], lambda m: 0.0)
    with pytest.raises(ValueError, match="level=1.5"):
        block_bootstrap([[Moments.from_data(np.ones((2, 1)))]], lambda m: 0.0, level=1.5)


def test_percentile_interval_equals_numpy_nanquantile_exactly():
    """The vectorized path (columns without NaN) and the NaN path give numpy's
    nanquantile bit for bit, for any shape of replicates."""
    rng = np.random.default_rng(12)
    a = (1 - 0.95) / 2
    for shape in [(200, 50), (61, 3, 7), (40, 300), (100,)]:
        r = rng.standard_normal(shape) * rng.uniform(0.1, 100, shape[1:])
        r[rng.random(shape) < 0.01] = np.nan
        if len(shape) > 1:
            r.reshape(shape[0], -1)[:, 2] = np.nan
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", RuntimeWarning)
            expect = np.nanquantile(r, a, axis=0), np.nanquantile(r, 1 - a, axis=0)
        for got, ref in zip(percentile_interval(r), expect):
            assert np.shape(got) == np.shape(ref)
            np.testing.assert_array_equal(got, ref)
