"""LDA against scikit-learn and against hand-computed cases."""

import numpy as np
import pytest
from sklearn.datasets import load_iris
from sklearn.discriminant_analysis import LinearDiscriminantAnalysis

from cvdesign.fit import LDA, discriminant_directions, fix_signs, rayleigh_quotient
from cvdesign.stats.moments import Moments


def _cosine(a, b):
    return abs(a @ b) / (np.linalg.norm(a) * np.linalg.norm(b))


def test_lda_matches_sklearn_on_fisher_iris():
    # Fisher (1936), Annals of Eugenics 7:179; the iris data as bundled with scikit-learn.
    # Same discriminant directions as scikit-learn's eigen solver, up to sign and scale.
    X, y = load_iris(return_X_y=True)
    ours = LDA().fit(X, y)
    ref = LinearDiscriminantAnalysis(solver="eigen").fit(X, y)
    assert ours.scalings_.shape == (4, 2)
    for k in range(2):
        assert _cosine(ours.scalings_[:, k], ref.scalings_[:, k]) == pytest.approx(1.0, abs=1e-9)
    # The projected data span the same space as scikit-learn's transform.
    a = ours.transform(X)
    b = ref.transform(X)
    coef, *_ = np.linalg.lstsq(np.c_[a, np.ones(len(a))], b, rcond=None)
    np.testing.assert_allclose(np.c_[a, np.ones(len(a))] @ coef, b, atol=1e-8)


def test_lda_svd_solver_direction_agrees_on_iris():
    # scikit-learn's default (SVD) solver gives the same leading direction.
    X, y = load_iris(return_X_y=True)
    ours = LDA(n_components=1).fit(X, y)
    ref = LinearDiscriminantAnalysis(solver="svd").fit(X, y)
    assert _cosine(ours.scalings_[:, 0], ref.scalings_[:, 0]) == pytest.approx(1.0, abs=1e-8)


def test_from_moments_equals_fit_on_arrays():
    rng = np.random.default_rng(0)
    X = np.vstack([rng.normal(0, 1, (80, 3)), rng.normal([2, 1, 0], 1, (60, 3))])
    y = np.repeat([0, 1], [80, 60])
    a = LDA().fit(X, y)
    b = LDA.from_moments([Moments.from_data(X[y == 0]), Moments.from_data(X[y == 1])])
    np.testing.assert_allclose(a.scalings_, b.scalings_, rtol=1e-10)
    np.testing.assert_allclose(a.eigenvalues_, b.eigenvalues_, rtol=1e-10)


def test_two_gaussians_direction_is_inverse_covariance_times_mean_difference():
    # Two states with a common covariance S: the Fisher direction is S^-1 (mu_B - mu_A)
    # (Fisher 1936; e.g. Hastie, Tibshirani and Friedman 2009, sect. 4.3).
    S = np.array([[2.0, 0.6], [0.6, 0.5]])
    mu = np.array([[0.0, 0.0], [1.0, 2.0]])
    ev, w = discriminant_directions(mu, [S, S], [0.5, 0.5])
    expect = np.linalg.solve(S, mu[1] - mu[0])
    assert _cosine(w[:, 0], expect) == pytest.approx(1.0, abs=1e-12)
    # Its Fisher ratio is the between/within variance ratio along it.
    assert ev[0] == pytest.approx(rayleigh_quotient(w[:, 0], mu, [S, S], [0.5, 0.5]), rel=1e-10)


def test_singular_within_covariance_still_works_with_shrinkage():
    rng = np.random.default_rng(1)
    a = rng.normal(size=(50, 1))
    b = rng.normal(size=(50, 1)) + 3
    X = np.vstack([np.c_[a, a], np.c_[b, b]])  # two identical columns: S_w is singular
    y = np.repeat([0, 1], 50)
    for shrinkage in (0.0, 1e-3):
        w = LDA(shrinkage=shrinkage).fit(X, y).scalings_[:, 0]
        assert np.all(np.isfinite(w))
        assert rayleigh_quotient(w, [X[y == 0].mean(0), X[y == 1].mean(0)],
                                 [np.cov(X[y == 0].T, bias=True), np.cov(X[y == 1].T, bias=True)],
                                 [0.5, 0.5]) > 1.0


def _scales_apart_with_a_constant(seed):
    """Two states, features at scales 1000 and 0.001 (both separating), and a constant
    third column that makes the within-state scatter singular."""
    rng = np.random.default_rng(seed)
    y = np.repeat([0, 1], 500)
    X = np.c_[rng.normal(size=1000) * 1000 + y * 1500, rng.normal(size=1000) * 1e-3 + y * 1e-3,
              np.ones(1000)]
    return X, y


def test_singular_scatter_ridge_does_not_depend_on_the_units():
    X, y = _scales_apart_with_a_constant(1)
    full = LDA().fit(X, y)
    without = LDA().fit(X[:, :2], y)  # not singular: no ridge
    unit = LDA().fit(X / np.r_[1000.0, 1e-3, 1.0], y)
    np.testing.assert_allclose(full.eigenvalues_, without.eigenvalues_, rtol=1e-6)
    np.testing.assert_allclose(full.eigenvalues_, unit.eigenvalues_, rtol=1e-6)
    np.testing.assert_allclose(full.scalings_[:2, 0], without.scalings_[:, 0], rtol=1e-6)
    assert full.scalings_[2, 0] == 0.0


def test_eigenvalues_are_the_ratio_of_their_direction_when_the_scatter_is_singular():
    X, y = _scales_apart_with_a_constant(2)
    fitted = LDA().fit(X, y)
    covs = [np.cov(X[y == c].T, bias=True) for c in (0, 1)]
    ratio = rayleigh_quotient(fitted.scalings_[:, 0], fitted.means_, covs, fitted.priors_)
    assert fitted.eigenvalues_[0] == pytest.approx(ratio, rel=1e-12)


def test_signs_are_deterministic():
    v = np.array([[0.1, -2.0], [-0.5, 1.0]])
    out = fix_signs(v)
    assert out[np.argmax(np.abs(out[:, 0])), 0] > 0
    assert out[np.argmax(np.abs(out[:, 1])), 1] > 0
    np.testing.assert_array_equal(fix_signs(-v), out)


def test_bad_arguments_are_named():
    X = np.random.default_rng(2).normal(size=(10, 2))
    with pytest.raises(ValueError, match="at least 2 classes"):
        LDA().fit(X, np.zeros(10))
    with pytest.raises(ValueError, match=r"n_components=3 must be between 1 and"):
        LDA(n_components=3).fit(X, np.repeat([0, 1], 5))
    with pytest.raises(ValueError, match="shrinkage=2"):
        LDA(shrinkage=2).fit(X, np.repeat([0, 1], 5))


@pytest.mark.parametrize("priors, what", [([float("nan"), 1.0], "nan"), ([0.0, 1.0], "0.0"),
                                          ([-1.0, 2.0], "-1.0"), ([1.0, 1.0, 1.0], "1.0"),
                                          ([float("inf"), 1.0], "inf"), ("ab", "'ab'")])
def test_bad_priors_are_named(priors, what):
    X = np.random.default_rng(3).normal(size=(10, 2))
    with pytest.raises(ValueError, match=r"priors=.*" + what + r".* must hold 2 finite, "
                                         r"non-negative numbers .*at least two of them "
                                         r"positive"):
        LDA(priors=priors).fit(X, np.repeat([0, 1], 5))
