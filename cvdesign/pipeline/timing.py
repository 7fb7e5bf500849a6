"""Time in the pipeline: frame spacings, lags in frames, integrated times, even spacing.

A lag is given in ps and converted with each file's frame spacing
(:meth:`cvdesign.io.source.Source.timestep`); integrated autocorrelation times
come from the autocorrelation on a geometric grid of lags. The check that
stored times are evenly spaced is a pass (:class:`EvenSpacingPass`), so it
runs with the screening statistics and needs no read of its own.
"""

import math

import numpy as np

from ..errors import InputError
from ..io.source import stores_time
from ..passes import Pass

__all__ = ["read_timesteps", "lag_frames", "iat_lags", "integrated_time", "local_autocorrelation",
           "longest_visit_ps", "runs_too_short", "state_integrated_times", "slowest_state_times",
           "scatter_factors",
           "longest_run_text", "block_frames", "EvenSpacingPass", "checked_segments",
           "bias_times"]


def read_timesteps(source):
    """Time step (ps, or None when unknown) of every segment of a source.

    Times are stored in single precision, so 7 significant digits are kept.
    """
    out = {}
    for si in range(len(source.segments)):
        v = source.timestep(si)
        out[si] = None if v is None else float(f"{v:.7g}")
    return out


def lag_frames(source, lag, timesteps):
    """Lag in frames of each segment, for a lag in ps; refuse what cannot be converted."""
    out = {}
    for si, seg in enumerate(source.segments):
        dt = timesteps.get(si)
        if dt is None or not dt > 0:
            raise InputError(
                f"lag={lag:g} ps cannot be converted to frames of {str(seg.path)!r}: its time "
                "step is unknown (the format stores no times, or the file has one frame); "
                "give the time step in ps with --frame-step-ps PS (Source(..., timestep=PS) "
                "in the Python API)")
        ratio = lag / dt
        n = int(round(ratio))
        # a step from stored single-precision times is known to source.timestep_resolution
        rel = max(1e-6, source.timestep_resolution(si) / dt)
        if n < 1 or abs(ratio - n) > rel * max(1.0, ratio):
            mean = (", the mean spacing of its stored times from its first frame to its last: "
                    "a file not evenly spaced is to be split where the spacing changes"
                    if source.timestep_resolution(si) > 1e-6 * dt else "")
            raise InputError(
                f"lag={lag:g} ps is not a whole number of frames of {str(seg.path)!r} "
                f"(time step {dt:g} ps{mean}); choose a multiple of {dt:g} ps")
        out[si] = n
    return out


def iat_lags(seg_counts, max_lag=2000):
    """Geometric grid of lags (frames) for integrated autocorrelation times.

    Up to half the longest run of the state whose longest run is shortest (at most
    `max_lag`): every state keeps pairs at every lag, while a run shorter than a lag (one
    short run beside longer ones of its state) has no pairs there and drops out of that
    lag's autocorrelation (:func:`local_autocorrelation`). One short run no longer caps
    every time (a grid up to half the shortest run had made a slow descriptor's time a
    lower bound); a grid up to half the longest run of all had let a state of short runs
    drop out at the long lags, and curves about one common mean then lost the offset
    between the states there.

    Parameters
    ----------
    seg_counts : ndarray of shape (n_segments, n_states)
        Frames of each state in each input segment.
    max_lag : int, default=2000

    Returns
    -------
    ndarray of int
        Increasing lags from 1.

    Examples
    --------
    >>> int(iat_lags(np.array([[40, 0], [1000, 0], [0, 600]])).max())  # state 1: 600
    300
    """
    counts = np.asarray(seg_counts)
    per_state = counts.max(axis=0)
    longest = int(per_state[per_state > 0].min()) if (per_state > 0).any() else 0
    top = max(1, min(max_lag, longest // 2))
    return np.unique(np.round(np.geomspace(1, top, 18)).astype(int))


def integrated_time(lags, rho, dt, *, window=5.0, return_window=False):
    """Integrated autocorrelation time from the autocorrelation on a grid of lags.

    ``tau_int = dt * (1/2 + sum_{k>=1} rho(k))`` (Sokal 1997, in *Functional
    Integration*, Plenum; Frenkel and Smit, *Understanding Molecular
    Simulation*, 2002), with the sum taken as the trapezoidal integral of
    ``rho`` (``rho(0) = 1``) interpolated linearly between the lags of the grid,
    up to Sokal's self-consistent window: the first lag ``M`` with
    ``M >= window * tau(M)``. The result is at least half a frame spacing, the value for
    frames that are not correlated at all: a smaller sum (down to zero or below, which no
    integrated time can be) comes from frames anti-correlated at the first lags, or from
    noise, and the frames do not resolve a time there (before this floor a negative time
    could be written out and refused by the bias hints).

    Parameters
    ----------
    lags : array-like of int, shape (n_lags,)
        Increasing lags in frames, starting at 1.
    rho : array-like of shape (n_lags, n_features)
        Normalized autocorrelation at each lag.
    dt : float
        Time between frames, ps (1 for frames).
    window : float, default=5.0
        Window factor ``c`` (Sokal recommends 4 to 10 for nearly exponential decay).
    return_window : bool, default=False
        Also return the summation window of each feature, frames.

    Returns
    -------
    tau : ndarray of shape (n_features,)
        In the unit of `dt`; at least ``dt / 2``; NaN where the first lag has no
        pairs (``rho`` NaN there).
    decayed : ndarray of bool, shape (n_features,)
        False where no lag of the grid satisfies the window condition: the
        motion did not decorrelate within the runs and `tau` (the integral over
        the whole grid) is a lower bound. A lag without pairs (``rho`` NaN, e.g.
        longer than every visit of a state in a labelled run) ends the grid
        there: the window must be reached before it.
    window_frames : ndarray of shape (n_features,)
        Only with `return_window`: the lag (frames) where the sum stopped.

    Examples
    --------
    >>> import numpy as np
    >>> lags = np.arange(1, 200)
    >>> tau, ok = integrated_time(lags, np.exp(-lags / 10.0)[:, None], 1.0)
    >>> round(float(tau[0]), 1), bool(ok[0])  # 1/2 + sum_k exp(-k/10) = 10.0, window loses ~1 %
    (9.9, True)
    """
    lags = np.asarray(lags, dtype=np.float64)
    rho = np.asarray(rho, dtype=np.float64)
    # a lag without pairs (NaN: runs or visits shorter than it) says nothing: the sum
    # stops before the first such lag, and the time counts as decayed only if the window
    # was reached before it (else a lower bound); no pairs at lag 1: no time (NaN)
    missing = np.isnan(rho)
    known = ~np.maximum.accumulate(missing, axis=0)  # lags before the first NaN
    rho = np.where(known, rho, 0.0)
    grid = np.concatenate([[0.0], lags])
    r = np.vstack([np.ones((1, rho.shape[1])), rho])
    cum = np.vstack([np.zeros((1, rho.shape[1])),
                     np.cumsum(0.5 * (r[1:] + r[:-1]) * np.diff(grid)[:, None], axis=0)])
    usable = np.vstack([np.ones((1, rho.shape[1]), dtype=bool), known])
    ok = (grid[:, None] >= window * cum) & usable
    ok[0] = False
    decayed = ok.any(axis=0)
    last = usable.sum(axis=0) - 1  # the last lag with pairs (0: none)
    stop = np.where(decayed, ok.argmax(axis=0), last)
    tau = np.maximum(cum[stop, np.arange(rho.shape[1])], 0.5)  # (frames; see above)
    tau = np.where(last > 0, tau, np.nan)
    if return_window:
        return tau * dt, decayed, grid[stop]
    return tau * dt, decayed


def _state_runs(segment, si, s, name, seg_counts):
    """Frame ranges ``[lo, hi)`` of the file of `segment` in which state `s` (`name`) has
    lagged pairs to offer: the whole range, or each visit of a labelled file (its pairs
    never span a state change)."""
    if segment.labels is None:
        lo = segment.start or 0
        return [(lo, lo + int(seg_counts[si, s]))] if seg_counts[si, s] else []
    inside = np.concatenate([[False], segment.labels == name, [False]]).astype(np.int8)
    edges = np.flatnonzero(np.diff(inside))
    return list(zip(edges[0::2].tolist(), edges[1::2].tolist()))


def longest_visit_ps(source, reweighting, seg_counts, steps):
    """The longest span (ps) that lagged pairs within one state can cover: the longest
    run given for a state, or visit of a labelled file (pairs never span a state
    change), from its first frame to its last, in rescaled time for a biased run; None
    when no frame spacing is known or a rescaled span overflows.

    A timescale measured on such pairs (each run or visit about one mean or its own) is
    resolved only below it: a labelled file's own length is not (its crossings are not
    among those pairs).

    Examples
    --------
    >>> from cvdesign import Source
    >>> from cvdesign.io.demo import demo_inputs
    >>> top, files = demo_inputs()  # three runs of 2000 frames per state, 0.2 ps apart
    >>> counts = np.array([[2000, 0]] * 3 + [[0, 2000]] * 3)
    >>> round(longest_visit_ps(Source.from_states(top, files), None, counts,
    ...                        dict.fromkeys(range(6), 0.2)), 6)
    399.8
    """
    spans = [span * dt for span, _, dt, _, _ in _state_spans(
        source, reweighting, seg_counts, steps, range(len(source.states))) if dt is not None]
    best = max(spans) if spans else None
    return best if best is not None and math.isfinite(best) else None


def _state_spans(source, reweighting, seg_counts, steps, states):
    """``(span, frames, dt, rescaled, segment)`` of every run of `states` (a segment's range,
    or each visit of a labelled file), its span from its first frame to its last in frame
    spacings (of rescaled time for a biased run), as lagged pairs see it."""
    for si, seg in enumerate(source.segments):
        dt = steps.get(si)
        rescaled = reweighting is not None and si in reweighting.clocks
        for s in states:
            for lo, hi in _state_runs(seg, si, s, source.states[s], seg_counts):
                span = (float(reweighting.clocks[si][hi - 1] - reweighting.clocks[si][lo])
                        if rescaled else float(hi - 1 - lo))
                yield span, hi - lo, dt, rescaled, seg


def longest_run_text(source, reweighting, seg_counts, steps, states):
    """Describe the run of `states` with the longest span for lagged pairs.

    Measured as lagged pairs are: a labelled file's visits one by one (pairs
    never span a state change), a biased run in rescaled time (frame spacings of
    ``exp(V/kT)``), each from its first frame to its last -- the longest lag
    that can still pair two of its frames (in rescaled time, about half a step
    more under the closest-frame rule).

    Parameters
    ----------
    source : Source
    reweighting : Reweighting or None
        The source's reweighting (None: no biased run).
    seg_counts : ndarray of shape (n_segments, n_states)
        Frames of each state in each segment.
    steps : dict of int to float or None
        Time between frames of each segment, ps (None: unknown).
    states : iterable of int
        The states whose runs count; at least one must have frames.

    Returns
    -------
    str
        ``'the longest run is N frames (T ps from its first frame to its last)'``,
        or the visit of a labelled file and the span in rescaled time.

    Examples
    --------
    >>> import mdtraj as md, tempfile, os
    >>> from cvdesign import Source
    >>> top = md.Topology(); r = top.add_residue("TOY", top.add_chain())
    >>> _ = top.add_atom("C1", md.element.carbon, r)
    >>> path = os.path.join(tempfile.mkdtemp(), "a.xtc")
    >>> md.Trajectory(np.zeros((20, 1, 3), np.float32), top,
    ...               time=np.arange(20) * 0.2).save_xtc(path)
    >>> src = Source(top).add(path, "a")
    >>> longest_run_text(src, None, np.array([[20]]), {0: 0.2}, [0])
    'the longest run is 20 frames (3.8 ps from its first frame to its last)'
    >>> md.Trajectory(np.zeros((1, 1, 3), np.float32), top, time=[0.0]).save_xtc(path)
    >>> longest_run_text(Source(top).add(path, "a"), None, np.array([[1]]), {0: 0.2}, [0])
    'the longest run is 1 frame (0 ps from its first frame to its last)'
    """
    best = None
    for span, n, dt, rescaled, seg in _state_spans(source, reweighting, seg_counts, steps,
                                                   states):
        key = span * (dt or 1.0)
        if best is None or key > best[0]:
            best = (key, n, span, dt, rescaled, seg)
    _, n, span, dt, rescaled, seg = best
    frames = f"{n} frame" + ("" if n == 1 else "s")
    text = (f"the longest run is {frames}" if seg.labels is None else
            f"the longest run is a visit of {frames} in the labelled file {seg.path.name}")
    if rescaled:
        return (text + f", {span:.4g} frame spacings"
                + ("" if dt is None else f" ({span * dt:.4g} ps)")
                + " of rescaled time from its first frame to its last")
    if dt is None:
        return text + f" ({span:g} frame spacings from its first frame to its last)"
    return text + f" ({span * dt:.4g} ps from its first frame to its last)"


def block_frames(seg_counts, taus, timesteps, lag_frames):
    """Bootstrap block length in frames, or None for whole runs.

    At least twice the longest integrated autocorrelation time of `taus`
    (``(time, decayed, ...)`` or None each; a fourth item, when given, is the decay the
    blocks follow, in place of the second) and two lags; whole runs when that
    exceeds half the longest run, when some motion did not decorrelate within
    the runs, or when no time is known. A run shorter than a block is one block
    (blocks are counted from each run's start); one short run no longer makes
    every run a single block (half the *shortest* run had been the bound).

    Examples
    --------
    >>> counts = np.array([[1000, 0], [12, 0], [0, 1000]])  # a 12-frame run of state 0
    >>> block_frames(counts, [(3.0, True)], {0: 1.0, 1: 1.0, 2: 1.0}, None)
    6
    >>> block_frames(counts, [(3.0, False, None, True)], {0: 1.0, 1: 1.0, 2: 1.0}, None)
    6
    """
    dt = next(iter(timesteps.values())) or 1.0
    known = [t for t in taus if t is not None]
    if not known or any(not (t[3] if len(t) > 3 else t[1]) for t in known):
        return None
    longest = max(t for t, *_ in known)
    b = max(1, int(math.ceil(2.0 * longest / dt)))
    if lag_frames:
        b = max(b, 2 * max(lag_frames.values()))
    if b > int(seg_counts.max()) // 2:
        return None
    return b


def runs_too_short(runs, tau_frames, n_features, *, effective=None):
    """Per feature: whether some state's runs are too short for its integrated time.

    Each run (segment, state) about its own mean, as the integrated times are measured,
    cannot show a motion slower than the run: a state of runs much shorter than the time
    gives a short time that seems to decay. Such runs give themselves away by their
    means: for a time ``tau`` (frames) the mean of ``n`` frames of a run has the variance
    ``2 tau sigma^2 / n`` (Sokal 1997, in *Functional Integration*, Plenum), with
    ``sigma^2`` the variance within the runs. Within a state of two or more runs,
    ``Q = sum_r (mu_r - mu)^2 / (2 tau sigma^2 / n_r)`` follows about a chi-square law of
    (runs - 1) degrees of freedom when the time is right. A state flags a feature when
    ``Q`` is beyond ``dof + 5 sqrt(2 dof) + 10`` (a tail probability of about 1e-5 for 2
    degrees of freedom) and the scatter implies a time at least three times the measured
    one (``Q / dof > 3``: the time and the variance measured about each run's own mean are
    themselves low, by a factor near 2 for runs 20 times the time, which many runs would
    otherwise make significant); our choices. The time is then a lower
    bound (the runs are too short for it, or the state holds sub-states they do not cross
    between). Each state is tested with its own time (a slow state of small spread hardly
    moves a time pooled over the states). States of one run cannot tell. A reweighted run
    (frames of a biased run, weighted) counts its Kish effective frames
    (:func:`cvdesign.io.bias.kish_ess` of its weights, `effective`) in place of ``n``: its
    weighted mean varies as a mean of that many frames would (Kish 1965, *Survey
    Sampling*, Wiley), a rough model when the weights vary along the run.

    Parameters
    ----------
    runs : dict of (int, int) to DiagonalLaggedMoments
        Per (segment, state), the lagged moments of one lag (e.g. ``by_run()`` of the
        first lag of the integrated-time grid).
    tau_frames : dict of int to array-like of shape (n_features,)
        Per state, the integrated times within its runs, frames
        (:func:`state_integrated_times`; NaN: not known, never flagged).
    n_features : int
    effective : dict of (int, int) to float, default=None
        Per (segment, state) of reweighted runs, their Kish effective frames (the run's
        ``count``, a sum of weights, is not a number of frames); runs not in it count
        their frames.

    Returns
    -------
    ndarray of bool, shape (n_features,)

    Examples
    --------
    >>> from cvdesign.stats.moments import DiagonalLaggedMoments
    >>> rng = np.random.default_rng(0)
    >>> x = np.cumsum(rng.normal(size=(3, 60)), axis=1)  # three short runs of a slow motion
    >>> runs = {(r, 0): DiagonalLaggedMoments.from_series(x[r][:, None], lag=1)
    ...         for r in range(3)}
    >>> runs_too_short(runs, {0: [1.0]}, 1).tolist(), runs_too_short(runs, {0: [500.0]}, 1).tolist()
    ([True], [False])
    """
    out = np.zeros(n_features, dtype=bool)
    for s, (tau, q, dof) in _run_scatter(runs, tau_frames, n_features, effective).items():
        out |= (np.isfinite(tau) & (q > dof + 5.0 * math.sqrt(2.0 * dof) + 10.0)
                & (q > 3.0 * dof))
    return out


def _run_scatter(runs, tau_frames, n_features, effective=None):
    """Per state of two or more runs: ``(tau, Q, dof)``, the chi-square
    statistic of :func:`runs_too_short` of its run means against the time `tau` (frames);
    a run in `effective` counts its effective frames."""
    effective = effective or {}
    by_state = {}
    for key, m in sorted(runs.items()):
        s = key[1]
        if m.count > 0 and s in tau_frames:
            by_state.setdefault(s, []).append((key, m))
    out = {}
    with np.errstate(divide="ignore", invalid="ignore"):
        for s, kms in by_state.items():
            dof = len(kms) - 1
            if dof < 1:
                continue
            ms = [m for _, m in kms]
            tau = np.asarray(tau_frames[s], dtype=np.float64).reshape(n_features)
            weight = np.array([m.count for m in ms], dtype=np.float64)[:, None]
            n = np.array([effective.get(key, m.count) for key, m in kms],
                         dtype=np.float64)[:, None]
            stats = [m.covariances(reversible=True) for m in ms]
            means = np.array([st[0] for st in stats])
            sigma2 = (weight * np.array([st[1] for st in stats])).sum(axis=0) / weight.sum()
            w = n / (2.0 * np.maximum(tau, 0.5))  # sigma^2 / var(run mean)
            centre = (w * means).sum(axis=0) / w.sum(axis=0)
            q = np.where(sigma2 > 0, (w * (means - centre) ** 2).sum(axis=0) / sigma2, 0.0)
            out[s] = (tau, q, dof)
    return out


def scatter_factors(runs, tau_frames, n_features, *, effective=None):
    """Per state, how much more its run means scatter than its features' times allow: the
    median over the features of ``max(1, Q / dof)``.

    ``Q`` is the chi-square statistic of :func:`runs_too_short` (``dof`` = runs - 1); ``tau
    Q / dof`` is the time a feature's run means imply. Runs that each sit at an offset of
    their own (unequilibrated) make a state's mean vary more than its frames' correlation
    says, for every feature alike; the median over many features (the screened descriptors,
    not a CV the search chose because its run means differ) is not lifted by a selection,
    and is about 1 when the runs agree (``Q / dof`` is below 1 for most features then: for
    two runs, ``P(chi2_1 < 1) = 0.68``). States of one run get 1.

    Parameters
    ----------
    runs : dict of (int, int) to DiagonalLaggedMoments
        Per (segment, state), lagged moments of one lag (as :func:`runs_too_short` takes).
    tau_frames : dict of int to array-like of shape (n_features,)
        Per state, the integrated times within its runs, frames.
    n_features : int
    effective : dict of (int, int) to float, default=None
        Kish effective frames of reweighted runs (as :func:`runs_too_short` takes).

    Returns
    -------
    dict of int to float
        Per state of `tau_frames`.

    Examples
    --------
    >>> from cvdesign.stats.moments import DiagonalLaggedMoments
    >>> rng = np.random.default_rng(0)
    >>> offsets = rng.normal(0.0, 0.5, size=(3, 1, 20))  # every feature: a run's own offset
    >>> x = rng.normal(size=(3, 2000, 20)) + offsets
    >>> runs = {(r, 0): DiagonalLaggedMoments.from_series(x[r], lag=1) for r in range(3)}
    >>> scatter_factors(runs, {0: np.full(20, 0.5)}, 20)[0] > 50
    True
    >>> same = {(r, 0): DiagonalLaggedMoments.from_series(rng.normal(size=(2000, 20)), lag=1)
    ...         for r in range(3)}
    >>> scatter_factors(same, {0: np.full(20, 0.5)}, 20)[0] < 1.2  # about 1: runs agree
    True
    """
    out = {s: 1.0 for s in tau_frames}
    for s, (tau, q, dof) in _run_scatter(runs, tau_frames, n_features, effective).items():
        ratio = np.maximum(q / dof, 1.0)[np.isfinite(tau) & np.isfinite(q)]
        out[s] = float(np.median(ratio)) if ratio.size else 1.0
    return out


def state_integrated_times(runs_by_lag, lags, n_features, *, dt=1.0, return_window=False):
    """Per state, the integrated time of each feature within its own runs (each run about
    its own mean), from lagged moments at a grid of lags.

    Parameters
    ----------
    runs_by_lag : sequence of dict of (int, int) to DiagonalLaggedMoments
        One per lag of `lags`: per (segment, state), as ``LaggedResult.by_run()`` gives.
    lags : array-like of int
        Increasing lags, frames, from 1.
    n_features : int
    dt : float, default=1.0
        Time between frames, ps (1: the times in frames).
    return_window : bool, default=False
        Give per state ``(tau, decayed, window)`` as :func:`integrated_time` with
        ``return_window=True`` does.

    Returns
    -------
    dict of int to ndarray of shape (n_features,)
        Per state with runs (in the unit of `dt`); NaN where not defined.
    """
    states = sorted({s for runs in runs_by_lag for (_, s) in runs})
    out = {}
    for s in states:
        rho = np.array([local_autocorrelation([m for (_, ss), m in runs.items() if ss == s],
                                              n_features) for runs in runs_by_lag])
        found = integrated_time(np.asarray(lags), rho.reshape(len(runs_by_lag), n_features),
                                dt, return_window=True)
        out[s] = found if return_window else found[0]
    return out


def slowest_state_times(per_state, n_features):
    """Per feature, the integrated time of the state where it is longest.

    A time pooled over the states weighs each by its variance: a narrow, slow state
    beside a broad, fast one pools to about the fast one's time, and a deposition interval
    or a bootstrap block sized from it would be far too short for the slow state.

    Parameters
    ----------
    per_state : dict of int to (ndarray, ndarray, ndarray)
        Per state ``(tau, decayed, window)``, as :func:`state_integrated_times` gives with
        ``return_window=True``.
    n_features : int

    Returns
    -------
    tau, decayed, window : ndarray of shape (n_features,)
        Of the slowest state (NaN, False, 0 where no state has a finite time).
    state : ndarray of int, shape (n_features,)
        That state (-1 where none); a tie keeps the first state.

    Examples
    --------
    >>> per_state = {0: (np.array([2.0, 9.0]), np.array([True, True]), np.array([10, 45])),
    ...              1: (np.array([50.0, np.nan]), np.array([False, False]),
    ...                  np.array([250, 0]))}
    >>> tau, decayed, window, state = slowest_state_times(per_state, 2)
    >>> tau.tolist(), decayed.tolist(), window.tolist(), state.tolist()
    ([50.0, 9.0], [False, True], [250.0, 45.0], [1, 0])
    """
    tau = np.full(n_features, np.nan)
    decayed, window = np.zeros(n_features, dtype=bool), np.zeros(n_features)
    state = np.full(n_features, -1, dtype=np.intp)
    for s, (t, d, w) in sorted(per_state.items()):
        longer = np.isfinite(t) & ~(t <= tau)
        tau[longer], decayed[longer], window[longer], state[longer] = \
            t[longer], d[longer], w[longer], s
    return tau, decayed, window, state


def local_autocorrelation(runs, n_features):
    """Autocorrelation at the lag with every run about its own mean.

    The variances and lagged covariances of the runs (diagonal lagged
    moments), each about the run's own mean, are combined weighted by their
    pair counts: the decorrelation *within* runs, free of the offsets between
    runs or states.

    Parameters
    ----------
    runs : iterable of DiagonalLaggedMoments
        One per run (segment, state).
    n_features : int

    Returns
    -------
    ndarray of shape (n_features,)
        NaN where no run has pairs or a feature does not vary.

    Examples
    --------
    >>> import numpy as np
    >>> from cvdesign.stats.moments import DiagonalLaggedMoments
    >>> x = np.cumsum(np.random.default_rng(0).normal(size=(400, 1)), axis=0)
    >>> a = DiagonalLaggedMoments.from_series(x[:200], lag=1)
    >>> b = DiagonalLaggedMoments.from_series(x[200:] + 100.0, lag=1)
    >>> bool(local_autocorrelation([a, b], 1)[0] > 0.9)
    True
    """
    c0 = np.zeros(n_features)
    ct = np.zeros(n_features)
    for m in runs:
        if m.count == 0:
            continue
        _, v0, c = m.covariances(reversible=True)
        c0 += m.count * v0
        ct += m.count * c
    out = np.full(n_features, np.nan)
    ok = c0 > 0
    out[ok] = ct[ok] / c0[ok]
    return out


class EvenSpacingPass(Pass):
    """Refuse a file whose stored times are not evenly spaced (a pass with no result).

    Lags in ps need evenly spaced frames. Within a leaf, consecutive frames must be
    ``(frame difference) * dt`` apart; across leaves, the tree's merges check the
    last frame of one node against the first of the next, so every gap is checked
    once whatever the task split. Files that store no times, or whose stored times
    were replaced by a given frame spacing, are skipped.

    Parameters
    ----------
    featurizer : cvdesign.passes.Featurizer
        The featurizer of the pass it runs with (times come with every read).
    steps : dict of int to float or None
        Frame spacing of each segment, ps (None: unknown, not checked).
    checked : set of int
        Segments whose stored times are to be checked.
    bias_times : dict of int to cvdesign.io.bias.BiasTimes, default=None
        Of the checked segments, those whose bias-energy file has a time column:
        every frame's stored time is compared with the file's
        (:meth:`~cvdesign.io.bias.BiasTimes.check`), here where the times are
        read anyway (:func:`bias_times`).
    """

    def __init__(self, featurizer, steps, checked, bias_times=None):
        self.featurizer = featurizer
        self.steps = dict(steps)
        self.checked = set(checked)
        self.bias_times = dict(bias_times or {})

    def map(self, leaf):
        si = leaf.segment
        if si not in self.checked or leaf.time is None or leaf.frames.size == 0:
            return None
        t = np.asarray(leaf.time, dtype=np.float64)
        if si in self.bias_times:
            self.bias_times[si].check(leaf.layout.path, leaf.frames, t)
        f = leaf.frames.astype(np.float64)
        _check_spacing(leaf.layout.path, self.steps[si], f, t)
        return {si: (leaf.layout.path, f[0], t[0], f[-1], t[-1])}

    def merge(self, a, b):
        out = dict(a)
        for si, (path, f0, t0, f1, t1) in b.items():
            if si in out:  # the node of `a` ends where the node of `b` starts
                _, g0, s0, g1, s1 = out[si]
                _check_spacing(path, self.steps[si], np.array([g1, f0]), np.array([s1, t0]))
                out[si] = (path, g0, s0, f1, t1)
            else:
                out[si] = (path, f0, t0, f1, t1)
        return out

    def finish(self, partial, plan):
        return None


def _check_spacing(path, dt, f, t):
    if t.size < 2:
        return
    expected = np.diff(f) * dt
    # times are single precision: each is within half a float32 spacing of the true time,
    # so a difference within one spacing at the larger; and 0.1 % of a step
    # (4 |t| 2^-23, allowed before, was 0.48 ps at 10^6 ps: a missing 0.2 ps frame passed)
    big = np.maximum(np.abs(t[1:]), np.abs(t[:-1])).astype(np.float32)
    tol = 1e-3 * dt + np.spacing(big).astype(np.float64)
    bad = np.flatnonzero(np.abs(np.diff(t) - expected) > tol)
    if bad.size:
        i = int(bad[0])
        raise InputError(
            f"trajectory {str(path)!r} is not evenly spaced in time: frame {int(f[i + 1])} is at "
            f"{_ps(t[i + 1])} ps, but the first time step ({dt:g} ps) puts it at "
            f"{_ps(t[i] + expected[i])} ps; lags in ps need evenly spaced frames, so split the "
            "file where the spacing changes")


def bias_times(source, checked):
    """The bias-file times (:class:`cvdesign.io.bias.BiasTimes`) of the `checked` segments
    whose bias-energy file has a time column, for :class:`EvenSpacingPass`."""
    return {si: source.segments[si].bias_times for si in sorted(checked)
            if source.segments[si].bias_times is not None}


def _ps(t):
    """A time (ps) with the digits that tell apart frames far from zero (7 significant
    digits, 2 more than the integer part's beyond 10^5)."""
    digits = max(7, int(math.log10(abs(t))) + 3) if t else 7
    return f"{t:.{digits}g}"


def checked_segments(source, steps):
    """Segments whose stored times :class:`EvenSpacingPass` checks."""
    return {si for si, seg in enumerate(source.segments)
            if steps.get(si) is not None and stores_time(seg.path)
            and not source.stored_times_ignored(si)}
