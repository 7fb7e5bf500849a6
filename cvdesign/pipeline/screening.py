"""Screening: univariate scores of every feature and descriptor, and the screened set.

From the screening pass (per-state diagonal moments, per-run lagged diagonal
moments) this stage computes, per feature, the standardization (center and
scale over equally weighted states), the Fisher ratio, the autocorrelation at
the lag (all runs about one mean, and each run about its own mean), marks
constant and *frozen* features (no spread within some state: not scored, not
combined), reduces them to descriptors, and keeps the best `screen_size`
descriptors by the objective's univariate score.
"""

from dataclasses import dataclass, field

import numpy as np

from ..errors import InputError
from ..score.univariate import fisher_ratio
from ..search.objectives import both_weight
from ..stats.moments import merge_all
from .timing import local_autocorrelation

__all__ = ["FROZEN_RELATIVE_SPREAD", "Screening", "screen"]

#: A feature whose standard deviation within some state is at most this fraction of its
#: overall standard deviation is *frozen* there (identical frames): not scored, not combined.
FROZEN_RELATIVE_SPREAD = 1e-6


@dataclass
class Screening:
    """Scores of every feature and descriptor, and the descriptors kept for the search.

    Feature arrays have shape ``(n_features,)`` of the pool, descriptor arrays
    ``(n_descriptors,)``; autocorrelations are None when slowness is not measured.

    Attributes
    ----------
    center, scale : ndarray
        Standardization of every feature (state-weighted mean and spread).
    low, high : ndarray
        Smallest and largest value of every feature (histogram ranges).
    unscored : ndarray of bool
        Constant or frozen features.
    fisher_desc, rho_desc, local_desc : ndarray
        Per descriptor: Fisher ratio, autocorrelation at the lag (all runs about one
        mean), within runs; the best of its features.
    frozen_desc : dict of int to list of str
        Frozen descriptors and the states they do not move in.
    order : list of int
        Descriptors, best Fisher ratio first (the score card's order).
    screened : list of int
        Descriptors kept, best by the objective first.
    features : ndarray of int
        Pool features of the screened descriptors, grouped by descriptor, in
        screening order.
    groups : list of ndarray of int
        Columns of each screened descriptor within `features`.
    notes : list of str
    """

    center: np.ndarray
    scale: np.ndarray
    low: np.ndarray
    high: np.ndarray
    unscored: np.ndarray
    fisher_desc: np.ndarray
    rho_desc: np.ndarray
    local_desc: np.ndarray
    frozen_desc: dict
    order: list
    screened: list
    features: np.ndarray
    groups: list
    notes: list = field(default_factory=list)


def _per_descriptor(pool, values, ufunc, fill):
    out = np.full(len(pool), fill)
    ufunc.at(out, pool.feature_descriptor, values)
    return out


def screen(pool, states, result, priors, *, objective, screen_size, lagged):
    """The screening stage: scores, frozen descriptors, the screened set.

    Parameters
    ----------
    pool : cvdesign.pool.Pool
    states : list of str
    result : cvdesign.passes.ScreeningResult
        Of the screening pass over every feature of `pool`.
    priors : ndarray of shape (n_states,)
    objective : {'separate', 'slow', 'both'}
    screen_size : int
    lagged : bool
        Whether slowness is measured (the pass's lagged moments are used).

    Returns
    -------
    Screening

    Raises
    ------
    InputError
        When no descriptor scores above 0 (every separating one frozen, or none
        separates or is correlated at the lag).
    """
    diag = result.diagonal
    means = np.array([d.mean for d in diag])
    variances = np.array([d.variance for d in diag])
    center = priors @ means
    scale = np.sqrt(priors @ (variances + (means - center) ** 2))
    constant = ~(scale > 1e-12 * (1.0 + np.abs(center)))
    scale[constant] = 1.0
    # a feature that does not move within some state (identical frames) has no measurable
    # spread there: its Fisher ratio would be infinite and a bias kernel along it of zero
    # width, so it is neither scored nor combined
    still = variances <= (FROZEN_RELATIVE_SPREAD * scale) ** 2
    frozen_feat = ~constant & still.any(axis=0)
    unscored = constant | frozen_feat
    fisher_feat = fisher_ratio(means, variances, priors)
    fisher_feat[unscored] = 0.0
    fisher_desc = _per_descriptor(pool, fisher_feat, np.maximum, 0.0)
    rho_desc = local_desc = None
    if lagged:
        runs = [m for _, m in sorted(result.lagged.items())]
        rho_feat = np.nan_to_num(merge_all(_unlagged(runs)).autocorrelation(), nan=0.0)
        local_feat = np.nan_to_num(local_autocorrelation(runs, pool.n_features), nan=0.0)
        rho_feat[unscored] = local_feat[unscored] = 0.0
        rho_desc = _per_descriptor(pool, rho_feat, np.maximum, -np.inf)
        local_desc = _per_descriptor(pool, local_feat, np.maximum, -np.inf)

    # a descriptor is frozen when none of its features can be scored and one is frozen
    # (a dihedral near 0 whose cosine barely moves still moves through its sine)
    all_unscored = np.ones(len(pool), dtype=bool)
    np.logical_and.at(all_unscored, pool.feature_descriptor, unscored)
    frozen_desc = {}
    for f in np.flatnonzero(frozen_feat):
        i = int(pool.feature_descriptor[f])
        if all_unscored[i]:
            frozen_desc.setdefault(i, [states[s] for s in np.flatnonzero(still[:, f])])
    notes = []
    if frozen_desc:
        first = min(frozen_desc)
        notes.append(f"frozen: {len(frozen_desc)} descriptor(s) do not move within some state "
                     f"(e.g. {pool.descriptors[first].label} in state "
                     f"{frozen_desc[first][0]!r}: every frame has the same value), so they are "
                     "neither scored nor combined; check that those trajectories are real "
                     "dynamics, not repeated frames")
    for i in frozen_desc:  # not scored, whatever its other features say
        fisher_desc[i] = 0.0
        if lagged:
            rho_desc[i] = local_desc[i] = -np.inf

    if objective == "separate":
        score, by = fisher_desc, "Fisher ratio"
    elif objective == "slow":
        score, by = np.clip(rho_desc, 0.0, None), "autocorrelation at the lag"
    else:
        # the objective's own form for one descriptor: slowness within the runs (each about
        # its own mean), not about one common mean, which on runs that stay in their states
        # makes every separating descriptor look slow and would count separation twice (a
        # fast, strongly separating descriptor screened out a slow one that separates a
        # little less)
        score = fisher_desc / (1.0 + fisher_desc) * both_weight(local_desc)
        by = "J / (1 + J) * (1 + max(rho within runs, 0)) / 2, the objective's own form"
    n_desc = len(pool)
    order = sorted(range(n_desc), key=lambda i: (-fisher_desc[i], i))
    candidates = [i for i in sorted(range(n_desc), key=lambda i: (-score[i], i))
                  if score[i] > 0]
    screened = candidates[:screen_size]
    if len(candidates) > len(screened):
        notes.append(f"screening: the best {len(screened)} of {len(candidates)} scored "
                     f"descriptors by {by} went on to the search (screen size "
                     f"{screen_size}); the others are on the score card only")
    if not screened:
        if frozen_desc:
            first = min(frozen_desc)
            raise InputError(
                f"every descriptor that differs between the states is frozen within some "
                f"state ({len(frozen_desc)} descriptors; e.g. {pool.descriptors[first].label} "
                f"does not move in state {frozen_desc[first][0]!r}): a separation cannot be "
                "measured without fluctuations within the states; give trajectories of real "
                "dynamics (not one repeated frame) for every state")
        what = ("differs between the states (every Fisher ratio is 0)" if objective != "slow"
                else "is correlated in time at the lag (every autocorrelation is 0)")
        raise InputError(f"no descriptor {what}; check the trajectories and the lag")
    features = np.concatenate([pool.features_of([i]) for i in screened])
    groups, pos = [], 0
    for i in screened:
        n = len(pool.descriptors[i].transforms)
        groups.append(np.arange(pos, pos + n))
        pos += n
    return Screening(center=center, scale=scale,
                     low=np.min([d.minimum for d in diag], axis=0),
                     high=np.max([d.maximum for d in diag], axis=0), unscored=unscored,
                     fisher_desc=fisher_desc, rho_desc=rho_desc, local_desc=local_desc,
                     frozen_desc=frozen_desc, order=order, screened=screened,
                     features=features, groups=groups, notes=notes)


def _unlagged(runs):
    """Copies without their lag in frames (runs of different files may differ in it)."""
    out = []
    for m in runs:
        m = m.copy()
        m.lag = None
        out.append(m)
    return out
