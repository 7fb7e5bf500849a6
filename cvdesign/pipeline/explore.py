"""Unlabelled exploratory runs: find the slow coordinates, propose metastable states.

When no state labels are known, :func:`propose_states`

1. builds the candidate pool and screens it by each feature's normalized
   autocorrelation at the lag (within-trajectory: lagged pairs never span a
   file or a gap);
2. fits TICA (reversible estimate) on the screened features and reads the
   implied timescales; when every timescale is shorter than the lag the runs
   show no slow process at that lag, and it says so instead of inventing states;
3. projects frames on the slow TICA coordinates (those slower than the lag,
   at most three, in kinetic-map scaling) and clusters the projections of an
   evenly spaced subsample (every frame below 40,000 frames, else between
   20,000 and 40,000 of them, plus at most one per run) with k-means
   (scikit-learn) for every number of states between 2 and ``max_states``
   (or the given one), scoring each clustering by its mean silhouette
   (Rousseeuw 1987) -- the silhouette rewards compact, well-separated
   groups, as metastable states are, where a likelihood criterion would
   split one non-Gaussian basin into several; every frame then gets the
   state of its nearest k-means centre;
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
6. reports each proposed state's fraction of the frames (reweighted for
   biased runs), staying probability and a representative frame. A fraction
   of frames is an equilibrium population only when the runs enter and leave
   the state often; a state entered or left fewer than
   :data:`FEW_TRANSITIONS` times gets a warning saying so.

TICA's implied timescales are *lower bounds* on the true ones given ample
data: by the variational principle of conformation dynamics (Noe and Nueske,
Multiscale Model. Simul. 11, 635, 2013) a linear combination of features
relaxes at least as fast as the slowest true process, for exact expectations.
From too few frames for the features TICA overfits and they come out too
long instead: the notes warn when there are fewer than
:data:`cvdesign.fit.MIN_PAIRS_PER_FEATURE` lagged pairs per feature (our
rule; see :func:`cvdesign.fit.few_pairs_text`). The summary says so, and
flags them when the runs contain fewer than :data:`FEW_TRANSITIONS`
transitions between the proposed states.

Every read of the runs is a pass of the pass engine (:mod:`cvdesign.passes`;
see :func:`propose_states`), so the result is the same, byte for byte, on any
executor (``executor=``: local processes, a Dask cluster) and task split.

**Biased runs** (runs given with their bias energies, :mod:`cvdesign.io.bias`)
are reweighted: every statistic above weighs frame t by ``exp(V_t/kT)``
(the k-means centres too, through scikit-learn's ``sample_weight``), and
lagged pairs of a biased run are taken at the lag in rescaled time ``dt
exp(V/kT)`` (McCarty and Parrinello, J. Chem. Phys. 147, 204109, 2017), so
TICA, the staying probabilities and the transition counts estimate the
unbiased dynamics -- exactly only when the bias vanishes at the barriers
between states (Voter, J. Chem. Phys. 106, 4665, 1997), approximately
otherwise, as the notes say. The silhouette (a geometric criterion), the
transitions between visits and the time spent in each state stay counts on
the runs' own frames and time.

The proposed labels then feed the labelled pipeline
(:func:`cvdesign.pipeline.suggest`) through :meth:`Exploration.labelled_source`.
"""

import logging
import math
import warnings as _warnings  # _propose has a list named warnings
from dataclasses import dataclass, field

import numpy as np
from sklearn.cluster import KMeans
from sklearn.metrics import silhouette_score
from threadpoolctl import threadpool_limits  # installed with scikit-learn

from ..constants import COORDINATION_R0_NM
from ..errors import InputError
from ..fit import TICA, DroppedDirectionsWarning, FewPairsWarning, few_pairs_text
from ..io.source import Source
from ..parallel import using_executor
from ..passes import (LaggedPass, Pass, PoolFeaturizer, ScreeningPass, frame_keys, plan_tasks,
                      reference_features, run_pass, thinning_stride)
from ..pool import build_pool, check_kinds, check_length, check_prefilter_stride
from ..progress import stage_messages
from ..search import standardize_lagged
from ..stats.moments import LaggedMoments, merge_all
from .output import run_file_names
from .timing import EvenSpacingPass, bias_times, checked_segments, read_timesteps
from .timing import lag_frames as _lag_frames

__all__ = ["propose_states", "state_kinetics", "Exploration", "StateKinetics",
           "MIN_SILHOUETTE", "MIN_MEMORY", "MIN_SEPARATION", "SILHOUETTE_TIE",
           "MAX_REPORT_FRAMES", "FEW_TRANSITIONS", "run_file_names"]

#: Most frames of the report's picture of the proposed states (the clustering's
#: subsample, thinned by a stride chosen from the frame counts).
MAX_REPORT_FRAMES = 5000

_log = logging.getLogger(__name__)

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

#: Fewest entries and exits of a state whose fraction of frames is read as an equilibrium
#: population, and fewest transitions between the proposed states behind TICA's slowest
#: timescales: below it the summary warns (a state entered once and never left held 0.033 of
#: the frames where its Boltzmann population was 0.168). A handful of transitions is the
#: usual minimum (common practice).
FEW_TRANSITIONS = 5

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
        apart in one run, the first in state ``i`` and the second in ``j``
        (biased runs: sums of the weights of the first frames, float, with the
        lag in rescaled time).
    staying : ndarray of shape (n_states,)
        Probability of being in the same state one lag later,
        ``counts[i, i] / counts[i].sum()`` (NaN when no pair starts in it).
    populations : ndarray of shape (n_states,)
        Fraction of the frames in each state (biased runs: of the weight); the
        key ``population`` of :meth:`as_dict`. An equilibrium population only
        when the runs enter and leave the state many times (see
        :data:`FEW_TRANSITIONS`).
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
        return ("; ".join(f"{s} -> " + ", ".join(f"{t} {_count(c)}" for t, c in
                                               zip(self.states, self.counts[i]))
                          for i, s in enumerate(self.states)))


def _count(c):
    """A transition count as text: an integer, or a sum of weights (biased runs)."""
    return str(int(c)) if isinstance(c, (int, np.integer)) else f"{float(c):.4g}"


def _timescale(value, lag_ps):
    lag = 1.0 if lag_ps is None else lag_ps
    if not value < 1:
        return math.inf if value >= 1 else math.nan
    if not value > 0:
        return 0.0
    return -lag / math.log(value)


class _Visits:
    """Visits of states along consecutive frames of one run: the transitions they make.

    A *visit* is a maximal stretch of frames in one state; only visits lasting
    at least `lag` frames count (a flicker across a boundary or a quick
    recrossing is not leaving), and a transition is a change of state between
    successive counted visits. A piece of a run keeps its first and last
    visit open (the frames before or after it may extend them) and the
    transitions between the visits in between; two pieces that follow each
    other join exactly (integer arithmetic), so a run cut anywhere, into pieces
    joined in any grouping, gives the same transitions.

    Built by :meth:`of`; :meth:`join` the piece that follows; :meth:`close`
    at the end of the run.
    """

    __slots__ = ("lag", "head", "mid", "tail", "exits", "entries")

    def __init__(self, lag, head, mid, tail, exits, entries):
        self.lag, self.head, self.mid, self.tail = lag, head, mid, tail
        self.exits, self.entries = exits, entries

    @classmethod
    def of(cls, labels, lag, n):
        """Piece of the frames with state codes `labels` (-1: no state; never counted)."""
        labels = np.asarray(labels, dtype=np.intp)
        starts = np.r_[0, np.flatnonzero(labels[1:] != labels[:-1]) + 1]
        lengths = np.diff(np.r_[starts, labels.size])
        labs = labels[starts]
        exits, entries = np.zeros(n, dtype=np.int64), np.zeros(n, dtype=np.int64)
        head = (int(labs[0]), int(lengths[0]))
        if labs.size == 1:
            return cls(int(lag), head, None, None, exits, entries)
        inner = labs[1:-1][(lengths[1:-1] >= lag) & (labs[1:-1] >= 0)]
        mid = None
        if inner.size:
            change = inner[1:] != inner[:-1]
            exits += np.bincount(inner[:-1][change], minlength=n)
            entries += np.bincount(inner[1:][change], minlength=n)
            mid = (int(inner[0]), int(inner[-1]))
        return cls(int(lag), head, mid, (int(labs[-1]), int(lengths[-1])), exits, entries)

    def _counted(self, visit):
        """A visit as a sequence of counted states: ``(first, last)``, or None."""
        label, length = visit
        return (label, label) if length >= self.lag and label >= 0 else None

    @staticmethod
    def _chain(parts, exits, entries):
        """Join sequences of counted states, adding the transitions where they meet."""
        out = None
        for p in parts:
            if p is None:
                continue
            if out is not None and out[1] != p[0]:
                exits[out[1]] += 1
                entries[p[0]] += 1
            out = p if out is None else (out[0], p[1])
        return out

    def _items(self):
        """First visit, the counted states in between, last visit: ``[(kind, value)]``."""
        return ([("v", self.head)] + ([("q", self.mid)] if self.mid is not None else [])
                + ([("v", self.tail)] if self.tail is not None else []))

    def join(self, other):
        """The piece made of this one followed at once by `other` (a new object)."""
        left, right = self._items(), other._items()
        (_, a), (_, b) = left[-1], right[0]
        if a[0] == b[0]:  # the visit goes on across the cut
            left[-1] = ("v", (a[0], a[1] + b[1]))
            right = right[1:]
        items = left + right
        exits, entries = self.exits + other.exits, self.entries + other.entries
        if len(items) == 1:
            return _Visits(self.lag, items[0][1], None, None, exits, entries)
        inner = [v if kind == "q" else self._counted(v) for kind, v in items[1:-1]]
        mid = self._chain(inner, exits, entries)
        return _Visits(self.lag, items[0][1], mid, items[-1][1], exits, entries)

    def close(self):
        """Transitions out of and into each state: ``(exits, entries)`` (new arrays)."""
        exits, entries = self.exits.copy(), self.entries.copy()
        parts = [self._counted(self.head), self.mid]
        if self.tail is not None:
            parts.append(self._counted(self.tail))
        self._chain(parts, exits, entries)
        return exits, entries


class _KineticSums:
    """Lag-time statistics of state labels along runs, mergeable (what :func:`state_kinetics`
    judges).

    Integer counts (transition pairs, frames per state and lag, transitions
    between visits) merge exactly; the within-state lagged moments of the
    coordinates merge by addition about fixed shifts. Runs may come in
    pieces (``pieces``: open :class:`_Visits` keyed by ``(segment, source
    state, first frame, last frame)``, in frame order); :meth:`merge` joins
    a piece with the one that follows it at once and closes the pieces that
    nothing can extend any more.

    Parameters
    ----------
    n : int
        Number of states.
    shifts : ndarray of shape (n, d), default=None
        Fixed shift of each state's within-state moments (None: the first
        pair seen, for runs given whole).
    weighted : bool, default=False
        Biased runs: frames and pairs carry weights (a pair weighs as its
        first frame); the transition counts are then sums of weights (float),
        and ``mass`` holds each state's summed weight, from which the
        populations come. Frames per state (the time spent in each, in lags)
        and the transitions between visits stay counts in the runs' own time.
    """

    def __init__(self, n, shifts=None, weighted=False):
        self.n = int(n)
        self.shifts = shifts
        self.weighted = bool(weighted)
        self.counts = np.zeros((self.n, self.n), dtype=np.float64 if weighted else np.int64)
        self.mass = np.zeros(self.n) if weighted else None  # summed weight of each state
        self.frames = {}      # lag in frames -> frames in each state
        self.exits = np.zeros(self.n, dtype=np.int64)
        self.entries = np.zeros(self.n, dtype=np.int64)
        self.inside = {}      # state -> LaggedMoments over pairs inside it
        self.pieces = []

    def add_frames(self, labels, lag, weights=None):
        ok = labels >= 0
        known = labels[ok]
        per = self.frames.get(int(lag), np.zeros(self.n, dtype=np.int64))
        self.frames[int(lag)] = per + np.bincount(known, minlength=self.n)
        if self.weighted:
            self.mass = self.mass + np.bincount(known, weights=weights[ok], minlength=self.n)

    def add_pairs(self, a, b, ya=None, yb=None, weights=None):
        """Pairs of frames one lag apart: states `a` then `b`, coordinates `ya`, `yb`, the
        weights of the first frames (weighted sums only)."""
        ok = (a >= 0) & (b >= 0)
        n = self.n
        w = weights[ok] if self.weighted else None
        self.counts += np.bincount(a[ok] * n + b[ok], weights=w,
                                   minlength=n * n).reshape(n, n)
        if ya is None:
            return
        same = ok & (a == b)
        for i in np.unique(a[same]):
            rows = np.flatnonzero(same & (a == i))
            m = self.inside.get(int(i))
            if m is None:
                shift = ya[rows[0]] if self.shifts is None else self.shifts[int(i)]
                m = self.inside[int(i)] = LaggedMoments(ya.shape[1], shift=shift)
            m.add_pairs(ya[rows], yb[rows], weights[rows] if self.weighted else None)

    def add_run(self, labels, lag):
        """The visits of a whole run (nothing before or after it)."""
        if labels.size:
            ex, en = _Visits.of(labels, lag, self.n).close()
            self.exits += ex
            self.entries += en

    def merge(self, other):
        """Statistics of this and `other`'s frames (which come after these); a new object."""
        out = _KineticSums(self.n, self.shifts, self.weighted)
        out.counts = self.counts + other.counts
        if self.weighted:
            out.mass = self.mass + other.mass
        out.frames = dict(self.frames)
        for lag, v in other.frames.items():
            out.frames[lag] = out.frames[lag] + v if lag in out.frames else v
        out.exits = self.exits + other.exits
        out.entries = self.entries + other.entries
        out.inside = dict(self.inside)
        for i, m in other.inside.items():
            out.inside[i] = out.inside[i].merge(m) if i in out.inside else m
        pieces = list(self.pieces)
        for key, piece in other.pieces:
            if pieces:
                (seg, state, first, last), prev = pieces[-1]
                if (seg, state, last + 1) == key[:3]:
                    pieces[-1] = ((seg, state, first, key[3]), prev.join(piece))
                    continue
            pieces.append((key, piece))
        for _, piece in pieces[1:-1]:  # nothing comes between them and their neighbours
            ex, en = piece.close()
            out.exits += ex
            out.entries += en
        out.pieces = pieces[:1] + pieces[1:][-1:]
        return out

    def closed(self):
        """Every piece closed (the runs end here): a new object."""
        out = self.merge(_KineticSums(self.n, self.shifts, self.weighted))
        for _, piece in out.pieces:
            ex, en = piece.close()
            out.exits += ex
            out.entries += en
        out.pieces = []
        return out

    def subset(self, keep):
        """The statistics of the states `keep` only (states without frames dropped)."""
        keep = np.asarray(keep, dtype=np.intp)
        out = _KineticSums(keep.size, None if self.shifts is None else self.shifts[keep],
                           self.weighted)
        out.counts = self.counts[np.ix_(keep, keep)]
        if self.weighted:
            out.mass = self.mass[keep]
        out.frames = {lag: v[keep] for lag, v in self.frames.items()}
        out.exits, out.entries = self.exits[keep], self.entries[keep]
        out.inside = {j: self.inside[int(i)] for j, i in enumerate(keep)
                      if int(i) in self.inside}
        return out

    def kinetics(self, states, lag_ps=None):
        """The :class:`StateKinetics` of these statistics (pieces must be closed)."""
        n = self.n
        frames = np.zeros(n, dtype=np.int64)
        lags_in_state = np.zeros(n)
        for lag in sorted(self.frames):
            frames += self.frames[lag]
            lags_in_state += self.frames[lag] / max(lag, 1)
        return _verdict(states, lag_ps, self.counts, frames, lags_in_state, self.exits,
                        self.entries, self.inside, mass=self.mass)


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
    sums = _KineticSums(len(states))
    for labels, lag, y in runs:
        labels = np.asarray(labels, dtype=np.intp)
        lag = int(lag)
        sums.add_frames(labels, lag)
        sums.add_run(labels, lag)
        if labels.size <= lag:
            continue
        if positions and y is not None:
            y = np.asarray(y, dtype=np.float64).reshape(labels.size, -1)
            sums.add_pairs(labels[:-lag], labels[lag:], y[:-lag], y[lag:])
        else:
            sums.add_pairs(labels[:-lag], labels[lag:])
    return sums.kinetics(states, lag_ps=lag_ps)


def _verdict(states, lag_ps, counts, frames, lags_in_state, exits, entries, inside,
             mass=None):
    """Staying probabilities, memory, separation and the metastability of each state
    (populations from the states' summed weights `mass` when given: biased runs)."""
    n = len(states)
    amount = frames if mass is None else mass
    total = amount.sum()
    pops = amount / total if total else np.full(n, np.nan)
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
        Fraction of the frames in each state (biased runs: of the frames' summed
        weights exp(V/kT), the reweighted fraction). It estimates the state's
        equilibrium population only when the runs enter and leave the state many
        times; with fewer than :data:`FEW_TRANSITIONS` entries or exits it
        reflects where the runs started and how long they lasted, and
        :attr:`warnings` says so. (The name, and the key ``population`` of
        :meth:`StateKinetics.as_dict`, are kept for compatibility.)
    representatives : dict of str to dict
        Per state, ``{"file", "frame"}`` of the frame nearest to the state's
        centre in the slow coordinates; ``file`` named as in :meth:`states_csv`
        (:func:`run_file_names`: the file name, or the full path when two runs
        share a file name).
    timescales_ps : list of float
        Implied timescales of the TICA components, slowest first, ps: lower
        bounds on the true timescales given ample data (variational principle),
        too long from too few frames for the features (see the module
        docstring).
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
        metastable" and why), one when the metastable states hold under half
        the frames, and one per state entered or left fewer than
        :data:`FEW_TRANSITIONS` times (its fraction of frames is not an
        equilibrium population); also written to summary.md and printed by
        the command line.
    bias : dict of str to (str, str or None)
        Per biased run file, its bias-energy file and column (empty: no
        biased run); :meth:`labelled_source` passes them on.
    temperature_k : float or None
        Temperature of the biased runs, K.
    report_tica : dict or None
        The ``tica`` entry of ``report-data.json`` (``docs/report-data-v1.md``):
        ``coords`` (the first two TICA coordinates, kinetic map, dimensionless, of at
        most :data:`MAX_REPORT_FRAMES` frames of the clustering's subsample; None when
        TICA has a single coordinate), ``state`` (each frame's proposed state),
        ``files`` (one name per run, as in :meth:`states_csv`), ``file`` (index into
        ``files``) and ``frame`` (where each frame is), ``timescales_ps``
        (of the two coordinates; None where not finite), ``lag_ps`` and ``n_slow``
        (the coordinates clustered: a second coordinate beyond it is faster than the
        lag and was not used for the states).

    Examples
    --------
    :func:`propose_states` returns one (see its example, on runs that cross
    between two wells). Built by hand here, for two short runs, to show what
    its methods write:

    >>> import numpy as np
    >>> exp = Exploration(
    ...     states=["S1", "S2"],
    ...     labels={"a/run-1.xtc": np.array(["S1", "S1", "S2"], dtype=object),
    ...             "a/run-2.xtc": np.array(["S2", "S2", "S1"], dtype=object)},
    ...     populations={"S1": 0.5, "S2": 0.5},
    ...     representatives={"S1": {"file": "run-1.xtc", "frame": 0},
    ...                      "S2": {"file": "run-2.xtc", "frame": 1}},
    ...     timescales_ps=[5.0], lag_ps=1.0, n_slow=1,
    ...     criterion={"name": "given", "values": {}, "all_metastable": {}, "rule": "given"})
    >>> print(exp.states_csv(), end="")
    file,frame,state
    run-1.xtc,0,S1
    run-1.xtc,1,S1
    run-1.xtc,2,S2
    run-2.xtc,0,S2
    run-2.xtc,1,S2
    run-2.xtc,2,S1
    >>> exp.states_line()
    'proposed states: S1 (50.0% of frames; e.g. run-1.xtc frame 0), S2 (50.0% of frames; e.g. run-2.xtc frame 1)'
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
    report_tica: dict = None
    bias: dict = field(default_factory=dict)
    temperature_k: float = None

    def labelled_source(self, topology, *, chunk_size=500, timestep=None):
        """A :class:`~cvdesign.io.source.Source` of the runs with the proposed labels (and
        the bias-energy files of biased runs, reweighted at :attr:`temperature_k`)."""
        src = Source(topology, chunk_size=chunk_size, timestep=timestep,
                     temperature=self.temperature_k if self.bias else None)
        for path, labels in self.labels.items():
            bias, column = self.bias.get(path, (None, None))
            src.add_labelled(path, labels, bias=bias, bias_column=column)
        # keep the proposed order S1, S2, ... whatever the order of first appearance
        src.states = [s for s in self.states if s in src.states]
        return src

    def states_csv(self):
        """Per-frame proposed states as CSV text (file, frame, state)."""
        lines = ["file,frame,state"]
        names = run_file_names(self.labels)
        for path, labels in self.labels.items():
            shown = names[str(path)]
            lines.extend(f"{shown},{i},{s}" for i, s in enumerate(labels))
        return "\n".join(lines) + "\n"

    def summary_lines(self):
        """Markdown lines describing the proposed states."""
        crit = self.criterion
        out = ["## Proposed states (unlabelled runs)", "",
               f"TICA at lag {self.lag_ps:g} ps; implied timescales (ps; lower bounds on the "
               "true ones given ample data: a linear combination of features relaxes at "
               "least as fast as the slowest process, by the variational principle, Noe and "
               "Nueske 2013, for exact averages; too few frames for the features inflate "
               "them, and the notes below then say so): "
               + ", ".join(_fmt_ts(t) if _resolved_by_runs(t, self.longest_run_ps)
                           is not False  # NaN: no timescale read
                           else f"> {self.longest_run_ps:.3g} (not resolved by these runs)"
                           for t in self.timescales_ps[:6])
               + self._few_transitions_text()
               + f". Clustered in the {self.n_slow} slowest coordinate(s) (kinetic map) with "
               "k-means. Number of states: "
               + ("given." if crit["name"] == "given" else
                  f"{crit.get('rule', 'the largest mean silhouette')} (mean silhouette by "
                  "number of states: " + ", ".join(
                      f"{k}: {v:.3f}" + ("" if crit.get("all_metastable", {}).get(k, True)
                                         else " (not all metastable)")
                      for k, v in crit["values"].items()) + ")."), ""]
        kin = self.kinetics
        share = ("fraction of frames (reweighted)" if self.bias else "fraction of frames")
        if kin is None:
            out += [f"| state | {share} | representative frame |", "| --- | ---: | --- |"]
            for s in self.states:
                r = self.representatives[s]
                out.append(f"| {s} | {self.populations[s]:.3f} | {r['file']} frame "
                           f"{r['frame']} |")
            return out + [""] + [f"- {n}" for n in self.notes] + [""]
        out += [f"Metastability at the lag ({self.lag_ps:g} ps), from the runs: a state is "
                "metastable when at least one transition into or out of it is seen, its "
                "staying probability over the lag lies at least halfway between its "
                f"fraction of frames (no memory) and 1 (memory >= {MIN_MEMORY}), and runs forget "
                f"where they are inside it at least {MIN_SEPARATION:g} times faster than they "
                "forget the state (memory time over the relaxation time inside it, both "
                "-lag/ln of the autocorrelation at the lag). Lagged pairs never span a file "
                f"or a gap. The runs contain {kin.n_transitions} transitions (changes of state "
                "between visits lasting at least the lag). A state's fraction of frames"
                + (" (frames weighted by exp(V/kT): biased runs)" if self.bias else "")
                + " estimates its equilibrium population only when the runs enter and leave "
                f"it many times (at least {FEW_TRANSITIONS} each; fewer get a warning below).",
                "",
                f"| state | {share} | staying probability | memory | memory time (ps) | "
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
        out += [f"| {s} | " + " | ".join(_count(c) for c in kin.counts[i]) + " |"
                for i, s in enumerate(self.states)]
        out += [""] + [f"- **warning**: {w}" for w in self.warnings]
        return out + [f"- {n}" for n in self.notes] + [""]


    def _few_transitions_text(self):
        """The summary's flag on TICA's slow timescales when few transitions back them."""
        kin = self.kinetics
        if kin is None or kin.n_transitions >= FEW_TRANSITIONS:
            return ""
        return (f" (the slowest backed by only {kin.n_transitions} transition(s) between the "
                "proposed states in the runs: poorly determined)")

    def __repr__(self):
        """One line: the states, with :meth:`states_line`'s fractions, and the runs (the
        per-frame labels of every run would flood a terminal).

        Examples
        --------
        >>> exp = Exploration(states=["S1"], labels={"a.xtc": np.array(["S1"] * 5000)},
        ...                   populations={"S1": 1.0}, representatives={"S1": {
        ...                       "file": "a.xtc", "frame": 0}}, timescales_ps=[50.0],
        ...                   lag_ps=1.0, n_slow=1, criterion={"name": "given"})
        >>> exp
        <Exploration: proposed states: S1 (100.0% of frames; e.g. a.xtc frame 0); 1 run, lag 1 ps>
        """
        n = len(self.labels)
        return (f"<Exploration: {self.states_line()}; {n} run{'s' if n != 1 else ''}, lag "
                f"{self.lag_ps:g} ps>")

    def states_line(self):
        """The command line's one-line account of the proposed states: each state's fraction
        of the frames (reweighted for biased runs) and a representative frame."""
        share = "of frames, reweighted" if self.bias else "of frames"
        return "proposed states: " + ", ".join(
            f"{s} ({self.populations[s]:.1%} {share}; e.g. {self.representatives[s]['file']} "
            f"frame {self.representatives[s]['frame']})" for s in self.states)

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
    """An implied timescale, ps, as text: 'n/a' for a TICA eigenvalue at or below 0 (no
    relaxation read at the lag: the coordinate has decorrelated within it).

    >>> _fmt_ts(14.5), _fmt_ts(float("inf")), _fmt_ts(float("nan"))
    ('14.5', 'inf', 'n/a (eigenvalue <= 0)')
    """
    return "inf" if math.isinf(t) else ("n/a (eigenvalue <= 0)" if math.isnan(t)
                                        else f"{t:.3g}")


def propose_states(source, *, lag, n_states=None, max_states=6, selection=None,
                   kinds=("distance", "angle", "dihedral"), cutoff=1.0, prefilter_stride=None,
                   coordination_r0=COORDINATION_R0_NM, screen_size=200, max_slow=3, seed=0,
                   executor=None, progress=None):
    """Propose metastable states of unlabelled runs from their slow coordinates.

    Every read of the runs is a pass of the pass engine (:mod:`cvdesign.passes`):
    (1) per-feature variances and autocorrelations at the lag, (2) the lagged
    moments of the screened features for TICA, (3) the slow coordinates of a
    subsample of frames -- every ``max(1, n_frames // 20000)``-th frame of each
    run, by its rank in the run: every frame below 40,000 frames, else between
    20,000 and 40,000 frames (the stride is whole) plus at most one per run --
    on which k-means is fitted and the silhouette computed (on every
    ``max(1, n // 4000)``-th of those ``n``: every one below 8,000, else
    between 4,000 and 8,000), (4) for every
    candidate number of states at once, the state of every frame (the nearest
    k-means centre), the lag-time transition counts, the transitions between
    visits, the within-state lagged moments and each state's representative
    frame. Memory does not grow with the number of frames except for the
    state labels of pass 4 (one small integer per frame and candidate), which
    the result holds for every frame by nature. The result is the same, byte
    for byte, for every executor and task split.

    Parameters
    ----------
    source : cvdesign.io.source.Source
        The runs, all under one state name (labels are ignored). Runs given
        with bias energies are reweighted (see the module docstring).
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
    executor : None, int, str, dask.distributed.Client or cvdesign.parallel.Executor
        Where the passes over the runs run: None in this process, an int that
        many local processes, a Dask client or scheduler address a cluster
        (see :func:`cvdesign.parallel.as_executor`). The results are the same,
        byte for byte.
    progress : callable, default=None
        Called with a message string at each stage (also logged at INFO on the
        ``cvdesign.pipeline.explore`` logger).

    Returns
    -------
    Exploration

    Raises
    ------
    InputError
        When the runs show no slow process at the lag, when no proposed state
        is metastable (the message gives the transition counts and staying
        probabilities), or for bad input.
    cvdesign.parallel.ExecutorError
        When the executor fails (a scheduler that cannot be reached, a worker
        that dies).

    Examples
    --------
    Exploratory runs that cross between their states (runs that each stay in
    one state, as the bundled demo runs do, are refused: nothing in them shows
    the states are metastable; give those with ``--state``). Here four
    unbiased runs of the testbed's double well (:mod:`cvdesign.testbed.wells`:
    one distance, wells about 2 nm apart), 1000 frames 0.2 ps apart, written
    as XTC files (a few seconds in all):

    >>> import tempfile
    >>> from cvdesign.io.source import Source
    >>> from cvdesign.testbed.wells import DoubleWell, write_well_runs
    >>> x = DoubleWell().run(4, 1000, md_step_ps=5e-3, stride=40, biased=False, seed=1)
    >>> with tempfile.TemporaryDirectory() as d:
    ...     top, runs, _ = write_well_runs(d, x, frame_step_ps=0.2)
    ...     src = Source(str(top))
    ...     for r in runs:
    ...         _ = src.add(str(r), "runs")
    ...     exploration = propose_states(src, lag=1.0)  # executor=2: two local processes
    >>> exploration.states, exploration.kinetics.metastable.tolist(), exploration.warnings
    (['S1', 'S2'], [True, True], [])
    >>> exploration.kinetics.n_transitions >= 5  # crossings seen at the lag
    True
    >>> exploration.states_line().startswith("proposed states: S1 (")
    True
    """
    if not isinstance(source, Source):
        raise InputError(f"propose_states() needs a Source (a topology and the runs), not "
                         f"{type(source).__name__}; build one with Source('top.pdb') and "
                         ".add('run1.xtc', 'runs') for each run")
    if not (isinstance(lag, (int, float)) and math.isfinite(lag) and lag > 0):
        raise InputError(f"lag={lag!r} must be a positive time in ps (give --lag PS)")
    if n_states is not None and (not isinstance(n_states, int) or n_states < 2):
        raise InputError(f"n_states={n_states!r} must be an integer of at least 2")
    check_prefilter_stride(prefilter_stride)
    kinds = check_kinds(kinds)
    cutoff = check_length(cutoff, "cutoff", allow_inf=True)
    coordination_r0 = check_length(coordination_r0, "coordination_r0")
    with using_executor(executor) as executor:
        executor.start()  # local workers start up while the pool is enumerated
        return _propose(source, executor, stage_messages(_log, progress), lag=float(lag),
                        n_states=n_states, max_states=max_states, selection=selection,
                        kinds=kinds, cutoff=cutoff, prefilter_stride=prefilter_stride,
                        coordination_r0=coordination_r0, screen_size=screen_size,
                        max_slow=max_slow, seed=seed)


def _refuse_mixed_runs(source):
    """Refuse runs of which some are biased and some not.

    Combining an unbiased group with a biased one (``cvdesign.io.bias``) assumes both
    sample the same state; the runs given here span every state, and unbiased runs
    usually sit in one basin, so the mix would pull the populations, kinetics and slow
    coordinates toward that basin without a word.
    """
    plain = sorted({str(seg.path) for seg in source.segments if seg.bias is None})
    if plain and len(plain) < len({str(seg.path) for seg in source.segments}):
        shown = ", ".join(repr(p) for p in plain[:3]) + (" ..." if len(plain) > 3 else "")
        raise InputError(
            f"runs {shown} have no bias energies while other runs do: states proposed from "
            "runs need every run biased or none (an unbiased run usually stays in one basin, "
            "which the mix would over-weight). Give only biased runs (each with its "
            "bias-energy file), or label the states and "
            "give them with --state / --labelled (Source.add / add_labelled), where a state "
            "may mix biased and unbiased runs")


def _propose(source, executor, note, *, lag, n_states, max_states, selection, kinds, cutoff,
             prefilter_stride, coordination_r0, screen_size, max_slow, seed):
    timesteps = read_timesteps(source)
    lag_frames = _lag_frames(source, lag, timesteps)
    reweighting = source.reweighting()  # biased runs (None without)
    if reweighting is not None:  # refuse lagged pairs in rescaled time that cannot be formed
        _refuse_mixed_runs(source)
        reweighting.check_rescaled_time(lag_frames)
    note("building the candidate pool")
    pool = build_pool(source, selection=selection, kinds=kinds, cutoff=cutoff,
                      stride=prefilter_stride, coordination_r0=coordination_r0,
                      executor=executor)
    base = plan_tasks(source)
    note(f"pool: {len(pool)} descriptors; screening by autocorrelation at {lag:g} ps")
    screened = _screen(source, base, pool, timesteps, lag, lag_frames, screen_size, executor)
    note(f"TICA on the {screened.columns.size} most autocorrelated features")
    plan = base.for_features(screened.featurizer.n_features, executor.n_workers)
    lagged = standardize_lagged(run_pass(LaggedPass(screened.featurizer, lag_frames,
                                                    shift=screened.center,
                                                    columns=screened.columns),
                                         source, executor=executor, tasks=plan,
                                         label="runs: TICA").merged(),
                                screened.center, screened.scale)
    with _warnings.catch_warnings():  # the notes below say how many were dropped, and
        _warnings.simplefilter("ignore", DroppedDirectionsWarning)  # when pairs are few
        _warnings.simplefilter("ignore", FewPairsWarning)
        tica = TICA.from_moments(lagged, lag=1, rcond=1e-6)
    ts_ps = (tica.timescales_ * lag).tolist()  # from_moments used lag=1 (one lag unit)
    notes = list(pool.notes) + [  # the pool's notes: a Python caller sees no CLI log
        f"TICA on the {screened.columns.size} most autocorrelated features "
        f"({tica.n_dropped_} near-singular directions dropped, eigenvalue below 1e-6 of "
        "the largest)"]  # of the standardized features: the correlation scale
    few = few_pairs_text(lagged.n_pairs, screened.columns.size - tica.n_dropped_)
    if few is not None:  # shown in the summary, and through it on the report page
        notes.append(f"warning: TICA's implied timescales are too long: {few} (fewer "
                     "features: a narrower --select or --kinds; from Python also "
                     "propose_states(..., screen_size=))")
    if reweighting is not None:
        notes += _biased_notes(reweighting, lag_frames)
    slow = [i for i, t in enumerate(ts_ps) if (math.isinf(t) or t > lag)]
    if not slow:
        raise InputError(
            f"the runs show no slow process at lag {lag:g} ps: every implied timescale "
            f"({', '.join(_fmt_ts(t) for t in ts_ps[:5])} ps) is shorter than the lag, so "
            "nothing stays correlated long enough to tell metastable states apart. Use a "
            "shorter --lag, longer runs, or give the states yourself with --state")
    n_slow = min(max_slow, len(slow))
    # kinetic-map scaling (Noé and Clementi 2015): each slow coordinate weighted by its
    # eigenvalue, so barely-slow ones count less in the clustering
    project = _Projection(screened.columns, screened.center, screened.scale, tica.mean_,
                          tica.eigenvectors_[:, :n_slow], tica.eigenvalues_[:n_slow])
    # the subsample also gets the second coordinate for the report's picture when only one
    # is clustered (each coordinate is computed on its own, so the first n_slow are the bits
    # `project` gives)
    n_wide = min(max(n_slow, 2), tica.eigenvectors_.shape[1])
    wide = _Projection(screened.columns, screened.center, screened.scale, tica.mean_,
                       tica.eigenvectors_[:, :n_wide], tica.eigenvalues_[:n_wide])

    # the clustering sees evenly spaced frames (by rank in each run, so the same for every
    # split): all of fewer than 40,000, else 20,000 to 40,000 (plus at most one per run: the
    # stride is whole); the silhouette every one of fewer than 8,000 of those, else 4,000
    # to 8,000
    n_frames = int(screened.segment_counts.sum())
    note(f"slow coordinates of a subsample of the {n_frames} frames")
    stride = _subsample_stride(n_frames, 20000)
    report_stride = thinning_stride(screened.segment_counts.reshape(-1), MAX_REPORT_FRAMES,
                                    multiple_of=stride)
    wide_y, sample = run_pass(_SamplePass(screened.featurizer, wide, stride, report_stride),
                              source, executor=executor, tasks=plan, label="runs: sample")
    fit_y = np.ascontiguousarray(wide_y[:, :n_slow])
    sil_y = fit_y[::_subsample_stride(fit_y.shape[0], 4000)]
    models = {}

    def cluster(k):
        # one thread: k-means sums depend on how the frames are split between threads, so
        # this keeps the result the same on every machine (and on at most 40,000 frames of
        # at most three coordinates it is also faster than waiting for busy cores)
        with threadpool_limits(limits=1):
            models[k] = KMeans(n_clusters=k, n_init=10, random_state=seed).fit(
                fit_y, sample_weight=sample["weight"])
        return models[k]

    scores = {}
    if n_states is None:
        for k in range(2, max_states + 1):
            if sil_y.shape[0] <= k:
                break
            labels_k = cluster(k).predict(sil_y)
            if len(set(labels_k.tolist())) < 2:
                continue
            with threadpool_limits(limits=1):
                scores[k] = float(silhouette_score(sil_y, labels_k))
        if not scores:
            raise InputError("too few distinct frames to propose states; give longer runs")
        candidates = sorted(scores)
    else:
        if fit_y.shape[0] < n_states:
            raise InputError(f"too few frames ({fit_y.shape[0]}) to propose {n_states} states; "
                             "give longer runs or fewer states")
        cluster(n_states)
        candidates = [n_states]
    # name states S1, S2, ... along the slowest coordinate
    means = {k: models[k].cluster_centers_[np.argsort(models[k].cluster_centers_[:, 0],
                                                      kind="stable")] for k in candidates}
    note(f"states of every frame and their kinetics ({', '.join(map(str, candidates))} "
         "states)")
    found = run_pass(_KineticsPass(screened.featurizer, project, lag_frames,
                                   [means[k] for k in candidates],
                                   weighted=reweighting is not None),
                     source, executor=executor, tasks=plan, label="runs: states")
    fits = {}
    for c, k in enumerate(candidates):
        sums = found["sums"][c]
        used = np.flatnonzero(sum(sums.frames.values()) > 0)
        kin = sums.subset(used).kinetics([f"S{i + 1}" for i in used], lag_ps=lag)
        fits[k] = {"k": k, "column": c, "used": used.tolist(), "kinetics": kin}

    if n_states is None:
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
            two = {k: int(fits[k]["kinetics"].metastable.sum()) >= 2 for k in frac}
            # (two metastable states first: one alone is refused below, and fractions tie
            # easily, 1 of 2 and 2 of 4)
            chosen = max(frac, key=lambda k: (two[k], frac[k], scores[k], -k))
            if frac[chosen] == 0:
                chosen = best  # none metastable anywhere: refused below, with these numbers
            rule = ("no clustering has only metastable states, so the one with the largest "
                    "fraction of metastable states among those with two or more (then the "
                    "largest mean silhouette)")
        fit = fits[chosen]
        criterion = {"name": "silhouette", "values": scores, "all_metastable": all_meta,
                     "rule": rule}
    else:
        fit = fits[n_states]
        criterion = {"name": "given", "values": {},
                     "all_metastable": {n_states: bool(fit["kinetics"].metastable.all())},
                     "rule": "given"}
    k, used, kin = fit["k"], fit["used"], fit["kinetics"]
    names = [f"S{i + 1}" for i in range(k)]
    if len(used) < 2:
        raise InputError("the clustering put every frame into one state; the runs may sample "
                         "a single metastable state at this lag. Give the states with --state")
    states = [names[i] for i in used]
    if not kin.metastable.any():
        raise InputError(
            f"none of the {len(states)} proposed states is metastable at lag {lag:g} ps: "
            + "; ".join(f"{s} (fraction of frames {kin.populations[i]:.2f}, stays {lag:g} ps with "
                        f"probability {kin.staying[i]:.2f}): {kin.reasons[i]}"
                        for i, s in enumerate(states))
            + f". The runs contain {kin.n_transitions} transitions between these states; "
            f"lag-time transition counts: {kin.counts_text()}. "
            + ("Use longer runs that cross between the states (no lag shows a transition the "
               "runs never make)" if _never_change_state(kin) else
               "Use longer runs (that cross between the states), try another --lag (a "
               "shorter one counts the visits shorter than this lag)")
            + ", or give the states yourself with --state NAME FILE ... (for instance when "
            "each run was started in a known state)")
    if n_states is None and int(kin.metastable.sum()) < 2:
        # one metastable state among others that are not is no pair of basins to separate:
        # a single well split by k-means (a 4 % corner passing the test by noise) had
        # given six states and CVs designed to separate them
        meta = [s for i, s in enumerate(states) if kin.metastable[i]]
        raise InputError(
            f"only one of the {len(states)} proposed states is metastable at lag {lag:g} ps "
            f"({meta[0]}, fraction of frames {kin.populations[states.index(meta[0])]:.2f}); the "
            "others are not: "
            + "; ".join(f"{s}: {kin.reasons[i]}" for i, s in enumerate(states)
                        if not kin.metastable[i])
            + ". Separating states needs two metastable ones: the runs may sample a single "
            "state at this lag. Use longer runs (that cross between the states), try another "
            "--lag, or give the states yourself with --state NAME FILE ... (or --n-states N "
            "to take a clustering as it is)")
    warnings = [f"state {s} is not metastable at lag {lag:g} ps: {kin.reasons[i]}; treat it "
                "with caution (longer runs or another --lag may settle it)"
                for i, s in enumerate(states) if not kin.metastable[i]]
    share = float(np.sum(kin.populations[kin.metastable]))
    if share < 0.5:
        warnings.append(f"the metastable states hold only {share:.0%} of the frames: most of "
                        "the runs are in states that are not; the proposal may split a single "
                        "broad state (longer runs or another --lag may settle it)")
    note(f"{len(states)} states proposed; staying probabilities at {lag:g} ps: "
         + ", ".join(f"{s} {kin.staying[i]:.3f}" for i, s in enumerate(states)))
    warnings += _few_transition_warnings(kin, reweighting is not None)
    c = fit["column"]
    file_names = run_file_names(seg.path for seg in source.segments)
    reps = {}
    for i in used:
        _, seg, frame = found["representatives"][c][i]
        reps[names[i]] = {"file": file_names[str(source.segments[seg].path)], "frame": frame}
    if reweighting is None:
        frames_in = sum(found["sums"][c].frames.values())
        pops = {names[i]: float(frames_in[i] / n_frames) for i in used}
    else:  # the reweighted populations
        mass = found["sums"][c].mass
        pops = {names[i]: float(mass[i] / mass.sum()) for i in used}
    notes = source.notes + notes
    notes.append(f"{len(states)} states proposed from {n_frames} frames "
                 f"(k-means fitted on {fit_y.shape[0]}, silhouette on {sil_y.shape[0]})")
    lengths = [screened.segment_counts[si].sum() * dt for si, dt in timesteps.items()
               if dt is not None and screened.segment_counts[si].sum() > 0]
    longest = float(max(lengths)) if lengths else None
    report_tica = _report_tica(source, sample, wide_y[sample["rows"]], n_slow, means[k], names,
                               ts_ps[:n_wide], lag, file_names, longest)
    return Exploration(states=states, labels=_frame_labels(source, found["labels"], c, names),
                       populations=pops, representatives=reps, timescales_ps=ts_ps,
                       lag_ps=lag, n_slow=n_slow, criterion=criterion, notes=notes,
                       longest_run_ps=longest,
                       kinetics=kin, warnings=warnings, report_tica=report_tica,
                       bias={str(seg.path): (str(seg.bias_path), seg.bias_column)
                             for seg in source.segments if seg.bias is not None},
                       temperature_k=None if reweighting is None else reweighting.temperature_k)


def _subsample_stride(n, least):
    """Stride of an evenly spaced subsample of `n` items with at least `least` of them:
    ``max(1, n // least)``, so every item below ``2 * least``, else between `least` and
    ``2 * least`` items (per run, one more at most: each run keeps its first frame)."""
    return max(1, n // least)


def _biased_notes(reweighting, lag_frames):
    """What reweighting biased runs changes in the proposal: the reweighting notes (effective
    sample sizes, rescaled time with its caveat) and how each step uses the weights."""
    rw_notes, _ = reweighting.describe(lag_frames)
    return rw_notes + [
        "proposed states from biased runs: the screening, TICA (lagged pairs at the lag in "
        "rescaled time), the k-means centres, the populations, the staying probabilities, "
        "the lag-time transition counts (sums of the weights of the pairs' first frames) "
        "and the within-state autocorrelations are weighted by exp(V/kT); the silhouette, "
        "the transitions between visits and the time spent in each state are counted on "
        "the runs' frames in their own time (with a bias that is positive, shorter than in "
        "rescaled time, so the metastability tests are the stricter for it)"]


def _never_change_state(kin):
    """Whether no lagged pair of the runs changes state: visits shorter than the lag do not
    count as transitions, so zero transitions alone may mean a lag too long."""
    counts = np.asarray(kin.counts, dtype=np.float64)
    return bool(counts.sum() - np.trace(counts) <= 0)


def _few_transition_warnings(kin, biased):
    """A warning per state entered or left fewer than :data:`FEW_TRANSITIONS` times: its
    fraction of frames is not an equilibrium population."""
    share = "reweighted fraction of the frames" if biased else "fraction of the frames"
    out = []
    for i, s in enumerate(kin.states):
        if min(kin.entries[i], kin.exits[i]) < FEW_TRANSITIONS:
            out.append(f"state {s} is entered {int(kin.entries[i])} and left "
                       f"{int(kin.exits[i])} time(s) in the runs (the fewer of the two below "
                       f"{FEW_TRANSITIONS}): "
                       f"its {share} ({kin.populations[i]:.3f}) depends on where the runs "
                       "started and how long they lasted; it is not an equilibrium population")
    return out


@dataclass
class _Screened:
    """The features kept for TICA: a featurizer of their descriptors and their columns in it.

    `center` and `scale` (of the kept columns) standardize them; `segment_counts`
    are the frames of each (segment, state).
    """

    featurizer: PoolFeaturizer
    columns: np.ndarray
    center: np.ndarray
    scale: np.ndarray
    segment_counts: np.ndarray


def _screen(source, base, pool, timesteps, lag, lag_frames, screen_size, executor):
    """Pass 1: variance and autocorrelation at the lag of every feature; the most
    autocorrelated ones (even time spacing checked in the same read)."""
    every = PoolFeaturizer(pool)
    plan = base.for_features(every.n_features, executor.n_workers)
    shift = reference_features(plan, every)
    checked = checked_segments(source, timesteps)
    spacing = EvenSpacingPass(every, timesteps, checked, bias_times(source, checked))
    first, lagged, _ = run_pass((ScreeningPass(every), LaggedPass(every, lag_frames,
                                                                   shift=shift, diagonal=True),
                                 spacing), source, executor=executor, tasks=plan,
                                label="runs: screening")
    pairs = lagged.merged()
    if pairs.count == 0:
        raise InputError(f"no lagged pairs at lag {lag:g} ps: every run is shorter than the "
                         "lag; choose a shorter --lag")
    n_feat = pool.n_features
    rho = np.nan_to_num(pairs.autocorrelation(), nan=0.0)
    diag = merge_all(first.diagonal)
    center, scale = diag.mean, np.sqrt(diag.variance)
    constant = ~(scale > 1e-12 * (1.0 + np.abs(center)))
    rho[constant] = 0.0
    scale[constant] = 1.0
    order = sorted(range(n_feat), key=lambda j: (-rho[j], j))
    feats = np.array(sorted(j for j in order[:screen_size] if rho[j] > 0), dtype=np.intp)
    if feats.size == 0:
        raise InputError(f"no feature is correlated across the lag of {lag:g} ps; the runs show "
                         "no slow process at this lag: choose a shorter --lag or longer runs")
    # the next passes compute only the descriptors of the kept features
    descriptors = np.unique(pool.feature_descriptor[feats])
    columns = np.searchsorted(pool.features_of(descriptors), feats).astype(np.intp)
    return _Screened(PoolFeaturizer(pool.subset(descriptors)), columns, center[feats],
                     scale[feats], first.segment_counts)


class _Projection:
    """Slow coordinates of frames: the standardized kept features on the slow TICA
    eigenvectors, times their eigenvalues (kinetic map).

    Computed row by row (a product and a sum per coordinate, no matrix
    product), so a frame's coordinates are the same bits in whatever rows it
    is computed with (a matrix product's rows depend on the matrix's shape).
    """

    def __init__(self, columns, center, scale, mean, vectors, weights):
        self.columns, self.center, self.scale, self.mean = columns, center, scale, mean
        self.vectors = np.ascontiguousarray(vectors.T)
        self.weights = np.asarray(weights, dtype=np.float64)

    @property
    def n_coordinates(self):
        return self.weights.size

    def __call__(self, x):
        z = (x[:, self.columns] - self.center) / self.scale - self.mean
        y = np.empty((z.shape[0], self.n_coordinates))
        for c, v in enumerate(self.vectors):
            y[:, c] = (z * v).sum(axis=1)
        return y * self.weights


def _squared_distances(y, centers):
    """Squared distance of every row of `y` to every centre, shape (n, k), row by row."""
    return ((y[:, None, :] - centers[None, :, :]) ** 2).sum(axis=2)


class _SamplePass(Pass):
    """Slow coordinates of every `stride`-th frame of each run (by its rank in the run),
    and which of them are every `report_stride`-th (a multiple of `stride`): the
    report's picture of the proposed states.

    The subsample is a pure function of (segment, frame), in frame order, so it
    is the same for every split; its size is bounded by the number of frames
    over `stride` plus one per run. The result is ``(y, sample)``: the
    coordinates, and ``sample`` with ``rows`` (rows of ``y`` in the report's
    subsample), their ``segment`` and ``frame``, and ``weight`` (the weights of
    the rows of ``y``; None when no run is biased).
    """

    def __init__(self, featurizer, project, stride, report_stride=None):
        self.featurizer, self.project, self.stride = featurizer, project, int(stride)
        self.report_stride = int(report_stride or stride)

    def map(self, leaf):
        rank = frame_keys(leaf.layout, leaf.frames).rank
        rows = np.flatnonzero(rank % self.stride == 0)
        if not rows.size:
            return None
        keep = rank[rows] % self.report_stride == 0
        w = leaf.weights
        return [(self.project(leaf.x[rows]), keep, leaf.segment, leaf.frames[rows[keep]],
                 None if w is None else w[rows])]

    def merge(self, a, b):
        return a + b

    def finish(self, partial, plan):
        partial = partial or []
        y = (np.concatenate([p[0] for p in partial]) if partial
             else np.zeros((0, self.project.n_coordinates)))
        keep = np.concatenate([p[1] for p in partial]) if partial else np.zeros(0, dtype=bool)
        sample = {"rows": np.flatnonzero(keep),
                  "segment": np.concatenate([np.full(p[3].size, p[2], dtype=np.int64)
                                             for p in partial]) if partial
                  else np.zeros(0, dtype=np.int64),
                  "frame": np.concatenate([p[3] for p in partial]) if partial
                  else np.zeros(0, dtype=np.int64), "weight": None}
        if any(p[4] is not None for p in partial):
            sample["weight"] = np.concatenate([np.ones(p[0].shape[0]) if p[4] is None else p[4]
                                               for p in partial])
        return y, sample


def _report_tica(source, sample, y, n_slow, centers, names, timescales_ps, lag_ps, file_names,
                 longest_run_ps):
    """The report's ``tica`` entry: the sample's first two TICA coordinates, the state of the
    nearest k-means centre in the first `n_slow` (the rule that gave every frame its state)
    and `n_slow`; the runs named by `file_names` (:func:`run_file_names`); the longest run
    (ps) and, per timescale, whether the runs resolve it (:func:`_resolved_by_runs`, the
    summary's rule)."""
    state = np.argmin(_squared_distances(np.ascontiguousarray(y[:, :n_slow]), centers), axis=1)
    return {"coords": y[:, :2].tolist() if y.shape[1] >= 2 else None,
            "state": [names[i] for i in state.tolist()],
            "files": [file_names[str(seg.path)] for seg in source.segments],
            "file": sample["segment"].tolist(),
            "frame": sample["frame"].tolist(),
            "timescales_ps": [float(t) if math.isfinite(t) else None for t in timescales_ps],
            "lag_ps": float(lag_ps), "n_slow": int(n_slow),
            "longest_run_ps": longest_run_ps,
            "timescales_resolved": [_resolved_by_runs(float(t), longest_run_ps)
                                    for t in timescales_ps]}


def _resolved_by_runs(t, longest_run_ps):
    """Whether runs at most `longest_run_ps` long resolve the timescale `t` (ps): shorter
    than the longest run; None when there is no timescale to judge (NaN) or no run length.

    Examples
    --------
    >>> _resolved_by_runs(40.0, 90.0), _resolved_by_runs(581.0, 90.0)
    (True, False)
    >>> _resolved_by_runs(float("inf"), 90.0), _resolved_by_runs(40.0, None)
    (False, None)
    """
    if longest_run_ps is None or math.isnan(t):
        return None
    return bool(t < longest_run_ps)


def _nearer(a, b):
    """Per state, the nearer ``(squared distance, segment, frame)`` (the earlier on a tie)."""
    out = dict(a)
    for i, v in b.items():
        out[i] = min(out[i], v) if i in out else v
    return out


class _KineticsPass(Pass):
    """For each candidate clustering: the state of every frame (nearest centre) and the
    statistics :func:`state_kinetics` judges, plus each state's frame nearest its centre.

    Lagged pairs are the engine's (:meth:`cvdesign.passes.Leaf.pairs`: within a
    run, never across a file, a gap or a change of given state); visits are
    followed across leaves by :class:`_KineticSums`. The within-state moments
    are accumulated about the state's centre (fixed before the pass).

    The result is a dict: ``sums`` (a closed :class:`_KineticSums` per
    clustering), ``representatives`` (per clustering, state -> ``(squared
    distance, segment, frame)``) and ``labels`` (``(segment, frames, labels)``
    per leaf, in frame order; ``labels`` of shape (n_frames, n_clusterings)).
    """

    def __init__(self, featurizer, project, lags, centers, weighted=False):
        self.featurizer, self.project, self.lags = featurizer, project, lags
        self.weighted = bool(weighted)  # biased runs: weighted sums (_KineticSums)
        self.centers = [np.asarray(c, dtype=np.float64) for c in centers]
        self.dtype = np.int8 if max(len(c) for c in self.centers) < 128 else np.int32

    def halo(self, segment_index):
        return int(self.lags[segment_index])

    def map(self, leaf):
        lag = int(self.lags[leaf.segment])
        y = self.project(leaf.window_x)
        frames, given, n = leaf.frames, leaf.states, leaf.frames.size
        i, j = leaf.pairs(lag)
        # stretches of consecutive frames in one given state
        cuts = np.flatnonzero((np.diff(frames) != 1) | (given[1:] != given[:-1])) + 1
        stretches = list(zip(np.r_[0, cuts].tolist(), np.r_[cuts, n].tolist()))
        labels = np.empty((n, len(self.centers)), dtype=self.dtype)
        w = None
        if self.weighted:
            w = leaf.weights if leaf.weights is not None else np.ones(n)
        sums, reps = [], []
        for c, centers in enumerate(self.centers):
            d2 = _squared_distances(y, centers)
            window = np.argmin(d2, axis=1)
            own = window[:n]
            labels[:, c] = own
            s = _KineticSums(len(centers), centers, self.weighted)
            s.add_frames(own, lag, w)
            s.add_pairs(window[i], window[j], y[i], y[j], None if w is None else w[i])
            for a, b in stretches:
                s.pieces.append(((leaf.segment, int(given[a]), int(frames[a]),
                                  int(frames[b - 1])), _Visits.of(own[a:b], lag, len(centers))))
            sums.append(s)
            near = d2[np.arange(n), own]
            rep = {}
            for st in np.unique(own).tolist():
                rows = np.flatnonzero(own == st)
                r = rows[np.argmin(near[rows])]
                rep[st] = (float(near[r]), leaf.segment, int(frames[r]))
            reps.append(rep)
        return {"sums": sums, "representatives": reps,
                "labels": [(leaf.segment, frames.copy(), labels)]}

    def merge(self, a, b):
        return {"sums": [x.merge(y) for x, y in zip(a["sums"], b["sums"])],
                "representatives": [_nearer(x, y) for x, y in zip(a["representatives"],
                                                                   b["representatives"])],
                "labels": a["labels"] + b["labels"]}

    def finish(self, partial, plan):
        if partial is None:
            return {"sums": [_KineticSums(len(c), c, self.weighted) for c in self.centers],
                    "representatives": [{} for _ in self.centers], "labels": []}
        return {**partial, "sums": [s.closed() for s in partial["sums"]]}


def _frame_labels(source, leaves, column, names):
    """Per run file, the state name of every frame (None where a frame has none)."""
    names = np.array(names, dtype=object)
    by_path = {}
    for seg, frames, labels in leaves:
        by_path.setdefault(str(source.segments[seg].path), []).append((frames, labels[:, column]))
    out = {}
    for path, parts in by_path.items():
        frames = np.concatenate([f for f, _ in parts])
        arr = np.full(int(frames.max()) + 1, None, dtype=object)
        arr[frames] = names[np.concatenate([lab for _, lab in parts]).astype(np.intp)]
        out[path] = arr
    return out
