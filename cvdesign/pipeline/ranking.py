"""Ranking: shortlist, search, final fits, bootstrap and the ranked entries.

Everything here works on merged statistics (:class:`~cvdesign.search.FoldMoments`
and the held-out pass's blocks), never on frames.
"""

import math
from dataclasses import dataclass

import numpy as np

from ..fit import rayleigh_quotient, timescales_from_eigenvalues
from ..score.card import card_intervals
from ..score.redundancy import descriptor_correlation, redundancy_graph, representatives
from ..score.univariate import overlap_coefficient, pairwise_overlaps
from ..search import (FoldMoments, autocorrelation_along, cv_direction, fit_direction,
                      greedy_search, heldout_autocorrelation, heldout_fisher_along, heldout_score,
                      heldout_scores, rank_combinations, slow_direction, state_arrays,
                      within_states)
from ..stats.bootstrap import (MIN_INTERVAL_BLOCKS, block_bootstrap, hull_interval,
                               percentile_interval)
from ..stats.moments import merge_all

__all__ = ["SELECTION_REPLICATES", "SELECTION_POOL", "NEAR_FROZEN_FISHER", "Fit", "Shortlist",
           "shortlist", "search", "fit_ranked", "kinetic_map_scale", "bootstrap_ranked",
           "ranking_entry", "card_interval_rows", "hints_for", "heldout_overlap",
           "add_ranges", "NOISE_LEVEL_FACTOR", "heldout_noise_level", "add_noise_level",
           "PAIR_OVERLAP_WARN", "closest_pairs", "add_pair_overlap", "FOLD_SPREAD_FACTOR",
           "add_fold_spread_warning", "fold_noise_level"]

#: Bootstrap refits of the search for selection frequencies, and the number of best
#: shortlisted descriptors (besides the ranked terms) they may choose from.
SELECTION_REPLICATES = 40
SELECTION_POOL = 12


@dataclass
class Fit:
    """A ranked combination fitted on all data, and on every fold's training part.

    Attributes
    ----------
    gidx : list of int
        Its descriptors, as positions in the screened list.
    idx : ndarray of int
        Their columns in the fold moments.
    w : ndarray
        Direction on all data (signed so the last state lies higher; kinetic-map
        units for ``slow``).
    fold_w : list of ndarray
        Direction fitted without each fold (signed like `w`).
    """

    gidx: list
    idx: np.ndarray
    w: np.ndarray
    fold_w: list


@dataclass
class Shortlist:
    """The screened descriptors the search combines, one per redundancy group.

    Attributes
    ----------
    members : list of int
        Positions in the screened list, best first.
    stands_for : dict of int to list of str
        Pool descriptor index of a representative -> ids of those it stands for.
    notes_by_desc : dict of int to str
        Pool descriptor index -> "represented by ..." note.
    """

    members: list
    stands_for: dict
    notes_by_desc: dict


def shortlist(pool, screening, fm, priors, config, notes):
    """One representative per group of redundant screened descriptors (see
    :mod:`cvdesign.score.redundancy`): correlated within the states and adding nothing
    to each other's held-out score."""
    screened, groups = screening.screened, screening.groups
    pooled = fm.pooled()
    within = np.tensordot(priors, np.array([m.covariance for m in pooled]), axes=1)
    dcorr = descriptor_correlation(within, groups)
    adds_nothing = _AddsNothing(fm, groups, config.search, config.min_gain)
    graph = redundancy_graph(dcorr, config.max_correlation, adds_nothing=adds_nothing)
    reps = representatives(graph, {g: -float(g) for g in range(len(screened))})
    notes_by_desc, stands_for = {}, {}
    for rep, others in reps:
        stands_for[screened[rep]] = [pool.descriptors[screened[o]].id for o in others]
        for o in others:
            notes_by_desc[screened[o]] = (
                f"represented by {pool.descriptors[screened[rep]].id} "
                f"(|r|={dcorr[rep, o]:.3f}; together they score no better than alone)")
    members = [rep for rep, _ in reps][:config.shortlist_size]
    n_red = sum(len(o) for _, o in reps)
    notes.append(f"redundancy: {n_red} of the {len(screened)} screened descriptors are "
                 f"represented by a better one (pooled within-state |r| > "
                 f"{config.max_correlation:g} and the pair's held-out score not more than "
                 f"{config.min_gain:.0%} above the better one alone; {adds_nothing.kept} "
                 "correlated pairs kept apart because their combination scores higher); "
                 f"shortlist: {len(members)} representatives")
    return Shortlist(members, stands_for, notes_by_desc)


def search(fm, screening, short, config, notes):
    """Greedy forward searches from the best single descriptors, ranked (1-SE rule)."""
    groups = [screening.groups[g] for g in short.members]
    combos = greedy_search(fm, groups, max_terms=config.max_terms, n_seeds=config.n_seeds,
                           min_gain=config.min_gain, **config.search)
    ranked = rank_combinations(combos, limit=config.n_suggestions)
    notes.append(_search_note(config.objective, config.method, config.shrinkage, len(combos),
                              min(config.n_seeds, len(short.members)), config.min_gain,
                              fm.slowness))
    return ranked


def fit_ranked(ranked, fm, screening, short, config):
    """The direction of each ranked combination on all data and without each fold."""
    fits = []
    pooled = fm.pooled()
    for comb in ranked:
        gidx = [short.members[m] for m in comb.members]
        idx = np.concatenate([screening.groups[g] for g in gidx])
        w = cv_direction(fm, idx, **config.search)
        mu = np.array([m.mean[idx] for m in pooled])
        if mu[-1] @ w < mu[0] @ w:
            w = -w
        if config.objective == "slow":
            w = kinetic_map_scale(w, fm.lagged_pooled(), idx)
        fold_w = []
        for k in range(fm.n_folds):
            wk = cv_direction(fm, idx, fold=k, **config.search)
            fold_w.append(wk if wk @ w >= 0 else -wk)
        fits.append(Fit(gidx, idx, w, fold_w))
    return fits


class _AddsNothing:
    """``adds_nothing(i, j)``: do screened descriptors i and j together score no better
    (held-out, by the search's own objective) than the better of the two alone, by more
    than the search's `min_gain`? Counts the correlated pairs it keeps apart."""

    def __init__(self, fm, groups, search, min_gain):
        self.fm, self.groups, self.search, self.min_gain = fm, groups, search, min_gain
        self._single = {}
        self.kept = 0

    def _score(self, members):
        idx = np.concatenate([self.groups[m] for m in members])
        return heldout_score(self.fm, idx, **self.search)[0]

    def __call__(self, i, j):
        for g in (i, j):
            if g not in self._single:
                self._single[g] = self._score((g,))
        best = max(self._single[i], self._single[j])
        redundant = not self._score((i, j)) > best + self.min_gain * abs(best)
        self.kept += not redundant
        return redundant


def kinetic_map_scale(w, lagged, idx):
    """Scale a slow direction to kinetic-map units (Noé and Clementi, J. Chem. Theory
    Comput. 2015): the CV's variance becomes ``lambda^2``, its autocorrelation at the lag
    squared, so distances along slow CVs of different runs or suggestions compare in
    kinetic terms. A direction with ``lambda <= 0`` is scaled to unit variance."""
    sub = lagged.subset(np.asarray(idx, dtype=np.intp))
    _, c0, ct = sub.covariances(reversible=True)
    var = float(w @ c0 @ w)
    if not var > 0:
        return w
    lam = float(w @ ct @ w) / var
    return w * (lam if lam > 0 else 1.0) / math.sqrt(var)


def hints_for(entry, temperature, md_step_fs, *, from_biased_runs=False):
    """(bias-parameter hints, None) for a ranked CV, or (None, why they were refused).

    The grid and walls take the CV's reachable and observed ranges into account when
    the entry has them (see :func:`add_ranges`); `from_biased_runs` as in
    :func:`~cvdesign.bias.hints.suggest_hints`."""
    from ..bias.hints import suggest_hints

    reach, seen = entry.get("reachable_range"), entry.get("observed_range")
    try:
        return suggest_hints(entry["states"], temperature=temperature, md_step_fs=md_step_fs,
                             autocorrelation_time_ps=entry.get("integrated_time_ps"),
                             frame_spacing_ps=entry.get("frame_spacing_ps"),
                             autocorrelation_time_decayed=entry.get("integrated_time_decayed"),
                             autocorrelation_time_interval_ps=_both(
                                 entry.get("integrated_time_ci_ps")),
                             cv_range=None if reach is None else (reach["lower"], reach["upper"]),
                             observed_range=None if seen is None else (seen["lower"],
                                                                       seen["upper"]),
                             leave_out_frozen=True, from_biased_runs=from_biased_runs), None
    except ValueError as exc:
        return None, str(exc)


def _both(interval):
    """`interval` when both its ends are known, else None."""
    return None if interval is None or None in interval else interval


def add_ranges(entry, pool, observed, states):
    """Add a ranked CV's reachable and observed ranges, and flag states at a bound.

    Parameters
    ----------
    entry : dict
        From :func:`ranking_entry`; gains ``reachable_range`` and
        ``observed_range`` (``{"lower", "upper"}``, CV units; a reachable bound
        None where the CV is unbounded), per state ``min``, ``max`` and, for a
        state whose mean lies within
        :data:`~cvdesign.spec.ranges.FOLD_SPREADS` standard deviations of a
        reachable bound, ``at_bound`` (``"lower"`` or ``"upper"``) with a
        warning.
    pool : Pool
        The pool the terms' descriptors come from.
    observed : (ndarray, ndarray)
        Smallest and largest value of the CV in each state (CV units), in the
        order of `states`. They come from single-precision features and can pass a
        reachable end by their rounding (3e-8 below a lower end of -1.019): they are
        clipped to the reachable range, which no geometry leaves.
    states : list of str
    """
    from ..spec.ranges import reachable_range, states_at_bounds

    by_id = {d.id: d for d in pool.descriptors}
    descs = []
    for did in dict.fromkeys(t["descriptor"] for t in entry["terms"]):
        d = by_id[did]
        descs.append({"id": d.id, "kind": d.kind,
                      **({"groups": [list(g) for g in d.groups]} if d.groups else {})})
    low, high = reachable_range(descs, entry["terms"])
    entry["reachable_range"] = {"lower": low, "upper": high}
    lows = np.asarray(observed[0], dtype=np.float64)
    highs = np.asarray(observed[1], dtype=np.float64)
    if low is not None:
        lows, highs = np.maximum(lows, low), np.maximum(highs, low)
    if high is not None:
        lows, highs = np.minimum(lows, high), np.minimum(highs, high)
    for s, name in enumerate(states):
        entry["states"][name]["min"] = float(lows[s])
        entry["states"][name]["max"] = float(highs[s])
    entry["observed_range"] = {"lower": float(np.min(lows)), "upper": float(np.max(highs))}
    one_dihedral = len(descs) == 1 and descs[0]["kind"] == "dihedral"
    folded = states_at_bounds(entry["states"], (low, high))
    if not folded:
        return
    where = []
    for name, side in folded.items():
        st = entry["states"][name]
        st["at_bound"] = side
        gap = abs(st["mean"] - (low if side == "lower" else high))
        where.append(f"{name!r} at the {side} bound (mean {st['mean']:.4g}, "
                     + (f"{gap / st['std']:.2g} std from it)" if st["std"] > 0 else "on it)"))
    todo = ("the dihedral itself, as a periodic CV (one identity term), has no fold; consider "
            "it" if one_dihedral else
            "check in a short biased run that the bias moves the state, or prefer a "
            "suggestion whose states lie inside its range")
    entry["warnings"].append(
        f"state{'s' if len(where) > 1 else ''} {' and '.join(where)} of the reachable range "
        f"[{_bound(low)}, {_bound(high)}]: a folded coordinate. Near a bound the CV changes "
        "only to second order with its descriptors, so structures on either side of the fold "
        "(e.g. a dihedral on either side of the angle where its cos or sin peaks) give the "
        f"same value and the bias force along the CV fades there. The fold also compresses "
        "the states' spreads along the CV, which raises its Fisher ratio (held-out J) above "
        "that of a CV without a fold that separates the states as well (the dihedral of a "
        "torsion whose states sit near 0 and pi can score far lower as a periodic CV than its "
        f"cos): compare J across CVs with that in mind; {todo}")


def _bound(x):
    return "unbounded" if x is None else f"{x:.4g}"


def _search_note(objective, method, shrinkage, n_combos, n_seeds, min_gain,
                 slowness="within_states"):
    transit = objective == "both" and slowness == "transitions"
    what = {"separate": "held-out Fisher ratio of the discriminant direction",
            "slow": "held-out VAMP-2 of the slowest singular function (squared correlation "
                    "across the lag)",
            "both": "held-out J/(1+J) times (1 + rho)/2, rho the held-out autocorrelation at "
                    + ("the lag along the runs that cross between the states (each run's "
                       "held-out block about its own mean; " if transit else
                       "the lag within the states (each state's pairs about its own mean; ")
                    + "negative rho counts as 0)"}[objective]
    disc = ("; the CV is the slowest TICA direction (reversible estimate) in kinetic-map "
            "scaling" if objective == "slow" else
            f"; {method.upper()} with shrinkage {shrinkage:g}, equal state weights")
    basin = ("; the lagged pairs never span a state change, so these runs (each state's "
             "runs staying in it) cannot measure how slowly the CV crosses between the "
             "states: the slowness ranked on is that of the motion inside the states (about "
             "one common mean, every separating CV would look slow), and it may at most halve "
             "the separation score J/(1+J), which saturates: among CVs that separate well "
             "it can reorder them"
             if objective == "both" and not transit else
             "; along the crossing runs the pairs span the state changes, so rho tells how "
             "slowly the CV crosses between the states; it may at most halve the separation "
             "score" if transit else "")
    return (f"search ({objective}): {n_combos} combinations from greedy forward searches "
            f"started at the {n_seeds} best single descriptors, scored by {what}; a term is "
            f"added only if it raises the score by more than {min_gain:.0%}; ranked with the "
            f"one-standard-error rule{disc}{basin}")


def _finite(x):
    x = float(x)
    return x if math.isfinite(x) else None


def card_interval_rows(card, card_desc, card_feat, pool, center, priors, constant, n_boot, seed):
    """Score-card intervals by descriptor id: {index: {column_ci: [low, high]}}."""
    if not card_desc:
        return None
    local = {i: j for j, i in enumerate(card_desc)}
    feature_descriptor = np.array([local[int(pool.feature_descriptor[f])] for f in card_feat],
                                  dtype=np.intp)
    res = card_intervals(card, center[card_feat], priors, constant[card_feat],
                         feature_descriptor, len(card_desc), n_boot=n_boot, seed=seed + 2)
    if res is None:
        return None
    out = {}
    for j, i in enumerate(card_desc):
        out[i] = {f"{name}_ci": [_finite(lo[j]), _finite(hi[j])]
                  for name, (_, lo, hi) in res.items()}
    return out


def heldout_overlap(counts):
    """The states' overlap along each CV, held out: the overlapping coefficient of the
    histograms of the held-out folds pooled.

    Parameters
    ----------
    counts : ndarray of shape (n_folds, n_states, n_cvs, n_bins)
        Held-out histograms, each fold's along its own direction, on bins common to
        every fold (:func:`~cvdesign.search.scaled_fold_directions`).

    Returns
    -------
    ndarray of shape (n_cvs,)

    Examples
    --------
    >>> c = np.zeros((2, 2, 1, 3))
    >>> c[0, 0, 0] = [4, 0, 0]; c[0, 1, 0] = [0, 4, 0]  # fold 1: the states apart
    >>> c[1, 0, 0] = [0, 4, 0]; c[1, 1, 0] = [0, 0, 4]  # fold 2: apart, one bin higher
    >>> heldout_overlap(c).tolist()  # pooled, the states share one bin of two
    [0.5]
    """
    return overlap_coefficient(np.asarray(counts).sum(axis=0))


#: With three or more states, a ranked CV along which two of them overlap by at least this
#: much (overlapping coefficient of their held-out histograms, the folds pooled) gets a
#: warning: the Fisher ratio pools every state, so a CV that sets one state far from the
#: others scores high even when it leaves two on top of each other. Our choice: two
#: Gaussian states of one spread overlap by half when their means are 1.35 spreads apart
#: (overlapping coefficient 2 Phi(-d/2); Inman and Bradley 1989, Commun. Stat. Theory
#: Methods 18, 3851; from memory), where a bias along the CV can hardly tell them apart.
PAIR_OVERLAP_WARN = 0.5


def closest_pairs(counts):
    """Per CV, the pair of states that overlap most along it, held out.

    Parameters
    ----------
    counts : ndarray of shape (n_folds, n_states, n_cvs, n_bins)
        Held-out histograms on bins common to every fold (as :func:`heldout_overlap`),
        pooled over the folds.

    Returns
    -------
    list of tuple
        Per CV ``(i, j, overlap, least)``: the states ``i < j`` with the largest
        overlapping coefficient of their pooled held-out histograms, that coefficient,
        and the smallest of any pair; None for a CV where it is not defined (fewer than
        two states, or a state without frames).

    Examples
    --------
    >>> c = np.zeros((2, 3, 1, 2))
    >>> c[:, 0, 0] = [4.0, 0.0]; c[:, 1, 0] = [0.0, 4.0]; c[:, 2, 0] = [1.0, 3.0]
    >>> closest_pairs(c)
    [(1, 2, 0.75, 0.0)]
    """
    pairs, overlaps = pairwise_overlaps(np.asarray(counts).sum(axis=0))
    if not pairs:
        return [None] * counts.shape[2]
    out = []
    for c in range(overlaps.shape[1]):
        if not np.isfinite(overlaps[:, c]).all():
            out.append(None)
            continue
        k = int(np.argmax(overlaps[:, c]))  # (the first pair of the largest: a fixed order)
        out.append((pairs[k][0], pairs[k][1], float(overlaps[k, c]),
                    float(overlaps[:, c].min())))
    return out


def add_pair_overlap(entry, closest, states):
    """With three or more `states`, warn in `entry` when the two of them that overlap most
    along its CV (`closest`, from :func:`closest_pairs`) overlap by at least
    :data:`PAIR_OVERLAP_WARN`. Returns whether it warned."""
    if closest is None or len(states) < 3 or not closest[2] >= PAIR_OVERLAP_WARN:
        return False
    i, j, value, least = closest
    if least >= PAIR_OVERLAP_WARN:  # no pair is apart: not a pair hidden by the others
        entry["warnings"].append(
            f"every pair of the states overlaps by {least:.2f} or more along it (held-out "
            f"overlapping coefficient of their histograms; most, {value:.2f}, states "
            f"{states[i]!r} and {states[j]!r}): it separates none of them well")
        return True
    entry["warnings"].append(
        f"states {states[i]!r} and {states[j]!r} overlap by {value:.2f} along it (held-out "
        f"overlapping coefficient of their histograms; 0 apart, 1 the same): its Fisher "
        f"ratio pools every state, so it can be high while these two lie on top of each "
        f"other, and a bias along it would hardly tell them apart; a CV of more terms "
        f"(--max-terms, max_terms=) may separate all the states, or bias a second CV "
        f"that separates these two (suggest on their runs alone gives one)")
    return True


def bootstrap_ranked(held, fits, short, screening, priors, fm, config, has_lag,
                     transit_blocks=None):
    """Confidence intervals of weights and scores, and how often terms are selected.

    Parameters
    ----------
    held : HeldOut
        Blocks of the held-out pass (per state and fold).
    fits : list of Fit
    short : Shortlist
    screening : Screening
    priors : ndarray
    fm : FoldMoments
    config : SuggestConfig
    has_lag : bool
    transit_blocks : list of list of list of LaggedMoments, optional
        The crossing runs' standardized sub-blocks ``[run][fold][block]``
        (:meth:`~cvdesign.pipeline.transitions.TransitionData.standardized_blocks`).
        When the objective ranks on them (``fm.slowness == "transitions"``), the
        refits resample them within each (run, fold) in the same replicates as the
        states' blocks, so the held-out scores' intervals and the selection
        frequencies carry their noise; a (run, fold) with a single sub-block stays
        fixed.

    Returns
    -------
    dict or None
        ``combos``: per ranked CV, intervals of its weights, Fisher ratio,
        autocorrelation and held-out scores, its terms' selection frequencies;
        None when a state has fewer than two blocks.
    """
    blocks, where = held.blocks, held.where
    short = short.members
    groups = screening.groups
    search = config.search
    max_terms, min_gain, n_seeds = config.max_terms, config.min_gain, config.n_seeds
    n_bootstrap, seed = config.n_bootstrap, config.seed
    n_states, n_folds = fm.n_states, fm.n_folds
    per_state = [[b for k in range(n_folds) for b in blocks.get((s, k), [])]
                 for s in range(n_states)]
    if any(len(g) < MIN_INTERVAL_BLOCKS for g in per_state):
        return None
    p_fits = [(np.array([where[int(i)] for i in f.idx], dtype=np.intp), f.w) for f in fits]
    fold_ws = [f.fold_w for f in fits]
    short_groups = [np.array([where[int(i)] for i in groups[g]], dtype=np.intp) for g in short]

    def stat(merged):
        states = [m[0] for m in merged]
        lag = merge_all([m[1] for m in merged]) if has_lag else None
        within = within_states([m[1] for m in merged]) if has_lag else None
        out = []
        for p_idx, w_ref in p_fits:
            if search["objective"] == "slow":
                w = slow_direction(lag, p_idx)[0]
            else:
                w = fit_direction(states, p_idx, priors, search["shrinkage"],
                                  method=search["method"])
            if w @ w_ref < 0:
                w = -w
            if search["objective"] == "slow":
                w = kinetic_map_scale(w, lag, p_idx)
            means, covs = state_arrays(states, p_idx)
            out.extend(w.tolist())
            out.append(rayleigh_quotient(w, means, covs, priors))
            out.append(autocorrelation_along(w, lag, p_idx) if has_lag else np.nan)
            out.append(autocorrelation_along(w, within, p_idx) if has_lag else np.nan)
        return np.array(out)

    res = block_bootstrap(per_state, stat, n_boot=n_bootstrap, seed=seed, label="bootstrap")
    # each value's range: a weight in [-1, 1] (the discriminant directions have unit length;
    # a 'slow' direction is scaled by the kinetic map: any), a Fisher ratio >= 0,
    # autocorrelations in [-1, 1]
    weight = 1.0 if search["objective"] != "slow" else np.inf
    bounds = np.concatenate([[[-weight, weight]] * p_idx.size + [[0.0, np.inf]] +
                             [[-1.0, 1.0]] * 2 for p_idx, _ in p_fits]) if p_fits else \
        np.zeros((0, 2))
    low, high = hull_interval(res.estimate, res.low, res.high,
                              bounds=(bounds[:, 0], bounds[:, 1]))
    out = {"combos": []}
    pos = 0
    for p_idx, _ in p_fits:
        n = p_idx.size
        out["combos"].append({
            "weights_ci": [[_finite(a), _finite(b)] for a, b in
                           zip(low[pos:pos + n], high[pos:pos + n])],
            "fisher_ratio_ci": [_finite(low[pos + n]), _finite(high[pos + n])],
            "autocorrelation_ci": ([_finite(low[pos + n + 1]),
                                    _finite(high[pos + n + 1])] if has_lag else None),
            "autocorrelation_within_states_ci": ([_finite(low[pos + n + 2]),
                                                  _finite(high[pos + n + 2])]
                                                 if has_lag else None),
        })
        pos += n + 3
    # How often each term of each ranked CV is kept when the whole search is rerun on a
    # bootstrap resample of the folds: in each refit, the CV's counterpart is the refit's
    # ranked combination sharing the most descriptors with it (ties: the better ranked),
    # and a term counts as selected when the counterpart holds it. The refits run the
    # main search (same seeds, objective and rule) over the terms of the ranked
    # combinations and the best SELECTION_POOL representatives, which bounds the cost.
    per_fold = [blocks.get((s, k), []) for s in range(n_states) for k in range(n_folds)]
    # blocks are resampled within each state and fold: a state and fold with a single
    # block would give every refit the same data (selection 100 %, intervals of zero
    # width), so the refits need at least two blocks in each
    if any(len(g) < 2 for g in per_fold):
        out["selection_skipped"] = (
            "no selection frequencies and no intervals for the held-out scores: some state "
            "has a single bootstrap block in a held-out fold (runs too short for the "
            f"blocks of {held.block_desc}), so refits of the search on resampled folds "
            "would all see the same data; give more or longer runs per state")
    else:
        in_ranked = {short.index(g) for f in fits for g in f.gidx}
        cand = sorted(in_ranked | set(range(min(SELECTION_POOL, len(short)))))
        cand_groups = [short_groups[j] for j in cand]
        cpos = {j: c for c, j in enumerate(cand)}
        ranked_sets = [[cpos[short.index(g)] for g in f.gidx] for f in fits]
        n_terms_all = sum(len(m) for m in ranked_sets)

        # the crossing runs' pairs (transition slowness) in the blocks' columns; when they
        # rank, their sub-blocks are resampled within each (run, fold) in the same replicates
        cols = np.empty(len(where), dtype=np.intp)
        for i, p in where.items():
            cols[p] = i
        transit = None if fm.transitions is None else [[m.subset(cols) for m in row]
                                                       for row in fm.transitions]
        t_keys, t_groups = [], []
        if transit is not None and transit_blocks is not None and fm.slowness == "transitions":
            for r, row in enumerate(transit_blocks):
                for k, sub in enumerate(row):
                    if len(sub) >= 2:
                        t_keys.append((r, k))
                        t_groups.append([m.subset(cols) for m in sub])
        out["transitions_resampled"] = bool(t_keys)

        def select(merged):
            grid = [[merged[s * n_folds + k][0] for k in range(n_folds)] for s in range(n_states)]
            lag = ([[merged[s * n_folds + k][1] for k in range(n_folds)]
                    for s in range(n_states)] if has_lag else None)
            boot_transit = transit
            if t_keys:
                boot_transit = [list(row) for row in transit]
                for (r, k), m in zip(t_keys, merged[len(per_fold):]):
                    boot_transit[r][k] = m
            boot_fm = FoldMoments(grid, priors, lag, boot_transit,
                                  rank_transitions=fm.rank_transitions)
            combos = greedy_search(boot_fm, cand_groups, max_terms=max_terms, n_seeds=n_seeds,
                                   min_gain=min_gain, **search)
            refit = [frozenset(c.members) for c in rank_combinations(combos, limit=len(fits))]
            hit = np.zeros(n_terms_all + len(fits))
            pos = 0
            for ci, members in enumerate(ranked_sets):
                mine = frozenset(members)
                twin = max(refit, key=lambda r: (len(r & mine), -refit.index(r)))
                hit[pos:pos + len(members)] = [m in twin for m in members]
                hit[n_terms_all + ci] = twin == mine
                pos += len(members)
            # held-out scores of the ranked combinations on the resampled folds (refitted),
            # and their held-out overlap and autocorrelation along the fold directions
            held = []
            counts = np.array([[merged[s * n_folds + k][2]["h"] for s in range(n_states)]
                               for k in range(n_folds)])
            overlap = heldout_overlap(counts)
            ranked_idx = [p_idx for p_idx, _ in p_fits]
            scores = heldout_scores(boot_fm, ranked_idx, **search)
            if search["objective"] == "separate":
                fisher = [v[0] for v in scores]
            elif search["objective"] == "both":  # the CV's direction is the discriminant
                fisher = [v[0] for v in heldout_scores(
                    boot_fm, ranked_idx, objective="separate", method=search["method"],
                    shrinkage=search["shrinkage"])]
            else:  # 'slow': along the TICA directions refitted without each fold
                fisher = [heldout_fisher_along(boot_fm, p_idx, [
                    cv_direction(boot_fm, p_idx, objective="slow", fold=k)
                    for k in range(n_folds)])[0] for p_idx in ranked_idx]
            for ci, (p_idx, _) in enumerate(p_fits):
                held.append(scores[ci][0])
                held.append(fisher[ci])
                held.append(overlap[ci])
                for along in (boot_fm.lagged_test, boot_fm.within_test):
                    held.append(heldout_autocorrelation(boot_fm, p_idx, fold_ws[ci], along)
                                if has_lag else np.nan)
            return np.concatenate([hit, held])

        n_sel = min(n_bootstrap, SELECTION_REPLICATES)
        n_hit = n_terms_all + len(fits)
        sel = block_bootstrap(per_fold + t_groups, select, n_boot=n_sel, seed=seed + 1,
                              label="bootstrap refits")
        ok = np.isfinite(sel.replicates[:, :n_hit]).all(axis=1)
        freq = sel.replicates[ok, :n_hit].mean(axis=0) if ok.any() else np.full(n_hit, np.nan)
        # held-out score (a Fisher ratio >= 0 for 'separate', in [0, 1] for 'both', a VAMP-2
        # score less its constant part for 'slow', at most 1), Fisher ratio, overlap and two
        # autocorrelations per ranked CV
        score_lo, score_hi = {"separate": (0.0, np.inf), "both": (0.0, 1.0)}.get(
            search["objective"], (-np.inf, 1.0))
        low, high = hull_interval(
            sel.estimate[n_hit:], *percentile_interval(sel.replicates[ok, n_hit:]),
            bounds=(np.tile([score_lo, 0.0, 0.0, -1.0, -1.0], len(fits)),
                    np.tile([score_hi, np.inf, 1.0, 1.0, 1.0], len(fits))))
        pos = 0
        for i, c in enumerate(out["combos"]):
            keys = ("heldout_score_ci", "heldout_fisher_ratio_ci", "heldout_overlap_ci",
                    "heldout_autocorrelation_ci", "heldout_autocorrelation_within_states_ci")
            for j, key in enumerate(keys):
                c[key] = [_finite(low[len(keys) * i + j]), _finite(high[len(keys) * i + j])]
            if not has_lag:
                c["heldout_autocorrelation_ci"] = None
                c["heldout_autocorrelation_within_states_ci"] = None
            n = len(ranked_sets[i])
            c["selection"] = [_finite(v) for v in freq[pos:pos + n]]
            c["reproduced"] = _finite(freq[n_terms_all + i])
            pos += n
        out["n_selection"] = int(ok.sum())
    return out


def _ranked_slowness(objective, fm, lag_ps):
    """Which slowness the ranking's score used: ``'transitions'`` or ``'within_states'``
    (objective ``both``), ``'all_pairs'`` (``slow``: every lagged pair about one mean), or
    None (``separate``, or no lag)."""
    if lag_ps is None or objective == "separate":
        return None
    return "all_pairs" if objective == "slow" else fm.slowness


#: A CV whose Fisher ratio exceeds this barely moves within the states: its within-state
#: spread is below 1/2000 of the distance between two state means.
NEAR_FROZEN_FISHER = 1e6


def _rigid_cv_warnings(state_stats, j_all, heldout):
    """Warnings for a CV that is (nearly) constant within the states."""
    if not (j_all > NEAR_FROZEN_FISHER or np.max(heldout) > NEAR_FROZEN_FISHER):
        return []
    narrow = min(state_stats, key=lambda k: state_stats[k]["std"])
    return [f"the CV barely moves within the states (Fisher ratio {j_all:.3g}; spread in "
            f"state {narrow!r} {state_stats[narrow]['std']:.3g} CV units): its descriptors "
            "are (nearly) rigidly tied within each state, which points at repeated or "
            "constrained frames, and a bias along it would need kernels narrower than the "
            "data resolve; check the runs before using it"]


#: A ranked CV whose held-out Fisher ratio is below this many times
#: :func:`heldout_noise_level` gets a warning: the search keeps the best of thousands of
#: held-out scores, which lifts the best above the level of one fixed direction (our
#: choice: with two states drawn from one distribution, two or three runs per state, with
#: and without an offset of each run's own, the best came 3 to 34 times that level in 64
#: tests, 9 in 10 below 19; states whose mean moved by one spread of the fastest jitter
#: came 15 to 42 times, by two spreads 65 to 115; a rough screen, not a test: a null case
#: can pass it, and a weak real difference can be warned about).
NOISE_LEVEL_FACTOR = 20.0


def heldout_noise_level(fm, tau_frames, effective_fraction=None, *, per_fold=False):
    """The held-out Fisher ratio that noise alone gives a fixed direction, were the states
    one distribution.

    With state means ``m_k`` of ``n_k`` held-out frames of integrated time ``tau``
    (frames), each off the common mean by a noise of variance ``sigma^2 2 tau / n_k``
    (Sokal 1997, in *Functional Integration*, Plenum), the expected between-state variance
    ``sum_k p_k (m_k - m)^2`` (``m = sum_k p_k m_k``) is ``sigma^2 sum_k p_k (1 - p_k)
    2 tau / n_k`` (our algebra), so the ratio over ``sigma^2`` is that sum. The held-out
    score pools the folds, so ``n_k`` counts the state's frames in every fold (it counts
    the held-out states only in the order the training folds give them, which for such
    states is about half the time: its mean is below the level, 0.87 times it for two
    states in three folds, tests/test_pooled_heldout.py); with
    `per_fold`, the level of one fold's ratio on its own (``n_k`` that fold's frames),
    averaged over the folds. A reweighted state's ``n_k`` is its weight (the weights
    average 1 per frame) times the state's Kish fraction (effective over actual frames;
    Kish 1965, *Survey Sampling*, Wiley): a rough count when the weights are not spread
    evenly over the folds.

    Parameters
    ----------
    fm : cvdesign.search.FoldMoments
        Per state and fold moments (their counts are the held-out frames).
    tau_frames : float or array-like of shape (n_states,)
        The time a state's mean varies by, frames: its integrated time, times how much more
        its run means scatter than that allows
        (:func:`~cvdesign.pipeline.timing.scatter_factors`); one value for every state, or
        one per state.
    effective_fraction : array-like of shape (n_states,), default=None
        Per state, effective over actual frames (1 for a state of unweighted frames);
        None: 1 for every state.
    per_fold : bool, default=False
        The level of the folds' ratios each on its own (``heldout_fisher_ratio_folds``)
        instead of the pooled one.

    Returns
    -------
    float or None
        None when a fold has a state without frames.

    Examples
    --------
    >>> from cvdesign.search import FoldMoments
    >>> from cvdesign.stats.moments import Moments
    >>> rng = np.random.default_rng(0)
    >>> fm = FoldMoments([[Moments.from_data(rng.normal(0, 1, (1000, 1))) for _ in range(2)]
    ...                   for _ in range(2)])
    >>> heldout_noise_level(fm, 0.5)  # 2 (1/4) (2 x 0.5 / 2000) = 0.00025
    0.00025
    >>> heldout_noise_level(fm, 0.5, [1.0, 0.25])  # the second state: 500 effective frames
    0.000625
    >>> heldout_noise_level(fm, 0.5, per_fold=True)  # 1000 frames a fold
    0.0005
    """
    p = np.asarray(fm.priors, dtype=np.float64)
    tau_frames = np.broadcast_to(np.asarray(tau_frames, dtype=np.float64), p.shape)
    fraction = (np.ones_like(p) if effective_fraction is None
                else np.asarray(effective_fraction, dtype=np.float64))
    n = np.array([[fm.moments[s][k].count for s in range(fm.n_states)]
                  for k in range(fm.n_folds)], dtype=np.float64) * fraction
    if not (n > 0).all():
        return None
    if not per_fold:
        return float(np.sum(p * (1.0 - p) * 2.0 * tau_frames / n.sum(axis=0)))
    return float(np.mean([np.sum(p * (1.0 - p) * 2.0 * tau_frames / row) for row in n]))


def _noise_times(entry, fm, frame_ps, state_frames):
    """Per state, the time in frames its mean varies by (`state_frames`, or else the CV's
    ``integrated_time_ps``); None when a state's is unknown."""
    tau_ps = entry.get("integrated_time_ps")
    times = np.full(fm.n_states, tau_ps / frame_ps if tau_ps is not None and frame_ps
                    else np.nan)
    if state_frames is not None:  # a state without its own time keeps the CV's
        own = np.asarray(state_frames, dtype=np.float64)
        times = np.where(np.isfinite(own), own, times)
    return times if np.isfinite(times).all() else None


def add_noise_level(entry, fm, frame_ps, *, warn=True, state_frames=None,
                    effective_fraction=None):
    """``heldout_fisher_ratio_noise`` (:func:`heldout_noise_level`, from `state_frames`, per
    state the time in frames its mean varies by, or else the CV's ``integrated_time_ps``
    for every state, and `effective_fraction`, per state its Kish effective over actual
    frames when reweighted; None when a state's time is unknown) and, when
    `warn`, a warning when the held-out Fisher ratio is below :data:`NOISE_LEVEL_FACTOR`
    times it. Returns whether it warned."""
    times = _noise_times(entry, fm, frame_ps, state_frames)
    level = None if times is None else heldout_noise_level(fm, times, effective_fraction)
    entry["heldout_fisher_ratio_noise"] = level
    j = entry["heldout_fisher_ratio"]
    if not warn or level is None or not j < NOISE_LEVEL_FACTOR * level:
        return False
    reweighted = effective_fraction is not None and bool(
        (np.asarray(effective_fraction) < 1.0).any())
    entry["warnings"].append(
        f"its held-out Fisher ratio ({j:.3g}) is less than {NOISE_LEVEL_FACTOR:g} times "
        f"what noise alone gives a fixed direction with these runs ({level:.3g}, from the "
        f"CV's integrated times in the states, the scatter of their run means, and the "
        f"states' frames{', effective ones where reweighted' if reweighted else ''}): the "
        "states may not "
        "differ along it at all, since the search keeps the best of many held-out scores, "
        "which lifts the best above that level; give more or longer runs before trusting "
        "it")
    return True


def fold_noise_level(entry, fm, frame_ps, *, state_frames=None, effective_fraction=None):
    """:func:`heldout_noise_level` of the folds' ratios each on its own (``per_fold``),
    from the times :func:`add_noise_level` takes; None when a state's time is unknown."""
    times = _noise_times(entry, fm, frame_ps, state_frames)
    return None if times is None else heldout_noise_level(fm, times, effective_fraction,
                                                          per_fold=True)


#: A ranked CV whose held-out Fisher ratio within each fold (the mean of
#: ``heldout_fisher_ratio_folds``) exceeds its Fisher ratio on all frames by more than this
#: factor gets a warning (our choice: states whose runs agree gave ratios of 1.02-1.03 in
#: our tests, runs each at an offset of its own 1.3 to 5.5).
FOLD_SPREAD_FACTOR = 1.5


def add_fold_spread_warning(entry, fold_level=None, *, noise_warned=False):
    """Warn in `entry` when its held-out Fisher ratio within the folds (the mean of
    ``heldout_fisher_ratio_folds``) is more than :data:`FOLD_SPREAD_FACTOR` times
    ``fisher_ratio_all``; returns whether it warned.

    A fold's ratio on its own divides by the spread within that fold (one trajectory per
    state with whole-trajectory folds, one block with block folds); when a state's runs or
    blocks sit at different means along the CV (runs not equilibrated, sub-states they do
    not cross between), that spread is smaller than the state's over all its frames, and
    the folds' ratios exceed the one on all frames, which is the separation a bias along
    the CV meets. The held-out score pools the folds and so counts that spread; the
    warning says that the runs disagree along the CV. Noise lifts a fold's ratio more than
    the one on all frames (a fold has fewer frames): their mean less their own noise level
    (`fold_level`, :func:`fold_noise_level`; None: 0) is compared, and a CV that got the
    noise warning (`noise_warned`, from :func:`add_noise_level`), whose message asks for
    more runs already, gets no second one.

    Examples
    --------
    >>> e = {"heldout_fisher_ratio": 0.9, "heldout_fisher_ratio_folds": [4.1, 5.1],
    ...      "fisher_ratio_all": 0.84, "warnings": []}
    >>> add_fold_spread_warning(e), e["warnings"][0][:66]
    (True, 'within each held-out fold its Fisher ratio averages 4.6, 5.5 times')
    """
    folds, whole = entry.get("heldout_fisher_ratio_folds"), entry.get("fisher_ratio_all")
    held = entry.get("heldout_fisher_ratio")
    if not folds or held is None or whole is None or not whole > 0:
        return False
    within = float(np.mean(folds))
    # the folds' excess over their own noise level counts (not a gate on that level: it
    # is computed from the states' run-mean scatter, which the offsets this warning is
    # about lift)
    if noise_warned or not within - (fold_level or 0.0) > FOLD_SPREAD_FACTOR * whole:
        return False
    entry["warnings"].append(
        f"within each held-out fold its Fisher ratio averages {within:.3g}, "
        f"{within / whole:.2g} times its Fisher ratio on all frames ({whole:.3g}): a fold "
        "on its own divides by the spread within it (one trajectory, or one block, per "
        "state), and a state's runs or blocks sit at different means along this CV (runs "
        "not equilibrated, or sub-states they do not cross between), so over all its "
        "frames the state is spread wider; the held-out ratio pools the folds and counts "
        f"that ({held:.3g}), as a bias along the CV meets it; give longer runs, or check "
        "the runs of each state against each other")
    return True


def ranking_entry(rank, comb, fit, overlap, *, pool, screening, fm, priors, states, config,
                  lag_ps, boot):
    """The ranking's record of one combination: scores, terms, per-state statistics.

    Parameters
    ----------
    rank : int
        1 for the best.
    comb : cvdesign.search.Combination
    fit : Fit
    overlap : float
        Held-out overlap of the states along the CV.
    pool : Pool
    screening : Screening
    fm : FoldMoments
    priors : ndarray
    states : list of str
    config : SuggestConfig
    lag_ps : float or None
        Lag of the slowness scores (None: not measured).
    boot : dict or None
        From :func:`bootstrap_ranked`.

    Returns
    -------
    dict
    """
    gidx, idx, w, fold_w = fit.gidx, fit.idx, fit.w, fit.fold_w
    screened, groups, scr_feat = screening.screened, screening.groups, screening.features
    center, scale = screening.center, screening.scale
    pooled = fm.pooled()
    objective, method = config.objective, config.method
    # held-out separation (arithmetic Fisher ratio, the held-out folds pooled) along the
    # CV's own fold directions: for 'separate' and 'both' the discriminant refitted without
    # each fold, by the computation of the held-out score (with 'separate' the same
    # numbers, bit for bit); for 'slow' the TICA directions
    if objective == "slow":
        sep_mean, sep_se, sep = heldout_fisher_along(fm, idx, fold_w)
    else:
        sep_mean, sep_se, sep = heldout_scores(fm, [idx], objective="separate", method=method,
                                               shrinkage=config.shrinkage)[0]
    # held-out autocorrelation along the fold directions, the folds' pairs pooled (each
    # fold's about one common mean, and within the states: each state's pairs about its
    # own mean)
    rho = rho_in = None
    if fm.lagged is not None:
        rho = heldout_autocorrelation(fm, idx, fold_w, fm.lagged_test)
        rho_in = heldout_autocorrelation(fm, idx, fold_w, fm.within_test)
    mu, cov = state_arrays(pooled, idx)
    j_all = rayleigh_quotient(w, mu, cov, priors)
    rho_all = timescale = rho_in_all = timescale_in = None
    if fm.lagged is not None:
        rho_all = autocorrelation_along(w, fm.lagged_pooled(), idx)
        timescale = float(timescales_from_eigenvalues([rho_all], lag_ps)[0])
        rho_in_all = autocorrelation_along(w, fm.within_pooled(), idx)
        timescale_in = float(timescales_from_eigenvalues([rho_in_all], lag_ps)[0])
    terms, local = [], 0
    ci = boot["combos"][rank - 1] if boot is not None else None
    sel = ci.get("selection") if ci is not None else None
    for g in gidx:
        desc = pool.descriptors[screened[g]]
        for t, fi in zip(desc.transforms, groups[g]):
            gf = scr_feat[fi]
            term = {"descriptor": desc.id, "label": desc.label, "kind": desc.kind,
                    "atoms": list(desc.atoms), "transform": t,
                    "center": float(center[gf]), "scale": float(scale[gf]),
                    "weight": float(w[local])}
            if ci is not None:
                term["weight_ci"] = ci["weights_ci"][local]
            if sel is not None:
                term["selection_frequency"] = sel[gidx.index(g)]
            terms.append(term)
            local += 1
    state_stats = {}
    for s, m in enumerate(pooled):
        var = float(w @ m.covariance[np.ix_(idx, idx)] @ w)
        state_stats[states[s]] = {"mean": float(m.mean[idx] @ w),
                                         "std": math.sqrt(max(var, 0.0)),
                                         "n_frames": int(round(m.count))}
    entry = {
        "rank": rank, "spec": f"cv-{rank:02d}.json", "n_terms": comb.n_terms,
        "objective": objective, "method": "tica" if objective == "slow" else method,
        "heldout_score": comb.score, "heldout_score_se": comb.se,
        "heldout_score_folds": [float(v) for v in comb.fold_scores],
        "heldout_fisher_ratio": sep_mean, "heldout_fisher_ratio_se": sep_se,
        "heldout_fisher_ratio_folds": [float(v) for v in sep],
        "heldout_overlap": _finite(overlap), "fisher_ratio_all": _finite(j_all),
        "lag_ps": lag_ps,
        "heldout_autocorrelation": _finite(rho) if rho is not None else None,
        "autocorrelation_all": _finite(rho_all) if rho_all is not None else None,
        "timescale_ps": _finite(timescale) if timescale is not None else None,
        "heldout_autocorrelation_within_states": (_finite(rho_in) if rho_in is not None
                                                  else None),
        "autocorrelation_within_states": (_finite(rho_in_all) if rho_in_all is not None
                                          else None),
        "timescale_within_states_ps": _finite(timescale_in) if timescale_in is not None else None,
        "slowness_ranked_on": _ranked_slowness(objective, fm, lag_ps),
        "states": state_stats, "terms": terms,
        "warnings": _rigid_cv_warnings(state_stats, j_all, sep),
    }
    if ci is not None:
        entry["fisher_ratio_ci"] = ci["fisher_ratio_ci"]
        entry["autocorrelation_ci"] = ci["autocorrelation_ci"]
        entry["autocorrelation_within_states_ci"] = ci["autocorrelation_within_states_ci"]
        entry["bootstrap_refits_for_selection"] = boot.get("n_selection")
        entry["reproduced_in_refits"] = ci.get("reproduced")
        for key in ("heldout_score_ci", "heldout_fisher_ratio_ci", "heldout_overlap_ci",
                    "heldout_autocorrelation_ci", "heldout_autocorrelation_within_states_ci"):
            if ci.get(key) is not None:
                entry[key] = ci[key]
        # the implied timescale is monotonic in the autocorrelation
        for src, dst in (("autocorrelation_ci", "timescale_ci_ps"),
                         ("autocorrelation_within_states_ci", "timescale_within_states_ci_ps")):
            aci = ci.get(src)
            if aci and lag_ps and None not in aci:
                entry[dst] = [_finite(v) for v in
                              timescales_from_eigenvalues(np.clip(aci, -1.0, 1.0), lag_ps)]
    return entry
