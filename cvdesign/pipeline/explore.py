"""Unlabelled exploratory runs: find the slow coordinates, propose metastable states.

When no state labels are known, :func:`propose_states`

1. builds the candidate pool and screens it by each feature's normalized
   autocorrelation at the lag (within-trajectory: lagged pairs never span a
   file or a gap);
2. fits TICA (reversible estimate) on the screened features and reads the
   implied timescales; when every timescale is shorter than the lag the runs
   show no slow process at that lag, and it says so instead of inventing states;
3. projects every frame on the slow TICA coordinates (those slower than the
   lag, at most three, in kinetic-map scaling) and clusters the projections
   with k-means (scikit-learn) for every number of states between 2 and
   ``max_states`` (or the given one), scoring each clustering by its mean
   silhouette (Rousseeuw 1987) -- the silhouette rewards compact,
   well-separated groups, as metastable states are, where a likelihood
   criterion would split one non-Gaussian basin into several;
4. checks that the proposed states are *metastable*, from the runs
   themselves (:func:`state_kinetics`): the lag-time transition counts between
   the states (pairs of frames one lag apart, within runs only), each state's
   probability of staying over the lag, the transitions the runs contain, and
   how fast runs forget where they are *inside* a state compared with how fast
   they forget the state (see :data:`MIN_MEMORY`, :data:`MIN_SEPARATION`);
5. chooses the number of states: the fewest states that are all metastable,
   among the clusterings whose silhouette is within :data:`SILHOUETTE_TIE` of
   the best such clustering; when no clustering has only metastable states,
   the one with the largest fraction of metastable states (then the best
   silhouette), with a warning naming each state that is not metastable; when
   no clustering has a metastable state, it refuses, naming the transition
   counts and staying probabilities it found;
6. reports each proposed state's population, staying probability and a
   representative frame.

The proposed labels then feed the labelled pipeline
(:func:`cvdesign.pipeline.suggest`) through :meth:`Exploration.labelled_source`.
"""

import math
from dataclasses import dataclass, field

import numpy as np
from sklearn.cluster import KMeans
from sklearn.metrics import silhouette_score
from threadpoolctl import threadpool_limits  # installed with scikit-learn

from ..errors import InputError
from ..fit import TICA
from ..io.source import Source
from ..pool import build_pool
from ..search import standardize_lagged
from ..stats.moments import (DiagonalLaggedMoments, DiagonalMoments, LagAccumulator,
                             LaggedMoments, merge_all)
from .timing import lag_frames as _lag_frames
from .timing import read_timesteps

__all__ = ["propose_states", "state_kinetics", "Exploration", "StateKinetics",
           "MIN_SILHOUETTE", "MIN_MEMORY", "MIN_SEPARATION", "SILHOUETTE_TIE"]

#: Smallest mean silhouette accepted as metastable structure. Kaufman and Rousseeuw
#: (*Finding Groups in Data*, 1990) read 0.51-0.70 as "a reasonable structure" and
#: below 0.5 as weak or artificial (from memory).
MIN_SILHOUETTE = 0.5

#: Smallest *memory* of a metastable state at the lag. A state of population ``pi``
#: visited with no memory (frames drawn independently) is still occupied one lag
#: later with probability ``pi``; its memory ``(p_stay - pi) / (1 - pi)`` is the
#: excess of the staying probability ``p_stay`` over that, as a fraction of the
#: largest possible excess, and equals the autocorrelation at the lag of the
#: indicator "in this state" (for a two-state Markov chain it is the second
#: eigenvalue ``1 - a - b`` of the transition matrix; Norris, *Markov Chains*, 1997).
#: 0.5 asks the staying probability to lie at least halfway between ``pi`` and 1, so
#: the state is remembered for longer than the lag (-lag / ln 0.5 = 1.44 lags): our
#: choice of margin.
MIN_MEMORY = 0.5

#: Smallest separation of timescales of a metastable state: the time over which runs
#: remember the state (-lag / ln memory) divided by the time over which they forget
#: where they are inside it (-lag / ln r, with r the autocorrelation at the lag of the
#: slow coordinates over pairs of frames both in the state). A metastable state is
#: left rarely and relaxes quickly inside (Schuette and Sarich, *Metastability and
#: Markov State Models in Molecular Dynamics*, AMS 2013; from memory); along a random
#: walk cut into pieces both happen on the same timescale (a ratio of a few at
#: most). A factor of ten is the usual order-of-magnitude separation (common
#: practice).
MIN_SEPARATION = 10.0

#: Mean silhouettes closer than this count as equally good when choosing the number
#: of states, and the fewest states win (our choice: about the spread of the
#: silhouette between subsamples of a few thousand frames).
SILHOUETTE_TIE = 0.05


@dataclass
class StateKinetics:
    """Lag-time transition statistics of states along runs.

    Attributes
    ----------
    states : list of str
        State names, in the order of every per-state array.
    lag_ps : float or None
        Lag time, ps.
    counts : ndarray of shape (n_states, n_states), dtype int
        Lag-time transition counts: ``counts[i, j]`` pairs of frames one lag
        apart in one run, the first in state ``i`` and the second in ``j``.
    staying : ndarray of shape (n_states,)
        Probability of being in the same state one lag later,
        ``counts[i, i] / counts[i].sum()`` (NaN when no pair starts in it).
    populations : ndarray of shape (n_states,)
        Fraction of the frames in each state.
    memory : ndarray of shape (n_states,)
        ``(staying - population) / (1 - population)``: 0 with no memory, 1
        when the state is never left (see :data:`MIN_MEMORY`).
    within : ndarray of shape (n_states,)
        Autocorrelation at the lag of the slow coordinates over pairs of frames
        both in the state, each pair about the state's mean (reversible
        estimate, the trace of the lagged over the instantaneous covariance);
        NaN when not computed.
    separation : ndarray of shape (n_states,)
        ``ln(within) / ln(memory)``: the state's memory time over its internal
        relaxation time (inf when the inside is forgotten within the lag; see
        :data:`MIN_SEPARATION`). For a state that is never left (no exit) the
        memory time is not measured, only known to exceed the time the runs
        spend in it: the separation is then at most ``lags_in_state *
        -ln(within)`` (time in the state over the relaxation time inside).
    lags_in_state : ndarray of shape (n_states,)
        Time the runs spend in each state, in lags (frames over each run's lag
        in frames).
    exits, entries : ndarray of shape (n_states,), dtype int
        Transitions out of and into each state: changes of state between
        successive visits of a run that last at least the lag (shorter visits,
        such as a flicker across a boundary or a quick recrossing, are not
        counted as leaving).
    n_transitions : int
        All such transitions in the runs.
    metastable : ndarray of shape (n_states,), dtype bool
    reasons : list of str
        Per state, why it is not metastable ('' when it is).

    Examples
    --------
    >>> k = state_kinetics([(np.array([0] * 5 + [1] * 5), 1, None)], ["A", "B"], lag_ps=2.0)
    >>> k.as_dict()["per_state"]["A"]["staying_probability"], k.counts_text()
    (0.8, 'A -> A 4, B 1; B -> A 0, B 4')
    >>> round(k.memory_time_ps(0), 2)  # memory 0.6: -2 ps / ln 0.6
    3.92
    """

    states: list
    lag_ps: float
    counts: np.ndarray
    staying: np.ndarray
    populations: np.ndarray
    memory: np.ndarray
    within: np.ndarray
    separation: np.ndarray
    exits: np.ndarray
    entries: np.ndarray
    n_transitions: int
    metastable: np.ndarray
    reasons: list
    lags_in_state: np.ndarray = None

    def memory_time_ps(self, i):
        """Time over which runs remember state `i`, ``-lag / ln(memory)`` ps (inf if never
        left: then it is only known to exceed :meth:`time_in_state_ps`)."""
        return _timescale(self.memory[i], self.lag_ps)

    def time_in_state_ps(self, i):
        """Time the runs spend in state `i`, ps (in lags when `lag_ps` is None)."""
        lags = math.nan if self.lags_in_state is None else float(self.lags_in_state[i])
        return lags * (1.0 if self.lag_ps is None else self.lag_ps)

    def within_time_ps(self, i):
        """Relaxation time inside state `i`, ``-lag / ln(within)`` ps (0 when below the lag's reach)."""
        return _timescale(self.within[i], self.lag_ps)

    def as_dict(self):
        """JSON-ready dictionary (lists, floats; NaN as None, inf as the string 'inf')."""
        def num(v):
            v = float(v)
            return None if math.isnan(v) else ("inf" if math.isinf(v) else v)

        return {"states": list(self.states), "lag_ps": self.lag_ps,
                "counts": self.counts.tolist(), "n_transitions": int(self.n_transitions),
                "per_state": {s: {"staying_probability": num(self.staying[i]),
                                  "population": num(self.populations[i]),
                                  "memory": num(self.memory[i]),
                                  "within_autocorrelation": num(self.within[i]),
                                  "separation": num(self.separation[i]),
                                  "time_in_state_ps": num(self.time_in_state_ps(i)),
                                  "exits": int(self.exits[i]), "entries": int(self.entries[i]),
                                  "metastable": bool(self.metastable[i]),
                                  "reason": self.reasons[i]}
                              for i, s in enumerate(self.states)}}

    def counts_text(self):
        """The transition counts as one line of text (rows from, columns to)."""
        return ("; ".join(f"{s} -> " + ", ".join(f"{t} {int(c)}" for t, c in
                                               zip(self.states, self.counts[i]))
                          for i, s in enumerate(self.states)))


def _timescale(value, lag_ps):
    lag = 1.0 if lag_ps is None else lag_ps
    if not value < 1:
        return math.inf if value >= 1 else math.nan
    if not value > 0:
        return 0.0
    return -lag / math.log(value)


def state_kinetics(runs, states, *, lag_ps=None, positions=True):
    """Lag-time transition counts, staying probabilities and metastability of states.

    Parameters
    ----------
    runs : iterable of tuple
        One ``(labels, lag_frames, y)`` per stretch of consecutive frames of a
        run: ``labels`` an int array of shape (n,) of state indices into
        `states` (-1: no state), ``lag_frames`` the lag in frames of that run,
        ``y`` an array of shape (n, d) of the coordinates the states were found
        in (or None). Pairs of frames are taken within a stretch only, never
        across files or gaps.
    states : list of str
        State names.
    lag_ps : float, default=None
        Lag time in ps, for the messages and timescales.
    positions : bool, default=True
        Compute the within-state autocorrelation from the ``y`` of the runs
        (False, or all ``y`` None: it is NaN and the separation test is skipped).

    Returns
    -------
    StateKinetics
        A state is metastable when (1) at least one transition into or out of
        it is seen in the runs (without one the data cannot tell a metastable
        state from a run that has not had time to move away), (2) its memory
        reaches :data:`MIN_MEMORY` and (3) its separation of timescales
        reaches :data:`MIN_SEPARATION` (when computed).

    Examples
    --------
    A run that stays four frames in A, then four in B (lag 1 frame):

    >>> k = state_kinetics([(np.array([0, 0, 0, 0, 1, 1, 1, 1]), 1, None)], ["A", "B"])
    >>> k.counts.tolist(), k.staying.round(3).tolist(), int(k.n_transitions)
    ([[3, 1], [0, 3]], [0.75, 1.0], 1)
    >>> k.memory.tolist(), k.metastable.tolist()
    ([0.5, 1.0], [True, True])
    """
    n = len(states)
    counts = np.zeros((n, n), dtype=np.int64)
    frames = np.zeros(n, dtype=np.int64)
    lags_in_state = np.zeros(n)
    exits = np.zeros(n, dtype=np.int64)
    entries = np.zeros(n, dtype=np.int64)
    inside = {}
    for labels, lag, y in runs:
        labels = np.asarray(labels, dtype=np.intp)
        known = labels >= 0
        lag = int(lag)
        in_run = np.bincount(labels[known], minlength=n)
        frames += in_run
        lags_in_state += in_run / max(lag, 1)
        # visits: maximal stretches in one state; only those lasting at least the lag
        # count, so a flicker across a boundary (or a quick recrossing) is no transition
        starts = np.r_[0, np.flatnonzero(labels[1:] != labels[:-1]) + 1] if labels.size else \
            np.zeros(0, dtype=np.intp)
        lengths = np.diff(np.r_[starts, labels.size])
        visits = labels[starts][(lengths >= lag) & (labels[starts] >= 0)]
        change = visits[1:] != visits[:-1]
        exits += np.bincount(visits[:-1][change], minlength=n)
        entries += np.bincount(visits[1:][change], minlength=n)
        if labels.size <= lag:
            continue
        a, b = labels[:-lag], labels[lag:]
        ok = (a >= 0) & (b >= 0)
        counts += np.bincount(a[ok] * n + b[ok], minlength=n * n).reshape(n, n)
        if positions and y is not None:
            y = np.asarray(y, dtype=np.float64).reshape(labels.size, -1)
            for i in np.unique(a[ok & (a == b)]):
                rows = np.flatnonzero((a == i) & (b == i))
                m = inside.get(int(i))
                if m is None:
                    m = inside[int(i)] = LaggedMoments(y.shape[1], shift=y[rows[0]].copy())
                m.add_pairs(y[rows], y[rows + lag])
    total = frames.sum()
    pops = frames / total if total else np.full(n, np.nan)
    out_pairs = counts.sum(axis=1)
    with np.errstate(invalid="ignore", divide="ignore"):
        staying = np.where(out_pairs > 0, np.diag(counts) / np.maximum(out_pairs, 1), np.nan)
        memory = np.where(pops < 1, (staying - pops) / np.where(pops < 1, 1 - pops, 1), np.nan)
    within = np.full(n, np.nan)
    for i, m in inside.items():
        _, c0, ct = m.covariances(reversible=True)
        v = float(np.trace(c0))
        within[i] = float(np.trace(ct)) / v if v > 0 else 0.0
    separation = np.full(n, np.nan)
    residence_bound = np.full(n, np.nan)
    for i in range(n):
        if np.isnan(within[i]) or np.isnan(memory[i]):
            continue
        if memory[i] >= 1 or within[i] <= 0:
            separation[i] = math.inf   # never left, or the inside forgotten within the lag
        elif memory[i] <= 0 or within[i] >= 1:
            separation[i] = 0.0
        else:
            separation[i] = math.log(within[i]) / math.log(memory[i])
        if exits[i] == 0 and within[i] > 0:
            # never left (no visit lasting the lag ends in another state): the memory time
            # is not measured, only known to exceed the time spent in the state, which then
            # bounds the separation (a random walk that drifts into a region and stays
            # there for the rest of a short run is not shown to be metastable)
            residence_bound[i] = lags_in_state[i] * -math.log(within[i]) if within[i] < 1 \
                else 0.0
            separation[i] = min(separation[i], residence_bound[i])
    lag_txt = "the lag" if lag_ps is None else f"{lag_ps:g} ps"
    metastable = np.zeros(n, dtype=bool)
    reasons = []
    for i in range(n):
        why = []
        if exits[i] + entries[i] == 0:
            why.append("no transition into or out of it in the runs: every run that visits it "
                       "stays in it, so these data cannot tell a metastable state from runs "
                       "that had no time to move away")
        if np.isnan(staying[i]):
            why.append(f"no pair of frames {lag_txt} apart starts in it")
        elif not memory[i] >= MIN_MEMORY:
            why.append(f"it is still occupied {lag_txt} later with probability only "
                       f"{staying[i]:.2f}, close to the {pops[i]:.2f} of a state of its "
                       f"population with no memory (memory {memory[i]:.2f} < {MIN_MEMORY})")
        if not np.isnan(staying[i]) and entries[i] > 0 and memory[i] >= MIN_MEMORY \
                and residence_bound[i] < MIN_SEPARATION:
            why.append(f"it is never left in the runs, which spend only "
                       f"{lags_in_state[i] * (1.0 if lag_ps is None else lag_ps):.3g} "
                       f"{'lags' if lag_ps is None else 'ps'} in it, {residence_bound[i]:.1f} times "
                       f"its relaxation time inside (autocorrelation inside it "
                       f"{within[i]:.2f} at {lag_txt}): too short to show that it is left "
                       f"at least {MIN_SEPARATION:g} times more slowly than it relaxes inside; "
                       "it may be a piece of a random walk, not a metastable state")
        elif not np.isnan(separation[i]) and not np.isnan(staying[i]) \
                and memory[i] >= MIN_MEMORY and separation[i] < MIN_SEPARATION:
            why.append(f"runs forget where they are inside it only {separation[i]:.1f} times "
                       f"faster than they forget the state (autocorrelation inside it "
                       f"{within[i]:.2f} at {lag_txt}; a metastable state relaxes inside at "
                       f"least {MIN_SEPARATION:g} times faster than it is left): it looks like "
                       "a piece of a random walk, not a metastable state")
        metastable[i] = not why
        reasons.append("; ".join(why))
    return StateKinetics(states=list(states), lag_ps=lag_ps, counts=counts, staying=staying,
                         populations=pops, memory=memory, within=within,
                         separation=separation, exits=exits, entries=entries,
                         n_transitions=int(exits.sum()), metastable=metastable,
                         reasons=reasons, lags_in_state=lags_in_state)


@dataclass
class Exploration:
    """Proposed metastable states of unlabelled runs.

    Attributes
    ----------
    states : list of str
        Names of the proposed states, ``S1``, ``S2``, ... ordered along the
        slowest TICA coordinate.
    labels : dict of str to ndarray
        Per run file, the state name of every frame (object array).
    populations : dict of str to float
        Fraction of all frames in each state.
    representatives : dict of str to dict
        Per state, ``{"file", "frame"}`` of the frame nearest to the state's
        centre in the slow coordinates.
    timescales_ps : list of float
        Implied timescales of the TICA components, slowest first, ps.
    lag_ps : float
    n_slow : int
        Slow coordinates used for clustering.
    criterion : dict
        ``{"name": "silhouette" or "given", "values": {n_states: mean silhouette},
        "all_metastable": {n_states: bool}, "rule": str}``: how the number of
        states was chosen.
    notes : list of str
    longest_run_ps : float or None
    kinetics : StateKinetics
        Lag-time transition counts, staying probabilities and the metastability
        verdict of each proposed state.
    warnings : list of str
        One per proposed state that is not metastable (each says "not
        metastable" and why); also written to summary.md and printed by the
        command line.
    """

    states: list
    labels: dict
    populations: dict
    representatives: dict
    timescales_ps: list
    lag_ps: float
    n_slow: int
    criterion: dict
    notes: list = field(default_factory=list)
    longest_run_ps: float = None
    kinetics: StateKinetics = None
    warnings: list = field(default_factory=list)

    def labelled_source(self, topology, *, chunk_size=500, timestep=None):
        """A :class:`~cvdesign.io.source.Source` of the runs with the proposed labels."""
        src = Source(topology, chunk_size=chunk_size, timestep=timestep)
        for path, labels in self.labels.items():
            src.add_labelled(path, labels)
        # keep the proposed order S1, S2, ... whatever the order of first appearance
        src.states = [s for s in self.states if s in src.states]
        return src

    def states_csv(self):
        """Per-frame proposed states as CSV text (file, frame, state)."""
        lines = ["file,frame,state"]
        names = [str(p).replace("\\", "/").rsplit("/", 1)[-1] for p in self.labels]
        unique = len(set(names)) == len(names)
        for (path, labels), name in zip(self.labels.items(), names):
            shown = name if unique else str(path)
            lines.extend(f"{shown},{i},{s}" for i, s in enumerate(labels))
        return "\n".join(lines) + "\n"

    def summary_lines(self):
        """Markdown lines describing the proposed states."""
        crit = self.criterion
        out = ["## Proposed states (unlabelled runs)", "",
               f"TICA at lag {self.lag_ps:g} ps; implied timescales (ps): "
               + ", ".join(_fmt_ts(t) if self.longest_run_ps is None or t < self.longest_run_ps
                           else f"> {self.longest_run_ps:.3g} (not resolved by these runs)"
                           for t in self.timescales_ps[:6])
               + f". Clustered in the {self.n_slow} slowest coordinate(s) (kinetic map) with "
               "k-means. Number of states: "
               + ("given." if crit["name"] == "given" else
                  f"{crit.get('rule', 'the largest mean silhouette')} (mean silhouette by "
                  "number of states: " + ", ".join(
                      f"{k}: {v:.3f}" + ("" if crit.get("all_metastable", {}).get(k, True)
                                         else " (not all metastable)")
                      for k, v in crit["values"].items()) + ")."), ""]
        kin = self.kinetics
        if kin is None:
            out += ["| state | population | representative frame |", "| --- | ---: | --- |"]
            for s in self.states:
                r = self.representatives[s]
                out.append(f"| {s} | {self.populations[s]:.3f} | {r['file']} frame "
                           f"{r['frame']} |")
            return out + [""] + [f"- {n}" for n in self.notes] + [""]
        out += [f"Metastability at the lag ({self.lag_ps:g} ps), from the runs: a state is "
                "metastable when at least one transition into or out of it is seen, its "
                "staying probability over the lag lies at least halfway between its "
                f"population (no memory) and 1 (memory >= {MIN_MEMORY}), and runs forget "
                f"where they are inside it at least {MIN_SEPARATION:g} times faster than they "
                "forget the state (memory time over the relaxation time inside it, both "
                "-lag/ln of the autocorrelation at the lag). Lagged pairs never span a file "
                f"or a gap. The runs contain {kin.n_transitions} transitions (changes of state "
                "between visits lasting at least the lag).", "",
                "| state | population | staying probability | memory | memory time (ps) | "
                "relaxation inside (ps) | transitions out / in | metastable | "
                "representative frame |",
                "| --- | ---: | ---: | ---: | ---: | ---: | ---: | --- | --- |"]
        for i, s in enumerate(self.states):
            r = self.representatives[s]
            out.append(f"| {s} | {self.populations[s]:.3f} | {_fmt(kin.staying[i], '.3f')} | "
                       f"{_fmt(kin.memory[i], '.3f')} | {self._memory_time(kin, i)} | "
                       f"{self._time(kin.within_time_ps(i))} | {kin.exits[i]} / "
                       f"{kin.entries[i]} | {'yes' if kin.metastable[i] else 'NO'} | "
                       f"{r['file']} frame {r['frame']} |")
        out += ["", f"Lag-time transition counts (pairs of frames {self.lag_ps:g} ps apart, "
                "from row to column):", "",
                "| from / to | " + " | ".join(self.states) + " |",
                "| --- |" + " ---: |" * len(self.states)]
        out += [f"| {s} | " + " | ".join(str(int(c)) for c in kin.counts[i]) + " |"
                for i, s in enumerate(self.states)]
        out += [""] + [f"- **warning**: {w}" for w in self.warnings]
        return out + [f"- {n}" for n in self.notes] + [""]


    def _memory_time(self, kin, i):
        """The memory time of state `i` for the summary: for a state never left, only the
        lower bound set by the time the runs spend in it."""
        t = kin.memory_time_ps(i)
        if kin.exits[i] == 0 and not math.isnan(kin.time_in_state_ps(i)):
            return f"> {kin.time_in_state_ps(i):.3g} (never left)"
        return self._time(t)

    def _time(self, t):
        """A timescale in ps for the summary; below the lag it is not resolved."""
        return f"< {self.lag_ps:g}" if t < self.lag_ps else _fmt_ts(t)


def _fmt(v, spec):
    return "nan" if v is None or math.isnan(v) else format(v, spec)


def _fmt_ts(t):
    return "inf" if math.isinf(t) else ("nan" if math.isnan(t) else f"{t:.3g}")


def propose_states(source, *, lag, n_states=None, max_states=6, selection=None,
                   kinds=("distance", "angle", "dihedral"), cutoff=1.0, prefilter_stride=10,
                   coordination_r0=0.45, screen_size=200, max_slow=3, seed=0, progress=None):
    """Propose metastable states of unlabelled runs from their slow coordinates.

    Parameters
    ----------
    source : cvdesign.io.source.Source
        The runs, all under one state name (labels are ignored).
    lag : float
        Lag time, ps.
    n_states : int, default=None
        Number of states; None chooses it between 2 and `max_states`: the
        fewest states that are all metastable, among the clusterings whose mean
        silhouette is within :data:`SILHOUETTE_TIE` of the best such one (see
        the module docstring for the fallback when no clustering qualifies).
    max_states : int, default=6
    selection, kinds, cutoff, prefilter_stride, coordination_r0
        As in :func:`cvdesign.pipeline.suggest`.
    screen_size : int, default=200
        Features (most autocorrelated first) entering TICA.
    max_slow : int, default=3
        Largest number of slow coordinates clustered.
    seed : int, default=0
        Seed of the k-means initializations.
    progress : callable, default=None

    Returns
    -------
    Exploration

    Raises
    ------
    InputError
        When the runs show no slow process at the lag, when no proposed state
        is metastable (the message gives the transition counts and staying
        probabilities), or for bad input.

    Examples
    --------
    Exploratory runs that cross between their states (runs that each stay in
    one state, as the bundled demo runs do, are refused: nothing in them shows
    the states are metastable; give those with ``--state``)::

        from cvdesign import Source
        from cvdesign.pipeline.explore import propose_states
        src = Source("protein.pdb")
        for f in ["run1.xtc", "run2.xtc", "run3.xtc"]:
            src.add(f, "runs")
        exploration = propose_states(src, lag=20.0)
        print(exploration.populations, exploration.kinetics.staying, exploration.warnings)
    """
    if not (isinstance(lag, (int, float)) and math.isfinite(lag) and lag > 0):
        raise InputError(f"lag={lag!r} must be a positive time in ps (give --lag PS)")
    if n_states is not None and (not isinstance(n_states, int) or n_states < 2):
        raise InputError(f"n_states={n_states!r} must be an integer of at least 2")
    note = progress or (lambda msg: None)
    timesteps = read_timesteps(source)
    lag_frames = _lag_frames(source, lag, timesteps)
    note("building the candidate pool")
    pool = build_pool(source, selection=selection, kinds=kinds, cutoff=cutoff,
                      stride=prefilter_stride, coordination_r0=coordination_r0)
    atoms = pool.atom_indices()
    n_feat = pool.n_features
    chunk = _chunk_frames(source, n_feat)
    note(f"pool: {len(pool)} descriptors; screening by autocorrelation at {lag:g} ps")

    # pass 1: variances and lag-autocorrelation of every feature
    diag = DiagonalMoments(n_feat)
    lag1 = None
    for c in source.iter_chunks(atom_indices=atoms, chunk_size=chunk):
        x = pool.features(c.trajectory, atom_indices=atoms)
        if lag1 is None:
            lag1 = _Series(n_feat, x[0].copy(), diagonal=True)
        diag = diag.merge(DiagonalMoments.from_data(x))
        lag1.feed(c.segment_index, c.frames, x, lag_frames[c.segment_index])
    if lag1 is None or lag1.moments().count == 0:
        raise InputError(f"no lagged pairs at lag {lag:g} ps: every run is shorter than the "
                         "lag; choose a shorter --lag")
    rho = np.nan_to_num(lag1.moments().autocorrelation(), nan=0.0)
    center, scale = diag.mean, np.sqrt(diag.variance)
    constant = ~(scale > 1e-12 * (1.0 + np.abs(center)))
    rho[constant] = 0.0
    scale[constant] = 1.0
    order = sorted(range(n_feat), key=lambda j: (-rho[j], j))
    feats = np.array(sorted(j for j in order[:screen_size] if rho[j] > 0), dtype=np.intp)
    if feats.size == 0:
        raise InputError(f"no feature is correlated across the lag of {lag:g} ps; the runs show "
                         "no slow process at this lag: choose a shorter --lag or longer runs")

    # pass 2: full lagged moments of the screened features -> TICA
    lag2 = _Series(feats.size, center[feats], diagonal=False)
    for c in source.iter_chunks(atom_indices=atoms, chunk_size=chunk):
        x = pool.features(c.trajectory, atom_indices=atoms)[:, feats]
        lag2.feed(c.segment_index, c.frames, x, lag_frames[c.segment_index])
    lagged = standardize_lagged(lag2.moments(), center[feats], scale[feats])
    tica = TICA.from_moments(lagged, lag=1, rcond=1e-6)
    ts_ps = (tica.timescales_ * lag).tolist()  # from_moments used lag=1 (one lag unit)
    notes = [f"TICA on the {feats.size} most autocorrelated features "
             f"({tica.n_dropped_} near-singular directions dropped, eigenvalue below 1e-6 of "
             "the largest)"]
    slow = [i for i, t in enumerate(ts_ps) if (math.isinf(t) or t > lag)]
    if not slow:
        raise InputError(
            f"the runs show no slow process at lag {lag:g} ps: every implied timescale "
            f"({', '.join(_fmt_ts(t) for t in ts_ps[:5])} ps) is shorter than the lag, so "
            "nothing stays correlated long enough to tell metastable states apart. Use a "
            "shorter --lag, longer runs, or give the states yourself with --state")
    n_slow = min(max_slow, len(slow))
    comps = tica.eigenvectors_[:, :n_slow]

    # pass 3: project every frame on the slow coordinates
    proj, frames_of = {}, {}
    for c in source.iter_chunks(atom_indices=atoms, chunk_size=chunk):
        x = pool.features(c.trajectory, atom_indices=atoms)[:, feats]
        z = ((x - center[feats]) / scale[feats] - tica.mean_) @ comps
        proj.setdefault(c.segment_index, []).append(z)
        frames_of.setdefault(c.segment_index, []).append(c.frames)
    keys = sorted(proj)
    frames_of = {k: np.concatenate(frames_of[k]) for k in keys}
    # kinetic-map scaling (Noé and Clementi 2015): each slow coordinate weighted by its
    # eigenvalue, so barely-slow ones count less in the clustering
    y = np.concatenate([np.concatenate(proj[k]) for k in keys]) * tica.eigenvalues_[:n_slow]
    # the clustering sees at most 20,000 evenly spaced frames (deterministic), the
    # silhouette at most 4,000 of those
    fit_y = y[::max(1, y.shape[0] // 20000)]
    sil_y = fit_y[::max(1, fit_y.shape[0] // 4000)]
    # stretches of consecutive frames of each run: lagged pairs never span a file or a gap
    stretches, pos = [], 0
    for key in keys:
        fr = frames_of[key]
        cuts = np.flatnonzero(np.diff(fr) != 1) + 1
        for lo, hi in zip(np.r_[0, cuts], np.r_[cuts, fr.size]):
            stretches.append((pos + lo, pos + hi, lag_frames[key]))
        pos += fr.size

    def cluster(k):
        # one thread: k-means sums depend on how the frames are split between threads, so
        # this keeps the result the same on every machine (and on at most 20,000 frames of
        # at most three coordinates it is also faster than waiting for busy cores)
        with threadpool_limits(limits=1):
            km = KMeans(n_clusters=k, n_init=10, random_state=seed).fit(fit_y)
        # name states S1, S2, ... along the slowest coordinate
        order_c = np.argsort(km.cluster_centers_[:, 0], kind="stable")
        rename = np.empty(k, dtype=np.intp)
        rename[order_c] = np.arange(k)
        lab = rename[km.predict(y)]
        used = sorted(set(lab.tolist()))
        # kinetics over the used states only (k-means may leave a cluster empty)
        code = np.full(k, -1, dtype=np.intp)
        code[used] = np.arange(len(used))
        kin = state_kinetics(((code[lab[a:b]], n, y[a:b]) for a, b, n in stretches),
                             [f"S{i + 1}" for i in used], lag_ps=float(lag))
        return {"k": k, "labels": lab, "used": used, "means": km.cluster_centers_[order_c],
                "kinetics": kin, "model": km}

    if n_states is None:
        scores, fits = {}, {}
        for k in range(2, max_states + 1):
            if sil_y.shape[0] <= k:
                break
            fit = cluster(k)
            labels_k = fit["model"].predict(sil_y)
            if len(set(labels_k.tolist())) < 2:
                continue
            with threadpool_limits(limits=1):
                scores[k] = float(silhouette_score(sil_y, labels_k))
            fits[k] = fit
        if not scores:
            raise InputError("too few distinct frames to propose states; give longer runs")
        best = max(scores, key=lambda k: (scores[k], -k))
        if scores[best] < MIN_SILHOUETTE:
            raise InputError(
                f"no metastable structure found: the best clustering of the slow coordinates "
                f"({best} groups) has a mean silhouette of only {scores[best]:.2f}, below "
                f"{MIN_SILHOUETTE} (below that, groups are not clearly separated; Kaufman and "
                "Rousseeuw 1990). The runs may sample a single state at this lag; give the "
                "states with --state, or use longer runs")
        all_meta = {k: bool(fits[k]["kinetics"].metastable.all()) for k in scores}
        good = [k for k in scores if all_meta[k] and scores[k] >= MIN_SILHOUETTE]
        if good:
            top = max(scores[k] for k in good)
            chosen = min(k for k in good if scores[k] >= top - SILHOUETTE_TIE)
            rule = (f"the fewest states that are all metastable, among the clusterings whose "
                    f"mean silhouette is within {SILHOUETTE_TIE} of the best such one")
        else:
            frac = {k: float(fits[k]["kinetics"].metastable.mean()) for k in scores
                    if scores[k] >= MIN_SILHOUETTE}
            chosen = max(frac, key=lambda k: (frac[k], scores[k], -k))
            if frac[chosen] == 0:
                chosen = best  # none metastable anywhere: refused below, with these numbers
            rule = ("no clustering has only metastable states, so the one with the largest "
                    "fraction of metastable states (then the largest mean silhouette)")
        fit = fits[chosen]
        criterion = {"name": "silhouette", "values": scores, "all_metastable": all_meta,
                     "rule": rule}
    else:
        fit = cluster(n_states)
        criterion = {"name": "given", "values": {},
                     "all_metastable": {n_states: bool(fit["kinetics"].metastable.all())},
                     "rule": "given"}
    k, lab, used, means = fit["k"], fit["labels"], fit["used"], fit["means"]
    kin = fit["kinetics"]
    names = [f"S{i + 1}" for i in range(k)]
    if len(used) < 2:
        raise InputError("the clustering put every frame into one state; the runs may sample "
                         "a single metastable state at this lag. Give the states with --state")
    states = [names[i] for i in used]
    if not kin.metastable.any():
        raise InputError(
            f"none of the {len(states)} proposed states is metastable at lag {lag:g} ps: "
            + "; ".join(f"{s} (population {kin.populations[i]:.2f}, stays {lag:g} ps with "
                        f"probability {kin.staying[i]:.2f}): {kin.reasons[i]}"
                        for i, s in enumerate(states))
            + f". The runs contain {kin.n_transitions} transitions between these states; "
            f"lag-time transition counts: {kin.counts_text()}. Use longer runs (that cross "
            "between the states), try another --lag, or give the states yourself with --state "
            "NAME FILE ... (for instance when each run was started in a known state)")
    warnings = [f"state {s} is not metastable at lag {lag:g} ps: {kin.reasons[i]}; treat it "
                "with caution (longer runs or another --lag may settle it)"
                for i, s in enumerate(states) if not kin.metastable[i]]
    note(f"{len(states)} states proposed; staying probabilities at {lag:g} ps: "
         + ", ".join(f"{s} {kin.staying[i]:.3f}" for i, s in enumerate(states)))
    labels, reps, best_d, pos = {}, {}, {}, 0
    for key in keys:
        fr = frames_of[key]
        n = fr.size
        seg = source.segments[key]
        arr = np.full(int(fr.max()) + 1 if fr.size else 0, None, dtype=object)
        arr[fr] = np.array([names[i] for i in lab[pos:pos + n]], dtype=object)
        labels[str(seg.path)] = arr
        d = np.linalg.norm(y[pos:pos + n] - means[lab[pos:pos + n]], axis=1)
        for i in np.unique(lab[pos:pos + n]):
            rows = np.flatnonzero(lab[pos:pos + n] == i)
            j = rows[np.argmin(d[rows])]
            if names[i] not in best_d or d[j] < best_d[names[i]]:
                best_d[names[i]] = d[j]
                reps[names[i]] = {"file": seg.path.name, "frame": int(fr[j])}
        pos += n
    pops = {names[i]: float(np.mean(lab == i)) for i in used}
    notes = source.notes + notes
    notes.append(f"{len(states)} states proposed from {y.shape[0]} frames "
                 f"(k-means fitted on {fit_y.shape[0]}, silhouette on {sil_y.shape[0]})")
    lengths = [frames_of[k].size * timesteps[k] for k in keys if timesteps.get(k) is not None]
    return Exploration(states=states, labels=labels, populations=pops, representatives=reps,
                       timescales_ps=ts_ps, lag_ps=float(lag), n_slow=n_slow,
                       criterion=criterion, notes=notes,
                       longest_run_ps=float(max(lengths)) if lengths else None,
                       kinetics=kin, warnings=warnings)


# -- streaming helpers (until propose_states runs on the pass engine)
def _chunk_frames(source, n_features, budget=2_000_000):
    """Frames per chunk so that a chunk's feature matrix stays near `budget` numbers."""
    return int(min(source.chunk_size, max(8, budget // max(1, n_features))))


class _Series:
    """Lagged statistics of many time series, keyed, fed chunk by chunk.

    A series is identified by a key (e.g. segment, state, fold); frames of one
    key that do not follow each other (a gap in frame numbers) start a new
    series, so no pair spans a gap, a state change, or a file boundary.
    """

    def __init__(self, n_features, shift, *, diagonal):
        self.n_features = n_features
        self.shift = shift
        self.diagonal = diagonal
        self._acc = {}
        self._last = {}

    def feed(self, key, frames, x, lag):
        """Feed rows `x` (frames `frames`, consecutive or not) of the series `key`."""
        if x.shape[0] == 0:
            return
        acc = self._acc.get(key)
        if acc is None:
            acc = self._acc[key] = LagAccumulator(self.n_features, lag, shift=self.shift,
                                                  diagonal=self.diagonal)
        cuts = np.flatnonzero(np.diff(frames) != 1) + 1
        last = self._last.get(key)
        if last is not None and frames[0] != last + 1:
            acc.break_series()
        start = 0
        for c in list(cuts) + [len(frames)]:
            acc.feed(x[start:c])
            if c < len(frames):
                acc.break_series()
            start = c
        self._last[key] = frames[-1]

    def moments_of(self, key):
        """Moments of one key (an empty object if the key was never fed)."""
        acc = self._acc.get(key)
        if acc is None:
            cls = DiagonalLaggedMoments if self.diagonal else LaggedMoments
            return cls(self.n_features, shift=self.shift)
        m = acc.moments.copy()
        m.lag = None
        return m

    def local_autocorrelation(self):
        """Autocorrelation at the lag with every series about its own mean.

        The variances and lagged covariances of the keys (diagonal statistics),
        each about the key's own mean, are combined weighted by their pair
        counts: the decorrelation *within* runs, free of the offsets between
        runs or states.
        """
        c0 = np.zeros(self.n_features)
        ct = np.zeros(self.n_features)
        for acc in self._acc.values():
            m = acc.moments
            if m.count == 0:
                continue
            _, v0, c = m.covariances(reversible=True)
            c0 += m.count * v0
            ct += m.count * c
        out = np.full(self.n_features, np.nan)
        ok = c0 > 0
        out[ok] = ct[ok] / c0[ok]
        return out

    def run_means(self):
        """Mean of the lagged pairs of each key (reversible, both ends), by key."""
        return {key: acc.moments.covariances(reversible=True)[0]
                for key, acc in self._acc.items() if acc.moments.count > 0}

    def moments(self, select=None):
        """Merged moments of the keys for which ``select(key)`` is true (all if None)."""
        out = []
        for key, acc in self._acc.items():
            if select is None or select(key):
                m = acc.moments.copy()
                m.lag = None  # files may need different frame lags for one lag in ps
                out.append(m)
        if not out:
            cls = DiagonalLaggedMoments if self.diagonal else LaggedMoments
            return cls(self.n_features, shift=self.shift)
        return merge_all(out)
