"""The passes' leaf arithmetic against direct numpy products (issue 10, item 5).

The passes shift a leaf's window once, take the second frames' lagged sums from the first
frames' sums plus the edge rows (``window_sums``), derive the screening pass's lagged
``sum_xx`` from the leaf's centred scatter, and bin every column of a block in one
``bincount``. Each is checked here against the plain computation (numpy products over the
pairs, each pair built by hand) on data far from zero (offsets of 1e3 to 1e6 for a spread
of about 1), at lags below, at and beyond half a leaf, a leaf and the halo.

Tolerances: relative to the sum of the absolute values of the terms (the natural bound of
float64 summation, ``n eps`` for ``n`` terms, common practice); 1e-13 for a few hundred
terms is several times that bound and far below any loss of digits.
"""

import numpy as np
import pytest

from cvdesign.passes import BlockPass, CardPass, LagGridPass, LaggedPass, ScreeningPass
from cvdesign.passes.engine import Leaf
from cvdesign.score.univariate import bin_counts
from cvdesign.stats.moments import DiagonalLaggedMoments, LaggedMoments, window_sums

LEAF = 16
LAGS = (1, 7, 8, 9, 15, 16, 17, 40)  # 2k < leaf, 2k = leaf, k = leaf, k beyond the leaf
TOL = 1e-13


class _Mem:
    def __init__(self, p):
        self.n_features = p


_leaves = Leaf.of_matrix


def _far(seed, n=100, p=4, offset=1e6):
    """A slow series (AR(1), spread about 1) about offsets of `offset` and more."""
    rng = np.random.default_rng(seed)
    x = np.empty((n, p))
    x[0] = rng.normal(size=p)
    for t in range(1, n):
        x[t] = 0.8 * x[t - 1] + rng.normal(size=p)
    return x + offset * np.arange(1, p + 1)


def _pairs(x, a, b, lag):
    """First frames ``a .. b - 1`` of the leaf with a partner `lag` rows later in the data."""
    t = np.arange(a, min(b, x.shape[0] - lag))
    return x[t], x[t + lag]


def _exact(u, v):
    """Column sums of ``u v^T`` terms, each side in long double (the reference)."""
    return np.asarray(u, dtype=np.longdouble).T @ np.asarray(v, dtype=np.longdouble)


def _check(got, want, scale):
    """``|got - want| <= TOL * scale`` elementwise."""
    err = np.abs(np.asarray(got, dtype=np.longdouble) - want)
    assert np.all(err <= TOL * scale), float(np.max(err / scale))


def _check_moments(m, x0, xt, shift, diagonal):
    d0, dt = x0 - shift, xt - shift
    assert m.n_pairs == d0.shape[0] and m.count == float(d0.shape[0])
    for name, u, v in (("xx", d0, d0), ("xy", d0, dt), ("yy", dt, dt)):
        want, scale = _exact(u, v), _exact(np.abs(u), np.abs(v))
        if diagonal:
            want, scale = np.diag(want), np.diag(scale)
        _check(getattr(m, "sum_" + name), want, scale)
    _check(m.sum_x, _exact(d0, np.ones((d0.shape[0], 1)))[:, 0],
           _exact(np.abs(d0), np.ones((d0.shape[0], 1)))[:, 0])
    _check(m.sum_y, _exact(dt, np.ones((dt.shape[0], 1)))[:, 0],
           _exact(np.abs(dt), np.ones((dt.shape[0], 1)))[:, 0])


@pytest.mark.parametrize("lag", LAGS)
@pytest.mark.parametrize("cls", [LaggedMoments, DiagonalLaggedMoments])
def test_window_sums_equal_the_direct_products_of_the_pairs_at_any_lag(cls, lag):
    x = _far(lag, n=max(LEAF, 2 * lag + 1) + lag + 3)
    shift = x[0]  # the first frame, as the pipeline's reference features
    d = x - shift
    for a, b in ((0, LEAF), (3, LEAF), (0, 2 * lag + 1)):
        m = cls(x.shape[1], shift=shift, lag=lag).add_window(d, a, b, lag)
        _check_moments(m, x[a:b], x[a + lag:b + lag], shift, cls is DiagonalLaggedMoments)
        # and the same bytes as the general route (shifted pairs, three products) where
        # the edges are not used
        if 2 * lag >= b - a:
            ref = cls(x.shape[1], shift=shift, lag=lag).add_shifted(d[a:b], d[a + lag:b + lag])
            for name in ("sum_x", "sum_y", "sum_xx", "sum_xy", "sum_yy"):
                assert np.array_equal(getattr(m, name), getattr(ref, name))


def test_window_sums_stay_accurate_without_a_shift_on_data_far_from_zero():
    """No shift at all (zeros): the sums are of order n offset^2 and the edges' share of
    the second frames' sums must not lose more than the direct product does."""
    x = _far(7, n=LEAF + 5, offset=1e3)
    gram = lambda u: u.T @ u  # noqa: E731
    sx, sy, sxx, sxy, syy = window_sums(x, 0, LEAF, 5, gram, lambda u, v: u.T @ v)
    dt = x[5:LEAF + 5]
    _check(syy, _exact(dt, dt), _exact(np.abs(dt), np.abs(dt)))
    _check(sy, dt.astype(np.longdouble).sum(axis=0), np.abs(dt).astype(np.longdouble).sum(0))
    direct = dt.T @ dt  # numpy's own product: the edges are as close to the exact sums
    assert np.max(np.abs(syy - _exact(dt, dt))) <= 4 * max(
        float(np.max(np.abs(direct - _exact(dt, dt)))), 1e-16 * float(np.max(np.abs(direct))))


@pytest.mark.parametrize("diagonal", [False, True])
def test_lagged_pass_leaves_give_the_direct_sums_at_leaf_and_halo_boundaries(diagonal):
    x = _far(1)
    shift = x[0] + 0.5
    for lag in LAGS:
        p = LaggedPass(_Mem(x.shape[1]), lag, shift=shift, diagonal=diagonal)
        for leaf in _leaves(x, LEAF, lag):
            a = int(leaf.frames[0])
            got = p.map(leaf)
            x0, xt = _pairs(x, a, a + leaf.n, lag)
            if x0.shape[0] == 0:
                assert got is None
                continue
            (key, m), = got.items()
            assert key == (0, 0, 0) and m.lag == lag
            _check_moments(m, x0, xt, shift, diagonal)


def test_screening_pass_leaves_give_two_pass_moments_and_direct_lagged_sums_far_from_the_shift():
    """The shift 40 spreads away from the data (another state's reference frame): the
    leaf's scatter is still the two-pass one and the lagged sum_xx, derived from it, the
    direct sum."""
    x = _far(2)
    shift = x[0] + 40.0
    for lag in LAGS:
        p = ScreeningPass(_Mem(x.shape[1]), lags=lag, shift=shift)
        for leaf in _leaves(x, LEAF, lag):
            a = int(leaf.frames[0])
            got = p.map(leaf)
            xl = x[a:a + leaf.n]
            dm = got["diag"][0]
            mean = xl.astype(np.longdouble).mean(axis=0)
            m2 = ((xl - mean) ** 2).sum(axis=0)
            assert np.all(np.abs(dm.mean - mean) <= 1e-15 * np.abs(mean))
            _check(dm.m2, m2, m2)
            assert np.array_equal(dm.minimum, xl.min(axis=0))
            assert np.array_equal(dm.maximum, xl.max(axis=0))
            assert got["counts"] == {(0, 0): leaf.n}
            x0, xt = _pairs(x, a, a + leaf.n, lag)
            if x0.shape[0] == 0:
                assert got["lagged"] == {}
                continue
            _check_moments(got["lagged"][(0, 0)], x0, xt, shift, True)


def test_lag_grid_pass_leaves_give_the_direct_sums_of_every_lag():
    x = _far(3)
    shift = x[0]
    p = LagGridPass(_Mem(x.shape[1]), LAGS, shift=shift)
    for leaf in _leaves(x, LEAF, max(LAGS)):
        a = int(leaf.frames[0])
        got = p.map(leaf) or {}
        for g, lag in enumerate(LAGS):
            x0, xt = _pairs(x, a, a + leaf.n, lag)
            if x0.shape[0] == 0:
                assert (g, 0, 0, 0) not in got
                continue
            _check_moments(got[(g, 0, 0, 0)], x0, xt, shift, True)


@pytest.mark.parametrize("within", [True, False])
def test_block_pass_leaves_give_the_direct_lagged_sums_of_each_block(within):
    """Blocks of 24 frames cut leaves of 16: a block's pairs are a run of consecutive rows
    (both frames in the block, or only the first)."""
    x = _far(5, p=3)
    shift = x[0] - 0.5
    for lag in (1, 7, 9, 17):
        p = BlockPass(_Mem(x.shape[1]), block_frames=24, moments=False, lags=lag,
                      lag_shift=shift, pairs_within_block=within)
        for leaf in _leaves(x, LEAF, lag):
            a = int(leaf.frames[0])
            got = p.map(leaf)
            for (_, _, _, blk), (_, m, _) in got.items():
                r0, r1 = max(a, 24 * blk), min(a + leaf.n, 24 * (blk + 1))
                end = min(x.shape[0], 24 * (blk + 1)) if within else x.shape[0]
                t = np.arange(r0, min(r1, end - lag))
                if t.size == 0:
                    assert m is None
                    continue
                _check_moments(m, x[t], x[t + lag], shift, False)


@pytest.mark.parametrize("run_means", [False, True])
def test_card_pass_leaves_give_the_direct_block_sums_with_pairs_in_their_first_block(run_means):
    """Blocks of 24 frames cut leaves of 16; the run's mean 30 spreads from the center."""
    x = _far(4, p=3)
    center = x[0] + 0.25
    lo, hi = x.min(axis=0), x.max(axis=0)
    means = {(0, 0): center + 30.0} if run_means else None
    for lag in (1, 7, 9, 17):
        p = CardPass(_Mem(x.shape[1]), center=center, low=lo, high=hi, n_bins=5,
                     block_frames=24, lags=lag, run_means=means)
        for leaf in _leaves(x, LEAF, lag):
            a = int(leaf.frames[0])
            got = p.map(leaf)
            assert sorted(got) == sorted({(0, 0, t // 24) for t in range(a, a + leaf.n)})
            for (_, _, blk), sums in got.items():
                r0, r1 = max(a, 24 * blk), min(a + leaf.n, 24 * (blk + 1))
                xb = x[r0:r1]
                assert sums["n"] == r1 - r0
                want = bin_counts(xb, lo, hi, 5, np.zeros(r1 - r0, dtype=int), 1)[0]
                assert np.array_equal(sums["hist"], want)
                d = xb - center
                _check(sums["s1"], d.astype(np.longdouble).sum(axis=0),
                       np.abs(d).astype(np.longdouble).sum(axis=0))
                _check(sums["s2"], (d.astype(np.longdouble) ** 2).sum(axis=0),
                       (d.astype(np.longdouble) ** 2).sum(axis=0))
                x0, xt = _pairs(x, r0, r1, lag)
                assert sums["n_pairs"] == x0.shape[0]
                if x0.shape[0] == 0:
                    continue
                mean = center + 30.0 if run_means else center
                for name, u, v in (("sx", x0 - center, 1.0), ("sy", xt - center, 1.0),
                                   ("sxx", x0 - center, x0 - center),
                                   ("sxy", x0 - center, xt - center),
                                   ("syy", xt - center, xt - center),
                                   ("lt", x0 - mean, xt - mean)):
                    u = u.astype(np.longdouble)
                    terms = u * v
                    _check(sums[name], terms.sum(axis=0), np.abs(terms).sum(axis=0))
                u, v = (x0 - mean).astype(np.longdouble), (xt - mean).astype(np.longdouble)
                l0 = 0.5 * (u * u + v * v).sum(axis=0)
                _check(sums["l0"], l0, l0)


def test_bin_counts_follow_the_formula_for_any_block_width_with_weights_and_odd_values():
    rng = np.random.default_rng(11)
    x = rng.normal(size=(70, 9)) * 2.0
    x[3, 1], x[5, 2], x[6, 2], x[8, 4] = np.nan, np.inf, -np.inf, 1e300
    lo, hi = np.full(9, -1.5), np.full(9, 2.5)
    nb = 6
    groups = rng.integers(0, 3, size=70)
    w = rng.uniform(0.1, 2.0, size=70)
    with np.errstate(invalid="ignore"):
        q = np.floor((x - lo) / (hi - lo) * nb)
    b = np.where(np.isnan(q), 0, np.clip(np.nan_to_num(q, posinf=nb, neginf=0), 0, nb - 1))
    want = np.zeros((3, 9, nb))
    want_w = np.zeros((3, 9, nb))
    for t in range(70):  # one row at a time, in row order
        for f in range(9):
            want[groups[t], f, int(b[t, f])] += 1.0
            want_w[groups[t], f, int(b[t, f])] += w[t]
    for block in (None, 1, 4, 9, 100):
        with np.errstate(invalid="ignore"):
            got = bin_counts(x, lo, hi, nb, groups, 3, block=block)
            got_w = bin_counts(x, lo, hi, nb, groups, 3, w, block=block)
        assert np.array_equal(got, want)
        np.testing.assert_allclose(got_w, want_w, rtol=1e-14)
        if block is not None:  # the weighted counts do not depend on the block width
            with np.errstate(invalid="ignore"):
                assert np.array_equal(got_w, bin_counts(x, lo, hi, nb, groups, 3, w))
    # every row in one group (the usual leaf): the group's offset joins the features'
    with np.errstate(invalid="ignore"):
        one = bin_counts(x, lo, hi, nb, np.full(70, 2), 3, block=4)
    assert np.array_equal(one[2], want.sum(axis=0)) and not one[:2].any()
    # fewer rows than bins: the row-by-row path
    with np.errstate(invalid="ignore"):
        few = bin_counts(x[:4], lo, hi, 50, groups[:4], 3, block=2)
    assert few.sum() == 4 * 9 and few[groups[1], 1, 0] == 1.0  # (NaN in the first bin)


def test_a_pass_refuses_columns_outside_the_features_and_gathers_the_others_as_values():
    with pytest.raises(ValueError, match="columns must be feature indices below 3"):
        ScreeningPass(_Mem(3), columns=[0, 3])
    x = _far(6, n=20, p=3)
    p = LaggedPass(_Mem(3), 2, columns=[2, -3], center=[1.0, 2.0], scale=[2.0, 4.0])
    out = np.empty((20, 2))
    got = p.values_in(x, out)
    assert got is out and np.array_equal(got, p.values(x))
    assert np.array_equal(got, (x[:, [2, 0]] - [1.0, 2.0]) / [2.0, 4.0])


def test_leaves_mapped_in_concurrent_threads_give_the_bytes_of_serial_maps():
    """The leaf temporaries are per-thread scratch arrays: threads never share one."""
    from concurrent.futures import ThreadPoolExecutor

    p = 300  # leaves big enough for numpy to release the interpreter lock mid-pass
    x = _far(8, n=2048, p=p)
    lo, hi = x.min(axis=0), x.max(axis=0)
    passes = [ScreeningPass(_Mem(p), lags=3, shift=x[0]),
              CardPass(_Mem(p), center=x[0], low=lo, high=hi, n_bins=7, block_frames=300,
                       lags=3, run_means={(0, 0): x[5]}, columns=np.arange(p - 1, -1, -1)),
              LagGridPass(_Mem(p), (1, 5, 20), shift=x[1])]
    leaves = _leaves(x, 256, 20)

    def flat(value):  # every array of a map's output, in a fixed order
        if isinstance(value, dict):
            return [a for k in sorted(value, key=repr) for a in flat(value[k])]
        if isinstance(value, (list, tuple)):
            return [a for v in value for a in flat(v)]
        if hasattr(value, "arrays"):
            return flat(value.arrays)
        if hasattr(value, "__slots__"):
            return [a for name in value.__slots__ for a in flat(getattr(value, name))]
        return [np.asarray(value)]

    serial = [flat(p.map(leaf)) for leaf in leaves for p in passes]
    jobs = [(p, leaf) for leaf in leaves for p in passes] * 3
    with ThreadPoolExecutor(4) as pool:
        threaded = list(pool.map(lambda job: flat(job[0].map(job[1])), jobs))
    for k, got in enumerate(threaded):
        want = serial[k % len(serial)]
        assert len(got) == len(want)
        assert all(a.tobytes() == b.tobytes() for a, b in zip(got, want))
