"""VAMP-2 against the exact answer of a reversible Ornstein-Uhlenbeck process."""

import numpy as np
import pytest

from cvdesign.fit import DroppedDirectionsWarning, TICA
from cvdesign.stats.moments import DiagonalLaggedMoments, LaggedMoments, merge_all
from cvdesign.fit.vamp import vamp2_score

LAG = 5  # frames


@pytest.fixture(scope="module")
def ou_moments(ou_train, ou_test):
    """(per-trajectory train moments, merged train, merged independent test)."""
    per_traj = [LaggedMoments.from_series(x, LAG) for x in ou_train]
    test = merge_all(LaggedMoments.from_series(x, LAG) for x in ou_test)
    return per_traj, merge_all(per_traj), test


def _group_se(per_traj, **kw):
    # standard error of the score of all the data, from 10 independent tenths
    scores = [vamp2_score(merge_all(per_traj[i:i + 10]), **kw) for i in range(0, 100, 10)]
    return np.std(scores, ddof=1) / np.sqrt(10)


def test_ou_train_score_is_one_plus_sum_of_squared_eigenvalues(ou, ou_moments):
    # For the identity features of a reversible OU process, the whitened Koopman
    # matrix Sigma^-1/2 Sigma exp(-A^T tau) Sigma^-1/2 is symmetric with eigenvalues
    # exp(-k_i tau), so its singular values are exp(-k_i tau) (Wu and Noé, J. Nonlinear
    # Sci. 2020, for the score; Gardiner / Risken for the OU correlation function,
    # from memory).
    per_traj, train, _ = ou_moments
    lam = np.exp(-ou.rates * LAG)
    se = _group_se(per_traj)
    assert se < 0.005
    assert vamp2_score(train) == pytest.approx(1 + np.sum(lam**2), abs=4 * se)
    se1 = _group_se(per_traj, k=1)
    assert vamp2_score(train, k=1) == pytest.approx(1 + lam[0] ** 2, abs=4 * se1)


def test_ou_cross_validated_score_is_close_and_not_above_train(ou, ou_moments):
    per_traj, train, test = ou_moments
    lam = np.exp(-ou.rates * LAG)
    for k in (1, 2, None):
        se = _group_se(per_traj, k=k)
        kk = 3 if k is None else k
        truth = 1 + np.sum(lam[:kk] ** 2)
        cv = vamp2_score(train, test, k=k)
        # the test set has half the frames of train: its error is ~ sqrt(2) se
        assert cv == pytest.approx(truth, abs=4 * np.sqrt(2) * se), (k, cv, truth)
        assert cv <= vamp2_score(train, k=k) + 3 * np.sqrt(3) * se
    # with every singular function kept the held-out score is the test set's own score
    assert vamp2_score(train, test) == pytest.approx(vamp2_score(test), rel=1e-10)


def test_reversible_data_agree_with_tica(ou_train, ou_moments):
    _, train, _ = ou_moments
    tica = TICA(lag=LAG).fit(ou_train)
    assert vamp2_score(train) == pytest.approx(1 + np.sum(tica.eigenvalues_**2), abs=1e-3)


def test_score_is_invariant_under_invertible_linear_maps():
    rng = np.random.default_rng(0)
    from scipy.signal import lfilter
    x = lfilter([1.0], [1.0, -0.95], rng.normal(size=(5000, 3)), axis=0)
    M = rng.normal(size=(3, 3))
    a = LaggedMoments.from_series(x, 3)
    b = LaggedMoments.from_series(x @ M + 7.0, 3, shift=np.full(3, 7.0))
    assert vamp2_score(b) == pytest.approx(vamp2_score(a), rel=1e-9)
    assert vamp2_score(b, k=2) == pytest.approx(vamp2_score(a, k=2), rel=1e-9)


def test_more_features_never_lower_the_train_score_and_white_noise_adds_little():
    rng = np.random.default_rng(1)
    from scipy.signal import lfilter
    slow = lfilter([1.0], [1.0, -0.9], rng.normal(size=(4000, 1)), axis=0)
    x = np.c_[slow, rng.normal(size=(4000, 5))]  # 5 white-noise features
    m = LaggedMoments.from_series(x, 1)
    one = vamp2_score(m.subset([0]))
    assert one == pytest.approx(1 + 0.9**2, abs=0.03)
    assert vamp2_score(m) >= one
    assert vamp2_score(m) - one < 0.02  # spurious correlations ~ n_features / n_pairs


def test_score_is_between_one_and_one_plus_k():
    rng = np.random.default_rng(2)
    x = rng.normal(size=(300, 4)).cumsum(axis=0)
    a = LaggedMoments.from_series(x[:150], 2)
    b = LaggedMoments.from_series(x[150:], 2)
    for k in (1, 2, 4):
        for s in (vamp2_score(a, k=k), vamp2_score(a, b, k=k)):
            assert 1.0 <= s <= 1.0 + k + 1e-12


def test_arguments_are_checked():
    x = np.random.default_rng(3).normal(size=(100, 2))
    m = LaggedMoments.from_series(x, 1)
    with pytest.raises(ValueError, match=r"k=3 must be an integer between 1 and the number of "
                                         r"singular functions, 2"):
        vamp2_score(m, k=3)
    with pytest.raises(ValueError, match=r"k=0 must be"):
        vamp2_score(m, k=0)
    with pytest.raises(ValueError, match="test has 3 features; train has 2"):
        vamp2_score(m, LaggedMoments.from_series(np.ones((10, 3)), 1))
    with pytest.raises(ValueError, match="test has lag=2; train has lag=1"):
        vamp2_score(m, LaggedMoments.from_series(x, 2))
    with pytest.raises(ValueError, match="train must be a LaggedMoments; got DiagonalLagged"):
        vamp2_score(DiagonalLaggedMoments.from_series(x, 1))
    with pytest.raises(ValueError, match="train holds no lagged pairs"):
        vamp2_score(LaggedMoments(2))
    with pytest.raises(ValueError, match=r"rcond=-1 must be a number in \[0, 1\)"):
        vamp2_score(m, rcond=-1)


def test_score_does_not_depend_on_the_units_of_a_feature():
    rng = np.random.default_rng(13)
    slow = np.zeros(20000)
    noise = rng.normal(size=20000)
    for t in range(1, 20000):
        slow[t] = 0.99 * slow[t - 1] + noise[t]
    X = np.c_[slow / slow.std() * 5e-4, rng.normal(size=20000)]  # raw C00: 2.5e-7 and 1
    small = vamp2_score(LaggedMoments.from_series(X, 10))
    unit = vamp2_score(LaggedMoments.from_series(X / X.std(axis=0), 10))
    assert small == pytest.approx(unit, rel=1e-9)
    # 1 + 0.99**20 + (about 0 from the white noise) = 1.82: an AR(1)'s autocorrelation at
    # lag 10 is 0.99**10 (Box and Jenkins, Time Series Analysis, 1970), the squared singular
    # value in the score (Wu and Noe 2020, J. Nonlinear Sci. 30:23)
    assert 1.7 < small < 1.95


def test_dropped_directions_are_warned_about():
    rng = np.random.default_rng(14)
    x = np.cumsum(rng.normal(size=(800, 2)), axis=0)
    X = np.c_[x, x[:, 0] - 2.0 * x[:, 1]]
    with pytest.warns(DroppedDirectionsWarning) as record:
        score = vamp2_score(LaggedMoments.from_series(X, 3))
    assert [str(w.message)[:45] for w in record] == [
        "1 of 3 directions of the training C00 dropped",
        "1 of 3 directions of the training Ctt dropped"]
    assert score == pytest.approx(vamp2_score(LaggedMoments.from_series(x, 3)), rel=1e-6)
