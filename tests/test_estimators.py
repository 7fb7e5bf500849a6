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
