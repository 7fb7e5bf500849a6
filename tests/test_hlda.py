"""HLDA: harmonic within-state scatter, checked against formulas computed here."""

import numpy as np
import pytest
import scipy.linalg

from cvdesign.fit import HLDA, LDA, discriminant_directions, rayleigh_quotient
from cvdesign.stats.moments import Moments

# Two hand-chosen Gaussian states with different means and covariances: A is narrow
# and B broad along y, where the means differ, so HLDA and LDA disagree markedly.
MU_A = np.array([0.0, 0.0, 0.0])
MU_B = np.array([1.0, 1.0, -0.5])
SIG_A = np.array([[1.0, 0.3, 0.0], [0.3, 0.2, 0.05], [0.0, 0.05, 0.5]])
SIG_B = np.array([[0.3, -0.1, 0.1], [-0.1, 4.0, 0.4], [0.1, 0.4, 1.5]])


def _cos(a, b):
    return abs(a @ b) / (np.linalg.norm(a) * np.linalg.norm(b))


def _exact_moments(mean, cov, count):
    """Moments holding exactly the given mean and (biased) covariance."""
    m = Moments(len(mean))
    m.count = float(count)
    m.mean = np.array(mean, dtype=np.float64)
    m.scatter = np.array(cov, dtype=np.float64) * count
    return m


def test_two_states_direction_is_sum_of_inverse_covariances_times_mean_difference():
    # Mendels, Piccini and Parrinello, J. Phys. Chem. Lett. 2018: for two states
    # the HLDA direction is (Sigma_A^-1 + Sigma_B^-1)(mu_A - mu_B), because S_b is
    # rank one along mu_A - mu_B.
    expect = (np.linalg.inv(SIG_A) + np.linalg.inv(SIG_B)) @ (MU_A - MU_B)
    h = HLDA.from_moments([_exact_moments(MU_A, SIG_A, 500), _exact_moments(MU_B, SIG_B, 500)])
    assert h.scalings_.shape == (3, 1)
    assert _cos(h.scalings_[:, 0], expect) == pytest.approx(1.0, abs=1e-12)
    # ... which is not LDA's (Sigma_A + Sigma_B)^-1 (mu_A - mu_B): the test is not trivial
    lda = LDA.from_moments([_exact_moments(MU_A, SIG_A, 500), _exact_moments(MU_B, SIG_B, 500)])
    assert _cos(lda.scalings_[:, 0], expect) < 0.7
    # the harmonic within scatter with equal priors is 2 (Sigma_A^-1 + Sigma_B^-1)^-1
    np.testing.assert_allclose(
        h.covariance_, 2 * np.linalg.inv(np.linalg.inv(SIG_A) + np.linalg.inv(SIG_B)),
        rtol=1e-12)
    # the eigenvalue is the Fisher ratio with the harmonic within scatter
    ratio = rayleigh_quotient(h.scalings_[:, 0], [MU_A, MU_B], [SIG_A, SIG_B], [0.5, 0.5],
                              within="harmonic")
    assert h.eigenvalues_[0] == pytest.approx(ratio, rel=1e-10)


def test_priors_weight_the_inverse_covariances():
    # S_w^-1 = sum_k p_k Sigma_k^-1; unequal frame counts give unequal default priors.
    expect = (0.3 * np.linalg.inv(SIG_A) + 0.7 * np.linalg.inv(SIG_B)) @ (MU_B - MU_A)
    by_count = HLDA.from_moments([_exact_moments(MU_A, SIG_A, 300),
                                  _exact_moments(MU_B, SIG_B, 700)])
    by_prior = HLDA.from_moments([_exact_moments(MU_A, SIG_A, 10),
                                  _exact_moments(MU_B, SIG_B, 10)], priors=[3, 7])
    for h in (by_count, by_prior):
        np.testing.assert_allclose(h.priors_, [0.3, 0.7], rtol=1e-12)
        assert _cos(h.scalings_[:, 0], expect) == pytest.approx(1.0, abs=1e-12)


def test_large_samples_recover_the_direction():
    rng = np.random.default_rng(0)
    n = 100_000
    X = np.vstack([rng.multivariate_normal(MU_A, SIG_A, n),
                   rng.multivariate_normal(MU_B, SIG_B, n)])
    y = np.repeat(["A", "B"], n)
    h = HLDA().fit(X, y)
    expect = (np.linalg.inv(SIG_A) + np.linalg.inv(SIG_B)) @ (MU_A - MU_B)
    # sampling error of the covariances ~ 1/sqrt(n) ~ 3e-3: |cos| is 1 to ~1e-4
    assert _cos(h.scalings_[:, 0], expect) > 0.999
    assert list(h.classes_) == ["A", "B"]
    assert h.transform(X[:5]).shape == (5, 1)


def test_equal_covariances_make_hlda_equal_lda():
    means = [MU_A, MU_B, [0.5, -1.0, 0.2]]
    covs = [SIG_A] * 3
    m = [_exact_moments(mu, c, 100) for mu, c in zip(means, covs)]
    h, lda = HLDA.from_moments(m), LDA.from_moments(m)
    np.testing.assert_allclose(h.scalings_, lda.scalings_, rtol=1e-9, atol=1e-12)
    np.testing.assert_allclose(h.eigenvalues_, lda.eigenvalues_, rtol=1e-9)
    np.testing.assert_allclose(h.covariance_, lda.covariance_, rtol=1e-9, atol=1e-14)


def test_three_states_solve_the_generalized_eigenproblem_with_harmonic_scatter():
    # Multi-class form (Piccini, Mendels and Parrinello, J. Chem. Theory Comput. 2018):
    # S_b w = lambda S_w w with S_w^-1 = sum_k p_k Sigma_k^-1, computed independently here.
    means = np.array([MU_A, MU_B, [0.5, -1.0, 0.2]])
    covs = np.array([SIG_A, SIG_B, np.diag([0.4, 0.4, 3.0])])
    p = np.array([0.2, 0.5, 0.3])
    grand = p @ means
    Sb = sum(pk * np.outer(mu - grand, mu - grand) for pk, mu in zip(p, means))
    Sw = np.linalg.inv(sum(pk * np.linalg.inv(c) for pk, c in zip(p, covs)))
    ref_ev, ref_vec = scipy.linalg.eigh(Sb, Sw)
    ev, vec = discriminant_directions(means, covs, p, within="harmonic")
    np.testing.assert_allclose(ev, ref_ev[::-1], rtol=1e-9, atol=1e-12)
    for k in range(2):
        assert _cos(vec[:, k], ref_vec[:, ::-1][:, k]) == pytest.approx(1.0, abs=1e-10)
    h = HLDA.from_moments([_exact_moments(mu, c, 1) for mu, c in zip(means, covs)], priors=p)
    assert h.scalings_.shape == (3, 2)
    np.testing.assert_allclose(h.eigenvalues_, ref_ev[::-1][:2], rtol=1e-9)


def test_shrinkage_shrinks_each_state_covariance_before_inversion():
    p = 3
    for s in (0.3, 1.0):
        shrunk = [(1 - s) * c + s * np.trace(c) / p * np.eye(p) for c in (SIG_A, SIG_B)]
        expect = (np.linalg.inv(shrunk[0]) + np.linalg.inv(shrunk[1])) @ (MU_B - MU_A)
        _, w = discriminant_directions([MU_A, MU_B], [SIG_A, SIG_B], [0.5, 0.5],
                                       within="harmonic", shrinkage=s)
        assert _cos(w[:, 0], expect) == pytest.approx(1.0, abs=1e-12)
    # full shrinkage: every Sigma_k is a multiple of I, so the direction is mu_B - mu_A
    assert _cos(w[:, 0], MU_B - MU_A) == pytest.approx(1.0, abs=1e-12)


def test_singular_state_covariance_still_gives_a_finite_direction():
    rng = np.random.default_rng(1)
    a = rng.normal(size=(50, 1))
    b = rng.normal(size=(50, 1)) + 3
    X = np.vstack([np.c_[a, a], np.c_[b, b]])  # duplicate columns: each Sigma_k is singular
    y = np.repeat([0, 1], 50)
    for shrinkage in (0.0, 1e-3):
        h = HLDA(shrinkage=shrinkage).fit(X, y)
        assert np.all(np.isfinite(h.scalings_)) and np.all(np.isfinite(h.eigenvalues_))


def test_singular_state_covariances_ridge_does_not_depend_on_the_units():
    rng = np.random.default_rng(4)
    y = np.repeat([0, 1], 500)
    X = np.c_[rng.normal(size=1000) * 1000 + y * 1500, rng.normal(size=1000) * 1e-3 + y * 1e-3,
              np.ones(1000)]  # a constant column: every Sigma_k is singular
    full = HLDA().fit(X, y)
    without = HLDA().fit(X[:, :2], y)
    np.testing.assert_allclose(full.eigenvalues_, without.eigenvalues_, rtol=1e-6)
    np.testing.assert_allclose(full.scalings_[:2, 0], without.scalings_[:, 0], rtol=1e-6)


def test_lda_default_behaviour_is_unchanged_by_the_within_option():
    means, covs, p = [MU_A, MU_B], [SIG_A, SIG_B], [0.4, 0.6]
    ev0, w0 = discriminant_directions(means, covs, p)
    ev1, w1 = discriminant_directions(means, covs, p, within="arithmetic")
    np.testing.assert_array_equal(ev0, ev1)
    np.testing.assert_array_equal(w0, w1)
    expect = np.linalg.solve(0.4 * SIG_A + 0.6 * SIG_B, MU_B - MU_A)
    assert _cos(w0[:, 0], expect) == pytest.approx(1.0, abs=1e-12)


def test_bad_arguments_are_named():
    X = np.random.default_rng(2).normal(size=(10, 2))
    with pytest.raises(ValueError, match="HLDA needs at least 2 classes"):
        HLDA().fit(X, np.zeros(10))
    with pytest.raises(ValueError, match="shrinkage=2"):
        HLDA(shrinkage=2).fit(X, np.repeat([0, 1], 5))
    with pytest.raises(ValueError, match=r"priors=\[nan, 1\] must hold 2 finite"):
        HLDA(priors=[float("nan"), 1]).fit(X, np.repeat([0, 1], 5))
    with pytest.raises(ValueError, match=r"priors=\[0, 1\] must .*at least two of them "
                                         r"positive"):
        HLDA.from_moments([_exact_moments(MU_A, SIG_A, 5), _exact_moments(MU_B, SIG_B, 5)],
                          priors=[0, 1])
    with pytest.raises(ValueError, match=r"within='geometric' must be 'arithmetic' or 'harmonic'"):
        discriminant_directions([MU_A, MU_B], [SIG_A, SIG_B], [0.5, 0.5], within="geometric")
    with pytest.raises(ValueError, match=r"within='median'"):
        rayleigh_quotient(MU_B, [MU_A, MU_B], [SIG_A, SIG_B], [0.5, 0.5], within="median")
    with pytest.raises(ValueError, match="HLDA needs moments of at least 2 states; got 1"):
        HLDA.from_moments([_exact_moments(MU_A, SIG_A, 5)])
    with pytest.raises(ValueError, match=r"moments\[1\] is empty"):
        HLDA.from_moments([_exact_moments(MU_A, SIG_A, 5), Moments(3)])


@pytest.mark.parametrize("within", ["arithmetic", "harmonic"])
@pytest.mark.parametrize("shrinkage", [0.0, 1e-3, 0.3])
def test_two_state_solve_equals_the_first_generalized_eigenvector(within, shrinkage):
    # With two states S_b has rank one, so the eigenproblem's first direction is
    # S_w^-1 (mu_1 - mu_0) (Fisher 1936); the fast path must agree with the eigensolver.
    from cvdesign.fit import discriminant_directions, two_state_direction

    rng = np.random.default_rng(41)
    for p in (1, 2, 5, 12):
        means = rng.normal(size=(2, p))
        covs = []
        for _ in range(2):
            a = rng.normal(size=(p, p))
            covs.append(a @ a.T / p + 0.05 * np.eye(p))
        fast = two_state_direction(means, covs, [0.5, 0.5], shrinkage=shrinkage, within=within)
        _, vecs = discriminant_directions(means, covs, [0.5, 0.5], shrinkage=shrinkage,
                                          within=within)
        np.testing.assert_allclose(fast, vecs[:, 0], rtol=0, atol=1e-9)
    assert two_state_direction(np.zeros((2, 3)), [np.eye(3)] * 2, [0.5, 0.5]) is None
