"""TICA against the exact answer of a reversible Ornstein-Uhlenbeck process, and its API."""

import numpy as np
import pytest

from cvdesign.fit import (MIN_PAIRS_PER_FEATURE, DroppedDirectionsWarning, FewPairsWarning, TICA,
                          few_pairs_text, slow_modes, timescales_from_eigenvalues)
from cvdesign.stats.moments import DiagonalLaggedMoments, LaggedMoments, merge_all

LAG = 5  # frames; the OU fixture has dt = 1 frame


def _cos(a, b):
    return abs(a @ b) / (np.linalg.norm(a) * np.linalg.norm(b))


@pytest.fixture(scope="module")
def ou_fits(ou_train):
    """TICA on all of `ou_train` and on 10 disjoint groups of 10 trajectories."""
    per_traj = [LaggedMoments.from_series(x, LAG) for x in ou_train]  # data have mean 0
    groups = [TICA.from_moments(merge_all(per_traj[i:i + 10]), lag=LAG)
              for i in range(0, len(per_traj), 10)]
    return TICA(lag=LAG).fit(ou_train), groups


def test_ou_eigenvalues_are_exp_of_minus_rate_times_lag(ou, ou_fits):
    # For a reversible OU process the lag-tau correlation matrix is
    # Sigma exp(-A^T tau) and the TICA eigenvalues are exp(-k_i tau), with k_i
    # the eigenvalues of the drift A (Gardiner, Handbook of Stochastic Methods;
    # Risken, The Fokker-Planck Equation; from memory).
    full, groups = ou_fits
    expect = np.exp(-ou.rates * LAG)  # 0.905, 0.607, 0.135
    # Statistical error of the full estimate from 10 independent repeats of a tenth
    # of the data: se(full) ~ std(groups) / sqrt(10).
    group_ev = np.array([g.eigenvalues_ for g in groups])
    se = group_ev.std(axis=0, ddof=1) / np.sqrt(len(groups))
    assert np.all(se < 0.003)  # the test is sharp: errors of a few 1e-3 at most
    assert np.all(np.abs(full.eigenvalues_ - expect) < 4 * se), (full.eigenvalues_, expect, se)
    assert np.all(np.diff(full.eigenvalues_) < 0)


def test_ou_implied_timescales_within_5_percent(ou, ou_fits):
    full, _ = ou_fits
    np.testing.assert_allclose(full.timescales_, 1.0 / ou.rates, rtol=0.05)


def test_ou_eigenvectors_are_the_left_eigenvectors_of_the_drift(ou, ou_fits):
    # w^T x relaxes as exp(-k t) exactly when A^T w = k w.
    full, _ = ou_fits
    rates, modes = ou.slow_modes()
    assert np.max(np.abs(modes[:, 0])) < 0.8  # the slow mode is not along an axis
    assert _cos(full.eigenvectors_[:, 0], modes[:, 0]) > 0.99
    assert _cos(full.eigenvectors_[:, 1], modes[:, 1]) > 0.99
    # C0-orthonormal directions
    np.testing.assert_allclose(full.eigenvectors_.T @ full.covariance_ @ full.eigenvectors_,
                               np.eye(3), atol=1e-10)
    np.testing.assert_allclose(full.covariance_, ou.Sigma, rtol=0.1)


def test_ou_non_reversible_estimate_agrees_on_equilibrium_data(ou, ou_train):
    rev = TICA(lag=LAG).fit(ou_train)
    nonrev = TICA(lag=LAG, reversible=False).fit(ou_train)
    np.testing.assert_allclose(nonrev.eigenvalues_, rev.eigenvalues_, atol=2e-3)
    np.testing.assert_allclose(nonrev.mean_, np.vstack([x[:-LAG] for x in ou_train]).mean(0),
                               atol=1e-12)


def test_fit_on_list_equals_from_moments_and_pairs_never_cross_arrays():
    rng = np.random.default_rng(0)
    a = np.cumsum(rng.normal(size=(300, 3)), axis=0)
    b = np.cumsum(rng.normal(size=(200, 3)), axis=0) + 40.0
    fitted = TICA(lag=4).fit([a, b])
    shift = np.vstack([a, b]).mean(axis=0)
    lm = LaggedMoments.from_series(a, 4, shift=shift).merge(
        LaggedMoments.from_series(b, 4, shift=shift))
    direct = TICA.from_moments(lm, lag=4)
    for name in ("mean_", "covariance_", "covariance_lag_", "eigenvalues_", "eigenvectors_",
                 "timescales_"):
        np.testing.assert_allclose(getattr(fitted, name), getattr(direct, name),
                                   rtol=1e-10, atol=1e-12, err_msg=name)
    assert fitted.n_features_in_ == 3 and fitted.n_dropped_ == 0
    # one concatenated array would add the 4 pairs that span the jump between a and b
    joined = TICA(lag=4).fit(np.vstack([a, b]))
    assert not np.allclose(joined.covariance_lag_, fitted.covariance_lag_)
    # transform of a list is a list of projections
    out = fitted.transform([a, b])
    assert [o.shape for o in out] == [(300, 3), (200, 3)]
    np.testing.assert_allclose(out[1], fitted.transform(b))


def test_transform_has_unit_variance_and_kinetic_weighting_scales_by_eigenvalues():
    rng = np.random.default_rng(1)
    x = np.cumsum(rng.normal(size=(2000, 3)), axis=0) @ rng.normal(size=(3, 3))
    plain = TICA(lag=3).fit(x)
    kmap = TICA(lag=3, kinetic_weighting=True).fit(x)
    y = plain.transform(x)
    assert y.shape == (2000, 3) and y.dtype == np.float64
    lm = LaggedMoments.from_series(y, 3)
    np.testing.assert_allclose(lm.covariances()[1], np.eye(3), atol=1e-8)
    np.testing.assert_allclose(kmap.transform(x), y * plain.eigenvalues_, rtol=1e-12)
    np.testing.assert_allclose(TICA(2, lag=3).fit_transform(x), y[:, :2], rtol=1e-10)


def test_nearly_dependent_features_are_dropped_by_rcond():
    rng = np.random.default_rng(2)
    x = np.cumsum(rng.normal(size=(500, 2)), axis=0)
    X = np.c_[x, x[:, 0] + x[:, 1]]  # exactly dependent third column
    with pytest.warns(DroppedDirectionsWarning, match=r"1 of 3 directions of the "
                                                      r"instantaneous covariance C0 dropped"):
        tica = TICA(lag=2).fit(X)
    assert tica.n_dropped_ == 1
    assert tica.eigenvalues_.shape == (2,) and tica.eigenvectors_.shape == (3, 2)
    with pytest.raises(ValueError, match=r"n_components=3 must be between 1 and the number "
                                         r"of directions kept, 2 \(of 3 features; 1 dropped"):
        TICA(3, lag=2).fit(X)


def _slow_beside_fast(seed):
    """A slow AR(1) feature (coefficient 0.99, about 100 frames) of std 5e-4 beside white
    noise of std 1: 20,000 frames."""
    rng = np.random.default_rng(seed)
    slow = np.zeros(20000)
    noise = rng.normal(size=20000)
    for t in range(1, 20000):
        slow[t] = 0.99 * slow[t - 1] + noise[t]
    return np.c_[slow / slow.std() * 5e-4, rng.normal(size=20000)]


def test_rcond_cut_is_on_the_correlation_scale_so_the_units_do_not_matter():
    X = _slow_beside_fast(11)
    small = TICA(lag=10).fit(X)  # the raw C0's eigenvalues are 2.5e-7 and 1: cut at 1e-6
    unit = TICA(lag=10).fit(X / X.std(axis=0))
    assert small.n_dropped_ == 0
    np.testing.assert_allclose(small.eigenvalues_, unit.eigenvalues_, rtol=1e-9)
    # the AR(1)'s autocorrelation at 10 frames is 0.99**10 = 0.904 (Box and Jenkins, Time
    # Series Analysis, 1970), its implied timescale -1 / ln 0.99 = 99.5 frames
    assert 0.85 < small.eigenvalues_[0] < 0.95 and small.timescales_[0] > 60


def test_constant_features_are_dropped_with_a_warning_and_get_zero_weights():
    rng = np.random.default_rng(12)
    x = np.cumsum(rng.normal(size=(600, 2)), axis=0)
    X = np.c_[x[:, 0], np.full(600, 3.0), x[:, 1]]
    lm = LaggedMoments.from_series(X, 2)
    with pytest.warns(DroppedDirectionsWarning, match=r"1 of 3 directions of the "
                                                      r"instantaneous covariance C0 dropped: "
                                                      r"constant features"):
        modes = slow_modes(lm, lag=2)
    assert modes.n_dropped == 1 and modes.eigenvectors.shape == (3, 2)
    assert np.all(modes.eigenvectors[1] == 0) and np.isfinite(modes.eigenvectors).all()
    kept = TICA(lag=2).fit(X[:, [0, 2]])
    np.testing.assert_allclose(modes.eigenvalues, kept.eigenvalues_, rtol=1e-10)


@pytest.mark.parametrize("value, shift", [(0.1, None), (1.7, 0.0), (1e-3, 0.051)])
def test_constant_feature_with_a_variance_of_rounding_is_dropped_not_made_a_mode(value, shift):
    # a constant column's computed variance is a rounding residue (about 1e-16 here, of
    # either sign); scaled to unit variance it would be a feature of pure noise
    rng = np.random.default_rng(16)
    x = np.cumsum(rng.normal(size=(1000, 2)), axis=0)
    X = np.c_[x[:, 0], np.full(1000, value), x[:, 1]]
    lm = LaggedMoments.from_series(X, 2, shift=None if shift is None else np.full(3, shift))
    assert lm.covariances()[1][1, 1] != 0.0  # the residue the test is about
    with pytest.warns(DroppedDirectionsWarning, match=r"1 of 3 directions"):
        modes = slow_modes(lm, lag=2)
    assert modes.n_dropped == 1 and np.all(modes.eigenvectors[1] == 0)
    kept = TICA(lag=2).fit(X[:, [0, 2]])
    np.testing.assert_allclose(modes.eigenvalues, kept.eigenvalues_, rtol=1e-8)


def test_lag_validation_messages():
    x = np.random.default_rng(3).normal(size=(500, 2))
    with pytest.raises(ValueError, match=r"lag=0 must be an integer >= 1"):
        TICA(lag=0).fit(x)
    with pytest.raises(ValueError, match=r"lag=1.5 must be an integer >= 1"):
        TICA(lag=1.5).fit(x)
    with pytest.raises(ValueError, match=r"lag=True must be an integer >= 1"):
        TICA(lag=True).fit(x)
    with pytest.raises(ValueError, match=r"lag=600 frames needs a trajectory of at least 601 "
                                         r"frames, but X has n_samples=500 frames; "
                                         r"choose lag <= 499"):
        TICA(lag=600).fit(x)
    with pytest.raises(ValueError, match=r"lag=600 frames needs a trajectory of at least 601 "
                                         r"frames, but the longest of the 2 trajectories in X "
                                         r"has 500 frames"):
        TICA(lag=600).fit([x, x[:100]])
    # a short array among long ones is fine: it just adds no pairs
    both = TICA(lag=200).fit([x, x[:100]])
    alone = TICA(lag=200).fit(x)
    assert both.eigenvalues_.shape == alone.eigenvalues_.shape
    lm = LaggedMoments.from_series(x, 5)
    with pytest.raises(ValueError, match=r"lag=4 does not match the lag of lagged_moments "
                                         r"\(5 frames\)"):
        TICA.from_moments(lm, lag=4)
    with pytest.raises(ValueError, match="must be a LaggedMoments; got DiagonalLaggedMoments"):
        TICA.from_moments(DiagonalLaggedMoments.from_series(x, 5), lag=5)
    with pytest.raises(ValueError, match="holds no pairs"):
        TICA.from_moments(LaggedMoments(2), lag=5)


def test_other_parameter_messages():
    x = np.random.default_rng(4).normal(size=(50, 2))
    with pytest.raises(ValueError, match=r"rcond=1.5 must be a number in \[0, 1\)"):
        TICA(rcond=1.5).fit(x)
    with pytest.raises(ValueError, match=r"kinetic_weighting='commute' must be True or False"):
        TICA(kinetic_weighting="commute").fit(x)
    with pytest.raises(ValueError, match=r"n_components=0 must be None or an integer >= 1"):
        TICA(0).fit(x)
    with pytest.raises(ValueError, match="X\\[1\\] has 3 features; X\\[0\\] has 2"):
        TICA().fit([x, np.ones((10, 3))])
    with pytest.raises(ValueError, match="features do not vary"):
        TICA().fit(np.ones((20, 2)))
    fitted = TICA().fit(x)
    with pytest.raises(ValueError, match="X has 3 features"):
        fitted.transform(np.ones((4, 3)))


def test_signs_are_deterministic():
    rng = np.random.default_rng(5)
    x = np.cumsum(rng.normal(size=(400, 3)), axis=0)
    a = TICA(lag=2).fit(x).eigenvectors_
    b = TICA(lag=2).fit(-x).eigenvectors_  # flipping the data flips every raw eigenvector
    np.testing.assert_allclose(a, b, rtol=1e-10)
    assert np.all(a[np.argmax(np.abs(a), axis=0), np.arange(3)] > 0)


def test_implied_timescales_conventions():
    ev = np.array([np.exp(-1 / 50), 1.0, 1.0 + 1e-9, 0.0, -0.2, np.nan])
    t = timescales_from_eigenvalues(ev, lag=3)
    assert t[0] == pytest.approx(150.0, rel=1e-12)
    assert np.isinf(t[1]) and np.isinf(t[2])
    assert np.all(np.isnan(t[3:]))
    assert timescales_from_eigenvalues(0.5, lag=2.0).shape == ()
    with pytest.raises(ValueError, match=r"lag=0 must be a positive number"):
        timescales_from_eigenvalues(ev, lag=0)


def _white_noise_runs(n_runs, n_frames, n_features, seed):
    rng = np.random.default_rng(seed)
    return [rng.standard_normal((n_frames, n_features)) for _ in range(n_runs)]


def test_too_few_lagged_pairs_for_the_features_are_warned_about_white_noise_looks_slow():
    # white noise has no slow process, yet TICA from 3 runs of 100 frames and 250 features
    # (285 pairs at lag 5) finds eigenvalues near 1 and timescales of hundreds of frames:
    # the variational lower bound holds only for exact averages
    with pytest.warns(FewPairsWarning, match=r"285 lagged pairs for 250 features \(1.14 per "
                      r"feature, fewer than 20, our rule\).* implied timescales too long"):
        tica = TICA(lag=5).fit(_white_noise_runs(3, 100, 250, seed=0))
    assert tica.timescales_[0] > 100 * 5
    # TICA.from_moments (what propose_states calls) warns the same way
    x = _white_noise_runs(1, 300, 100, seed=1)[0]
    with pytest.warns(FewPairsWarning, match="295 lagged pairs for 100 features"):
        TICA.from_moments(LaggedMoments.from_series(x, 5, shift=x.mean(axis=0)), lag=5)
    assert few_pairs_text(MIN_PAIRS_PER_FEATURE * 30 - 1, 30) is not None


def test_ample_lagged_pairs_give_no_warning_and_white_noise_timescales_below_the_lag():
    # the rule's ground (our choice of 20 pairs per feature): at 20 pairs per feature white
    # noise no longer shows a timescale longer than the lag; at 5 it does
    import warnings
    for n_features in (20, 50):
        n_frames = -(-MIN_PAIRS_PER_FEATURE * n_features // 3) + 5  # 3 runs, lag 5
        with warnings.catch_warnings():
            warnings.simplefilter("error", FewPairsWarning)
            ample = TICA(lag=5).fit(_white_noise_runs(3, n_frames, n_features, seed=2))
        assert ample.timescales_[0] < 5
        with pytest.warns(FewPairsWarning):
            few = TICA(lag=5).fit(_white_noise_runs(3, 5 * n_features // 3 + 5, n_features,
                                                    seed=3))
        assert few.timescales_[0] > 5
    # a slow process sampled well (the AR(1) of the class's example): no warning
    from scipy.signal import lfilter
    rng = np.random.default_rng(0)
    slow = lfilter([1.0], [1.0, -0.99], rng.normal(size=4000))
    with warnings.catch_warnings():
        warnings.simplefilter("error", FewPairsWarning)
        tica = TICA(lag=10).fit(np.c_[slow + rng.normal(size=4000), slow - rng.normal(size=4000)])
    assert 80 < tica.timescales_[0] < 120
