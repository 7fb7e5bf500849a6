"""Discriminants of labelled states, in scikit-learn's shape.

:class:`LDA` finds the linear combinations of features that best separate
labelled states (Fisher 1936; Rao 1948), by the generalized eigenproblem
``S_b w = lambda S_w w`` of between-state and within-state scatter.
:class:`HLDA` is the same with the harmonic mean of the state covariances as
within-state scatter (Mendels, Piccini and Parrinello 2018).  Both work on
plain arrays (``fit(X, y)``) and, for the pipeline, directly on per-state
:class:`~cvdesign.stats.moments.Moments` (``from_moments``), so that trajectories
never have to be held in memory.

The arithmetic lives in :mod:`.directions` (no scikit-learn there); its public
functions are importable from here too.
"""

import numpy as np
from sklearn.base import BaseEstimator, ClassNamePrefixFeaturesOutMixin, TransformerMixin
from sklearn.utils.multiclass import unique_labels
from sklearn.utils.validation import check_is_fitted, validate_data

from ..stats.moments import Moments
from .directions import (_harmonic_within, discriminant_directions, fix_signs,
                         quadratic_forms, rayleigh_quotient, rayleigh_quotients,
                         two_state_direction, two_state_directions)

__all__ = ["LDA", "HLDA", "discriminant_directions", "two_state_direction",
           "two_state_directions", "rayleigh_quotient", "rayleigh_quotients",
           "quadratic_forms", "fix_signs"]


def _check_priors(given, n_classes):
    """`priors` as an array summing to 1: one finite, non-negative weight per class, at
    least two of them positive (a single state has nothing to be separated from)."""
    try:
        priors = np.asarray(given, dtype=np.float64).reshape(-1)
    except (TypeError, ValueError):
        priors = None
    if priors is None or priors.shape[0] != n_classes or not np.isfinite(priors).all() \
            or np.any(priors < 0) or np.count_nonzero(priors) < 2:
        raise ValueError(
            f"priors={given!r} must hold {n_classes} finite, non-negative numbers (one per "
            "class, in the order of classes_), at least two of them positive; or None for "
            "the classes' frequencies"
        )
    return priors / priors.sum()


class _Discriminant(ClassNamePrefixFeaturesOutMixin, TransformerMixin, BaseEstimator):
    """Shared code of :class:`LDA` and :class:`HLDA` (they differ in `_within`).

    Output feature names are the lower-case class name and the component's index
    (``lda0``, ``lda1``, ... or ``hlda0``, ...), so ``set_output(transform="pandas")``
    gives a DataFrame with those columns.
    """

    _within = "arithmetic"

    def __init__(self, n_components=None, *, priors=None, shrinkage=0.0):
        self.n_components = n_components
        self.priors = priors
        self.shrinkage = shrinkage

    def fit(self, X, y):
        """Fit from feature values and state labels.

        Parameters
        ----------
        X : array-like of shape (n_samples, n_features)
            Feature values.
        y : array-like of shape (n_samples,)
            State label of each sample; at least two distinct labels.

        Returns
        -------
        self
        """
        X, y = validate_data(self, X, y, ensure_min_samples=2, dtype=np.float64)
        self.classes_ = unique_labels(y)
        if len(self.classes_) < 2:
            raise ValueError(
                f"{type(self).__name__} needs at least 2 classes; "
                f"y has {len(self.classes_)} ({self.classes_!r})"
            )
        moments = [Moments.from_data(X[y == c]) for c in self.classes_]
        return self._fit_moments(moments)

    @classmethod
    def from_moments(cls, moments, *, n_components=None, priors=None, shrinkage=0.0):
        """Fit from per-state :class:`~cvdesign.stats.moments.Moments`.

        Parameters
        ----------
        moments : sequence of Moments
            One per state, all with the same features; ``classes_`` becomes
            ``0 .. n_states - 1``.
        n_components, priors, shrinkage
            As in the constructor.

        Returns
        -------
        estimator
            A fitted estimator of the class it is called on.
        """
        moments = list(moments)
        if len(moments) < 2:
            raise ValueError(
                f"{cls.__name__} needs moments of at least 2 states; got {len(moments)}"
            )
        for k, m in enumerate(moments):
            if m.count == 0:
                raise ValueError(f"moments[{k}] is empty (count=0); every state needs frames")
            if m.n_features != moments[0].n_features:
                raise ValueError(f"moments[{k}] has {m.n_features} features; "
                                 f"moments[0] has {moments[0].n_features}")
        est = cls(n_components=n_components, priors=priors, shrinkage=shrinkage)
        est.classes_ = np.arange(len(moments))
        est.n_features_in_ = moments[0].n_features
        return est._fit_moments(moments)

    def _fit_moments(self, moments):
        n_classes = len(moments)
        n_features = moments[0].n_features
        if self.priors is None:
            counts = np.array([m.count for m in moments], dtype=np.float64)
            priors = counts / counts.sum()
        else:
            priors = _check_priors(self.priors, n_classes)
        max_comp = min(n_classes - 1, n_features)
        n_comp = max_comp if self.n_components is None else int(self.n_components)
        if not 1 <= n_comp <= max_comp:
            raise ValueError(
                f"n_components={self.n_components!r} must be between 1 and "
                f"min(n_classes - 1, n_features)={max_comp}"
            )
        means = np.array([m.mean for m in moments])
        covs = np.array([m.covariance for m in moments])
        evals, evecs = discriminant_directions(means, covs, priors, shrinkage=self.shrinkage,
                                               within=self._within)
        self.priors_ = priors
        self.means_ = means
        if self._within == "harmonic":
            self.covariance_ = _harmonic_within(covs, priors, self.shrinkage)
        else:
            self.covariance_ = np.tensordot(priors, covs, axes=1)
        self.xbar_ = priors @ means
        self.scalings_ = evecs[:, :n_comp]
        self.eigenvalues_ = evals[:n_comp]
        return self

    def transform(self, X):
        """Project `X` onto the discriminant directions.

        Parameters
        ----------
        X : array-like of shape (n_samples, n_features)

        Returns
        -------
        ndarray of shape (n_samples, n_components)
            ``(X - xbar_) @ scalings_``, in the features' units; a pandas DataFrame
            with the columns of :meth:`get_feature_names_out` (and the index of `X`
            when it is one) after ``set_output(transform="pandas")``.
        """
        check_is_fitted(self)
        X = validate_data(self, X, reset=False, dtype=np.float64)
        return (X - self.xbar_) @ self.scalings_

    @property
    def _n_features_out(self):
        """Number of components, for :meth:`get_feature_names_out` (scikit-learn's mixin)."""
        return self.scalings_.shape[1]


class LDA(_Discriminant):
    """Multi-class linear discriminant analysis (Fisher's criterion).

    Parameters
    ----------
    n_components : int, default=None
        Number of discriminant directions kept; at most
        ``min(n_classes - 1, n_features)`` (the default).
    priors : array-like of shape (n_classes,), default=None
        Class weights in the scatter matrices, in the order of ``classes_``:
        finite, non-negative, at least two positive (normalized to sum to 1).
        None uses the class frequencies (as scikit-learn does); the cvdesign
        pipeline passes equal weights so that a longer run of one state does
        not dominate.
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

    See Also
    --------
    HLDA : the same with the harmonic mean of the class covariances.

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
    >>> lda.get_feature_names_out().tolist()  # columns with set_output(transform="pandas")
    ['lda0']
    """

    _within = "arithmetic"


class HLDA(_Discriminant):
    """Harmonic linear discriminant analysis.

    LDA with the within-state scatter replaced by the prior-weighted harmonic
    mean of the state covariances,

    ``S_w^-1 = sum_k p_k Sigma_k^-1``,

    so that a state which is narrow along a direction keeps it a good
    separator even when another state is broad there. The between-state
    scatter is LDA's, ``S_b = sum_k p_k (mu_k - mu)(mu_k - mu)^T`` with
    ``mu = sum_k p_k mu_k``; the directions solve ``S_b w = lambda S_w w``.

    The priors ``p_k`` (normalized to sum 1) enter both matrices, exactly
    as in :class:`LDA`: the class frequencies by default, or the `priors`
    given. Mendels, Piccini and Parrinello (2018) write, for two states,
    ``S_w^-1 = Sigma_A^-1 + Sigma_B^-1`` and ``S_b = (mu_A - mu_B)(mu_A - mu_B)^T``;
    with equal priors the directions here are the same and only the Fisher
    ratios differ by a constant factor, chosen so that HLDA equals LDA when
    all states share one covariance.

    Parameters
    ----------
    n_components : int, default=None
        Number of directions kept; at most ``min(n_classes - 1, n_features)``
        (the default).
    priors : array-like of shape (n_classes,), default=None
        State weights ``p_k`` as for :class:`LDA` (finite, non-negative, at
        least two positive); None uses the class frequencies.
    shrinkage : float, default=0.0
        Each ``Sigma_k`` is replaced by ``(1 - shrinkage) Sigma_k + shrinkage
        (tr Sigma_k / p) I`` before it is inverted, see
        :func:`discriminant_directions`.

    Attributes
    ----------
    classes_ : ndarray of shape (n_classes,)
    priors_ : ndarray of shape (n_classes,)
    means_ : ndarray of shape (n_classes, n_features)
    covariance_ : ndarray of shape (n_features, n_features)
        Harmonic within-state covariance ``S_w`` as used in the eigenproblem
        (after the shrinkage of each ``Sigma_k``), in squared feature units.
    xbar_ : ndarray of shape (n_features,)
        Prior-weighted grand mean.
    scalings_ : ndarray of shape (n_features, n_components)
        Unit-length directions, best first, signs fixed by :func:`fix_signs`.
    eigenvalues_ : ndarray of shape (n_components,)
        ``w^T S_b w / w^T S_w w`` along each direction (dimensionless).
    n_features_in_ : int

    See Also
    --------
    LDA : the arithmetic mean of the class covariances.

    References
    ----------
    Mendels, D., Piccini, G. and Parrinello, M. (2018). Collective variables
    from local fluctuations. J. Phys. Chem. Lett. 9, 2776-2781.

    Piccini, G., Mendels, D. and Parrinello, M. (2018). Metadynamics with
    discriminants: a tool for understanding chemistry. J. Chem. Theory
    Comput. 14, 5040-5044.

    Examples
    --------
    >>> import numpy as np
    >>> rng = np.random.default_rng(0)
    >>> a = rng.normal(0, [1.0, 0.1], (200, 2))   # state A is narrow along y
    >>> b = rng.normal(1, [1.0, 3.0], (200, 2))   # state B is broad along y
    >>> hlda = HLDA().fit(np.vstack([a, b]), np.repeat([0, 1], 200))
    >>> hlda.scalings_.shape
    (2, 1)
    >>> bool(abs(hlda.scalings_[1, 0]) > 0.9)  # LDA would lean toward x instead
    True
    >>> hlda.get_feature_names_out().tolist()
    ['hlda0']
    """

    _within = "harmonic"
