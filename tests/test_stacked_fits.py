"""Stacked two-state fits and held-out scores: the searches' batched arithmetic must
give what the one-at-a-time functions give, and fall back to them where it cannot."""

import numpy as np
import pytest
from sklearn.datasets import load_iris
from sklearn.discriminant_analysis import LinearDiscriminantAnalysis

import cvdesign.search.greedy as greedy
from cvdesign.fit import (rayleigh_quotient, rayleigh_quotients, two_state_direction,
                          two_state_directions)
from cvdesign.search import FoldMoments, greedy_search, heldout_score, heldout_scores
from cvdesign.search.objectives import _fold_scores_one
from cvdesign.stats.moments import LaggedMoments, Moments


def _spd(rng, p):
    a = rng.normal(size=(p, p))
    return a @ a.T / p + 0.05 * np.eye(p)


def _problems(rng, p, n):
    means = rng.normal(size=(n, 2, p))
    covs = np.array([[_spd(rng, p) for _ in range(2)] for _ in range(n)])
    return means, covs


@pytest.mark.parametrize("within", ["arithmetic", "harmonic"])
@pytest.mark.parametrize("shrinkage", [0.0, 1e-3, 0.3])
def test_stacked_directions_equal_the_one_at_a_time_solve(within, shrinkage):
    rng = np.random.default_rng(7)
    priors = [0.3, 0.7]
    for p in (1, 2, 5):
        means, covs = _problems(rng, p, 6)
        w, ok = two_state_directions(means, covs, priors, shrinkage=shrinkage, within=within)
        assert w.shape == (6, p) and ok.all()
        for i in range(6):
            one = two_state_direction(means[i], covs[i], priors, shrinkage=shrinkage,
                                      within=within)
            np.testing.assert_allclose(w[i], one, rtol=0, atol=1e-12)


@pytest.mark.parametrize("within", ["arithmetic", "harmonic"])
def test_stacked_directions_flag_what_needs_the_one_at_a_time_path(within):
    rng = np.random.default_rng(8)
    means, covs = _problems(rng, 3, 4)
    means[1, 1] = means[1, 0]  # coincident means: no direction is preferred
    covs[2] = 0.0  # nothing to solve with, without shrinkage: the ridge fallback's case
    covs[3, 0, 0, 0] = np.nan
    w, ok = two_state_directions(means, covs, [0.5, 0.5], within=within)
    assert ok.tolist() == [True, False, False, False]
    assert np.isnan(w[1:]).all()
    assert two_state_direction(means[1], covs[1], [0.5, 0.5], within=within) is None
    # with shrinkage the zero covariances become (tr/p) I = I: solvable again
    _, ok = two_state_directions(means, covs, [0.5, 0.5], within=within, shrinkage=0.1)
    assert ok.tolist() == [True, False, True, False]


def test_stacked_direction_is_scikit_learns_lda_direction_on_two_iris_species():
    # Fisher (1936), Annals of Eugenics 7:179; the iris data as bundled with scikit-learn.
    # Two species: S_b has rank one, so scikit-learn's (eigen solver) first scaling is
    # S_w^-1 (mu_1 - mu_0) up to scale, S_w the prior-weighted class covariance.
    X, y = load_iris(return_X_y=True)
    X, y = X[y > 0], y[y > 0]
    ref = LinearDiscriminantAnalysis(solver="eigen").fit(X, y).scalings_[:, 0]
    parts = [X[y == c] for c in (1, 2)]
    means = np.array([x.mean(axis=0) for x in parts])
    covs = np.array([np.cov(x, rowvar=False, bias=True) for x in parts])
    w, ok = two_state_directions(means[None], covs[None], [0.5, 0.5])
    assert ok[0]
    cosine = abs(w[0] @ ref) / np.linalg.norm(ref)
    assert cosine == pytest.approx(1.0, abs=1e-12)


def test_stacked_rayleigh_quotients_equal_the_one_at_a_time_ratio():
    rng = np.random.default_rng(9)
    priors = np.array([0.4, 0.6])
    means, covs = _problems(rng, 3, 5)
    w = rng.normal(size=(5, 3))
    covs[3] = 0.0  # no within-state variance: inf
    means[4, 1] = means[4, 0]
    covs[4] = 0.0  # neither: 0
    got = rayleigh_quotients(w, means, covs, priors)
    want = [rayleigh_quotient(w[i], means[i], covs[i], priors) for i in range(5)]
    np.testing.assert_allclose(got[:3], want[:3], rtol=1e-12)
    assert got[3] == want[3] == np.inf and got[4] == want[4] == 0.0
    covs[2, 1] = np.nan  # a state without frames in a fold: not measured, as one at a time
    assert np.isnan(rayleigh_quotients(w, means, covs, priors)[2])
    assert np.isnan(rayleigh_quotient(w[2], means[2], covs[2], priors))


def _fold_moments(seed, n_features=14):
    """Two states in four folds, with lagged pairs per state; feature 6 is constant in
    both states and feature 7 has the same mean in both (no direction from it alone)."""
    rng = np.random.default_rng(seed)
    shift = rng.normal(size=n_features)
    states, lagged = [], []
    for s in (0.0, 1.0):
        ms, ls = [], []
        for _ in range(4):
            x = (np.cumsum(rng.normal(size=(200, n_features)), axis=0) * 0.05
                 + rng.normal(size=(200, n_features)) + s * shift)
            x[:, 6] = 1.5
            x[:, 7] = rng.normal(size=200)
            ms.append(Moments.from_data(x))
            ls.append(LaggedMoments.from_series(x, lag=2))
        states.append(ms)
        lagged.append(ls)
    return FoldMoments(states, [0.45, 0.55], lagged)


@pytest.mark.parametrize("objective", ["separate", "both"])
@pytest.mark.parametrize("method", ["lda", "hlda"])
@pytest.mark.parametrize("shrinkage", [0.0, 1e-3])
def test_heldout_scores_equal_fold_by_fold_scores(objective, method, shrinkage):
    fm = _fold_moments(3)
    rng = np.random.default_rng(4)
    combos = [rng.choice(12, size=k, replace=False) for k in (1, 2, 3, 4, 8, 10)
              for _ in range(5)]
    combos += [[6], [7], [0, 6], [2, 7]]  # constant feature: singular without shrinkage
    got = heldout_scores(fm, combos, objective=objective, method=method, shrinkage=shrinkage)
    assert len(got) == len(combos)
    for c, (mean, se, per) in zip(combos, got):
        ref_score, ref_se, ref = _fold_scores_one(fm, np.asarray(c), objective, method,
                                                  shrinkage)
        np.testing.assert_allclose(per, ref, rtol=1e-9, atol=1e-14)
        assert mean == pytest.approx(ref_score, rel=1e-9, abs=1e-14)
        assert se == pytest.approx(ref_se, rel=1e-6, abs=1e-12)
        # a score does not depend on what else is in the batch, bit for bit
        alone = heldout_score(fm, c, objective=objective, method=method, shrinkage=shrinkage)
        assert (mean, se) == alone[:2] and np.array_equal(per, alone[2])


def test_the_greedy_search_is_the_same_with_one_combination_at_a_time(monkeypatch):
    fm = _fold_moments(5)
    groups = [[0], [1], [2, 3], [4], [5], [6], [7]]  # one "dihedral" of two features
    kw = dict(max_terms=4, n_seeds=3, min_gain=0.0, method="hlda")
    stacked = greedy_search(fm, groups, **kw)

    def one_at_a_time(fold_moments, combos, *, objective, method, shrinkage):
        calls.append(len(combos))
        return [_fold_scores_one(fold_moments, c, objective, method, shrinkage)
                for c in combos]

    calls = []
    monkeypatch.setattr(greedy, "heldout_scores", one_at_a_time)
    single = greedy_search(fm, groups, **kw)
    assert calls[0] == len(groups)  # the singles, scored at once
    assert max(calls) > len(groups)  # a round: every seed's candidates at once
    assert [c.members for c in stacked] == [c.members for c in single]
    assert len(stacked) >= 4
    for a, b in zip(stacked, single):
        assert a.score == pytest.approx(b.score, rel=1e-9)


def _one_seed_after_another(fm, groups, *, max_terms, n_seeds, min_gain, method):
    """The greedy search written plainly: each seed's path to its end, then the next
    seed's, every combination scored alone (the algorithm before the seeds advanced
    together)."""
    def score(members):
        idx = np.concatenate([groups[m] for m in sorted(members)])
        return heldout_score(fm, idx, method=method)

    singles = sorted(range(len(groups)), key=lambda g: (-score((g,))[0], g))
    found = {}
    for seed in singles[:n_seeds]:
        members = (seed,)
        found.setdefault(frozenset(members), members)
        while len(members) < min(max_terms, len(groups)):
            best, best_val = None, -np.inf
            for g in range(len(groups)):  # the first largest score (a NaN never wins)
                if g not in members and score(members + (g,))[0] > best_val:
                    best, best_val = g, score(members + (g,))[0]
            current = score(members)[0]
            if not best_val > current + min_gain * abs(current):
                break
            members = members + (best,)
            found.setdefault(frozenset(members), members)
    return [(m, score(m)[0]) for m in found.values()]


@pytest.mark.parametrize("min_gain", [0.0, 0.05])
def test_the_seeds_advancing_together_find_what_one_seed_after_another_finds(min_gain):
    fm = _fold_moments(6, n_features=10)
    groups = [np.array(g) for g in ([0], [1], [2, 3], [4], [5], [6], [7], [8], [9])]
    kw = dict(max_terms=4, n_seeds=4, min_gain=min_gain, method="lda")
    got = [(c.members, c.score) for c in greedy_search(fm, groups, **kw)]
    assert got == _one_seed_after_another(fm, groups, **kw)  # bit for bit, in order
    assert len({len(m) for m, _ in got}) > 1


def _dependent_fold_moments(seed):
    """Two states in four folds whose feature 2 is an exact linear combination of features
    0 and 1: without shrinkage the within-state scatter of (0, 1, 2) is singular, up to
    rounding (a Cholesky factor may still exist, with a pivot of rounding size)."""
    rng = np.random.default_rng(seed)
    states = []
    for s in range(2):
        ms = []
        for _ in range(4):
            x = rng.normal(size=(100, 4)) + s * np.array([1.0, 0.5, 0.0, 0.2])
            x[:, 2] = 0.7 * x[:, 0] - 1.3 * x[:, 1]
            ms.append(Moments.from_data(x))
        states.append(ms)
    return FoldMoments(states)


@pytest.mark.parametrize("method", ["lda", "hlda"])
def test_exactly_dependent_features_without_shrinkage_take_the_one_at_a_time_path(method):
    # Found in review: numpy's Cholesky accepted such matrices with a pivot of rounding
    # size and the stacked LU solve raised 'Singular matrix' for the whole batch (seeds 0,
    # 1, 7, 9 of 0-11). Now they go fold by fold, where LAPACK decides on the ridge.
    for seed in range(12):
        fm = _dependent_fold_moments(seed)
        combos = [[0, 1, 2], [0, 2], [2, 1, 0], [0, 1, 2, 3], [3]]
        got = heldout_scores(fm, combos, method=method, shrinkage=0.0)
        for c, (_, _, per) in zip(combos, got):
            ref = _fold_scores_one(fm, np.asarray(c), "separate", method, 0.0)[2]
            np.testing.assert_allclose(per, ref, rtol=1e-9, atol=1e-14)
        assert greedy_search(fm, [[0], [1], [2], [3]], shrinkage=0.0, method=method)


def test_close_to_singular_matrices_are_left_to_the_one_at_a_time_path():
    rng = np.random.default_rng(12)
    means, covs = _problems(rng, 3, 2)
    a = rng.normal(size=(3, 2))
    covs[1, :] = a @ a.T + 1e-13 * np.eye(3)  # rank 2 up to a ridge of 1e-13
    w, ok = two_state_directions(means, covs, [0.5, 0.5])
    assert ok.tolist() == [True, False]
    _, ok = two_state_directions(means, covs, [0.5, 0.5], shrinkage=1e-3)
    assert ok.tolist() == [True, True]


def test_batches_bounded_in_memory_give_the_same_scores(monkeypatch):
    import cvdesign.search.objectives as objectives

    fm = _fold_moments(13)
    rng = np.random.default_rng(14)
    combos = [rng.choice(12, size=3, replace=False) for _ in range(30)]
    whole = heldout_scores(fm, combos, method="hlda")
    monkeypatch.setattr(objectives, "_STACK_VALUES", 4 * 2 * 9 * 7)  # batches of 7
    split = heldout_scores(fm, combos, method="hlda")
    assert all(a[:2] == b[:2] and np.array_equal(a[2], b[2]) for a, b in zip(whole, split))
