"""scikit-learn's estimator checks for LDA, HLDA and TICA.

Every check passes, so no ``expected_failed_checks`` are listed; the
array-API check is skipped by scikit-learn itself unless SCIPY_ARRAY_API is set.
"""

from sklearn.utils.estimator_checks import parametrize_with_checks

from cvdesign.fit import HLDA, LDA, TICA


@parametrize_with_checks([LDA(), HLDA(), HLDA(shrinkage=0.1), TICA(),
                          TICA(lag=2, kinetic_weighting=True)])
def test_sklearn_estimator_checks(estimator, check):
    check(estimator)
