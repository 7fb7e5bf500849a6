"""Slow linear modes from lagged moments: TICA's eigenproblem and implied timescales.

The arithmetic of :class:`~cvdesign.fit.tica.TICA` (Molgedey and Schuster 1994;
Perez-Hernandez et al. 2013) on :class:`~cvdesign.stats.moments.LaggedMoments`, without
scikit-learn (so that ``suggest``, whose searches take the slowest direction of many
combinations, and its worker processes do not import it): :func:`slow_modes` solves
``C(tau) w = lambda C(0) w`` after whitening ``C(0)``; :func:`timescales_from_eigenvalues`
turns eigenvalues into implied timescales; :func:`few_pairs_text` says when there are too
few lagged pairs for the features (:data:`MIN_PAIRS_PER_FEATURE`).
"""

import warnings
from typing import NamedTuple

import numpy as np
import scipy.linalg

from ..stats.moments import LaggedMoments, _check_lag
from ._linalg import _check_rcond, _variance_floor, _warn_dropped, _whitener
from .directions import fix_signs

__all__ = ["SlowModes", "slow_modes", "timescales_from_eigenvalues", "MIN_PAIRS_PER_FEATURE",
           "FewPairsWarning", "few_pairs_text"]

#: Fewest lagged pairs per feature (per direction kept after the rcond cut) below which
#: TICA's eigenvalues and implied timescales are flagged as inflated by overfitting. Our
#: choice, from seeded white noise (no slow process at all; 3 runs, lag 5 frames, 20 to 100
#: features): the largest eigenvalue came out about 1.35 / sqrt(pairs per feature), 0.43 at
#: 10 pairs per feature (a timescale of 1.2 lags) and 0.30 at 20 (0.85 lags: noise alone
#: then no longer looks slower than the lag). Pairs of one run are correlated, so real runs
#: need more than this count.
MIN_PAIRS_PER_FEATURE = 20


class FewPairsWarning(UserWarning):
    """TICA was fitted on too few lagged pairs for its features (:func:`few_pairs_text`)."""


def few_pairs_text(n_pairs, n_features):
    """Why TICA's timescales from `n_pairs` lagged pairs of `n_features` features are too
    long, or None when there are at least :data:`MIN_PAIRS_PER_FEATURE` pairs per feature.

    The variational principle (Noe and Nueske, Multiscale Model. Simul. 11, 635, 2013) makes
    implied timescales lower bounds on the true ones only for exact expectations: from few
    pairs the lagged covariance is overfitted, and the eigenvalues come out too close to 1.

    Examples
    --------
    >>> few_pairs_text(4000, 200) is None
    True
    >>> few_pairs_text(285, 250)[:60]
    '285 lagged pairs for 250 features (1.14 per feature, fewer t'
    """
    if n_features <= 0 or n_pairs >= MIN_PAIRS_PER_FEATURE * n_features:
        return None
    return (f"{n_pairs} lagged pairs for {n_features} features ({n_pairs / n_features:.3g} "
            f"per feature, fewer than {MIN_PAIRS_PER_FEATURE}, our rule): TICA overfits the "
            "lagged covariance from so few pairs, so its eigenvalues come out too close to 1 "
            "and its implied timescales too long (on white noise at 10 pairs per feature, "
            "longer than the lag); they are lower bounds on the true ones only with ample "
            "data. Use fewer features, or more or longer runs")


def _warn_few_pairs(n_pairs, n_features, stacklevel=3):
    text = few_pairs_text(n_pairs, n_features)
    if text is not None:
        warnings.warn(text, FewPairsWarning, stacklevel=stacklevel + 1)


def timescales_from_eigenvalues(eigenvalues, lag):
    """Implied relaxation timescales ``t = -lag / ln(lambda)``.

    Parameters
    ----------
    eigenvalues : array-like
        Eigenvalues at the lag, e.g. :attr:`TICA.eigenvalues_` (dimensionless).
    lag : float
        The lag, > 0, in any time unit (frames for TICA).

    Returns
    -------
    ndarray of the shape of `eigenvalues`
        Timescales in the unit of `lag`: ``-lag / ln(lambda)`` for
        ``0 < lambda < 1``; ``inf`` for ``lambda >= 1`` (no decay seen);
        NaN for ``lambda <= 0`` (and for NaN input). For a reversible process
        every true eigenvalue is positive, ``exp(-lag / t)``; an estimate at or
        below zero is sampling noise around a relaxation much faster than the
        lag, from which no timescale can be read (choose a shorter lag).

    Examples
    --------
    >>> import numpy as np
    >>> timescales_from_eigenvalues([np.exp(-0.5), 1.0, -0.1], lag=2).tolist()
    [4.0, inf, nan]
    """
    if isinstance(lag, (bool, np.bool_)) or not np.isscalar(lag) \
            or not (np.isfinite(lag) and lag > 0):
        raise ValueError(f"lag={lag!r} must be a positive number")
    ev = np.asarray(eigenvalues, dtype=np.float64)
    out = np.full(ev.shape, np.nan)
    out[ev >= 1] = np.inf
    mid = (ev > 0) & (ev < 1)
    out[mid] = -float(lag) / np.log(ev[mid])
    return out


class SlowModes(NamedTuple):
    """What :func:`slow_modes` returns: TICA's fitted attributes, by the same names
    without the trailing underscore (see :class:`~cvdesign.fit.tica.TICA`)."""

    #: Mean subtracted before projecting, feature units, shape (n_features,).
    mean: np.ndarray
    #: Instantaneous covariance C(0), squared feature units, (n_features, n_features).
    covariance: np.ndarray
    #: Time-lagged covariance C(tau) (symmetric for the reversible estimate).
    covariance_lag: np.ndarray
    #: Autocorrelations at the lag of the modes, largest first, (n_components,).
    eigenvalues: np.ndarray
    #: C(0)-orthonormal directions as columns, signs fixed, (n_features, n_components).
    eigenvectors: np.ndarray
    #: Implied timescales in frames (inf for eigenvalues >= 1, NaN for <= 0).
    timescales: np.ndarray
    #: Directions of C(0) dropped by the `rcond` cut.
    n_dropped: int


def _check_lagged_moments(lagged_moments):
    if not isinstance(lagged_moments, LaggedMoments):
        raise ValueError(f"lagged_moments must be a LaggedMoments; "
                         f"got {type(lagged_moments).__name__}")


def _check_n_components(n):
    if n is not None and (isinstance(n, (bool, np.bool_))
                          or not isinstance(n, (int, np.integer)) or n < 1):
        raise ValueError(f"n_components={n!r} must be None or an integer >= 1")


def slow_modes(lagged_moments, *, lag, n_components=None, rcond=1e-6, reversible=True):
    """TICA's slow modes from lagged moments, without an estimator.

    What :meth:`TICA.from_moments <cvdesign.fit.tica.TICA.from_moments>` computes (it
    calls this), for code that needs the numbers alone: the reversible or
    non-reversible covariances of the lagged pairs, ``C(0)`` whitened with its
    constant features and the directions of its correlation matrix
    (``D^-1/2 C(0) D^-1/2``, ``D = diag C(0)``, each feature's scale rounded to a power
    of two: independent of the features' units) of
    eigenvalue at most ``rcond`` times the largest dropped (with a
    :class:`~cvdesign.fit.DroppedDirectionsWarning`), and the
    symmetric eigenproblem of the whitened ``C(tau)`` (its symmetric part), largest
    eigenvalue first.

    Parameters
    ----------
    lagged_moments : LaggedMoments
        Statistics of the lagged pairs, with at least one pair.
    lag : int
        The lag in frames at which they were accumulated (checked against
        ``lagged_moments.lag`` when that is known); the timescales are in its unit.
    n_components : int, default=None
        Modes kept; None keeps every direction that survives the `rcond` cut.
    rcond : float, default=1e-6
        Relative cutoff of small eigenvalues of ``C(0)`` on the correlation scale,
        in [0, 1).
    reversible : bool, default=True
        Symmetrized estimate (see :class:`~cvdesign.fit.tica.TICA`).

    Returns
    -------
    SlowModes
        ``mean``, ``covariance``, ``covariance_lag``, ``eigenvalues``,
        ``eigenvectors``, ``timescales`` (frames), ``n_dropped``.

    Examples
    --------
    >>> import numpy as np
    >>> from cvdesign.stats.moments import LaggedMoments
    >>> x = np.random.default_rng(0).normal(size=(500, 3)).cumsum(axis=0)
    >>> modes = slow_modes(LaggedMoments.from_series(x, lag=5, shift=x.mean(axis=0)), lag=5)
    >>> modes.eigenvectors.shape, bool(modes.eigenvalues[0] > 0.9)
    ((3, 3), True)
    """
    _check_lagged_moments(lagged_moments)
    lag = _check_lag(lag)
    _check_rcond(rcond)
    _check_n_components(n_components)
    if lagged_moments.lag is not None and lagged_moments.lag != lag:
        raise ValueError(f"lag={lag} does not match the lag of lagged_moments "
                         f"({lagged_moments.lag} frames)")
    if lagged_moments.count == 0:
        raise ValueError("lagged_moments holds no pairs (count=0)")
    modes = _solve(lagged_moments, lag, n_components, rcond, reversible)
    _warn_dropped(modes.n_dropped, lagged_moments.n_features, rcond,
                  "the instantaneous covariance C0")
    return modes


def _solve(moments, lag, n_components, rcond_given, reversible):
    """The eigenproblem of :func:`slow_modes`, on moments already checked (`rcond_given`
    as the caller gave it, for the message)."""
    rcond = _check_rcond(rcond_given)
    if reversible:
        mean, c0, ct = moments.covariances(reversible=True)
    else:
        mean, _, c0, ct, _ = moments.covariances(reversible=False)
    white, n_dropped = _whitener(c0, rcond, "the instantaneous covariance C0",
                                 _variance_floor(moments, "xy" if reversible else "x"))
    kt = white.T @ ct @ white
    kt = 0.5 * (kt + kt.T)
    evals, evecs = scipy.linalg.eigh(kt)
    order = np.argsort(-evals, kind="stable")
    n_kept = white.shape[1]
    n_comp = n_kept if n_components is None else int(n_components)
    if n_comp > n_kept:
        raise ValueError(
            f"n_components={n_components!r} must be between 1 and the number of "
            f"directions kept, {n_kept} (of {c0.shape[0]} features; {n_dropped} dropped "
            f"by rcond={rcond_given!r})"
        )
    order = order[:n_comp]
    eigenvalues = evals[order]
    return SlowModes(mean=mean, covariance=c0, covariance_lag=ct, eigenvalues=eigenvalues,
                     eigenvectors=fix_signs(white @ evecs[:, order]),
                     timescales=timescales_from_eigenvalues(eigenvalues, lag),
                     n_dropped=n_dropped)
