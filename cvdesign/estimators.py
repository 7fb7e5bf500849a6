"""Linear estimators of collective variables, in scikit-learn's shape.

:class:`LDA` finds the linear combinations of features that best separate
labelled states (Fisher 1936; Rao 1948), by the generalized eigenproblem
``S_b w = lambda S_w w`` of between-state and within-state scatter.  It works on
plain arrays (``fit(X, y)``) and, for the pipeline, directly on per-state
:class:`~cvdesign.moments.Moments` (:meth:`LDA.from_moments`), so that
trajectories never have to be held in memory.
"""

import numpy as np
import scipy.linalg
from sklearn.base import BaseEstimator, TransformerMixin
from sklearn.utils.multiclass import unique_labels
from sklearn.utils.validation import check_array, check_is_fitted, validate_data

from .moments import Moments

__all__ = ["LDA", "discriminant_directions", "rayleigh_quotient", "fix_signs"]


def fix_signs(vectors):
    """Flip columns so that each column's largest-magnitude entry is positive.

    Makes eigenvectors, and every file written from them, reproducible.

    Parameters
    ----------
    vectors : ndarray of shape (n_features, n_vectors)

    Returns
    -------
    ndarray of shape (n_features, n_vectors)

    Examples
    --------
    >>> import numpy as np
    >>> fix_signs(np.array([[1.0, 0.2], [-3.0, 0.1]])).tolist()
    [[-1.0, 0.2], [3.0, 0.1]]
    """
    vectors = np.array(vectors, dtype=np.float64, copy=True)
    if vectors.size == 0:
        return vectors
    idx = np.argmax(np.abs(vectors), axis=0)
    signs = np.sign(vectors[idx, np.arange(vectors.shape[1])])
    signs[signs == 0] = 1.0
    return vectors * signs


def _scatter_matrices(means, covariances, priors):
    means = np.asarray(means, dtype=np.float64)
    covariances = np.asarray(covariances, dtype=np.float64)
    priors = np.asarray(priors, dtype=np.float64)
    grand = priors @ means
    centered = means - grand
    between = (centered * priors[:, None]).T @ centered
    within = np.tensordot(priors, covariances, axes=1)
    return between, within


def _regularize(within, shrinkage):
    p = within.shape[0]
    if p == 0:
        return within
    target = np.trace(within) / p
    if not np.isfinite(target) or target <= 0:
        target = 1.0
    return (1.0 - shrinkage) * within + shrinkage * target * np.eye(p)


def discriminant_directions(means, covariances, priors, *, shrinkage=0.0):
    """Fisher discriminant directions from per-state means and covariances.

    Solves ``S_b w = lambda S_w w`` with ``S_b = sum_k p_k (mu_k - mu)(mu_k - mu)^T``,
    ``mu = sum_k p_k mu_k`` and ``S_w = sum_k p_k Sigma_k``.

    Parameters
    ----------
    means : array-like of shape (n_states, n_features)
        Per-state feature means.
    covariances : array-like of shape (n_states, n_features, n_features)
        Per-state feature covariances.
    priors : array-like of shape (n_states,)
        State weights, summing to 1.
    shrinkage : float, default=0.0
        Regularization in [0, 1]: ``S_w`` is replaced by
        ``(1 - shrinkage) S_w + shrinkage (tr S_w / p) I``, which keeps the
        problem well posed when ``S_w`` is singular (constant or exactly
        dependent features). When ``shrinkage=0`` and ``S_w`` is singular, a
        ridge of ``1e-10 tr S_w / p`` is added instead of failing.

    Returns
    -------
    eigenvalues : ndarray of shape (n_features,)
        Fisher ratios of the directions, largest first (dimensionless).
    directions : ndarray of shape (n_features, n_features)
        Columns are the directions, normalized to unit length, signs fixed by
        :func:`fix_signs`.

    Examples
    --------
    >>> import numpy as np
    >>> ev, w = discriminant_directions([[0.0, 0.0], [2.0, 0.0]],
    ...                                 [np.eye(2), np.eye(2)], [0.5, 0.5])
    >>> round(float(ev[0]), 6), np.round(w[:, 0], 6).tolist()
    (1.0, [1.0, 0.0])
    """
    if not 0.0 <= shrinkage <= 1.0:
        raise ValueError(f"shrinkage={shrinkage!r} must be between 0 and 1")
    between, within = _scatter_matrices(means, covariances, priors)
    within = _regularize(within, shrinkage) if shrinkage > 0 else within
    try:
        evals, evecs = scipy.linalg.eigh(between, within)
    except np.linalg.LinAlgError:
        within = _regularize(within, 1e-10)
        evals, evecs = scipy.linalg.eigh(between, within)
    order = np.argsort(-evals, kind="stable")
    evals = evals[order]
    evecs = evecs[:, order]
    norms = np.linalg.norm(evecs, axis=0)
    norms[norms == 0] = 1.0
    return evals, fix_signs(evecs / norms)


def rayleigh_quotient(w, means, covariances, priors):
    """Fisher ratio of a direction: between-state over within-state variance.

    Parameters
    ----------
    w : array-like of shape (n_features,)
        Direction in feature space.
    means, covariances, priors
        As in :func:`discriminant_directions`.

    Returns
    -------
    float
        ``(w^T S_b w) / (w^T S_w w)`` (dimensionless); ``inf`` when the
        within-state variance along `w` is zero and the between-state one is not.

    Examples
    --------
    >>> import numpy as np
    >>> rayleigh_quotient([1.0], [[0.0], [2.0]], [[[1.0]], [[1.0]]], [0.5, 0.5])
    1.0
    """
    w = np.asarray(w, dtype=np.float64)
    between, within = _scatter_matrices(means, covariances, priors)
    num = float(w @ between @ w)
    den = float(w @ within @ w)
    if den <= 0:
        return float("inf") if num > 0 else 0.0
    return num / den


class LDA(TransformerMixin, BaseEstimator):
    """Multi-class linear discriminant analysis (Fisher's criterion).

    Parameters
    ----------
    n_components : int, default=None
        Number of discriminant directions kept; at most
        ``min(n_classes - 1, n_features)`` (the default).
    priors : array-like of shape (n_classes,), default=None
        Class weights in the scatter matrices. None uses the class
        frequencies (as scikit-learn does); the cvdesign pipeline passes
        equal weights so that a longer run of one state does not dominate.
    shrinkage : float, default=0.0
        Regularization of the within-class scatter, see
        :func:`discriminant_directions`.

    Attributes
    ----------
    classes_ : ndarray of shape (n_classes,)
    priors_ : ndarray of shape (n_classes,)
    means_ : ndarray of shape (n_classes, n_features)
    covariance_ : ndarray of shape (n_features, n_features)
        Prior-weighted within-class covariance.
    xbar_ : ndarray of shape (n_features,)
        Prior-weighted grand mean.
    scalings_ : ndarray of shape (n_features, n_components)
        Unit-length discriminant directions, best first.
    eigenvalues_ : ndarray of shape (n_components,)
        Fisher ratio along each direction (dimensionless).
    n_features_in_ : int

    References
    ----------
    Fisher, R. A. (1936). The use of multiple measurements in taxonomic
    problems. Annals of Eugenics 7, 179-188.

    Rao, C. R. (1948). The utilization of multiple measurements in problems of
    biological classification. J. R. Stat. Soc. B 10, 159-203.

    Examples
    --------
    >>> import numpy as np
    >>> rng = np.random.default_rng(0)
    >>> X = np.vstack([rng.normal(0, 1, (50, 2)), rng.normal([4, 0], 1, (50, 2))])
    >>> y = np.repeat([0, 1], 50)
    >>> lda = LDA().fit(X, y)
    >>> lda.scalings_.shape
    (2, 1)
    >>> bool(abs(lda.scalings_[0, 0]) > 0.9)
    True
    """

    def __init__(self, n_components=None, *, priors=None, shrinkage=0.0):
        self.n_components = n_components
        self.priors = priors
        self.shrinkage = shrinkage

    def fit(self, X, y):
        """Fit from feature values `X` and state labels `y`; return self."""
        X, y = validate_data(self, X, y, ensure_min_samples=2, dtype=np.float64)
        self.classes_ = unique_labels(y)
        if len(self.classes_) < 2:
            raise ValueError(
                f"LDA needs at least 2 classes; y has {len(self.classes_)} ({self.classes_!r})"
            )
        moments = [Moments.from_data(X[y == c]) for c in self.classes_]
        return self._fit_moments(moments)

    @classmethod
    def from_moments(cls, moments, *, n_components=None, priors=None, shrinkage=0.0):
        """Fit from per-state :class:`~cvdesign.moments.Moments`.

        Parameters
        ----------
        moments : sequence of Moments
            One per state, all with the same features; ``classes_`` becomes
            ``0 .. n_states - 1``.
        n_components, priors, shrinkage
            As in the constructor.

        Returns
        -------
        LDA
            A fitted estimator.
        """
        est = cls(n_components=n_components, priors=priors, shrinkage=shrinkage)
        est.classes_ = np.arange(len(moments))
        est.n_features_in_ = moments[0].n_features
        return est._fit_moments(list(moments))

    def _fit_moments(self, moments):
        n_classes = len(moments)
        n_features = moments[0].n_features
        if self.priors is None:
            counts = np.array([m.count for m in moments], dtype=np.float64)
            priors = counts / counts.sum()
        else:
            priors = np.asarray(self.priors, dtype=np.float64).reshape(-1)
            if priors.shape[0] != n_classes or np.any(priors < 0) or priors.sum() <= 0:
                raise ValueError(
                    f"priors={self.priors!r} must hold {n_classes} non-negative numbers"
                )
            priors = priors / priors.sum()
        max_comp = min(n_classes - 1, n_features)
        n_comp = max_comp if self.n_components is None else int(self.n_components)
        if not 1 <= n_comp <= max_comp:
            raise ValueError(
                f"n_components={self.n_components!r} must be between 1 and "
                f"min(n_classes - 1, n_features)={max_comp}"
            )
        means = np.array([m.mean for m in moments])
        covs = np.array([m.covariance for m in moments])
        evals, evecs = discriminant_directions(means, covs, priors, shrinkage=self.shrinkage)
        self.priors_ = priors
        self.means_ = means
        self.covariance_ = np.tensordot(priors, covs, axes=1)
        self.xbar_ = priors @ means
        self.scalings_ = evecs[:, :n_comp]
        self.eigenvalues_ = evals[:n_comp]
        return self

    def transform(self, X):
        """Project `X` onto the discriminant directions.

        Returns
        -------
        ndarray of shape (n_samples, n_components)
            ``(X - xbar_) @ scalings_``, in the features' units.
        """
        check_is_fitted(self)
        X = check_array(X, dtype=np.float64)
        if X.shape[1] != self.scalings_.shape[0]:
            raise ValueError(
                f"X has {X.shape[1]} features, but LDA was fitted with {self.scalings_.shape[0]}"
            )
        return (X - self.xbar_) @ self.scalings_
