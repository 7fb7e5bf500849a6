"""scikit-learn's estimator checks for LDA, HLDA and TICA, and its checks of output
feature names and ``set_output``.

Every check passes, so no ``expected_failed_checks`` are listed; the
array-API check is skipped by scikit-learn itself unless SCIPY_ARRAY_API is set.
"""

import pytest
from sklearn.utils import estimator_checks
from sklearn.utils.estimator_checks import parametrize_with_checks

from cvdesign.fit import HLDA, LDA, TICA

# scikit-learn's checks fit TICA on a few dozen frames of several features: too few lagged
# pairs per feature, which TICA rightly warns about (FewPairsWarning, tested in test_tica.py)
pytestmark = pytest.mark.filterwarnings("ignore::cvdesign.fit.FewPairsWarning")


@parametrize_with_checks([LDA(), HLDA(), HLDA(shrinkage=0.1), TICA(),
                          TICA(lag=2, kinetic_weighting=True)])
def test_sklearn_estimator_checks(estimator, check):
    check(estimator)


# The checks of feature names and of set_output, which scikit-learn runs on its own
# transformers (they are not part of parametrize_with_checks); they need pandas.
_OUTPUT_CHECKS = ("check_transformer_get_feature_names_out",
                  "check_transformer_get_feature_names_out_pandas",
                  "check_set_output_transform", "check_set_output_transform_pandas",
                  "check_global_output_transform_pandas")


# The set_output checks fit on arrays and transform DataFrames (and the reverse), on which
# scikit-learn warns about feature names for its own PCA just the same.
@pytest.mark.filterwarnings("ignore:X (has|does not have valid) feature names:UserWarning")
@pytest.mark.parametrize("check_name", _OUTPUT_CHECKS)
@pytest.mark.parametrize("estimator", [LDA(), HLDA(), TICA(), TICA(lag=2, kinetic_weighting=True)],
                         ids=repr)
def test_sklearn_feature_names_and_set_output_checks(estimator, check_name):
    pytest.importorskip("pandas", reason="pandas is an optional extra (cvdesign[pandas])")
    assert hasattr(estimator, "get_feature_names_out")  # else the checks return at once
    check = getattr(estimator_checks, check_name)
    check(type(estimator).__name__, estimator)
