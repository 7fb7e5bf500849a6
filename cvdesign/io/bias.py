"""Biased runs as input: bias-energy files, frame weights and rescaled time.

A trajectory from a biased simulation may come with the bias energy of every
frame (kJ/mol) and the temperature of the run (K). Its frames then stand for
the unbiased ensemble with the weight ``w_t = exp(V_t / kT)``, and its slow
motion is measured on the rescaled clock ``dt'_t = dt exp(V_t / kT)``
(McCarty and Parrinello, J. Chem. Phys. 147, 204109, 2017), which recovers the
unbiased kinetics only when the bias vanishes at the barriers between states
(Voter, J. Chem. Phys. 106, 4665, 1997; elsewhere it is an approximation).

**The bias-energy file** (our own format): UTF-8 text, one row per frame of the
trajectory file, frame 0 first (the whole file, also when only a frame range
of it is used). Blank lines and lines starting with ``#`` are skipped. A row is
one number, or several columns separated by commas (when the first row has a
comma) or by white space. An optional first row of column names (any row that
is not all numbers) allows choosing a column by name; by default the file's
only column is read, or the column named ``bias``. Every value is the bias
energy of that frame in kJ/mol: the energy the bias *added* to the system's
potential (positive where the bias pushes the system away, as a history of
deposited kernels does). For a bias that changed during the run, give the
energy to reweight with (for instance the bias minus its time-dependent
offset ``c(t)``), not the raw sum of kernels.

**The time column.** A header may name a column of frame times: ``time`` or
``time_ps`` (ps), ``time_ns``, ``time_fs`` (:data:`TIME_COLUMNS`). When the
trajectory stores times too, they must agree (to single precision and the
digits written, :class:`BiasTimes`): a bias file of another run, or one whose
rows are shifted by a frame, is refused naming both files, the frame and both
times. Frames 0, 1 and the last are compared when the file is given
(:meth:`cvdesign.io.source.Source.add`), every frame where the trajectory's
times are read anyway (the even-spacing check of ``suggest`` and
``propose_states``, :class:`cvdesign.pipeline.timing.EvenSpacingPass`). A
trajectory without stored times (or whose stored times are replaced by a given
frame spacing) is not compared.

**The clock column.** The weights do not change when every energy of a state
is shifted by one constant, but the rescaled clock (below) does: it needs the
bias *as the system felt it* at each frame, ``V(s_t, t)``, zero where the bias
has deposited nothing (Tiwary and Parrinello, Phys. Rev. Lett. 111, 230602,
2013, from memory). For a bias that did not change (or one given as felt), the
bias column serves both. For a bias given minus its time-dependent offset
``c(t)``, the clock would be off by ``exp(-c(t)/kT)``, a factor that keeps
changing during the run: add a column named ``clock_bias`` (:data:`CLOCK_COLUMN`)
with the bias as felt, in kJ/mol; the clock is then taken from it and the
weights from the bias column. The summary says which column each clock used.

**Weights.** Within each state, the weights are normalized over *all* the
state's frames, in every file, with one common constant: ``w_t = N_s
exp(a_t - c_s) / sum_{u in s} exp(a_u - c_s)`` with ``a_t = V_t / kT``,
``c_s`` the largest ``a`` of the state (so no exponential overflows) and
``N_s`` its number of frames. Each state's weights thus average 1, its
weighted frame count stays its number of frames, and statistics pooled over
states weigh them as unbiased input does (by frames). A constant per file
would be wrong: it would change the relative weight of the files of a state.
The states' populations are not affected by this choice: they follow from
``Z_s = sum_{t in s} exp(a_t)``, computed in log space
(:meth:`Reweighting.populations`), over the frames of the biased runs that
visit two or more states only: a run that stays in one state (given for that
state, or labelled with one state) holds that state's frames by construction,
so adding its frames to ``Z_s`` would inflate that state's population.

**A state with biased and unbiased runs.** An unbiased file has no bias
energies, so its frames share no reference with those of a biased run:
``exp(V/kT)`` fixes the weights of the biased frames only up to a constant
that is unknown relative to the unbiased frames (the constant is ``Z_V /
Z_0``, the ratio of the partition functions of the state with and without the
bias). The state's files are therefore split into two groups, each with a
common reference: its unbiased files (weight 1 each frame) and its biased
files (weights normalized with one constant, as above). Each group's
self-normalized estimate of a state average is a consistent estimate of the
same unbiased average, so the state's average is taken as a convex
combination ``sum_g lambda_g A_g`` of the groups' estimates, with
``lambda_g`` proportional to the group's Kish effective sample size ``n_g``
(the unbiased group: its number of frames). The frames of group ``g`` keep
their relative weights and the group's weights sum to ``N_s n_g / sum_h
n_h``, so the state's weights still average 1. Why this rule: the variance
of a self-normalized importance-sampling estimate is about ``sigma^2 / n_g``
(Kish, *Survey Sampling*, Wiley, 1965; Kong, Tech. Rep. 348, Dept. of
Statistics, University of Chicago, 1992; Liu, *Monte Carlo Strategies in
Scientific Computing*, Springer, 2001; the Kong and Liu references from memory), so
these ``lambda_g`` are the inverse-variance (minimum-variance) weights of
independent estimates of one quantity (Cochran, Biometrics 10, 101, 1954, from
memory); equivalently, of all group scalings they give
the largest Kish effective sample size of the state's weights, which is then
the sum of the groups' (``sum_g n_g``). The estimator a multistate method
such as MBAR (Shirts and Chodera, J. Chem. Phys. 129, 124105, 2008) would
give needs the bias energy of the unbiased frames too, which the input does
not have. Limits: both groups must sample the same state (an unbiased run
stuck in part of the state biases the combination as it biases an unbiased
estimate), and Kish's size ignores the correlation of successive frames, in
both groups alike. The groups' sizes are in :attr:`Reweighting.groups` and the
summary. Every file keeps its own clock: lagged pairs of a biased file are
taken in rescaled time, those of an unbiased file in its own time, and no
pair spans two files. A state with unbiased files only keeps unweighted
statistics (no weights at all), so its results are the same bytes as without
any biased run; a state with biased files only is weighted as above.

**Effective sample size.** Kish's ``(sum w)^2 / sum w^2`` (Kish, *Survey
Sampling*, Wiley, 1965), per state; a warning names a state whose effective
size is below :data:`LOW_ESS_FRACTION` of its frames or below
:data:`LOW_ESS_FRAMES` frames, and, in a state with biased and unbiased runs,
whose biased group's effective size is below :data:`LOW_ESS_FRAMES` (the
state's combined size may then be large, its unbiased frames carrying it).

**Rescaled time.** The *clock* of a file counts rescaled time in units of the
frame spacing: ``clock[f] = sum_{u < f} exp(V_u / kT)`` (the bias of the frame
that starts each interval, from the ``clock_bias`` column when the file has one;
absolute, unshifted, so a bias that vanishes at the
barrier keeps real time there). The sum runs over the frames the run is used
for: every frame of a labelled file (its frames between the states are part
of the run's time, and of its crossings), the frame range of a file given for
one state (the frames outside it add no time, so their bias cannot overflow
the clock); the overflow check and its message look at the same frames. A
bias that accelerates the dynamics is never negative as felt, so the clock
never runs slower than simulation time; when it does (a clock bias shifted by
``c(t)``, or of the wrong sign), :meth:`Reweighting.describe` warns
(:meth:`Reweighting.slow_clocks`). A lagged pair at a lag of ``L`` frame spacings
pairs frame ``t`` with the frame whose clock is closest to ``clock[t] + L``
among the frames after ``t`` up to the first frame ``u`` whose clock reaches
it: ``u`` or the frame before it (a tie: ``u``; only ``u`` when the frame
before it is ``t``), so the pairs' rescaled lags scatter about ``L`` by at most
half a step either way (``passes.keys.SegmentLayout.partners``); no pair when
no frame reaches it. The clock is a function of the file's bias
values and the segment's frames alone, so pairs do not depend on how frames
are split into chunks or tasks.
"""

import decimal
import math
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from ..constants import BOLTZMANN_KJ_MOL_K
from ..errors import InputError

__all__ = ["read_bias_file", "is_number", "kish_ess", "Reweighting", "reweight", "LOW_ESS_FRACTION",
           "LOW_ESS_FRAMES", "MAX_RESCALE_EXPONENT", "BIAS_COLUMN", "CLOCK_COLUMN",
           "COARSE_LAG_FRACTION", "SLOW_CLOCK_TOLERANCE", "NEGATIVE_CLOCK_FRACTION",
           "SLOW_CLOCK_WARNING", "TIME_COLUMNS", "BiasTimes", "state_codes"]

#: A state's Kish effective sample size below this fraction of its frames gets a warning
#: (common practice: reweighted averages from a few percent of the frames are noisy).
LOW_ESS_FRACTION = 0.1
#: ... or below this many frames (common practice).
LOW_ESS_FRAMES = 100
#: Largest ``V / kT`` for which the rescaled clock ``exp(V / kT)`` is formed (float64
#: overflows near 709).
MAX_RESCALE_EXPONENT = 600.0
#: Name of the column read by default from a bias-energy file with several columns.
BIAS_COLUMN = "bias"
#: Header names of a bias-energy file's optional time column, with the factor of their
#: unit to ps; its times are compared with those the trajectory stores.
TIME_COLUMNS = {"time": 1.0, "time_ps": 1.0, "time_ns": 1000.0, "time_fs": 1e-3}
#: Name of the optional column with the bias each frame felt, for the rescaled clock
#: (see the module's text: the clock needs the bias as felt, the weights may take it minus
#: a time-dependent offset).
CLOCK_COLUMN = "clock_bias"
#: A biased run's clock gets a warning when its rescaled length is below its simulated
#: length by more than this fraction (float rounding of a zero bias stays far below it) ...
SLOW_CLOCK_TOLERANCE = 1e-3
#: ... or when more than this share of its clock energies are negative: a bias as felt is
#: never negative (common practice).
NEGATIVE_CLOCK_FRACTION = 0.1
#: How the warning about such a clock starts (the command shows it on standard error).
SLOW_CLOCK_WARNING = "the rescaled clock runs slower than simulation time"
#: A lag gets a warning when more than this share of the biased frames' weight is in
#: rescaled steps longer than half of it (:meth:`Reweighting.coarse_fraction`; common
#: practice).
COARSE_LAG_FRACTION = 0.1


def is_number(text):
    """True when `text` reads as a float (``float(text)`` succeeds: also 'nan', 'inf').

    Examples
    --------
    >>> is_number(" 1e-3 "), is_number("bias")
    (True, False)
    """
    try:
        float(text)
    except ValueError:
        return False
    return True


def _bias_rows(path):
    """(line number, cells) of the non-blank, non-comment lines of a bias-energy file."""
    name = str(path)
    path = Path(path)
    if not path.exists():
        raise InputError(f"bias-energy file {name!r} does not exist; check the path")
    if not path.is_file():
        raise InputError(f"bias-energy file {name!r} is not a regular file")
    try:
        text = path.read_bytes().decode("utf-8-sig")
    except UnicodeDecodeError as exc:
        raise InputError(f"bias-energy file {name!r} is not UTF-8 text (byte {exc.start} "
                         "cannot be decoded); give a text file with one bias energy (kJ/mol) "
                         "per frame") from None
    rows = []
    comma = None
    for n, line in enumerate(text.splitlines(), 1):
        t = line.strip()
        if not t or t.startswith("#"):
            continue
        if comma is None:
            comma = "," in t
        rows.append((n, [c.strip() for c in t.split(",")] if comma else t.split()))
    if not rows:
        raise InputError(f"bias-energy file {name!r} holds no values (only blank or comment "
                         "lines); give one bias energy (kJ/mol) per frame")
    return rows


def _bias_column(name, header, width, column):
    """0-based index of the column holding the bias energies."""
    lower = None if header is None else [h.lower() for h in header]
    shown = "" if header is None else " (" + ", ".join(repr(h) for h in header) + ")"
    if column is not None:
        text = str(column).strip()
        if text.isdigit():
            k = int(text) - 1
            if not 0 <= k < width:
                raise InputError(f"bias column {text} of bias-energy file {name!r} does not "
                                 f"exist: the file has {width} column{'s' if width > 1 else ''}"
                                 f"{shown}, counted from 1")
            return k
        if lower is None:
            raise InputError(f"bias column {text!r} names a column, but bias-energy file "
                             f"{name!r} has no header line; give the column number, counted "
                             "from 1")
        if text.lower() not in lower:
            raise InputError(f"bias-energy file {name!r} has no column named {text!r}; its "
                             f"columns are{shown}")
        return lower.index(text.lower())
    if width == 1:
        return 0
    if lower is not None and BIAS_COLUMN in lower:
        return lower.index(BIAS_COLUMN)
    return None


def read_bias_file(path, column=None, *, with_clock=False, with_times=False):
    """Bias energies (kJ/mol) of every frame, from a bias-energy file.

    The format is described in :mod:`cvdesign.io.bias`: one row per frame,
    optional header row, ``#`` comments, columns separated by commas or white
    space; the only column, the column named ``bias``, or `column`; with
    `with_clock`, the ``clock_bias`` column when the header has one; with
    `with_times`, the frame times of a time column (:data:`TIME_COLUMNS`).

    Parameters
    ----------
    path : path-like
        The file.
    column : int or str, default=None
        Column with the energies: a number counted from 1, or a header name
        (case does not matter). None: the only column, or the one named
        ``bias``.
    with_clock : bool, default=False
        Also return the ``clock_bias`` column (the bias as felt, for the
        rescaled clock), or None when the file has none.
    with_times : bool, default=False
        Also return the file's frame times (:class:`BiasTimes`, from its
        header's time column), or None when it has none.

    Returns
    -------
    ndarray of shape (n_frames,), float64
        Bias energy of each frame, kJ/mol; with `with_clock` or `with_times`,
        a tuple of it and the clock's energies (or None) and/or the times (or
        None), in that order.

    Raises
    ------
    InputError
        Naming the file (and line) for a missing or non-text file, no values,
        an unknown column, a row with another number of columns than the
        first, a value that is not a number or not finite.

    Examples
    --------
    >>> import os, tempfile
    >>> with tempfile.TemporaryDirectory() as tmp:
    ...     path = os.path.join(tmp, "run.bias")
    ...     with open(path, "w") as fh:
    ...         _ = fh.write("# time_ps, bias\\ntime_ps, bias\\n0.0, 0.5\\n0.2, 1.25\\n")
    ...     read_bias_file(path).tolist()
    [0.5, 1.25]
    """
    name = str(path)
    rows = _bias_rows(path)
    header = None
    if not all(is_number(c) for c in rows[0][1]):
        header, rows = rows[0][1], rows[1:]
        if not rows:
            raise InputError(f"bias-energy file {name!r} holds a header line and no values; "
                             "give one bias energy (kJ/mol) per frame")
    width = len(header) if header is not None else len(rows[0][1])
    k = _bias_column(name, header, width, column)
    if k is None:
        what = ("no header line naming a 'bias' column" if header is None else
                "none named 'bias' (" + ", ".join(repr(h) for h in header) + ")")
        raise InputError(f"bias-energy file {name!r} has {width} columns and {what}; say which "
                         "column holds the bias energies (--bias-column N|NAME, bias_column= "
                         "in Python)")
    values = _column_values(name, rows, width, k, header is not None)
    if not with_clock and not with_times:
        return values
    lower = [] if header is None else [h.lower() for h in header]
    out = [values]
    if with_clock:
        out.append(None if CLOCK_COLUMN not in lower else
                   _column_values(name, rows, width, lower.index(CLOCK_COLUMN), True))
    if with_times:
        out.append(_bias_times(name, rows, width, header))
    return tuple(out)


def _bias_times(name, rows, width, header):
    """The :class:`BiasTimes` of a bias-energy file's time column, or None without one."""
    lower = [] if header is None else [h.lower() for h in header]
    k = next((i for i, h in enumerate(lower) if h in TIME_COLUMNS), None)
    if k is None:
        return None
    factor = TIME_COLUMNS[lower[k]]
    times = _column_values(name, rows, width, k, True) * factor
    # half the last digit written, of the coarsest row: how far the text may be from the
    # time it stands for
    digits = max(decimal.Decimal(cells[k]).as_tuple().exponent for _, cells in rows)
    return BiasTimes(name, header[k], times, 0.5 * 10.0 ** digits * factor)


@dataclass(frozen=True, eq=False)
class BiasTimes:
    """The frame times a bias-energy file states in its time column.

    Compared with the times a trajectory stores, they catch a bias file that
    does not belong to the trajectory's frames (another run, or rows shifted
    by a frame).

    Attributes
    ----------
    path : str
        The bias-energy file.
    column : str
        Its time column's header name (:data:`TIME_COLUMNS`).
    times_ps : ndarray of shape (n_frames,)
        Time of every row, ps.
    resolution_ps : float
        Half the last digit written in the column (its coarsest row), ps: how
        far a written time may be from the time it stands for.

    Examples
    --------
    >>> t = BiasTimes("run.bias", "time_ps", np.array([0.0, 0.2, 0.4]), 5e-4)
    >>> t.first_mismatch(np.array([0, 1, 2]), np.float32([0.0, 0.2, 0.4]))
    -1
    >>> t.first_mismatch(np.array([1, 2]), np.float32([0.4, 0.6]))  # shifted by a frame
    0
    >>> far = BiasTimes("run.bias", "time_ps", 1e6 + 0.2 * np.arange(10), 5e-4)
    >>> far.first_mismatch(np.arange(10), np.float32(1e6 + 0.2 * np.arange(10)))
    -1
    >>> far.first_mismatch(np.arange(1, 10), np.float32(1e6 + 0.2 * np.arange(9)))  # shifted
    0
    """

    path: str
    column: str
    times_ps: np.ndarray = field(repr=False)
    resolution_ps: float

    def first_mismatch(self, frames, stored_ps):
        """Index into `frames` of the first frame whose stored time (ps) differs from this
        file's beyond their precisions (single precision for the stored time, as the even-
        spacing check allows, and the written digits), or -1."""
        stored = np.asarray(stored_ps, dtype=np.float64)
        mine = self.times_ps[np.asarray(frames, dtype=np.int64)]
        # a time stored in single precision is within half a float32 spacing of the true
        # time (io.source.float32_resolution); 4 |t| 2^-23, allowed before, was 0.48 ps at
        # 10^6 ps, which let a bias file shifted by one 0.2 ps frame pass
        half = 0.5 * np.spacing(np.abs(stored).astype(np.float32)).astype(np.float64)
        tol = (self.resolution_ps + half) * (1 + 1e-9)
        bad = np.flatnonzero(~(np.abs(mine - stored) <= tol))
        return int(bad[0]) if bad.size else -1

    def check(self, trajectory, frames, stored_ps):
        """Refuse frames whose stored times (ps) differ from this file's, naming both files,
        the frame (its row) and both times."""
        i = self.first_mismatch(frames, stored_ps)
        if i < 0:
            return
        f = int(np.asarray(frames)[i])
        raise InputError(
            f"bias-energy file {self.path!r} and trajectory {str(trajectory)!r} disagree on the "
            f"time of frame {f}: the bias file's row of that frame (value row {f + 1}) says "
            f"{self.times_ps[f]:.9g} ps in column {self.column!r}, the trajectory stores "
            f"{float(np.asarray(stored_ps)[i]):.9g} ps; the bias energies must be those of the "
            "trajectory's frames, one row per frame, frame 0 first: check that both files "
            "come from the same run and that no row was dropped, repeated or shifted")


def _column_values(name, rows, width, k, has_header):
    """The finite numbers of column `k` (0-based) of a bias-energy file's rows."""
    values = np.empty(len(rows))
    for r, (n, cells) in enumerate(rows):
        if len(cells) != width:
            raise InputError(f"bias-energy file {name!r}, line {n}: {len(cells)} column"
                             f"{'s' if len(cells) != 1 else ''}, but the "
                             f"{'header' if has_header else 'first line'} has {width}; "
                             "give the same columns on every line")
        try:
            v = float(cells[k])
        except ValueError:
            raise InputError(f"bias-energy file {name!r}, line {n}, column {k + 1}: "
                             f"{cells[k]!r} is not a number") from None
        if not math.isfinite(v):
            raise InputError(f"bias-energy file {name!r}, line {n}: bias energy {cells[k]!r} "
                             "is not a finite number; the run's bias must be finite at every "
                             "frame")
        values[r] = v
    return values


def kish_ess(weights):
    """Kish effective sample size ``(sum w)^2 / sum w^2`` of non-negative weights.

    Equal weights give the number of frames; one dominant weight gives about 1
    (Kish, *Survey Sampling*, Wiley, 1965).

    Parameters
    ----------
    weights : array-like of shape (n,)
        Non-negative weights (any scale).

    Returns
    -------
    float
        Between 1 and ``n`` (0 for no weight at all), frames.

    Examples
    --------
    >>> kish_ess([1.0, 1.0, 1.0, 1.0]), kish_ess([1.0, 0.0, 0.0, 0.0])
    (4.0, 1.0)
    """
    w = np.asarray(weights, dtype=np.float64).reshape(-1)
    if w.size == 0 or not w.max() > 0:
        return 0.0
    w = w / w.max()  # scale-free; no overflow of the squares
    return float(w.sum() ** 2 / (w @ w))


@dataclass(frozen=True, eq=False)
class Reweighting:
    """Frame weights and rescaled clocks of the biased segments of a source.

    Built by :func:`reweight` (through :meth:`cvdesign.io.source.Source.reweighting`).

    Attributes
    ----------
    temperature_k : float
        Temperature of the biased runs, K.
    states : list of str
    weights : dict of int to ndarray
        Per biased segment (index in the source), and per unbiased segment
        holding frames of a state with biased runs, the weight of every frame
        of its file (0 for frames outside the segment's states); within each
        state the weights average 1 over all its frames. Unbiased segments of
        states without biased runs have none (unweighted statistics).
    clocks : dict of int to ndarray
        Per biased segment, the rescaled clock at every frame of its file and
        at its end (``n_file + 1`` values), in frame spacings (``clock[f] =
        sum_{u<f} exp(V_u / kT)`` over the frames the clock runs through: every
        frame of a labelled file, the frame range of a file given for one
        state; the others add no time); ``inf`` after an overflow (see
        :meth:`check_rescaled_time`).
    frames : ndarray of shape (n_states,), int64
        Frames of each reweighted state (a state with biased frames), in
        biased and unbiased segments (0: an unbiased state).
    ess : ndarray of shape (n_states,)
        Kish effective sample size of each reweighted state's weights (NaN:
        unbiased); for a state with biased and unbiased runs, the sum of its
        groups' (:attr:`groups`).
    log_z : ndarray of shape (n_states,)
        ``log sum_{t in s} exp(V_t / kT)`` over each state's frames in the
        biased runs that visit two or more states (:attr:`population_runs`;
        ``-inf``: no such frame).
    groups : dict of int to dict of str to (int, float)
        For each state with biased and unbiased runs, ``{'biased': (frames,
        Kish size), 'unbiased': (frames, frames)}``: the groups whose
        estimates are combined in proportion to their effective sample sizes
        (see :mod:`cvdesign.io.bias`). Empty when no state mixes them.
    max_exponent : dict of int to (float, int)
        Per biased segment, the largest ``V / kT`` of the clock (from the
        ``clock_bias`` column when the file has one) over the frames the clock
        runs through (see `clocks`), and that frame (0-based, in the file).
    multi_state : bool
        True when some biased file holds frames of two or more states (a run
        that crossed between states), so that populations mean something.
    paths : dict of int to (str, str)
        Per biased segment, (trajectory file, bias-energy file).
    own_clock : set of int
        The biased segments whose clock comes from their file's ``clock_bias``
        column (the others' from the bias column).
    population_runs : tuple of int
        The biased segments whose file holds frames of two or more states:
        the populations are taken over their frames alone. A run that stays in
        one state (given for a state, or labelled with one state only) holds
        that state's frames by construction, not in proportion to its
        population, so its frames would inflate that state's ``Z_s``.
    clock_lengths : dict of int to (int, float, int)
        Per biased segment, over the frames its clock runs through: their
        number (its simulated length in frame spacings), its rescaled length
        (frame spacings) and how many of them have a negative clock energy
        (see :meth:`slow_clocks`).
    """

    temperature_k: float
    states: list
    weights: dict
    clocks: dict
    frames: np.ndarray
    ess: np.ndarray
    log_z: np.ndarray
    max_exponent: dict
    multi_state: bool
    paths: dict = field(default_factory=dict)
    groups: dict = field(default_factory=dict)
    own_clock: set = field(default_factory=set)
    population_runs: tuple = ()
    clock_lengths: dict = field(default_factory=dict)

    @property
    def kt(self):
        """float : kT in kJ/mol."""
        return BOLTZMANN_KJ_MOL_K * self.temperature_k

    @property
    def biased_states(self):
        """list of int : states whose frames are reweighted."""
        return [s for s in range(len(self.states)) if self.frames[s] > 0]

    def populations(self):
        """Reweighted population of each state over the biased frames, or None.

        ``p_s = Z_s / sum_r Z_r`` with ``Z_s = sum_{t in s} exp(V_t / kT)``
        over the frames of the biased runs that visit two or more states
        (:attr:`population_runs`; a run that stays in one state holds that
        state's frames by construction and is left out; states without frames
        in those runs: NaN). Meaningful when those runs sample one ensemble
        (one bias, or bias energies with a common reference); None when no
        biased file holds frames of two states (:attr:`multi_state`).

        Returns
        -------
        ndarray of shape (n_states,) or None
        """
        if not self.multi_state:
            return None
        ok = np.isfinite(self.log_z)
        top = self.log_z[ok].max()
        out = np.full(len(self.states), np.nan)
        z = np.exp(self.log_z[ok] - top)
        out[ok] = z / z.sum()
        return out

    def rescaled_frames(self, segment, lo, hi):
        """Rescaled length of frames ``[lo, hi)`` of a biased segment, in frame spacings."""
        clock = self.clocks[segment]
        lo, hi = max(0, int(lo)), min(int(hi), clock.size - 1)
        return float(clock[hi] - clock[lo]) if hi > lo else 0.0

    def check_rescaled_time(self, lags):
        """Refuse lagged pairs in rescaled time that float64 cannot form.

        Parameters
        ----------
        lags : dict of int to int
            Lag of each segment, in frame spacings (rescaled time for biased
            segments).

        Raises
        ------
        InputError
            When a biased run's ``exp(V / kT)`` overflows, or its clock is too
            coarse (float64) to resolve the lag, naming the files.
        """
        for si, clock in self.clocks.items():
            lag = lags.get(si)
            if not lag:
                continue
            traj, bias = self.paths.get(si, ("?", "?"))
            top, frame = self.max_exponent[si]
            if top > MAX_RESCALE_EXPONENT or not np.isfinite(clock[-1]):
                raise InputError(
                    f"bias-energy file {bias!r} reaches {top * self.kt:.6g} kJ/mol "
                    f"({top:.6g} kT at {self.temperature_k:g} K) at frame {frame}: the rescaled "
                    f"time step exp(V/kT) overflows, so slowness cannot be measured on "
                    f"{traj!r}; check the bias energies and --temperature, or leave out --lag")
            if np.spacing(clock[-1]) > 1e-3 * lag:
                raise InputError(
                    f"the rescaled time of {traj!r} (bias file {bias!r}) spans "
                    f"{clock[-1]:.3g} frame spacings, too long for float64 to resolve a lag of "
                    f"{lag} frame spacings; its bias ({top:.3g} kT at most) is too large for "
                    "rescaled time: leave out --lag or give a longer lag")

    def slow_clocks(self):
        """Biased segments whose rescaled clock runs slower than simulation time.

        A bias that accelerates the dynamics is never negative as felt, so
        ``exp(V / kT) >= 1`` at every frame and the rescaled length is at
        least the simulated one. A segment whose rescaled length is below
        ``1 - SLOW_CLOCK_TOLERANCE`` of its simulated length, or more than
        :data:`NEGATIVE_CLOCK_FRACTION` of whose clock energies are negative,
        was given a clock bias that is shifted (the bias minus ``c(t)``) or of
        the wrong sign.

        Returns
        -------
        list of int
            Segment indices, in order.

        Examples
        --------
        >>> from pathlib import Path
        >>> from cvdesign.io.source import Segment
        >>> kt = BOLTZMANN_KJ_MOL_K * 300.0
        >>> up = Segment(Path("up.xtc"), "a", bias=np.array([0.0, 1.0, 2.0]) * kt)
        >>> down = Segment(Path("down.xtc"), "a", bias=np.array([0.0, -1.0, -2.0]) * kt)
        >>> reweight([up, down], ["a"], 300.0).slow_clocks()
        [1]
        """
        out = []
        for si, (n, rescaled, negative) in self.clock_lengths.items():
            if n and (rescaled < (1.0 - SLOW_CLOCK_TOLERANCE) * n
                      or negative > NEGATIVE_CLOCK_FRACTION * n):
                out.append(si)
        return sorted(out)

    def slow_clock_warning(self):
        """The warning about the biased segments whose rescaled clock runs slower than
        simulation time (:meth:`slow_clocks`), naming them, or None when none does.

        Examples
        --------
        >>> from pathlib import Path
        >>> from cvdesign.io.source import Segment
        >>> kt = BOLTZMANN_KJ_MOL_K * 300.0
        >>> up = Segment(Path("up.xtc"), "a", bias=np.array([0.0, 1.0, 2.0]) * kt)
        >>> reweight([up], ["a"], 300.0).slow_clock_warning() is None
        True
        """
        slow = self.slow_clocks()
        return _slow_clock_text(self, slow) if slow else None

    def coarse_fraction(self, lags):
        """Share of the biased frames' weight in rescaled steps longer than half the lag.

        A frame whose rescaled step ``exp(V / kT)`` (frame spacings) exceeds
        half the lag is paired at a rescaled lag off by more than a quarter of
        it (:meth:`cvdesign.passes.SegmentLayout.partners`).

        Parameters
        ----------
        lags : dict of int to int
            Lag of each segment, frame spacings.

        Returns
        -------
        float
            In [0, 1]; 0 without lags.
        """
        coarse = total = 0.0
        for si, clock in self.clocks.items():
            lag = lags.get(si)
            if not lag:
                continue
            w = self.weights[si]
            with np.errstate(invalid="ignore"):
                steps = np.diff(clock)
            coarse += float(w[steps > 0.5 * lag].sum())
            total += float(w.sum())
        return coarse / total if total > 0 else 0.0

    def describe(self, lags=None, *, default_lag=False):
        """Notes for the summary: what was reweighted, the effective sample sizes, warnings.

        Parameters
        ----------
        lags : dict of int to int, default=None
            Lag of each segment in frame spacings, when slowness is measured
            (then the rescaled-time caveat is added, and a warning when the
            lag is short for the rescaled steps).
        default_lag : bool, default=False
            The lag is a default, not one the user chose (the warning says so).

        Returns
        -------
        notes : list of str
        warnings : list of str
            The notes that are warnings (also in `notes`, prefixed ``warning:``).
        """
        notes, warnings = [], []
        n_files = len({p for p, _ in self.paths.values()})
        notes.append(
            f"reweighting: {n_files} biased run{'s' if n_files != 1 else ''} with bias "
            f"energies per frame, at {self.temperature_k:g} K; every statistic weights frame "
            "t by exp(V_t/kT), normalized over all the frames of its state"
            + ("" if not self.groups else
               "; in a state with biased and unbiased runs, the two groups are normalized "
               "apart and combined in proportion to their effective sample sizes (the "
               "inverse-variance weights of the two estimates)"))
        for s in self.biased_states:
            ess, n = float(self.ess[s]), int(self.frames[s])
            parts = ""
            if s in self.groups:
                (nb, eb), (nu, _) = self.groups[s]["biased"], self.groups[s]["unbiased"]
                parts = (f": biased runs {eb:.1f} of {nb} frames, unbiased runs {nu} of {nu} "
                         f"frames, weighing {eb / ess:.1%} and {nu / ess:.1%} of the state")
            notes.append(f"effective sample size (Kish) of state {self.states[s]!r}: "
                         f"{ess:.1f} of {n} frames ({ess / n:.1%}){parts}")
            if ess < LOW_ESS_FRACTION * n or ess < LOW_ESS_FRAMES:
                w = (f"state {self.states[s]!r} has a small effective sample size after "
                     f"reweighting ({ess:.1f} of {n} frames): a few frames of high bias carry "
                     "most of the weight, so its statistics are noisy; give longer biased runs "
                     "or runs with a smaller bias in that state")
                warnings.append(w)
                notes.append("warning: " + w)
            elif s in self.groups and self.groups[s]["biased"][1] < LOW_ESS_FRAMES:
                (nb, eb), (nu, _) = self.groups[s]["biased"], self.groups[s]["unbiased"]
                w = (f"the biased runs of state {self.states[s]!r} have a small effective "
                     f"sample size after reweighting ({eb:.1f} of {nb} frames): a few frames "
                     f"of high bias carry most of their weight, so they weigh {eb / ess:.1%} "
                     f"of the state and its statistics come almost only from its {nu} "
                     "unbiased frames; give longer biased runs or runs with a smaller bias in "
                     "that state")
                warnings.append(w)
                notes.append("warning: " + w)
        pops = self.populations()
        if pops is not None:
            kt = self.kt
            ok = np.isfinite(pops)
            ref = int(np.argmax(np.where(ok, pops, -1.0)))
            parts = [f"{self.states[s]!r} {pops[s]:.3g}" + (
                "" if s == ref else f" (dF = {-kt * math.log(pops[s] / pops[ref]):.3g} kJ/mol)")
                for s in range(len(self.states)) if ok[s] and pops[s] > 0]
            used = sorted({self.paths[si][0] for si in self.population_runs})
            left = sorted({p for p, _ in self.paths.values()} - set(used))
            verb = "visits" if len(used) == 1 else "visit"
            note = (f"reweighted state populations over the frames of {_runs(len(used))} that "
                    f"{verb} two or more states ({', '.join(used)}): {', '.join(parts)}; free "
                    f"energies relative to {self.states[ref]!r} (no interval; meaningful when "
                    "those runs sample one ensemble and cross between the states)")
            unseen = [self.states[s] for s in range(len(self.states))
                      if not (ok[s] and pops[s] > 0)]
            if unseen:  # (a population over these runs' frames says nothing about them)
                note += (f"; no population for {', '.join(map(repr, unseen))}: those runs "
                         "never visit it")
            if left:
                verb, its = ("stays", "its") if len(left) == 1 else ("stay", "their")
                note += (f"; left out: {_runs(len(left))} that {verb} in one state "
                         f"({', '.join(left)}): {its} frames are in that state by construction, "
                         "not in proportion to its population, and would inflate it")
            notes.append(note)
        slow = [si for si in self.slow_clocks() if lags is not None or si in self.own_clock]
        if slow:
            w = _slow_clock_text(self, slow)
            warnings.append(w)
            notes.append("warning: " + w)
        if lags is not None:
            coarse = self.coarse_fraction(lags)
            if coarse > COARSE_LAG_FRACTION:
                w = (f"the lag is short for rescaled time: {coarse:.0%} of the biased runs' "
                     "weight is in frames whose rescaled step dt exp(V/kT) exceeds half the "
                     "lag, so their pairs are taken at a rescaled lag off by a quarter of it or "
                     "more; choose a longer --lag, or save frames more often"
                     + (" (this lag is the default of 10 frames, not one chosen; with "
                        "objective 'separate' it sizes only the slowness columns)"
                        if default_lag else ""))
                warnings.append(w)
                notes.append("warning: " + w)
            notes.append(
                "rescaled time: lagged pairs of biased runs are taken at the lag in rescaled "
                "time dt' = dt exp(V/kT) (McCarty and Parrinello, J. Chem. Phys. 2017), so "
                "autocorrelations, slowness and timescales (and the run lengths they are "
                "compared with) estimate the unbiased dynamics; "
                "this is exact only when the bias vanishes at the barriers between states "
                "(Voter, J. Chem. Phys. 1997), otherwise the timescales are approximate; "
                "integrated autocorrelation times (which size the bootstrap blocks, and a "
                "ranked CV's, from which the bias hints take the deposition interval) stay in "
                "the runs' own simulation time, their pairs weighted as their first frame: "
                "they describe neither the unbiased dynamics nor the biased run's own "
                "exactly, so treat that interval as rough")
            own = {self.paths[si][1] for si in self.own_clock if si in self.paths}
            other = {p for si, (_, p) in self.paths.items() if si not in self.own_clock}
            if own:
                notes.append("rescaled clock from the 'clock_bias' column (the bias as felt) "
                             "of " + ", ".join(sorted(own)))
            if other:
                notes.append(
                    "rescaled clock from the bias column itself of " + ", ".join(sorted(other))
                    + ": right for a bias that did not change during the run, or a column "
                    "holding the bias each frame felt; a bias given minus its time-dependent "
                    "offset c(t) (for the weights) puts the clock off by exp(-c(t)/kT), so "
                    "add a 'clock_bias' column with the bias as felt (cvdesign.io.bias)")
        return notes, warnings


def _slow_clock_text(reweighting, segments):
    """The warning of :meth:`Reweighting.describe` about clocks slower than simulation time."""
    parts = []
    for si in segments:
        n, rescaled, negative = reweighting.clock_lengths[si]
        traj, bias = reweighting.paths[si]
        column = "its 'clock_bias' column" if si in reweighting.own_clock else "its bias column"
        parts.append(f"{traj} (bias file {bias}, clock from {column}: {rescaled:.4g} frame "
                     f"spacings of rescaled time over {n} simulated, {negative / n:.0%} of its "
                     "clock energies negative)")
    return (SLOW_CLOCK_WARNING + " in " + "; ".join(parts)
            + ": no bias that accelerates the dynamics does that, so the clock bias looks "
            "shifted (a column holding the bias minus its offset c(t)) or sign-flipped; give a "
            "'clock_bias' column with the bias each frame felt, in kJ/mol, positive where the "
            "bias pushes the system away (cvdesign.io.bias), and check the sign of the bias "
            "column (a flipped sign inverts the weights too); the slowness and timescales of "
            "these runs are not to be trusted until then")


def _runs(n):
    """'1 biased run', '2 biased runs'."""
    return f"{n} biased run{'s' if n != 1 else ''}"


def state_codes(segment, n_file, index):
    """State code of every frame of a segment's file (-1: no state).

    Parameters
    ----------
    segment : cvdesign.io.source.Segment
    n_file : int
        Frames of its file.
    index : dict of str to int
        State name to code.

    Returns
    -------
    ndarray of int64, shape (n_file,)

    Examples
    --------
    >>> from cvdesign.io.source import Segment
    >>> state_codes(Segment("a.xtc", "open", 2, 4), 6, {"closed": 0, "open": 1}).tolist()
    [-1, -1, 1, 1, -1, -1]
    """
    if segment.labels is not None:
        return np.array([-1 if x is None else index[x] for x in segment.labels], dtype=np.int64)
    codes = np.full(n_file, -1, dtype=np.int64)
    lo = min(n_file, segment.start or 0)
    hi = n_file if segment.stop is None else min(n_file, segment.stop)
    codes[lo:hi] = index[segment.state]
    return codes


def reweight(segments, states, temperature_k, *, count_frames=None):
    """Frame weights, effective sample sizes and rescaled clocks of biased segments.

    Parameters
    ----------
    segments : sequence of cvdesign.io.source.Segment
        Segments; those with ``bias`` (one energy per frame of the file,
        kJ/mol) are reweighted. Unbiased segments holding frames of a state
        that also has biased frames get weights too (the state's two groups
        combined in proportion to their effective sample sizes, see
        :mod:`cvdesign.io.bias`).
    states : sequence of str
        State names (the codes of the segments' states).
    temperature_k : float
        Temperature of the biased runs, K.
    count_frames : callable, default=None
        ``count_frames(path) -> int``, frames in a trajectory file: needed for
        an unbiased segment without labels of a state with biased runs
        (default: :func:`cvdesign.io.source.file_frames`).

    Returns
    -------
    Reweighting

    Examples
    --------
    >>> from pathlib import Path
    >>> from cvdesign.io.source import Segment
    >>> kt = BOLTZMANN_KJ_MOL_K * 300.0
    >>> seg = Segment(Path("run.xtc"), "a", bias=np.log([1.0, 1.0, 2.0]) * kt)
    >>> rw = reweight([seg], ["a"], 300.0)
    >>> rw.weights[0].tolist(), round(float(rw.ess[0]), 3)  # weights 1:1:2, averaging 1
    ([0.75, 0.75, 1.5], 2.667)

    The same state with an unbiased run of 3 frames too: the groups weigh
    2.667 : 3 (their effective sizes), and the 6 weights still average 1:

    >>> plain = Segment(Path("plain.xtc"), "a")
    >>> rw = reweight([seg, plain], ["a"], 300.0, count_frames=lambda path: 3)
    >>> [round(float(v), 4) for v in rw.weights[0].tolist() + rw.weights[1].tolist()]
    [0.7059, 0.7059, 1.4118, 1.0588, 1.0588, 1.0588]
    >>> round(float(rw.ess[0]), 3), rw.groups[0]["unbiased"]
    (5.667, (3, 3.0))
    """
    index = {s: i for i, s in enumerate(states)}
    n_states = len(states)
    kt = BOLTZMANN_KJ_MOL_K * float(temperature_k)
    biased = [si for si, seg in enumerate(segments) if seg.bias is not None]
    exps, codes, felt = {}, {}, {}
    for si in biased:
        seg = segments[si]
        a = np.asarray(seg.bias, dtype=np.float64) / kt
        exps[si], codes[si] = a, state_codes(seg, a.size, index)
        felt[si] = a if seg.clock_bias is None else np.asarray(seg.clock_bias,
                                                               dtype=np.float64) / kt
    # per state: the largest exponent c_s, then sums of r = exp(a - c_s) over all its files
    top = np.full(n_states, -np.inf)
    for si in biased:
        sel = codes[si] >= 0
        np.maximum.at(top, codes[si][sel], exps[si][sel])
    total, squares = np.zeros(n_states), np.zeros(n_states)
    frames = np.zeros(n_states, dtype=np.int64)
    raw = {}
    for si in biased:
        c, a = codes[si], exps[si]
        raw[si] = np.where(c >= 0, np.exp(np.where(c >= 0, a - top[c], -np.inf)), 0.0)
        for s in np.unique(c[c >= 0]):
            rs = raw[si][c == s]
            total[s] += rs.sum()
            squares[s] += rs @ rs
            frames[s] += rs.size
    weights, clocks, max_exp, paths, clock_lengths = {}, {}, {}, {}, {}
    scale = np.divide(frames, total, out=np.zeros(n_states), where=total > 0)
    for si in biased:
        c, a = codes[si], exps[si]
        weights[si] = raw[si] * scale[c]  # (frames without a state: raw is 0)
        # the clock's exponents over the frames it runs through: what the overflow check is
        # about (a labelled file's every frame, the range of a file given for one state)
        f = felt[si]
        used = np.ones(f.size, dtype=bool) if segments[si].labels is not None else c >= 0
        k = int(np.argmax(np.where(used, f, -np.inf))) if used.any() else int(np.argmax(f))
        max_exp[si] = (float(f[k]), k)
        with np.errstate(over="ignore"):
            steps = np.where(used, np.exp(np.where(used, f, 0.0)), 0.0)
        clocks[si] = np.concatenate([[0.0], np.cumsum(steps)])
        n_used = int(used.sum())
        clock_lengths[si] = (n_used, float(clocks[si][-1]), int((f[used] < 0).sum()))
        paths[si] = (str(segments[si].path), str(segments[si].bias_path))
    crossing = _crossing_segments(segments, biased, codes)
    log_z = _log_partition(crossing, exps, codes, n_states)
    ess = np.where(frames > 0, np.divide(total ** 2, squares, out=np.zeros(n_states),
                                         where=squares > 0), np.nan)
    multi = bool(crossing)
    groups = _mix_unbiased(segments, index, frames, ess, weights, codes, count_frames)
    own_clock = {si for si in biased if segments[si].clock_bias is not None}
    return Reweighting(float(temperature_k), list(states), weights, clocks, frames, ess, log_z,
                       max_exp, multi, paths, groups, own_clock, tuple(crossing),
                       clock_lengths)


def _crossing_segments(segments, biased, codes):
    """The biased segments whose file holds frames of two or more states (over all the
    file's biased segments: a file split by frame ranges into states counts as one run)."""
    seen = {}
    for si in biased:
        c = codes[si]
        seen.setdefault(str(segments[si].path), set()).update(np.unique(c[c >= 0]).tolist())
    return [si for si in biased if len(seen[str(segments[si].path)]) > 1]


def _log_partition(crossing, exps, codes, n_states):
    """``log Z_s = log sum exp(V_t / kT)`` over the frames of state s in the `crossing`
    segments (``-inf``: none), in log space."""
    top = np.full(n_states, -np.inf)
    for si in crossing:
        sel = codes[si] >= 0
        np.maximum.at(top, codes[si][sel], exps[si][sel])
    total = np.zeros(n_states)
    for si in crossing:
        c = codes[si]
        sel = c >= 0
        np.add.at(total, c[sel], np.exp(exps[si][sel] - top[c[sel]]))
    with np.errstate(divide="ignore"):
        return np.where(total > 0, top + np.log(np.where(total > 0, total, 1.0)), -np.inf)


def _mix_unbiased(segments, index, frames, ess, weights, codes, count_frames):
    """Weights for the unbiased segments of states that also have biased frames.

    The biased group's weights (average 1 over its frames, Kish size ``e_b``)
    and the unbiased group's (``n_u`` frames, weight 1) are scaled so that
    each group's total is ``N e_g / (e_b + n_u)``; `weights` (biased ones),
    `frames` and `ess` are updated in place. Returns :attr:`Reweighting.groups`.
    """
    n_states = frames.size
    has_biased = frames > 0
    plain_codes = {}
    for si, seg in enumerate(segments):
        if seg.bias is not None:
            continue
        present = ({index[x] for x in seg.labels if x is not None} if seg.labels is not None
                   else {index[seg.state]})
        if not any(has_biased[s] for s in present):
            continue
        if seg.labels is not None:
            n_file = seg.labels.shape[0]
        else:
            if count_frames is None:
                from .source import file_frames as count_frames
            n_file = int(count_frames(seg.path))
        plain_codes[si] = state_codes(seg, n_file, index)
    if not plain_codes:
        return {}
    plain = np.zeros(n_states, dtype=np.int64)
    for c in plain_codes.values():
        plain += np.bincount(c[c >= 0], minlength=n_states)
    mixed = has_biased & (plain > 0)
    n_all = frames + plain
    e_all = np.where(mixed, ess + plain, 1.0)
    # group totals N e_g / (e_b + n_u): per-frame factors on weights that average 1
    lam_b = np.where(mixed, n_all * ess / (e_all * np.maximum(frames, 1)), 1.0)
    lam_u = np.where(mixed, n_all / e_all, 1.0)
    groups = {int(s): {"biased": (int(frames[s]), float(ess[s])),
                       "unbiased": (int(plain[s]), float(plain[s]))}
              for s in np.flatnonzero(mixed)}
    for si, c in codes.items():
        if mixed[c[c >= 0]].any():
            weights[si] = weights[si] * lam_b[c]
    for si, c in plain_codes.items():
        weights[si] = np.where(c >= 0, lam_u[c], 0.0)
    ess[mixed] = e_all[mixed]
    frames[mixed] = n_all[mixed]
    return groups
