"""The pass engine: tasks over leaves of frames, a fixed reduction tree, any executor.

A *pass* maps the frames of one leaf to a partial result, merges partials and
finishes the root. Leaves are runs of :data:`LEAF_FRAMES` consecutive frames
aligned to absolute frame numbers of each file (leaf ``frame // leaf_frames``;
the first and last leaf of a segment may be partial); a leaf's partial is
computed from exactly its frames (plus the frames after it that its lagged
pairs need, the *halo*), whichever chunk or task read them. Partials merge in
the fixed tree of :mod:`cvdesign.passes.tree`: per segment over its leaves,
then over the segments. So any task split, read chunk size, executor, worker
count or order of arrival gives the same bytes.

Leaf arithmetic runs with one BLAS thread (threadpoolctl), so its result does
not depend on the number of threads either.
"""

import contextlib
import dataclasses
import functools
import logging
import math
import threading
from dataclasses import dataclass

import numpy as np
from threadpoolctl import threadpool_limits

from .. import progress
from ..errors import InputError
from ..io.source import Source, check_label_count
from ..stats.scratch import release as release_scratch
from .keys import SegmentLayout
from .read import file_frames, read_chunks
from .tree import TreeReducer, merge_optional

__all__ = ["LEAF_FRAMES", "MAX_LEAF_FRAMES", "LEAF_VALUES", "FEATURE_BUDGET", "Featurizer",
           "PoolFeaturizer", "CoordinateFeaturizer", "Pass", "Leaf", "Task", "TaskPlan", "plan_tasks",
           "leaf_frames_for", "run_pass", "run_task", "first_frame", "reference_features"]

_log = logging.getLogger(__name__)

#: Frames per leaf (the unit of arithmetic) of a pool of up to about 2,000 features.
LEAF_FRAMES = 256
#: Longest leaf, for few features (a screened or shortlisted set).
MAX_LEAF_FRAMES = 4096
#: Feature values a leaf of few features holds (2**19 numbers, 4 MB): few features get
#: longer leaves, up to :data:`MAX_LEAF_FRAMES`, so that the per-leaf products (one
#: ``syrk`` of a 256 x 200 block costs about twice its share of a 2048 x 200 one, measured)
#: and the per-leaf Python work are spread over more frames.
LEAF_VALUES = 1 << 19
#: Feature values (float64) a leaf or a read chunk may hold: 2e6 numbers, 16 MB.
FEATURE_BUDGET = 2_000_000


_BLAS_LOCK = threading.Lock()
_BLAS = {"depth": 0, "limits": None}


@contextlib.contextmanager
def one_blas_thread():
    """Limit BLAS to one thread while any thread of this process is inside.

    Leaf arithmetic runs under it, so its bits do not depend on the thread
    count. Threads of a threaded executor share one limit, lifted when the
    last of them leaves (a plain ``threadpool_limits`` per thread would
    restore the original count while another thread still computes).
    """
    with _BLAS_LOCK:
        if _BLAS["depth"] == 0:
            _BLAS["limits"] = threadpool_limits(limits=1, user_api="blas")
        _BLAS["depth"] += 1
    try:
        yield
    finally:
        with _BLAS_LOCK:
            _BLAS["depth"] -= 1
            if _BLAS["depth"] == 0:
                _BLAS["limits"].restore_original_limits()
                _BLAS["limits"] = None


def leaf_frames_for(n_features, budget=FEATURE_BUDGET):
    """Leaf length for `n_features` features.

    :data:`LEAF_FRAMES` frames for a pool of about 2,000 features; longer for fewer
    features (a power of two, about :data:`LEAF_VALUES` values, at most
    :data:`MAX_LEAF_FRAMES` frames); shorter for big pools (at most `budget` values,
    at least 8 frames). A function of the number of features only, so it is the
    same for every executor and task split.

    Examples
    --------
    >>> leaf_frames_for(100), leaf_frames_for(200), leaf_frames_for(1802)
    (4096, 2048, 256)
    >>> leaf_frames_for(100_000)
    20
    """
    n = max(1, int(n_features))
    few = LEAF_VALUES // n
    longer = 1 << (few.bit_length() - 1) if few >= LEAF_FRAMES else LEAF_FRAMES
    return int(min(MAX_LEAF_FRAMES, longer, max(8, budget // n)))


# --------------------------------------------------------------------------- featurizers
class Featurizer:
    """Feature values of frames of the selected atoms (base class).

    Subclasses set :attr:`atom_indices` (sorted topology indices of the atoms
    to read) and :attr:`n_features`, and implement ``__call__``. A featurizer
    is pickled to every worker once per run; its values must depend on each
    frame alone (not on which other frames share the chunk).
    """

    atom_indices = None
    n_features = 0

    def __call__(self, trajectory):
        """Features of every frame, shape ``(n_frames, n_features)``, float64.

        Parameters
        ----------
        trajectory : mdtraj.Trajectory
            Frames of the atoms :attr:`atom_indices`, in that order, with the
            unit cell when the file has one, and no topology.
        """
        raise NotImplementedError


class PoolFeaturizer(Featurizer):
    """The features of a :class:`~cvdesign.pool.Pool` (through :meth:`Pool.features`).

    Parameters
    ----------
    pool : cvdesign.pool.Pool

    Examples
    --------
    >>> import mdtraj as md
    >>> from cvdesign.pool import Descriptor, Pool
    >>> top = md.Topology(); r = top.add_residue("X", top.add_chain())
    >>> for i in range(3):
    ...     _ = top.add_atom(f"C{i}", md.element.carbon, r)
    >>> f = PoolFeaturizer(Pool([Descriptor("distance", (0, 2), "d")], top))
    >>> xyz = np.array([[[0, 0, 0], [9, 9, 9], [0.3, 0.4, 0]]], dtype=np.float32)
    >>> f.atom_indices.tolist(), np.round(f(md.Trajectory(xyz[:, [0, 2]], None)), 6).tolist()
    ([0, 2], [[0.5]])
    """

    def __init__(self, pool):
        self.pool = pool
        self.atom_indices = pool.atom_indices()
        self.n_features = pool.n_features

    def __call__(self, trajectory):
        return self.pool.features(trajectory, atom_indices=self.atom_indices)


class CoordinateFeaturizer(Featurizer):
    """Cartesian coordinates (nm) of some atoms as features: x, y, z of each atom in turn.

    Parameters
    ----------
    atom_indices : array-like of int
        Topology indices of the atoms, sorted.

    Examples
    --------
    >>> import mdtraj as md
    >>> f = CoordinateFeaturizer([1, 4])
    >>> f(md.Trajectory(np.arange(6.0).reshape(1, 2, 3), None)).tolist()
    [[0.0, 1.0, 2.0, 3.0, 4.0, 5.0]]
    """

    def __init__(self, atom_indices):
        self.atom_indices = np.unique(np.asarray(atom_indices, dtype=np.intp))
        self.n_features = 3 * self.atom_indices.size

    def __call__(self, trajectory):
        return trajectory.xyz.reshape(trajectory.n_frames, -1).astype(np.float64)


# --------------------------------------------------------------------------- passes
class Pass:
    """A statistic over frames: map a leaf to a partial, merge partials, finish.

    Subclasses set :attr:`featurizer` and implement :meth:`map`, :meth:`merge`
    and :meth:`finish`; a pass with lagged pairs overrides :meth:`halo`.
    Partials are plain picklable objects (dicts of
    :class:`~cvdesign.stats.moments.Moments` and the like); ``merge(a, b)`` must
    return a new object and leave its inputs unchanged, and ``map`` may return
    None for "nothing" (None merges as the identity).

    An *exact* pass (``exact = True``: integer counts, histograms) has a merge
    that is exact and so associative; it skips the tree, and
    :meth:`accumulate` may add a leaf into its running partial in place. With
    weighted frames (biased runs) its counts are sums of weights, which are not
    exact: it then goes through the tree like every other pass.

    The lags of a pass (:meth:`halo`, :meth:`Leaf.pairs`) are in frame
    spacings; in a biased run they are taken in rescaled time
    (:meth:`Leaf.pairs`), unless :attr:`rescaled_time` is False.

    Attributes
    ----------
    featurizer : Featurizer
    exact : bool
    rescaled_time : bool
        Whether the lags of this pass are in rescaled time in biased runs.
    """

    featurizer = None
    exact = False
    rescaled_time = True

    def halo(self, segment_index):
        """Frames needed after a leaf's last frame (its longest lag), for a segment."""
        return 0

    def map(self, leaf):
        """Partial of one :class:`Leaf` (or None)."""
        raise NotImplementedError

    def merge(self, a, b):
        """Partial of the union of two disjoint sets of frames (`a` before `b`)."""
        raise NotImplementedError

    def accumulate(self, acc, leaf):
        """Exact passes: `acc` with `leaf` added (may modify `acc`; None: nothing yet)."""
        return merge_optional(self.merge, acc, self.map(leaf))

    def finish(self, partial, plan):
        """Result from the root partial (None when no frame was seen) and the :class:`TaskPlan`."""
        return partial


def _joined(blocks):
    """Row blocks as one C-contiguous array (a single block as it is, when contiguous)."""
    if len(blocks) == 1:
        return np.ascontiguousarray(blocks[0])
    return np.concatenate(blocks)


def _lag_halo(lags, segment_index):
    """Halo of a lag given as None, an int, or {segment: int or None}."""
    if lags is None:
        return 0
    if isinstance(lags, dict):
        return int(lags.get(segment_index) or 0)
    return int(lags)


# --------------------------------------------------------------------------- leaves
class Leaf:
    """The frames of one leaf and the halo after it, as a pass sees them.

    Only frames that belong to a state are present (in frame order). The
    window holds the leaf's rows first, then the halo's.

    Attributes
    ----------
    segment : int
        Segment index.
    index : int
        Absolute leaf number (``frame // leaf_frames``).
    layout : SegmentLayout
        The segment's layout (cut to the task's frames), for
        :func:`~cvdesign.passes.keys.frame_keys`.
    n_states : int
    frames, states : ndarray of int64
        Frame numbers and state codes of the leaf's rows.
    x : ndarray of shape (n_rows, n_features)
        Their features.
    time : ndarray or None
        Their stored times, ps.
    box : ndarray of shape (n_rows, 3, 3) or None
        Their box vectors, nm.
    window_frames, window_states, window_x : ndarray
        The same for the leaf's rows followed by the halo's.

    The features may be given as a list of row blocks (consecutive pieces of
    the window, as read in chunks): they are joined only when a pass asks for
    rows that span two blocks (:attr:`x`, :attr:`window_x`), and
    :meth:`window_columns` joins only the columns asked for. The values are the
    same bytes either way.
    """

    __slots__ = ("segment", "index", "layout", "n_states", "window_frames", "window_states",
                 "_x", "_rows", "window_time", "window_box", "n")

    def __init__(self, segment, index, layout, n_states, frames, states, x, time, box, n):
        self.segment, self.index, self.layout, self.n_states = segment, index, layout, n_states
        self.window_frames, self.window_states = frames, states
        self._x = x if isinstance(x, np.ndarray) else list(x)
        self._rows = None  # the leaf's rows joined, when they span two row blocks
        self.window_time, self.window_box, self.n = time, box, n

    @property
    def window_x(self):
        if not isinstance(self._x, np.ndarray):  # joined once, on first use
            self._x = _joined(self._x)
            self._rows = None  # (x is a view of it from now on)
        return self._x

    def window_columns(self, columns):
        """``window_x[:, columns]``, joining only those columns of the row blocks."""
        if isinstance(self._x, np.ndarray):
            return self._x[:, columns]
        return _joined([block[:, columns] for block in self._x])

    @property
    def frames(self):
        return self.window_frames[:self.n]

    @property
    def states(self):
        return self.window_states[:self.n]

    @property
    def x(self):
        if isinstance(self._x, np.ndarray):
            return self._x[:self.n]
        if self._rows is None:  # joined once per leaf, whichever passes ask for them
            blocks, rows = [], 0
            for block in self._x:  # only the blocks of the leaf's rows (not the halo's)
                blocks.append(block[:self.n - rows])
                rows += blocks[-1].shape[0]
                if rows >= self.n:
                    break
            self._rows = _joined(blocks)  # a view when they are in one block
        return self._rows

    @property
    def time(self):
        return None if self.window_time is None else self.window_time[:self.n]

    @property
    def box(self):
        return None if self.window_box is None else self.window_box[:self.n]

    @property
    def weights(self):
        """ndarray of float64 or None : weights of the leaf's rows (None: unbiased run)."""
        return self.layout.weights_of(self.frames)

    @classmethod
    def of_matrix(cls, x, leaf_frames, halo=0):
        """The leaves of an in-memory feature matrix: one unbiased segment, one state.

        For checking and timing a pass's leaf arithmetic without files (the engine
        builds its leaves from what it reads).

        Parameters
        ----------
        x : ndarray of shape (n_frames, n_features)
            Feature values of consecutive frames.
        leaf_frames : int
        halo : int, default=0
            Rows after each leaf in its window (the longest lag a pass may ask for).

        Returns
        -------
        list of Leaf

        Examples
        --------
        >>> [(leaf.n, leaf.window_x.shape[0]) for leaf in Leaf.of_matrix(np.zeros((5, 2)), 2, 1)]
        [(2, 3), (2, 3), (1, 1)]
        """
        n = x.shape[0]
        lay = SegmentLayout.plain(0, "memory", n, 0, n, 0, 1)
        out = []
        for k, a in enumerate(range(0, n, int(leaf_frames))):
            b = min(n, a + int(leaf_frames))
            c = min(n, b + int(halo))
            out.append(cls(0, k, lay, 1, np.arange(a, c), np.zeros(c - a, dtype=np.int64),
                           x[a:c], None, None, b - a))
        return out

    def pairs(self, lag, rescaled=True):
        """Lagged pairs ``(t, u)`` whose first frame is in this leaf.

        In an unbiased run (and with ``rescaled=False``) ``u = t + lag``; in a
        biased run ``u`` is the frame closest in rescaled time to ``clock[t] +
        lag`` (:meth:`SegmentLayout.partners`). A pair is valid
        when every frame from ``t`` to ``u`` belongs to the segment, is
        selected and carries the same state (no pair spans a file, a gap or a
        state change).

        Parameters
        ----------
        lag : int
            Lag in frame spacings (at most the pass's halo).
        rescaled : bool, default=True
            In a biased run, take the lag in rescaled time; False: in frames.

        Returns
        -------
        i, j : ndarray of intp
            Rows of the leaf (first frames) and rows of the window (second
            frames) of the valid pairs, in the order of ``t``.
        """
        lag = int(lag)
        t = self.frames
        if rescaled and self.layout.clock is not None:
            u = self.layout.partners(t, lag)
            ok = (u >= 0) & (self.layout.run_end_of(t) > u)
        else:
            u = t + lag
            ok = self.layout.run_end_of(t) > u
        i = np.flatnonzero(ok)
        u = u[i]
        j = np.searchsorted(self.window_frames, u)
        if j.size and (j[-1] >= self.window_frames.size
                       or not np.array_equal(self.window_frames[j], u)):
            raise RuntimeError(f"lag {lag} is longer than the halo read after leaf {self.index}")
        return i, j.astype(np.intp)


# --------------------------------------------------------------------------- tasks
@dataclass(frozen=True)
class Task:
    """Leaves ``[leaf_start, leaf_stop)`` (absolute leaf numbers) of one segment."""

    segment: int
    leaf_start: int
    leaf_stop: int


class TaskPlan:
    """Segments cut into leaves, and tasks covering every leaf once.

    Built by :func:`plan_tasks`. The results of a pass depend on
    :attr:`leaf_frames` (a leaf is the unit of arithmetic), never on
    :attr:`tasks`.

    Attributes
    ----------
    layouts : list of SegmentLayout
    leaf_frames : int
    tasks : list of Task
    states : list of str
    topology : mdtraj.Topology
    """

    def __init__(self, layouts, leaf_frames, tasks, states, topology):
        self.layouts = list(layouts)
        self.leaf_frames = int(leaf_frames)
        self.states = list(states)
        self.topology = topology
        self.tasks = self._checked(_split(self, None, None) if tasks is None else tasks)

    @property
    def n_states(self):
        return len(self.states)

    @property
    def n_segments(self):
        return len(self.layouts)

    def leaves(self, segment):
        """Absolute leaf numbers of a segment (empty for a segment without frames)."""
        lay = self.layouts[segment]
        if lay.hi <= lay.lo:
            return range(0)
        return range(lay.lo // self.leaf_frames, -(-lay.hi // self.leaf_frames))

    def task_frames(self, task):
        """Frame range ``[start, stop)`` of a task."""
        lay = self.layouts[task.segment]
        return (max(lay.lo, task.leaf_start * self.leaf_frames),
                min(lay.hi, task.leaf_stop * self.leaf_frames))

    def segment_counts(self):
        """Frames of each state in each segment, shape (n_segments, n_states), int64."""
        return np.array([lay.counts for lay in self.layouts], dtype=np.int64).reshape(
            self.n_segments, self.n_states)

    def _checked(self, tasks):
        tasks = list(tasks)
        covered = {}
        for t in tasks:
            if not isinstance(t, Task):
                raise TypeError(f"tasks must be Task objects, got {type(t).__name__}")
            if not 0 <= t.segment < self.n_segments:
                raise ValueError(f"task {t} names no segment of the plan")
            leaves = self.leaves(t.segment)
            if not (t.leaf_start < t.leaf_stop and t.leaf_start >= leaves.start
                    and t.leaf_stop <= leaves.stop):
                raise ValueError(f"task {t} is not within the leaves {leaves} of its segment")
            covered.setdefault(t.segment, []).append((t.leaf_start, t.leaf_stop))
        for si in range(self.n_segments):
            leaves = self.leaves(si)
            spans = sorted(covered.get(si, []))
            pos = leaves.start
            for a, b in spans:
                if a != pos:
                    raise ValueError(f"tasks of segment {si} leave a gap or overlap at leaf "
                                     f"{min(a, pos)}")
                pos = b
            if pos != leaves.stop:
                raise ValueError(f"tasks of segment {si} do not cover leaves up to "
                                 f"{leaves.stop}")
        return tasks

    def with_tasks(self, tasks):
        """The same plan with other tasks (checked to cover every leaf exactly once)."""
        return TaskPlan(self.layouts, self.leaf_frames, tasks, self.states, self.topology)

    def split(self, *, n_tasks=None, frames_per_task=None):
        """The same leaves split into other tasks (see :func:`plan_tasks`)."""
        return self.with_tasks(_split(self, n_tasks, frames_per_task))

    def for_features(self, n_features, n_workers=1):
        """The same segments in leaves of :func:`leaf_frames_for` `n_features`, in tasks for
        `n_workers` workers (about four each; one task per segment for one worker).

        The leaves depend on the number of features only, so results do not
        depend on `n_workers` (the tasks do). Files are not counted again.
        """
        plan = TaskPlan(self.layouts, leaf_frames_for(n_features), None, self.states,
                        self.topology)
        return plan.split(n_tasks=4 * int(n_workers)) if int(n_workers) > 1 else plan


def _split(plan, n_tasks, frames_per_task):
    if n_tasks is not None and frames_per_task is not None:
        raise InputError("give n_tasks or frames_per_task, not both")
    sizes = {si: len(plan.leaves(si)) for si in range(plan.n_segments)}
    total = sum(sizes.values())
    if frames_per_task is not None:
        if int(frames_per_task) < 1:
            raise InputError(f"frames_per_task={frames_per_task!r} must be a positive number "
                             "of frames")
        per = max(1, int(frames_per_task) // plan.leaf_frames)
    elif n_tasks is not None:
        if int(n_tasks) < 1:
            raise InputError(f"n_tasks={n_tasks!r} must be a positive number of tasks")
        per = max(1, math.ceil(total / int(n_tasks)))
    else:
        per = None
    tasks = []
    for si in range(plan.n_segments):
        leaves = plan.leaves(si)
        step = len(leaves) if per is None else per
        for a in range(leaves.start, leaves.stop, max(1, step)):
            tasks.append(Task(si, a, min(leaves.stop, a + step)))
    return tasks


def _layouts(source):
    index = {s: i for i, s in enumerate(source.states)}
    out, lengths = [], {}
    reweighting = source.reweighting()  # None without biased runs
    for si, seg in enumerate(source.segments):
        key = str(seg.path)
        if key not in lengths:  # a file given as several frame ranges is counted once
            lengths[key] = file_frames(seg.path)
        n_file = lengths[key]
        if seg.labels is not None:
            check_label_count(seg, n_file)
            codes = np.array([-1 if x is None else index[x] for x in seg.labels],
                             dtype=np.int64)
            lay = SegmentLayout.from_codes(si, str(seg.path), codes, len(index))
        else:
            lay = SegmentLayout.plain(
                si, str(seg.path), n_file, seg.start or 0,
                n_file if seg.stop is None else seg.stop, index[seg.state], len(index))
        if reweighting is not None and si in reweighting.weights:
            # (an unbiased run of a state with biased runs: weights, and its own clock)
            if reweighting.weights[si].size != n_file:
                raise InputError(f"bias-energy file {str(seg.bias_path)!r} holds "
                                 f"{reweighting.weights[si].size} bias energies, but "
                                 f"trajectory {key!r} has {n_file} frames; give one per frame")
            clock = reweighting.clocks.get(si)
            lay = dataclasses.replace(lay, weight=reweighting.weights[si],
                                      clock=None if clock is None else clock[:n_file])
        out.append(lay)
    return out


def plan_tasks(source, *, leaf_frames=LEAF_FRAMES, n_tasks=None, frames_per_task=None):
    """Cut the segments of a source into leaves and the leaves into tasks.

    Counts the frames of every file (mdtraj's file objects) and checks the
    label arrays (one label per frame); frame ranges are clipped to the file.

    Parameters
    ----------
    source : cvdesign.io.source.Source
    leaf_frames : int, default=LEAF_FRAMES
        Frames per leaf (aligned to absolute frame numbers). Results depend on
        it; see :func:`leaf_frames_for`.
    n_tasks : int, default=None
        About this many tasks over all segments (a task never spans two
        segments, so there may be more).
    frames_per_task : int, default=None
        At most this many frames per task (rounded down to whole leaves, at
        least one). None for both: one task per segment.

    Returns
    -------
    TaskPlan

    Raises
    ------
    InputError
        For a source that is not a Source, a file whose frames cannot be
        counted, a label array of another length than its file.
    """
    if not isinstance(source, Source):
        raise InputError(f"plan_tasks() needs a Source, not {type(source).__name__}")
    if int(leaf_frames) < 1:
        raise InputError(f"leaf_frames={leaf_frames!r} must be a positive number of frames")
    plan = TaskPlan(_layouts(source), int(leaf_frames), None, source.states, source.topology)
    if n_tasks is None and frames_per_task is None:
        return plan
    return plan.split(n_tasks=n_tasks, frames_per_task=frames_per_task)


# --------------------------------------------------------------------------- running a task
@dataclass
class _Context:
    """What every task of a run shares (sent to each worker once)."""

    passes: tuple
    featurizer: Featurizer
    topology: object
    leaf_frames: int
    n_states: int
    chunk_frames: int
    weighted: bool = False  # biased runs: weighted counts, so no pass is exact


def _exact(pass_, ctx):
    """Whether a pass skips the tree in this run (exact counts: never with weights)."""
    return pass_.exact and not ctx.weighted


def _halo(passes, layout, segment):
    """Frames read after a task for its passes' lags (rescaled time spans vary in a biased
    run: the longest span of the lag over the segment, :meth:`SegmentLayout.lag_span`)."""
    out = 0
    for p in passes:
        lag = p.halo(segment)
        out = max(out, layout.lag_span(lag) if p.rescaled_time else lag)
    return out


@dataclass
class _Work:
    """One task as a worker gets it: the frames to read and the segment's layout."""

    number: int
    task: Task
    path: str
    layout: SegmentLayout
    n_leaves: int          # leaves of the segment (the tree's width)
    first_leaf: int        # absolute number of the segment's first leaf
    start: int             # task frames [start, stop); read up to read_stop (halo)
    stop: int
    read_stop: int
    halo: int

    def describe(self):
        return (f"task {self.number + 1}: frames {self.start}-{self.stop - 1} of "
                f"{self.path!r}")


def _leaves(ctx, work):
    """Yield the task's leaves, reading in chunks and keeping only what the next leaves need.

    A leaf's rows (and halo) are a view of the chunk that holds them; only a window
    that spans two chunks is copied.
    """
    lay, L = work.layout, ctx.leaf_frames
    pieces = []          # (frames, states, x, time, box) of each chunk still needed
    leaf = work.task.leaf_start

    def window(lo, hi):
        """Columns of the rows with frames in [lo, hi), or None when there are none."""
        parts = []
        for piece in pieces:
            fr = piece[0]
            if fr[-1] < lo:
                continue
            if fr[0] >= hi:
                break
            a, b = np.searchsorted(fr, [lo, hi])
            if b > a:
                parts.append([None if c is None else c[a:b] for c in piece])
        if not parts:
            return None
        # features stay row blocks (joined by the Leaf only if a pass needs them joined);
        # frames, states, times and boxes are small and joined here
        return [[p[2] for p in parts] if i == 2 else None if c[0] is None else
                c[0] if len(c) == 1 else np.concatenate(c)
                for i, c in enumerate(zip(*parts))]

    def emit(upto, final):
        """Yield the leaves whose windows end before frame `upto` (all when `final`), one
        at a time: at most one copied window is alive."""
        nonlocal leaf, pieces
        while leaf < work.task.leaf_stop:
            a, b = max(lay.lo, leaf * L), min(lay.hi, (leaf + 1) * L)
            need = min(work.read_stop, b + work.halo)
            if not final and need > upto:
                break
            win = window(a, need)
            n = 0 if win is None else int(np.searchsorted(win[0], b))
            number = leaf
            leaf += 1
            nxt = max(lay.lo, leaf * L)
            pieces = [p for p in pieces if p[0][-1] >= nxt]
            if n == 0:
                yield number, None
            else:
                yield number, Leaf(work.task.segment, number, lay, ctx.n_states, win[0],
                                   win[1], win[2], win[3], win[4], n)
            win = None

    def select(frames):
        return lay.states_of(frames) >= 0

    for chunk in read_chunks(work.path, work.start, work.read_stop, ctx.featurizer.atom_indices,
                             ctx.topology, chunk_frames=ctx.chunk_frames, select=select):
        x = np.asarray(ctx.featurizer(chunk.trajectory), dtype=np.float64)
        if x.shape != (chunk.frames.size, ctx.featurizer.n_features):
            raise ValueError(f"the featurizer returned shape {x.shape} for "
                             f"{chunk.frames.size} frames and {ctx.featurizer.n_features} "
                             "features")
        box = chunk.trajectory.unitcell_vectors
        pieces.append((chunk.frames, lay.states_of(chunk.frames), x, chunk.time, box))
        yield from emit(int(chunk.frames[-1]) + 1, False)
    yield from emit(work.read_stop, True)


def run_task(ctx, work, tick=None):
    """Run one task in a worker: per pass, the tree nodes it completed (or its exact sum).

    Parameters
    ----------
    ctx : _Context
        What every task of the run shares.
    work : _Work
        The task.
    tick : callable, default=None
        ``tick(work.number, n_rows)`` after each leaf (progress, in this
        process only; never part of the result).

    Returns
    -------
    list
        One entry per pass of the run: ``[(h, k, partial), ...]`` for a tree
        pass (nodes of the segment's leaf tree), the accumulated partial for an
        exact pass.
    """
    with one_blas_thread():
        trees, accs = [], []
        exact = [_exact(p, ctx) for p in ctx.passes]
        for p, e in zip(ctx.passes, exact):
            trees.append(None if e else TreeReducer(work.n_leaves, p.merge))
            accs.append(None)
        for number, leaf in _leaves(ctx, work):
            k = number - work.first_leaf
            for i, p in enumerate(ctx.passes):
                if exact[i]:
                    if leaf is not None:
                        accs[i] = p.accumulate(accs[i], leaf)
                else:
                    trees[i].add(0, k, None if leaf is None else p.map(leaf))
            if tick is not None:
                tick(work.number, 0 if leaf is None else leaf.n)
        return [accs[i] if exact[i] else trees[i].nodes() for i in range(len(ctx.passes))]


# --------------------------------------------------------------------------- running a pass
def _chunk_frames(source, featurizer, leaf_frames, halo=0):
    """Frames per read: the source's chunk size, longer with a long halo (so that a leaf's
    window rarely spans two chunks and needs a copy), within :data:`FEATURE_BUDGET`."""
    want = max(source.chunk_size, 4 * int(halo))
    return int(max(leaf_frames, min(want, FEATURE_BUDGET // max(1, featurizer.n_features))))


def run_pass(pass_, source, *, executor=None, tasks=None, chunk_frames=None, label=None):
    """Run one pass, or several sharing one read, over the frames of a source.

    Parameters
    ----------
    pass_ : Pass or sequence of Pass
        Several passes must share one featurizer (the same object); the
        frames are read and featurized once for all of them.
    source : cvdesign.io.source.Source
    executor : Executor, int, dask.distributed.Client or str, default=None
        Where tasks run (:mod:`cvdesign.parallel`; see
        :func:`cvdesign.parallel.as_executor`): None in this process, an int
        that many local processes, a client or scheduler address a Dask
        cluster. An executor made here from an int or address is closed at
        the end.
    tasks : TaskPlan, default=None
        Leaves and tasks (:func:`plan_tasks`); None: leaves of
        :func:`leaf_frames_for` the featurizer's features, and about four
        tasks per worker of the executor.
    chunk_frames : int, default=None
        Frames per read (memory only; results do not depend on it).
    label : str, default=None
        What the read is for, shown beside its progress bar when a display is
        active (:mod:`cvdesign.progress`); None: ``'reading'``. The bar counts
        the frames with a state read of the total, advanced leaf by leaf in
        this process and task by task for other executors. It never changes
        the result.

    Returns
    -------
    object or tuple
        The pass's result (a tuple of results for a sequence of passes).
        Identical bytes for every executor, task split, chunk size and order
        of arrival.

    Raises
    ------
    InputError
        Bad input met while reading (invalid box, non-finite coordinate,
        frames missing), naming the file.
    cvdesign.parallel.ExecutorError
        The executor failed (scheduler unreachable, a worker died).
    """
    from ..parallel import using_executor

    single = isinstance(pass_, Pass)
    passes = (pass_,) if single else tuple(pass_)
    if not passes or not all(isinstance(p, Pass) for p in passes):
        raise InputError("run_pass() needs a Pass or a sequence of Pass objects")
    featurizer = passes[0].featurizer
    if any(p.featurizer is not featurizer for p in passes):
        raise InputError("passes run together must share one featurizer object")
    try:
        with using_executor(executor) as executor:
            return _run(passes, featurizer, source, executor, tasks, chunk_frames, single,
                        label or "reading")
    finally:
        release_scratch()  # (this thread's leaf temporaries: not kept between passes)


def _run(passes, featurizer, source, executor, tasks, chunk_frames, single, label):
    if tasks is None:
        plan = plan_tasks(source).for_features(featurizer.n_features, executor.n_workers)
    elif isinstance(tasks, TaskPlan):
        plan = tasks
    else:
        raise InputError(f"tasks must be a TaskPlan from plan_tasks(), not {type(tasks).__name__}")
    halo = max(_halo(passes, lay, si) for si, lay in enumerate(plan.layouts)) \
        if plan.n_segments else 0
    ctx = _Context(passes, featurizer, plan.topology, plan.leaf_frames, plan.n_states,
                   int(chunk_frames) if chunk_frames else
                   _chunk_frames(source, featurizer, plan.leaf_frames, halo),
                   any(lay.weight is not None for lay in plan.layouts))
    works = []
    for n, t in enumerate(plan.tasks):
        lay = plan.layouts[t.segment]
        start, stop = plan.task_frames(t)
        halo = _halo(passes, lay, t.segment)
        read_stop = min(lay.hi, stop + halo)
        leaves = plan.leaves(t.segment)
        works.append(_Work(n, t, lay.path, lay.window(start, read_stop), len(leaves),
                           leaves.start, start, stop, read_stop, halo))
    _log.debug("%s: %d pass(es) over %d segment(s) in %d task(s), leaves of %d frames, "
               "reads of %d frames, on %s", label, len(passes), plan.n_segments, len(works),
               plan.leaf_frames, ctx.chunk_frames, type(executor).__name__)
    with one_blas_thread(), _Progress(label, works, executor) as shown:
        return _reduce(passes, plan, executor, ctx, works, single, shown)


def _selected_frames(work):
    """Frames with a state in a task's range ``[start, stop)``."""
    lay = work.layout
    lo, hi = max(work.start, lay.lo), min(work.stop, lay.hi)
    if hi <= lo:
        return 0
    if lay.codes is None:
        return hi - lo
    return int(np.count_nonzero(lay.states_of(np.arange(lo, hi)) >= 0))


class _Progress:
    """The progress bar of one run: frames with a state read of the total.

    Tasks run in this process advance it leaf by leaf (``tick``, given to
    :func:`run_task` only by an in-process executor, so nothing of it is ever
    pickled); every completed task then adds what its leaves did not, so tasks
    of other executors advance it as they complete. Inactive (and costing
    nothing) when no display is.
    """

    def __init__(self, label, works, executor):
        self.label, self.works, self.executor = label, works, executor
        self.bar, self.frames, self.done, self._cm = None, None, {}, None

    def __enter__(self):
        if progress.active():
            self.frames = [_selected_frames(w) for w in self.works]
            self._cm = progress.bar(self.label, sum(self.frames), unit="frames")
            self.bar = self._cm.__enter__()
        return self

    def __exit__(self, *exc):
        if self._cm is not None:
            return self._cm.__exit__(*exc)
        return False

    def task_fn(self):
        """:func:`run_task`, with leaf-by-leaf progress when the tasks run in this process."""
        if self.bar is None or not getattr(self.executor, "in_process", False):
            return run_task
        return functools.partial(run_task, tick=self._tick)

    def _tick(self, number, n):
        if n:
            self.done[number] = self.done.get(number, 0) + n
            self.bar.update(n)

    def completed(self, number):
        """Task `number` is done: count the frames its leaves did not report."""
        if self.bar is not None:
            rest = self.frames[number] - self.done.get(number, 0)
            self.done[number] = self.frames[number]
            if rest > 0:
                self.bar.update(rest)


def _reduce(passes, plan, executor, ctx, works, single, shown):
    seg_trees = [[TreeReducer(len(plan.leaves(si)), p.merge) if len(plan.leaves(si)) else None
                  for si in range(plan.n_segments)] for p in passes]
    exact = [None] * len(passes)
    for number, result in executor.run(shown.task_fn(), ctx, works):
        shown.completed(number)
        segment = works[number].task.segment
        for i, p in enumerate(passes):
            if _exact(p, ctx):
                exact[i] = merge_optional(p.merge, exact[i], result[i])
            else:
                for h, k, value in result[i]:
                    seg_trees[i][segment].add(h, k, value)
    out = []
    for i, p in enumerate(passes):
        if _exact(p, ctx):
            root = exact[i]
        else:
            roots = []
            for si, tree in enumerate(seg_trees[i]):
                if tree is not None and not tree.done:
                    raise RuntimeError(f"segment {si} was not fully reduced (tasks missing)")
                roots.append(None if tree is None else tree.root)
            root = None
            if roots:
                top = TreeReducer(len(roots), p.merge)
                for si, r in enumerate(roots):
                    top.add(0, si, r)
                root = top.root
        out.append(p.finish(root, plan))
    return out[0] if single else tuple(out)


def first_frame(plan, atom_indices):
    """The first frame with a state (of the first segment that has one), read and checked.

    A pure function of the input (never of a task split): what a pass may need
    to know before it runs, such as a fixed shift or a reference structure.

    Parameters
    ----------
    plan : TaskPlan
    atom_indices : array-like of int
        Sorted topology indices of the atoms to read.

    Returns
    -------
    (int, int, mdtraj.Trajectory) or None
        Segment index, frame number in its file, and the frame (those atoms,
        with the unit cell when the file has one, no topology); None when no
        segment has a frame.
    """
    for si, lay in enumerate(plan.layouts):
        if lay.n_frames == 0:
            continue
        frames = np.arange(lay.lo, lay.hi)
        first = int(frames[np.argmax(lay.states_of(frames) >= 0)])
        for chunk in read_chunks(lay.path, first, first + 1, atom_indices, plan.topology,
                                 chunk_frames=1):
            return si, first, chunk.trajectory
    return None


def reference_features(plan, featurizer):
    """Features of the first frame with a state (:func:`first_frame`).

    A shift for lagged sums that is known before a pass and the same for every
    executor (lagged statistics merge by addition and need one shift).

    Returns
    -------
    ndarray of shape (n_features,) or None
        None when no segment has a frame.
    """
    found = first_frame(plan, featurizer.atom_indices)
    if found is None:
        return None
    with one_blas_thread():
        return np.asarray(featurizer(found[2]), dtype=np.float64)[0]

