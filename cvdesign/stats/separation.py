"""Separation of states by a feature: the Fisher ratio of per-state means and variances.

Here, below the pool and the scores, so that both use one definition (the distance
prefilter keeps pairs far apart that separate the states; the score card reports it);
:mod:`cvdesign.score.univariate` re-exports it with the other univariate scores.
"""

import numpy as np

__all__ = ["fisher_ratio"]


def fisher_ratio(means, variances, priors=None):
    """Per-feature Fisher ratio of between- to within-state variance.

    Parameters
    ----------
    means : array-like of shape (n_states, n_features)
    variances : array-like of shape (n_states, n_features)
        Within-state variances.
    priors : array-like of shape (n_states,), default=None
        State weights; None gives every state the same weight.

    Returns
    -------
    ndarray of shape (n_features,)
        Dimensionless; 0 where a feature is constant.

    Examples
    --------
    >>> fisher_ratio([[0.0], [2.0]], [[1.0], [1.0]]).tolist()
    [1.0]
    """
    means = np.asarray(means, dtype=np.float64)
    variances = np.asarray(variances, dtype=np.float64)
    n_states = means.shape[0]
    p = np.full(n_states, 1.0 / n_states) if priors is None else np.asarray(priors, float)
    p = p / p.sum()
    grand = p @ means
    between = p @ (means - grand) ** 2
    within = p @ variances
    with np.errstate(divide="ignore", invalid="ignore"):
        out = np.where(within > 0, between / np.where(within > 0, within, 1.0),
                       np.where(between > 0, np.inf, 0.0))
    return out
