"""Lagged-pair statistics: chunked, merged and split computations equal the whole."""

import numpy as np
import pytest

from cvdesign.stats.moments import DiagonalLaggedMoments, LagAccumulator, LaggedMoments, merge_all


def _pairs(series, lag, weights=None):
    """Explicit list of the lagged pairs of each series (never across series)."""
    x0, xt, w = [], [], []
    for i, x in enumerate(series):
        for t in range(len(x) - lag):
            x0.append(x[t])
            xt.append(x[t + lag])
            w.append(1.0 if weights is None else weights[i][t])
    return np.array(x0), np.array(xt), np.array(w)


def _reference_sums(x0, xt, w, shift):
    d0, dt = x0 - shift, xt - shift
    return (w.sum(), w @ d0, w @ dt, (w[:, None] * d0).T @ d0, (w[:, None] * d0).T @ dt,
            (w[:, None] * dt).T @ dt)


def _assert_same(m, ref, rtol=1e-12):
    names = ("count", "sum_x", "sum_y", "sum_xx", "sum_xy", "sum_yy")
    for name, r in zip(names, ref):
        got = getattr(m, name)
        scale = np.max(np.abs(r)) if np.size(r) else 1.0
        np.testing.assert_allclose(got, r, rtol=rtol, atol=rtol * scale, err_msg=name)


def _series(rng, n=400, d=4, offset=0.0):
    # A correlated random walk, far from zero when `offset` is large.
    return np.cumsum(rng.normal(size=(n, d)), axis=0) * [1.0, 3.0, 0.1, 1.0][:d] + offset


@pytest.mark.parametrize("weighted", [False, True])
def test_from_series_equals_explicit_pairs(weighted):
    rng = np.random.default_rng(0)
    x = _series(rng)
    w = rng.uniform(0.1, 2.0, size=len(x)) if weighted else None
    shift = x.mean(axis=0)
    m = LaggedMoments.from_series(x, lag=7, weights=w, shift=shift)
    x0, xt, pw = _pairs([x], 7, None if w is None else [w])
    _assert_same(m, _reference_sums(x0, xt, pw, shift))
    assert m.n_pairs == len(x) - 7 and m.lag == 7


@pytest.mark.parametrize("diagonal", [False, True])
@pytest.mark.parametrize("weighted", [False, True])
def test_chunked_feeding_in_any_chunk_sizes_equals_from_series(diagonal, weighted):
    rng = np.random.default_rng(1)
    x = _series(rng, n=500, offset=1e3)
    w = rng.uniform(0.1, 2.0, size=len(x)) if weighted else None
    lag = 9
    shift = x[:50].mean(axis=0)  # a rough pass-1 mean is enough
    cls = DiagonalLaggedMoments if diagonal else LaggedMoments
    whole = cls.from_series(x, lag, weights=w, shift=shift)
    for trial in range(6):
        # chunk sizes include 0, 1 and sizes below the lag
        cuts = np.sort(rng.choice(np.arange(0, 501), size=rng.integers(1, 60), replace=True))
        acc = LagAccumulator(4, lag, shift=shift, diagonal=diagonal)
        for piece in np.split(np.arange(500), cuts):
            acc.feed(x[piece], None if w is None else w[piece])
        m = acc.moments
        assert isinstance(m, cls)
        assert m.n_pairs == whole.n_pairs == 500 - lag
        assert acc.n_frames == 500
        _assert_same(m, [getattr(whole, k) for k in
                         ("count", "sum_x", "sum_y", "sum_xx", "sum_xy", "sum_yy")])


def test_no_pair_crosses_break_series():
    rng = np.random.default_rng(2)
    a, b, c = _series(rng, 120), _series(rng, 5), _series(rng, 300)
    lag = 10
    acc = LagAccumulator(4, lag)
    for x in (a, b, c):
        for chunk in np.array_split(x, 4):
            acc.feed(chunk)
        acc.break_series()
    x0, xt, w = _pairs([a, b, c], lag)  # b is shorter than the lag: no pairs
    assert acc.moments.n_pairs == len(x0) == (120 - lag) + (300 - lag)
    _assert_same(acc.moments, _reference_sums(x0, xt, w, np.zeros(4)))
    # and it differs from treating the three as one series
    joined = LaggedMoments.from_series(np.vstack([a, b, c]), lag)
    assert joined.n_pairs > acc.moments.n_pairs


@pytest.mark.parametrize("cls", [LaggedMoments, DiagonalLaggedMoments])
def test_merging_two_series_equals_the_sum_of_their_pairs(cls):
    rng = np.random.default_rng(3)
    a, b = _series(rng, 200), _series(rng, 150)
    shift = np.vstack([a, b]).mean(axis=0)
    ma = cls.from_series(a, 4, shift=shift)
    mb = cls.from_series(b, 4, shift=shift)
    merged = ma.merge(mb)
    assert merged.n_pairs == ma.n_pairs + mb.n_pairs
    for name in ("sum_x", "sum_y", "sum_xx", "sum_xy", "sum_yy"):
        np.testing.assert_array_equal(getattr(merged, name),
                                      getattr(ma, name) + getattr(mb, name))
    assert merged.count == ma.count + mb.count
    # merge_all works on lagged moments too, and inputs are left untouched
    before = ma.sum_xy.copy()
    m3 = merge_all([ma, mb, cls.from_series(a[:3], 4, shift=shift)])
    np.testing.assert_array_equal(ma.sum_xy, before)
    np.testing.assert_array_equal(m3.sum_xy, merged.sum_xy)


def test_covariances_match_numpy_on_explicit_pairs():
    rng = np.random.default_rng(4)
    series = [_series(rng, 300, offset=50.0), _series(rng, 200, offset=50.0)]
    lag = 3
    m = merge_all(LaggedMoments.from_series(x, lag, shift=np.full(4, 50.0)) for x in series)
    x0, xt, _ = _pairs(series, lag)
    # reversible: the statistics of the pairs seen in both directions, i.e. of the
    # concatenation of both ends
    both = np.vstack([x0, xt])
    mean, c0, ct = m.covariances(reversible=True)
    np.testing.assert_allclose(mean, both.mean(axis=0), rtol=1e-12)
    np.testing.assert_allclose(c0, np.cov(both.T, bias=True), rtol=1e-10)
    mu = both.mean(axis=0)
    cross = (x0 - mu).T @ (xt - mu) / len(x0)
    np.testing.assert_allclose(ct, 0.5 * (cross + cross.T), rtol=1e-10)
    np.testing.assert_array_equal(c0, c0.T)
    np.testing.assert_array_equal(ct, ct.T)
    # non-reversible: each end about its own mean
    mx, my, cxx, cxy, cyy = m.covariances(reversible=False)
    np.testing.assert_allclose(mx, x0.mean(axis=0), rtol=1e-12)
    np.testing.assert_allclose(my, xt.mean(axis=0), rtol=1e-12)
    full = np.cov(np.hstack([x0, xt]).T, bias=True)
    np.testing.assert_allclose(cxx, full[:4, :4], rtol=1e-10)
    np.testing.assert_allclose(cxy, full[:4, 4:], rtol=1e-10)
    np.testing.assert_allclose(cyy, full[4:, 4:], rtol=1e-10)


def test_shift_keeps_sums_well_conditioned_far_from_zero():
    rng = np.random.default_rng(5)
    x = rng.normal(size=(2000, 3)) + 1e6  # unit spread, a million away from zero
    lag = 2
    ref = np.cov(np.vstack([x[:-lag], x[lag:]]).T, bias=True)
    good = LaggedMoments.from_series(x, lag, shift=x[:100].mean(axis=0))
    np.testing.assert_allclose(good.covariances()[1], ref, rtol=1e-8, atol=1e-10)
    # reshifting is exact algebra: equal to accumulating about the new shift
    other = good.reshifted(np.full(3, 1e6))
    direct = LaggedMoments.from_series(x, lag, shift=np.full(3, 1e6))
    for name in ("sum_x", "sum_y", "sum_xx", "sum_xy", "sum_yy"):
        np.testing.assert_allclose(getattr(other, name), getattr(direct, name),
                                   rtol=1e-9, atol=1e-9 * np.abs(getattr(direct, name)).max())


def test_subset_and_diagonal_are_exact():
    rng = np.random.default_rng(6)
    x = _series(rng, 300)
    m = LaggedMoments.from_series(x, 5, shift=x.mean(axis=0))
    sub = m.subset([3, 1])
    direct = LaggedMoments.from_series(x[:, [3, 1]], 5, shift=x.mean(axis=0)[[3, 1]])
    for name in ("sum_x", "sum_y", "sum_xx", "sum_xy", "sum_yy"):
        np.testing.assert_allclose(getattr(sub, name), getattr(direct, name), rtol=1e-12)
    diag = m.diagonal()
    ddirect = DiagonalLaggedMoments.from_series(x, 5, shift=x.mean(axis=0))
    for name in ("sum_x", "sum_y", "sum_xx", "sum_xy", "sum_yy"):
        np.testing.assert_allclose(getattr(diag, name), getattr(ddirect, name), rtol=1e-12)
    # the diagonal statistics give the diagonals of the full covariances
    _, c0, ct = m.covariances()
    np.testing.assert_allclose(ddirect.autocorrelation(), np.diag(ct) / np.diag(c0), rtol=1e-12)
    _, _, cxx, cxy, cyy = m.covariances(reversible=False)
    np.testing.assert_allclose(ddirect.autocorrelation(reversible=False),
                               np.diag(cxy) / np.sqrt(np.diag(cxx) * np.diag(cyy)), rtol=1e-12)


def test_autocorrelation_of_ar1_is_phi_to_the_lag():
    # AR(1) x_{t+1} = phi x_t + noise has autocorrelation phi^k at lag k (common practice;
    # e.g. Box and Jenkins, Time Series Analysis). 200 000 frames: standard error ~ 3e-3.
    rng = np.random.default_rng(7)
    from scipy.signal import lfilter
    phi = np.array([0.5, 0.9, 0.0])
    x = np.column_stack([lfilter([1.0], [1.0, -p], rng.normal(size=200_000)) for p in phi])
    ac = DiagonalLaggedMoments.from_series(x, lag=3).autocorrelation()
    np.testing.assert_allclose(ac, phi**3, atol=0.015)


def test_constant_feature_and_empty_statistics_give_nan_without_warnings():
    x = np.c_[np.arange(10.0), np.ones(10)]
    ac = DiagonalLaggedMoments.from_series(x, 2).autocorrelation()
    assert np.isfinite(ac[0]) and np.isnan(ac[1])
    empty = LaggedMoments.from_series(x, lag=10)  # len <= lag: no pairs
    assert empty.count == 0 and empty.n_pairs == 0
    assert all(np.all(np.isnan(a)) for a in empty.covariances())
    assert all(np.all(np.isnan(a)) for a in empty.covariances(reversible=False))
    assert np.all(np.isnan(DiagonalLaggedMoments(2).autocorrelation()))


def test_empty_statistics_merge_as_identity_whatever_their_shift():
    x = np.random.default_rng(8).normal(size=(30, 2))
    m = LaggedMoments.from_series(x, 2, shift=[1.0, 2.0])
    e = LaggedMoments(2)  # shift zeros, but empty
    for merged in (m.merge(e), e.merge(m)):
        np.testing.assert_array_equal(merged.shift, m.shift)
        np.testing.assert_array_equal(merged.sum_xy, m.sum_xy)
        assert merged.lag == 2


def test_refusals_name_the_problem():
    x = np.random.default_rng(9).normal(size=(30, 2))
    with pytest.raises(ValueError, match=r"lag=0 must be an integer >= 1"):
        LaggedMoments.from_series(x, 0)
    with pytest.raises(ValueError, match=r"lag=2.5 must be an integer >= 1"):
        LagAccumulator(2, 2.5)
    with pytest.raises(ValueError, match="different shifts"):
        LaggedMoments.from_series(x, 2).merge(LaggedMoments.from_series(x, 2, shift=[1, 1]))
    with pytest.raises(ValueError, match=r"cannot merge lagged moments of lag=3 into lag=2"):
        LaggedMoments.from_series(x, 2).merge(LaggedMoments.from_series(x, 3))
    with pytest.raises(ValueError, match="cannot merge DiagonalLaggedMoments into LaggedMoments"):
        LaggedMoments.from_series(x, 2).merge(DiagonalLaggedMoments.from_series(x, 2))
    with pytest.raises(ValueError, match="x_chunk has 3 features; these moments hold 2"):
        LagAccumulator(2, 1).feed(np.ones((4, 3)))
    with pytest.raises(ValueError, match="shift has 3 entries"):
        LaggedMoments(2, shift=[0, 0, 0])
    with pytest.raises(ValueError, match="same number of pairs"):
        LaggedMoments(2).add_pairs(np.ones((3, 2)), np.ones((4, 2)))
    with pytest.raises(ValueError, match="non-negative"):
        LaggedMoments.from_series(x, 2, weights=-np.ones(30))
