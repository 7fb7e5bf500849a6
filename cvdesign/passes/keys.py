"""Frame keys: state, rank, fold and bootstrap block as pure functions of (segment, frame).

Every pass groups frames by keys computed here, from the segment's layout (its
frame range, its state or per-frame labels, its frame counts per state) and
the absolute frame number in the file, never from the order in which chunks or
tasks arrive. So a fold or a block holds the same frames whatever the task
split, chunk size, executor or arrival order.

* **state code** of a frame: the segment's state, or the code of its label
  (-1: outside the segment's frame range, or labelled None);
* **rank** within (segment, state): ``frame - start`` for a plain segment, the
  number of earlier frames of the same label in the file for a labelled one;
* **fold** (:class:`Folds`): by trajectory (every frame of a file and state in
  one fold) or by contiguous block of ranks (``rank * n_folds // count``);
* **bootstrap block**: ``rank // block_frames`` within (segment, state), or
  within (segment, state, fold) when folds are given (rank counted from the
  fold's first frame);
* **thinning**: a subsample bounded in size whatever the number of frames keeps the
  frames whose rank (or frame offset) is a multiple of :func:`thinning_stride`, a
  function of the frame counts only;
* **run end**: the first frame after the run of consecutive frames of one
  state that a frame belongs to; a lagged pair ``(t, t + lag)`` is valid only
  when ``t + lag`` is before it (no pair spans a file, a gap, a state change or
  the end of the frame range);
* **weight** (biased runs, :mod:`cvdesign.io.bias`): the frame's reweighting
  factor, and its **clock**, the rescaled time of the frame in frame spacings;
  a lagged pair of a biased run pairs ``t`` with the first frame whose clock
  reaches ``clock[t] + lag`` (:meth:`SegmentLayout.partners`). Both are
  functions of the file's bias energies and the absolute frame number.
"""

from dataclasses import dataclass, field

import numpy as np

from ..errors import InputError

__all__ = ["SegmentLayout", "Folds", "FrameKeys", "frame_keys", "MIN_FRAMES_PER_FOLD",
           "thinning_stride"]

#: Fewest frames of each state in each held-out fold (the pipeline's rule).
MIN_FRAMES_PER_FOLD = 10


@dataclass(frozen=True, eq=False)
class SegmentLayout:
    """Where the frames of one segment are and which state each belongs to.

    Built by :func:`cvdesign.passes.plan_tasks` from a
    :class:`~cvdesign.io.source.Source`; workers get a :meth:`window` of it
    (the few arrays of a labelled segment cut to the frames of one task).

    Attributes
    ----------
    index : int
        Segment index in the source.
    path : str
        Trajectory file.
    n_file : int
        Frames in the file.
    lo, hi : int
        Frame range ``[lo, hi)`` of the segment, clipped to the file.
    n_states : int
        Number of states of the source.
    state : int or None
        State code of every frame of a plain segment; None for a labelled one.
    counts : ndarray of shape (n_states,), dtype int64
        Frames of each state in the segment.
    offset : int
        First frame described by `codes`, `rank` and `run_end`.
    codes, rank, run_end : ndarray of int64 or None
        Per-frame state code (-1: no state), rank within (segment, state) and
        end of the frame's run, for frames ``offset, offset + 1, ...``
        (labelled segments only).
    weight, clock : ndarray of float64 or None
        Biased runs only: per-frame weight and rescaled clock (frame
        spacings), for frames ``offset, offset + 1, ...``
        (:class:`cvdesign.io.bias.Reweighting`); None for an unbiased run.

    Examples
    --------
    >>> lay = SegmentLayout.from_codes(0, "run.xtc", np.array([0, 0, -1, 1, 1, 0]), 2)
    >>> lay.counts.tolist(), lay.rank_of(np.arange(6)).tolist()
    ([3, 2], [0, 1, 0, 0, 1, 2])
    >>> lay.run_end_of(np.array([0, 3, 5])).tolist()
    [2, 5, 6]
    """

    index: int
    path: str
    n_file: int
    lo: int
    hi: int
    n_states: int
    state: int | None = None
    counts: np.ndarray = field(default=None, repr=False)
    offset: int = 0
    codes: np.ndarray | None = field(default=None, repr=False)
    rank: np.ndarray | None = field(default=None, repr=False)
    run_end: np.ndarray | None = field(default=None, repr=False)
    weight: np.ndarray | None = field(default=None, repr=False)
    clock: np.ndarray | None = field(default=None, repr=False)
    spans: dict = field(default_factory=dict, repr=False)

    @classmethod
    def plain(cls, index, path, n_file, lo, hi, state, n_states):
        """Layout of frames ``[lo, hi)`` (clipped to the file) all in state `state`."""
        lo, hi = min(max(0, int(lo)), int(n_file)), min(max(0, int(hi)), int(n_file))
        hi = max(lo, hi)
        counts = np.zeros(int(n_states), dtype=np.int64)
        counts[int(state)] = hi - lo
        return cls(int(index), str(path), int(n_file), lo, hi, int(n_states), int(state), counts)

    @classmethod
    def from_codes(cls, index, path, codes, n_states):
        """Layout of a whole file with a state code per frame (-1: no state)."""
        codes = np.asarray(codes, dtype=np.int64).reshape(-1)
        n = codes.shape[0]
        counts = np.bincount(codes[codes >= 0], minlength=int(n_states)).astype(np.int64)
        rank = np.zeros(n, dtype=np.int64)
        for s in range(int(n_states)):
            rows = np.flatnonzero(codes == s)
            rank[rows] = np.arange(rows.size)
        # end of each run of equal codes: the start of the next run
        starts = np.flatnonzero(np.diff(codes) != 0) + 1
        ends = np.append(starts, n)
        run_id = np.zeros(n, dtype=np.int64)
        run_id[starts] = 1
        run_end = ends[np.cumsum(run_id)]
        return cls(int(index), str(path), n, 0, n, int(n_states), None, counts, 0, codes, rank,
                   run_end)

    @property
    def labelled(self):
        """bool : whether frames carry their own state codes."""
        return self.state is None

    @property
    def n_frames(self):
        """int : frames of the segment that belong to a state."""
        return int(self.counts.sum())

    def _at(self, array, frames, outside):
        idx = np.asarray(frames, dtype=np.int64) - self.offset
        ok = (idx >= 0) & (idx < array.shape[0])
        out = np.full(idx.shape, outside, dtype=np.int64)
        out[ok] = array[idx[ok]]
        return out

    def states_of(self, frames):
        """State code of each frame (-1 outside the frame range or unlabelled)."""
        frames = np.asarray(frames, dtype=np.int64)
        inside = (frames >= self.lo) & (frames < self.hi)
        if self.codes is None:
            return np.where(inside, self.state, -1).astype(np.int64)
        return np.where(inside, self._at(self.codes, frames, -1), -1)

    def rank_of(self, frames):
        """Rank of each frame within (segment, its state); meaningful for frames with a state."""
        frames = np.asarray(frames, dtype=np.int64)
        if self.codes is None:
            return frames - self.lo
        return self._at(self.rank, frames, -1)

    def run_end_of(self, frames):
        """First frame after the run of same-state consecutive frames containing each frame."""
        frames = np.asarray(frames, dtype=np.int64)
        if self.codes is None:
            return np.full(frames.shape, self.hi, dtype=np.int64)
        return np.minimum(self._at(self.run_end, frames, 0), self.hi)

    def weights_of(self, frames):
        """Weight of each frame (biased runs), or None for an unbiased run."""
        if self.weight is None:
            return None
        idx = np.asarray(frames, dtype=np.int64) - self.offset
        return self.weight[idx]

    def _reach(self, frames, lag):
        """(index into the clock of the first frame of the segment's range, in this window,
        whose clock reaches ``clock[t] + lag``; whether there is one; the target times)."""
        idx = np.asarray(frames, dtype=np.int64) - self.offset
        target = self.clock[idx] + float(lag)
        n = max(0, min(self.clock.size, self.hi - self.offset))
        first = np.searchsorted(self.clock[:n], target, side="left")
        return idx, np.minimum(first, max(n - 1, 0)), first < n, target

    def partners(self, frames, lag):
        """Second frame of the rescaled-time pair of each frame (biased runs).

        Of the frames after ``t`` up to the first one whose clock reaches
        ``clock[t] + lag`` (`lag` in frame spacings of rescaled time), the one
        whose clock is closest to it (a tie: the later one); -1 when no frame
        of the segment's range (in this layout's window) reaches it. Rescaled
        frame steps vary, so the pairs' rescaled lags scatter about `lag`,
        by at most half a step either way.

        Examples
        --------
        >>> import dataclasses
        >>> lay = SegmentLayout.plain(0, "run.xtc", 6, 0, 6, 0, 1)
        >>> lay = dataclasses.replace(lay, clock=np.array([0.0, 0.5, 1.8, 2.9, 3.2, 5.0]))
        >>> lay.partners(np.array([0, 1, 2, 4]), 2).tolist()
        [2, 3, 4, -1]
        """
        idx, first, found, target = self._reach(frames, lag)
        before = first - 1
        closer = found & (before > idx) & (target - self.clock[before] < self.clock[first] - target)
        return np.where(found, np.where(closer, before, first) + self.offset, -1).astype(np.int64)

    def lag_span(self, lag):
        """Frames a lag in rescaled time spans at most in this segment (its halo).

        For an unbiased run the lag itself; for a biased one the largest
        distance from a frame ``t`` of the segment's range to the first frame
        of the range whose clock reaches ``clock[t] + lag`` (every frame
        :meth:`partners` may look at), or to the range's last frame when none
        reaches it: a shorter lag's partner of that ``t`` may lie anywhere up to
        there, so the span never shrinks as the lag grows and the halo of a
        pass's longest lag holds the pairs of its shorter ones. Call it on the
        whole layout, not a window.

        Examples
        --------
        >>> import dataclasses
        >>> lay = SegmentLayout.plain(0, "run.xtc", 5, 0, 5, 0, 1)
        >>> lay = dataclasses.replace(lay, clock=np.array([0.0, 7.26, 8.05, 8.58, 9.09, 9.6]))
        >>> [lay.lag_span(lag) for lag in (1, 2, 4)]  # t = 1 pairs with 3 at lag 1
        [2, 3, 3]
        """
        lag = int(lag)
        if self.clock is None or lag <= 0:
            return lag
        if lag not in self.spans:
            ran = self.clock[:max(0, self.hi - self.offset)]  # what the range's clock sums
            if not np.isfinite(ran).all():
                frame = self.offset + int(np.argmin(np.isfinite(ran))) - 1
                raise InputError(f"the rescaled time of trajectory {self.path!r} overflows at "
                                 f"frame {frame} (exp(V/kT) of its bias there is not finite: "
                                 "V above about 700 kT): lagged pairs in rescaled time cannot "
                                 "be formed; check the bias energies and the temperature")
            t = np.arange(self.lo, self.hi, dtype=np.int64)
            _, first, found, _ = self._reach(t, lag) if t.size else (t, t, t > 0, t)
            span = np.where(found, first + self.offset, self.hi - 1) - t
            self.spans[lag] = int(span.max()) if span.size else 0
        return self.spans[lag]

    def window(self, start, stop):
        """The same layout with its per-frame arrays cut to frames ``[start, stop)``."""
        if self.codes is None and self.weight is None:
            return self
        a, b = max(0, int(start) - self.offset), max(0, int(stop) - self.offset)

        def cut(array):
            return None if array is None else array[a:b].copy()

        return SegmentLayout(self.index, self.path, self.n_file, self.lo, self.hi,
                             self.n_states, self.state, self.counts, self.offset + a,
                             cut(self.codes), cut(self.rank), cut(self.run_end),
                             cut(self.weight), cut(self.clock))


@dataclass(frozen=True)
class Folds:
    """Assignment of every frame to a held-out fold, from its keys only.

    Parameters
    ----------
    n_folds : int
    mode : {'block', 'trajectory'}, default='block'
        ``'block'``: fold ``rank * n_folds // count`` of the frame's (segment,
        state) run, so each run is cut into `n_folds` contiguous pieces;
        ``'trajectory'``: the fold of the frame's file for its state.
    file_fold : dict of (int, str) to int, default=None
        ``(state, path) -> fold`` (mode ``'trajectory'``).

    Examples
    --------
    >>> lay = SegmentLayout.plain(0, "a.xtc", 10, 0, 10, 0, 1)
    >>> Folds(2).of(lay, np.zeros(10, int), np.arange(10)).tolist()
    [0, 0, 0, 0, 0, 1, 1, 1, 1, 1]
    """

    n_folds: int
    mode: str = "block"
    file_fold: dict | None = None

    def __post_init__(self):
        if self.mode not in ("block", "trajectory"):
            raise ValueError(f"mode={self.mode!r} must be 'block' or 'trajectory'")
        if self.mode == "trajectory" and not self.file_fold:
            raise ValueError("mode 'trajectory' needs file_fold")

    @classmethod
    def plan(cls, layouts, n_folds, *, min_frames=MIN_FRAMES_PER_FOLD, state_names=None):
        """Folds by trajectory when every state has enough files, else by block.

        By trajectory when each state has frames in at least two files and
        every state keeps at least `min_frames` frames in each of
        ``min(n_folds, fewest files)`` folds (each state's files dealt to the
        folds in the order first given); otherwise by contiguous block, with
        ``min(n_folds, fewest frames of a state // min_frames)`` folds.

        Parameters
        ----------
        layouts : sequence of SegmentLayout
        n_folds : int
            Folds wanted.
        min_frames : int, default=MIN_FRAMES_PER_FOLD
        state_names : sequence of str, default=None
            For the message.

        Raises
        ------
        InputError
            When a state has too few frames for two folds.

        Examples
        --------
        >>> lays = [SegmentLayout.plain(i, f"{i}.xtc", 40, 0, 40, i % 2, 2) for i in range(4)]
        >>> f = Folds.plan(lays, 4)
        >>> f.mode, f.n_folds
        ('trajectory', 2)
        """
        n_states = layouts[0].n_states if layouts else 0
        seg_counts = np.array([lay.counts for lay in layouts], dtype=np.int64).reshape(
            len(layouts), n_states)
        files = [list(dict.fromkeys(lay.path for lay in layouts if lay.counts[s] > 0))
                 for s in range(n_states)]
        if n_states and min(len(f) for f in files) >= 2:
            k = min(int(n_folds), min(len(f) for f in files))
            fold_of = {(s, p): i % k for s in range(n_states) for i, p in enumerate(files[s])}
            per_fold = np.zeros((n_states, k))
            for lay in layouts:
                for s in range(n_states):
                    if lay.counts[s]:
                        per_fold[s, fold_of[(s, lay.path)]] += lay.counts[s]
            if per_fold.min() >= min_frames:
                return cls(k, "trajectory", fold_of)
        totals = seg_counts.sum(axis=0)
        k = int(min(int(n_folds), totals.min() // min_frames)) if n_states else 0
        if k < 2:
            s = int(np.argmin(totals)) if n_states else 0
            name = repr(state_names[s]) if state_names is not None else str(s)
            n = int(totals[s]) if n_states else 0
            raise InputError(
                f"state {name} has only {n} frame{'' if n == 1 else 's'}; held-out "
                f"scoring needs at least {2 * min_frames} per state ({min_frames} in each of "
                "two folds); give more frames")
        return cls(k, "block")

    def of(self, layout, states, ranks):
        """Fold of frames with state codes `states` and ranks `ranks` in `layout`."""
        states = np.asarray(states, dtype=np.int64)
        if self.mode == "trajectory":
            out = np.empty(states.shape, dtype=np.int64)
            for s in np.unique(states):
                out[states == s] = self.file_fold[(int(s), layout.path)]
            return out
        counts = layout.counts[states]
        return (np.asarray(ranks, dtype=np.int64) * self.n_folds) // np.maximum(counts, 1)

    def first_rank(self, layout, states, folds):
        """Rank of the first frame of each fold within (segment, state)."""
        if self.mode == "trajectory":
            return np.zeros(np.shape(states), dtype=np.int64)
        counts = layout.counts[np.asarray(states, dtype=np.int64)]
        # smallest r with r * n_folds // count >= fold: ceil(fold * count / n_folds)
        return -((-np.asarray(folds, dtype=np.int64) * counts) // self.n_folds)


@dataclass
class FrameKeys:
    """Keys of some frames of one segment (see :func:`frame_keys`).

    Attributes
    ----------
    states, rank : ndarray of int64
    fold, block : ndarray of int64
        Zeros when no folds / no block length were given.
    """

    states: np.ndarray
    rank: np.ndarray
    fold: np.ndarray
    block: np.ndarray


def frame_keys(layout, frames, *, folds=None, block_frames=None):
    """State, rank, fold and bootstrap block of frames of one segment.

    Parameters
    ----------
    layout : SegmentLayout
    frames : array-like of int
        Absolute frame numbers in the segment's file (frames with a state).
    folds : Folds, default=None
        None: every frame in fold 0.
    block_frames : int, default=None
        Bootstrap block length in frames; None: one block per (segment,
        state[, fold]).

    Returns
    -------
    FrameKeys

    Examples
    --------
    >>> lay = SegmentLayout.plain(0, "a.xtc", 100, 10, 30, 0, 1)
    >>> k = frame_keys(lay, np.arange(10, 30), folds=Folds(2), block_frames=4)
    >>> k.fold.tolist()
    [0, 0, 0, 0, 0, 0, 0, 0, 0, 0, 1, 1, 1, 1, 1, 1, 1, 1, 1, 1]
    >>> k.block.tolist()
    [0, 0, 0, 0, 1, 1, 1, 1, 2, 2, 0, 0, 0, 0, 1, 1, 1, 1, 2, 2]
    """
    frames = np.asarray(frames, dtype=np.int64)
    states = layout.states_of(frames)
    rank = layout.rank_of(frames)
    zeros = np.zeros(frames.shape, dtype=np.int64)
    fold = zeros if folds is None else folds.of(layout, states, rank)
    if block_frames is None:
        block = zeros
    else:
        start = zeros if folds is None else folds.first_rank(layout, states, fold)
        block = (rank - start) // int(block_frames)
    return FrameKeys(states, rank, fold, block)


def thinning_stride(counts, limit, *, multiple_of=1):
    """The smallest stride that keeps at most `limit` frames in all.

    A subsample that keeps, in each group of frames (a segment, or a (segment,
    state) run), those whose rank ``r`` (0, 1, 2, ... within the group) has
    ``r % stride == 0`` holds ``sum(ceil(count / stride))`` frames. This is the
    smallest such stride, a multiple of `multiple_of`, for which that sum is at
    most `limit` -- a function of the counts only, so the subsample is the same
    for every task split, and bounded whatever the number of frames.

    Parameters
    ----------
    counts : array-like of int
        Frames in each group (zeros allowed).
    limit : int
        Most frames kept in all; at least the number of non-empty groups (each
        keeps its first frame at least).
    multiple_of : int, default=1
        The stride is a multiple of this (to thin a subsample that was itself
        taken with this stride).

    Returns
    -------
    int
        At least `multiple_of`.

    Raises
    ------
    ValueError
        When `limit` is smaller than the number of non-empty groups.

    Examples
    --------
    >>> thinning_stride([2000, 2000], 1000)
    4
    >>> thinning_stride([999], 1000), thinning_stride([8000], 1000)
    (1, 8)
    >>> thinning_stride([50000, 3], 5000, multiple_of=2)
    12
    """
    counts = np.asarray(counts, dtype=np.int64).reshape(-1)
    counts = counts[counts > 0]
    step, limit = max(1, int(multiple_of)), int(limit)
    if counts.size > limit:
        raise ValueError(f"limit={limit} frames cannot hold one frame of each of the "
                         f"{counts.size} groups")

    def kept(stride):
        return int(np.sum(-(-counts // stride)))

    m = max(1, -(-int(counts.sum()) // (limit * step)))  # a lower bound
    while kept(m * step) > limit:
        m += 1
    return m * step
