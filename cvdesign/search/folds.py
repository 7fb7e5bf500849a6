"""Per-state, per-fold moments of standardized features, the input of every fit.

Folds are groups of whole trajectories, or contiguous blocks of frames when a
state has a single trajectory, never random frames: neighbouring frames are
correlated, and a random split would score a combination on frames it has
effectively already seen.
"""

import numpy as np

from ..stats.moments import merge_all

__all__ = ["FoldMoments", "standardize_moments", "standardize_lagged", "state_arrays"]


class FoldMoments:
    """Per-state, per-fold moments of a set of features.

    Parameters
    ----------
    moments : list of list of Moments
        ``moments[state][fold]``; every state must have frames in every fold.
    priors : array-like of shape (n_states,), default=None
        State weights (equal when None).

    Examples
    --------
    >>> import numpy as np
    >>> from cvdesign.stats.moments import Moments
    >>> rng = np.random.default_rng(0)
    >>> fm = FoldMoments([[Moments.from_data(rng.normal(m, 1, (30, 2))) for _ in range(3)]
    ...                   for m in (0.0, 3.0)])
    >>> fm.n_states, fm.n_folds, fm.n_features
    (2, 3, 2)
    """

    def __init__(self, moments, priors=None, lagged=None):
        self.moments = [list(m) for m in moments]
        self.lagged = None if lagged is None else list(lagged)
        self.n_states = len(self.moments)
        self.n_folds = len(self.moments[0])
        self.n_features = self.moments[0][0].n_features
        self.priors = (np.full(self.n_states, 1.0 / self.n_states) if priors is None
                       else np.asarray(priors, dtype=np.float64) / np.sum(priors))
        self._all = [merge_all(m) for m in self.moments]
        self._train = [
            [merge_all(m for f, m in enumerate(ms) if f != k) for ms in self.moments]
            for k in range(self.n_folds)
        ]
        if self.lagged is not None:
            self._lag_all = merge_all(self.lagged)
            self._lag_train = [merge_all(m for f, m in enumerate(self.lagged) if f != k)
                               for k in range(self.n_folds)]

    def lagged_pooled(self):
        """Lagged moments over all folds (LaggedMoments), or None."""
        return None if self.lagged is None else self._lag_all

    def lagged_train(self, k):
        """Lagged moments of every fold but `k`."""
        return self._lag_train[k]

    def lagged_test(self, k):
        """Lagged moments of fold `k`."""
        return self.lagged[k]

    def pooled(self):
        """Per-state moments over all folds (list of Moments)."""
        return self._all

    def train(self, k):
        """Per-state moments of every fold but `k`."""
        return self._train[k]

    def test(self, k):
        """Per-state moments of fold `k`."""
        return [ms[k] for ms in self.moments]

    def standardized(self, center, scale):
        """A copy with features transformed to ``(x - center) / scale``."""
        center = np.asarray(center, dtype=np.float64)
        scale = np.asarray(scale, dtype=np.float64)
        out = [[standardize_moments(m, center, scale) for m in ms] for ms in self.moments]
        lagged = None if self.lagged is None else [
            standardize_lagged(m, center, scale) for m in self.lagged]
        return FoldMoments(out, self.priors, lagged)


def standardize_moments(m, center, scale):
    """Moments of ``(x - center) / scale`` from those of ``x`` (exact)."""
    out = m.copy()
    out.mean = (m.mean - center) / scale
    out.scatter = m.scatter / np.outer(scale, scale)
    return out


def standardize_lagged(m, center, scale):
    """Lagged moments of ``(x - center) / scale`` from those of ``x`` (exact)."""
    out = m.reshifted(center)
    inv = 1.0 / np.asarray(scale, dtype=np.float64)
    out.shift = np.zeros_like(out.shift)
    out.sum_x = out.sum_x * inv
    out.sum_y = out.sum_y * inv
    for name in ("sum_xx", "sum_xy", "sum_yy"):
        setattr(out, name, getattr(out, name) * np.outer(inv, inv))
    return out


def state_arrays(moments, idx):
    """Per-state means (n_states, k) and covariances (n_states, k, k) of features `idx`."""
    idx = np.asarray(idx, dtype=np.intp)
    means = np.array([m.mean[idx] for m in moments])
    # the subset of each covariance (scatter / count), without dividing the whole matrix
    covs = np.array([m.scatter[idx[:, None], idx] / m.count if m.count else
                     np.full((idx.size, idx.size), np.nan) for m in moments])
    return means, covs
