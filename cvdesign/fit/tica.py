"""Time-lagged independent component analysis, in scikit-learn's shape.

:class:`TICA` finds the linear combinations of features that decorrelate
most slowly at a lag time (Molgedey and Schuster 1994; Perez-Hernandez et al.
2013), from :class:`~cvdesign.stats.moments.LaggedMoments` or from trajectories;
:func:`timescales_from_eigenvalues` turns its eigenvalues into implied
timescales. The arithmetic lives in :mod:`.slowmodes` (no scikit-learn there);
:func:`timescales_from_eigenvalues` is importable from here too.
"""

import functools

import numpy as np
from sklearn.base import BaseEstimator, ClassNamePrefixFeaturesOutMixin, TransformerMixin
from sklearn.utils.validation import check_array, check_is_fitted, validate_data

from ..stats.moments import LaggedMoments, _check_lag
from ._linalg import _check_rcond, _warn_dropped
from .slowmodes import (_check_lagged_moments, _check_n_components, _solve, _warn_few_pairs,
                        slow_modes, timescales_from_eigenvalues)

__all__ = ["TICA", "timescales_from_eigenvalues"]


def _as_series(X):
    """``(list of 2-D float arrays, is_list)`` from one array or a list of arrays."""
    if isinstance(X, (list, tuple)) and len(X) > 0 and all(np.ndim(x) == 2 for x in X):
        series = [check_array(x, dtype=np.float64, ensure_min_samples=0,
                              input_name=f"X[{i}]") for i, x in enumerate(X)]
        n = series[0].shape[1]
        for i, x in enumerate(series):
            if x.shape[1] != n:
                raise ValueError(f"X[{i}] has {x.shape[1]} features; X[0] has {n}")
        return series, True
    return None, False


class TICA(ClassNamePrefixFeaturesOutMixin, TransformerMixin, BaseEstimator):
    """Time-lagged independent component analysis.

    Finds the linear combinations ``w^T x`` of features with the largest
    autocorrelation at a lag ``tau``: the solutions of the generalized
    eigenproblem ``C(tau) w = lambda C(0) w``, largest ``lambda`` first.  For a
    reversible process the eigenvalues approximate ``exp(-tau / t_i)`` of its
    slowest relaxations, so ``t_i = -tau / ln(lambda_i)`` are implied
    timescales.

    Regularization: constant features are dropped, and ``C(0)`` is taken to the
    correlation scale (``D^-1/2 C(0) D^-1/2``, ``D = diag C(0)``, each feature's
    scale rounded to a power of two, so that the cut does not depend on the units of
    each feature) and eigen-decomposed; directions
    with eigenvalue at most ``rcond`` times the largest are dropped (counted in
    ``n_dropped_``, with a :class:`~cvdesign.fit.DroppedDirectionsWarning`); the kept
    space is whitened and the symmetric eigenproblem of the whitened ``C(tau)`` is
    solved.

    Parameters
    ----------
    n_components : int, default=None
        Number of components kept; None keeps all directions that survive
        the `rcond` cut.
    lag : int, default=1
        Lag ``tau`` in frames, >= 1.
    rcond : float, default=1e-6
        Relative cutoff of small eigenvalues of ``C(0)`` on the correlation
        scale, in [0, 1) (as numpy's ``rcond``: relative to the largest).
    reversible : bool, default=True
        True: symmetrized estimate (each pair counted in both time
        directions; mean over both ends, ``C0 = (Cxx + Cyy) / 2``,
        ``Ctau = (Cxy + Cyx) / 2``), see
        :meth:`~cvdesign.stats.moments.LaggedMoments.covariances`. False: mean and
        ``C0`` from the earlier frames of the pairs only and ``Ctau = Cxy``
        about the means of each end; the eigenproblem then uses the symmetric
        part of ``Ctau``, the only part the autocorrelation ``w^T Ctau w``
        of a projection sees.
    kinetic_weighting : bool, default=False
        False: :meth:`transform` returns projections with unit variance
        (``C(0)``-orthonormal directions). True: each component is
        multiplied by its eigenvalue, so that Euclidean distances in the
        output approximate kinetic distances (the kinetic map of Noé and
        Clementi 2015).

    Output feature names (:meth:`get_feature_names_out`) are ``tica0``,
    ``tica1``, ..., slowest first; after ``set_output(transform="pandas")``,
    :meth:`transform` returns DataFrames with those columns (a list of them for
    a list of trajectories).

    Attributes
    ----------
    mean_ : ndarray of shape (n_features,)
        Mean subtracted before projecting, in feature units.
    covariance_ : ndarray of shape (n_features, n_features)
        Instantaneous covariance ``C(0)``.
    covariance_lag_ : ndarray of shape (n_features, n_features)
        Time-lagged covariance ``C(tau)`` (symmetric when `reversible`).
    eigenvalues_ : ndarray of shape (n_components,)
        Autocorrelations at the lag of the components, largest first.
    eigenvectors_ : ndarray of shape (n_features, n_components)
        Directions as columns, ``C(0)``-orthonormal
        (``eigenvectors_.T @ covariance_ @ eigenvectors_ = I``), signs fixed by
        :func:`fix_signs`; in inverse feature units.
    timescales_ : ndarray of shape (n_components,)
        Implied timescales in frames, see :func:`timescales_from_eigenvalues`
        (``inf`` for eigenvalues >= 1, NaN for eigenvalues <= 0).
    n_dropped_ : int
        Directions of ``C(0)`` dropped by the `rcond` cut.
    n_features_in_ : int

    References
    ----------
    Molgedey, L. and Schuster, H. G. (1994). Separation of a mixture of
    independent signals using time delayed correlations. Phys. Rev. Lett. 72,
    3634-3637.

    Perez-Hernandez, G., Paul, F., Giorgino, T., De Fabritiis, G. and Noé, F.
    (2013). Identification of slow molecular order parameters for Markov model
    construction. J. Chem. Phys. 139, 015102.

    Noé, F. and Clementi, C. (2015). Kinetic distance and kinetic maps from
    molecular dynamics simulation. J. Chem. Theory Comput. 11, 5002-5011.

    Examples
    --------
    >>> import numpy as np
    >>> from scipy.signal import lfilter
    >>> rng = np.random.default_rng(0)
    >>> slow = lfilter([1.0], [1.0, -0.99], rng.normal(size=4000))  # AR(1), t = 100 frames
    >>> fast = rng.normal(size=4000)
    >>> X = np.c_[slow + fast, slow - fast]                         # mixed
    >>> tica = TICA(lag=10).fit(X)
    >>> tica.eigenvectors_.shape
    (2, 2)
    >>> bool(tica.eigenvalues_[0] > 0.8 and abs(tica.eigenvalues_[1]) < 0.1)
    True
    >>> w = tica.eigenvectors_[:, 0]
    >>> bool(w.sum() / np.sqrt(2 * w @ w) > 0.99)    # slow mode = x0 + x1
    True
    >>> bool(80 < tica.timescales_[0] < 120)          # 1 / -ln(0.99) = 99.5 frames
    True
    >>> tica.get_feature_names_out().tolist()
    ['tica0', 'tica1']
    """

    def __init__(self, n_components=None, *, lag=1, rcond=1e-6, reversible=True,
                 kinetic_weighting=False):
        self.n_components = n_components
        self.lag = lag
        self.rcond = rcond
        self.reversible = reversible
        self.kinetic_weighting = kinetic_weighting

    def _check_params(self):
        lag = _check_lag(self.lag)
        _check_rcond(self.rcond)
        if not isinstance(self.kinetic_weighting, (bool, np.bool_)):
            raise ValueError(f"kinetic_weighting={self.kinetic_weighting!r} must be True or "
                             "False")
        if not isinstance(self.reversible, (bool, np.bool_)):
            raise ValueError(f"reversible={self.reversible!r} must be True or False")
        _check_n_components(self.n_components)
        return lag

    def fit(self, X, y=None):
        """Fit from one trajectory or a list of trajectories.

        Parameters
        ----------
        X : array-like of shape (n_frames, n_features), or list of such arrays
            Feature values in time order, one array per trajectory; pairs
            never span two arrays. Arrays with at most `lag` frames add no
            pairs, but at least one must be longer.
        y : None
            Ignored.

        Returns
        -------
        self
        """
        lag = self._check_params()
        series, is_list = _as_series(X)
        if not is_list:
            series = [validate_data(self, X, dtype=np.float64)]
        else:
            self.n_features_in_ = series[0].shape[1]
        lengths = [x.shape[0] for x in series]
        longest = max(lengths)
        if longest <= lag:
            what = (f"X has n_samples={longest} frames" if not is_list else
                    f"the longest of the {len(series)} trajectories in X has {longest} frames")
            advice = (f"choose lag <= {longest - 1}" if longest >= 2
                      else "give at least 2 frames")
            raise ValueError(
                f"lag={lag} frames needs a trajectory of at least {lag + 1} frames, but "
                f"{what}; {advice}"
            )
        # Pass 1: the mean of all frames, used as the shift of the lagged sums.
        shift = sum(x.sum(axis=0) for x in series) / sum(lengths)
        moments = None
        for x in series:
            m = LaggedMoments.from_series(x, lag, shift=shift)
            moments = m if moments is None else moments.merge(m)
        return self._fit_moments(moments, lag)

    @classmethod
    def from_moments(cls, lagged_moments, *, lag, n_components=None, rcond=1e-6,
                     reversible=True, kinetic_weighting=False):
        """Fit from :class:`~cvdesign.stats.moments.LaggedMoments`.

        Parameters
        ----------
        lagged_moments : LaggedMoments
            Statistics of the lagged pairs, e.g. merged over trajectories.
        lag : int
            The lag in frames at which they were accumulated (checked against
            ``lagged_moments.lag`` when that is known).
        n_components, rcond, reversible, kinetic_weighting
            As in the constructor.

        Returns
        -------
        TICA
            A fitted estimator.

        Examples
        --------
        >>> import numpy as np
        >>> from cvdesign.stats.moments import LaggedMoments
        >>> x = np.random.default_rng(0).normal(size=(500, 3)).cumsum(axis=0)
        >>> lm = LaggedMoments.from_series(x, lag=5, shift=x.mean(axis=0))
        >>> tica = TICA.from_moments(lm, lag=5)
        >>> bool(np.allclose(tica.eigenvalues_, TICA(lag=5).fit(x).eigenvalues_))
        True
        """
        _check_lagged_moments(lagged_moments)
        est = cls(n_components=n_components, lag=lag, rcond=rcond,
                  reversible=reversible, kinetic_weighting=kinetic_weighting)
        lag = est._check_params()
        modes = slow_modes(lagged_moments, lag=lag, n_components=n_components, rcond=rcond,
                           reversible=reversible)
        _warn_few_pairs(lagged_moments.n_pairs, lagged_moments.n_features - modes.n_dropped)
        est.n_features_in_ = lagged_moments.n_features
        return est._set_modes(modes)

    def _fit_moments(self, moments, lag):
        modes = _solve(moments, lag, self.n_components, self.rcond, self.reversible)
        _warn_dropped(modes.n_dropped, moments.n_features, self.rcond,
                      "the instantaneous covariance C0")
        _warn_few_pairs(moments.n_pairs, moments.n_features - modes.n_dropped)
        return self._set_modes(modes)

    def _set_modes(self, modes):
        self.mean_ = modes.mean
        self.covariance_ = modes.covariance
        self.covariance_lag_ = modes.covariance_lag
        self.eigenvalues_ = modes.eigenvalues
        self.eigenvectors_ = modes.eigenvectors
        self.timescales_ = modes.timescales
        self.n_dropped_ = modes.n_dropped
        return self

    def _project(self, X):
        out = (X - self.mean_) @ self.eigenvectors_
        if self.kinetic_weighting:
            out = out * self.eigenvalues_
        return out

    @property
    def _n_features_out(self):
        """Number of components, for :meth:`get_feature_names_out` (scikit-learn's mixin)."""
        return self.eigenvectors_.shape[1]

    def transform(self, X):
        """Project onto the TICA components.

        Parameters
        ----------
        X : array-like of shape (n_frames, n_features), or list of such arrays

        Returns
        -------
        ndarray of shape (n_frames, n_components), or list of them
            ``(X - mean_) @ eigenvectors_`` (dimensionless, unit variance per
            component), times ``eigenvalues_`` with ``kinetic_weighting=True``;
            a list when `X` is a list. After ``set_output(transform="pandas")``,
            pandas DataFrames with the columns of :meth:`get_feature_names_out`.
        """
        check_is_fitted(self)
        return self._project(validate_data(self, X, reset=False, dtype=np.float64))


def _transform_each(self, series):
    """The (set_output-wrapped) :meth:`TICA.transform` of each array of a list."""
    check_is_fitted(self)
    for i, x in enumerate(series):
        if x.shape[1] != self.n_features_in_:
            raise ValueError(f"X[{i}] has {x.shape[1]} features, but TICA was fitted "
                             f"with {self.n_features_in_}")
    return [self.transform(x) for x in series]


# scikit-learn's set_output wraps ``transform`` and ``fit_transform`` when the class is
# made, and its wrapper turns the result for one array into one DataFrame; a list of
# trajectories is therefore dispatched outside that wrapper, to the wrapped ``transform``
# of each array (each becomes a DataFrame when pandas output is set).
def _list_transform(transform):
    @functools.wraps(transform)
    def dispatch(self, X):
        series, is_list = _as_series(X)
        return _transform_each(self, series) if is_list else transform(self, X)
    return dispatch


def _list_fit_transform(fit_transform):
    @functools.wraps(fit_transform)
    def dispatch(self, X, y=None, **fit_params):
        series, is_list = _as_series(X)
        if not is_list:
            return fit_transform(self, X, y, **fit_params)
        return _transform_each(self.fit(series, y, **fit_params), series)
    return dispatch


TICA.transform = _list_transform(TICA.transform)
TICA.fit_transform = _list_fit_transform(TICA.fit_transform)
