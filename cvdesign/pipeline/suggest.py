"""The main job: from state trajectories to ranked CVs and spec files.

:func:`suggest` reads top to bottom as the data flow of the design:

1. **configuration** -- every option validated once (:class:`SuggestConfig`);
2. **timing** -- frame spacing of every file, the lag in frames;
3. **pool** -- candidate descriptors from the selected atoms, distances
   prefiltered by a cutoff on a strided subset of frames;
4. **screening pass** -- per-state diagonal moments, frame counts, per-run
   lagged autocorrelations of every feature, even time spacing, box heights;
   then univariate scores and the screened descriptors (:mod:`.screening`);
5. **statistics pass** -- per-state, per-fold full and lagged moments of the
   screened features, and their autocorrelations on a grid of lags
   (integrated times);
6. **shortlist, search, fits** -- redundancy, greedy forward search scored on
   held-out folds, ranking, final directions (:mod:`.ranking`);
7. **held-out pass** -- histograms of every feature (score card overlap), the
   ranked CVs' held-out histograms and their smallest and largest value in
   each state (the observed range), bootstrap blocks, the score card's block
   sums, and what the report draws (:mod:`.report_data`: held-out histograms
   in the CVs' units, traces); then the implied timescales' lagged sums, and
   each ranked CV's own per-run autocorrelations on the integrated-time grid
   (its integrated time, which the hints' deposition interval uses), in a read
   of their own over the ranked CVs' terms (their lags, up to 2000 frames,
   would keep that many frames of every feature in the held-out read);
8. **bootstrap, ranking, specs** -- intervals, the ranked entries with their
   reachable and observed ranges (:func:`.ranking.add_ranges`), one spec per
   entry (:mod:`.specs`), the report data.

Every pass runs on the pass engine (:mod:`cvdesign.passes`): tasks over leaves
of frames, merged in a fixed tree, so the result is the same, byte for byte,
serially, on local processes or on a Dask cluster (``executor=``), whatever the
task split or chunk size. Memory grows only with the logarithm of the trajectory
length (one partial result per level of the merge tree).
"""

import logging
import math
from dataclasses import dataclass, replace

import numpy as np

from ..constants import BOOTSTRAP_TOO_FEW, COORDINATION_R0_NM, MIN_BOOTSTRAP_REPLICATES
from ..errors import InputError
from ..geometry import recorded_geometry_warnings
from ..io.source import (Source, describe_selection, missing_box_warning, select_atoms,
                         unboxed_files)
from ..kinds import DEFAULT_KINDS
from ..passes import (MIN_FRAMES_PER_FOLD, BlockPass, CardPass, FoldMomentsPass, Folds,
                      HistogramPass, LagGridPass, LaggedPass, PoolFeaturizer,
                      ProjectionRangePass, ScreeningPass, plan_tasks, reference_features,
                      run_pass)
from ..pool import build_pool, check_kinds, check_length, needs_prefilter, prefilter_stride_for
from ..progress import stage_messages
from ..score.card import integrated_time_interval, plan_card_blocks
from ..stats.bootstrap import MIN_INTERVAL_BLOCKS
from ..stats.separation import fisher_ratio
from ..score.univariate import overlap_coefficient
from ..search import OBJECTIVES, FoldMoments, scaled_fold_directions
from .output import CAUTION, Suggestions, is_output_file, output_inputs, resolving_span_ps
from .ranking import (NOISE_LEVEL_FACTOR, PAIR_OVERLAP_WARN, add_fold_spread_warning,
                      add_noise_level, add_pair_overlap, add_ranges, bootstrap_ranked,
                      card_interval_rows, closest_pairs, fit_ranked, fold_noise_level,
                      heldout_overlap, hints_for, ranking_entry, search, shortlist)
from .report_data import (CVBlockHistograms, CVGridPass, CVLaggedPass, CVReportPass, cv_plans,
                          cv_integrated_times, report_document, timescale_lags, trace_stride)
from .screening import Screening, screen
from .specs import InputChecksums, SourceRecord, describe_inputs, spec_document
from .transitions import gather_transitions, transition_columns, transition_intervals
from .timing import (EvenSpacingPass, bias_times, block_frames, checked_segments, iat_lags,
                     lag_frames, longest_run_text, longest_visit_ps, read_timesteps,
                     runs_too_short, scatter_factors, slowest_state_times,
                     state_integrated_times)

__all__ = ["suggest", "SuggestConfig", "Suggestions", "CAUTION", "is_output_file"]

_log = logging.getLogger(__name__)

#: Histogram bins of the score card and of the held-out CV histograms.
N_BINS = 50

#: Temperature of the biased run the hints (and the report's -kT ln p) assume when neither
#: `temperature` nor a source with biased runs gives one, K.
HINTS_TEMPERATURE_K = 300.0

#: Most bootstrap blocks of one state (blocks are lengthened beyond that): enough for a
#: 95 % percentile interval, and memory that does not grow with the number of frames
#: (common practice: a few dozen to a few hundred resampling units).
MAX_BOOTSTRAP_BLOCKS = 200


# --------------------------------------------------------------------------- configuration
@dataclass(frozen=True)
class SuggestConfig:
    """Every option of :func:`suggest`, validated once (see its docstring for meanings).

    Raises
    ------
    InputError
        Naming the option, its value and the accepted range.

    Examples
    --------
    >>> SuggestConfig(objective="both", lag_ps=2.0).search
    {'objective': 'both', 'method': 'hlda', 'shrinkage': 0.001}
    >>> SuggestConfig(max_terms=0)
    Traceback (most recent call last):
    ...
    cvdesign.errors.InputError: max_terms=0 must be an integer of at least 1
    """

    objective: str = "separate"
    lag_ps: float = None
    method: str = "hlda"
    selection: str = None
    kinds: tuple = DEFAULT_KINDS
    cutoff_nm: float = 1.0
    prefilter_stride: int | None = None
    coordination_r0_nm: float = COORDINATION_R0_NM
    max_terms: int = 5
    n_suggestions: int = 10
    screen_size: int = 200
    shortlist_size: int = 40
    max_correlation: float = 0.95
    n_folds: int = 4
    n_seeds: int = 5
    min_gain: float = 0.01
    shrinkage: float = 1e-3
    n_bootstrap: int = 200
    seed: int = 0
    temperature_k: float = 300.0  # (HINTS_TEMPERATURE_K)
    md_step_fs: float = 2.0

    def __post_init__(self):
        ints = {"max_terms": 1, "n_suggestions": 1, "screen_size": 1, "shortlist_size": 1,
                "n_folds": 2, "n_seeds": 1, "prefilter_stride": 1, "n_bootstrap": 0, "seed": 0}
        for name, lo in ints.items():
            v = getattr(self, name)
            if v is None and name == "prefilter_stride":  # the source's default
                continue
            if isinstance(v, bool) or not isinstance(v, (int, np.integer)) or v < lo:
                raise InputError(f"{name}={v!r} must be an integer of at least {lo}")
        if 0 < self.n_bootstrap < MIN_BOOTSTRAP_REPLICATES:
            raise InputError(f"n_bootstrap={self.n_bootstrap!r}: {BOOTSTRAP_TOO_FEW}")
        # the pool's own checks: a comma-separated string of kinds, as build_pool takes it
        object.__setattr__(self, "kinds", check_kinds(self.kinds))
        object.__setattr__(self, "cutoff_nm", check_length(self.cutoff_nm, "cutoff",
                                                           allow_inf=True))
        object.__setattr__(self, "coordination_r0_nm",
                           check_length(self.coordination_r0_nm, "coordination_r0"))
        if not 0 < self.max_correlation <= 1:
            raise InputError(f"max_correlation={self.max_correlation!r} must be in (0, 1]")
        if not self.min_gain >= 0:
            raise InputError(f"min_gain={self.min_gain!r} must be non-negative")
        if not 0 <= self.shrinkage <= 1:
            raise InputError(f"shrinkage={self.shrinkage!r} must be in [0, 1]")
        if self.objective not in OBJECTIVES:
            raise InputError(f"objective={self.objective!r} must be one of "
                             f"{', '.join(OBJECTIVES)}")
        if self.method not in ("lda", "hlda"):
            raise InputError(f"method={self.method!r} must be 'lda' or 'hlda'")
        lag = self.lag_ps
        if lag is not None and not (isinstance(lag, (int, float)) and not isinstance(lag, bool)
                                    and math.isfinite(lag) and lag > 0):
            raise InputError(f"lag={lag!r} must be a positive time in ps")
        if self.objective in ("slow", "both") and lag is None:
            raise InputError(f"objective {self.objective!r} needs a lag time: give --lag PS "
                             "(e.g. a few times the time step, well below the run length)")
        from ..bias.hints import check_run_conditions

        check_run_conditions(self.temperature_k, self.md_step_fs)  # impossible hint inputs

    @property
    def search(self):
        """dict : the keywords every held-out score and direction of the search takes."""
        return {"objective": self.objective, "method": self.method, "shrinkage": self.shrinkage}

    def parameters(self, lag_ps, folds):
        """The parameters recorded in every spec's provenance."""
        return {"objective": self.objective, "method": self.method, "lag_ps": lag_ps,
                "selection": self.selection, "kinds": list(self.kinds),
                "cutoff_nm": float(self.cutoff_nm),
                **({"coordination_r0_nm": float(self.coordination_r0_nm)}
                   if "coordination" in self.kinds else {}),
                "prefilter_stride": self.prefilter_stride, "max_terms": self.max_terms,
                "screen_size": self.screen_size, "shortlist_size": self.shortlist_size,
                "max_correlation": self.max_correlation, "n_folds": folds.n_folds,
                "n_seeds": self.n_seeds, "min_gain": self.min_gain, "fold_mode": folds.mode,
                "shrinkage": self.shrinkage, "n_bootstrap": self.n_bootstrap,
                "temperature_k": self.temperature_k, "md_step_fs": self.md_step_fs}


# --------------------------------------------------------------------------- the job
def suggest(source, *, objective="separate", lag=None, method="hlda", selection=None,
            kinds=DEFAULT_KINDS, cutoff=1.0, prefilter_stride=None,
            coordination_r0=COORDINATION_R0_NM,
            max_terms=5, n_suggestions=10, screen_size=200, shortlist_size=40,
            max_correlation=0.95, n_folds=4, n_seeds=5, min_gain=0.01, shrinkage=1e-3,
            n_bootstrap=200, seed=0, temperature=None, md_step_fs=2.0, executor=None,
            progress=None):
    """Rank compact linear CVs for the states of a source.

    Parameters
    ----------
    source : cvdesign.io.source.Source
        Topology and trajectories with at least two states. Biased runs (given
        with their bias energies, ``Source(top, temperature=K).add(traj, state,
        bias=FILE)``) are reweighted by ``exp(V/kT)`` in every statistic, and
        their lagged pairs taken in rescaled time ``dt exp(V/kT)``; the notes
        give each state's effective sample size (see :mod:`cvdesign.io.bias`).
    objective : {'separate', 'slow', 'both'}, default='separate'
        What the search maximizes on held-out folds: the separation of the
        states (Fisher ratio of the discriminant direction), the slowness of
        the slowest linear combination (cross-validated VAMP-2 of the slowest
        singular function, Wu and Noé 2020), or the product of the two (see
        :func:`cvdesign.search.fold_scores`). Every suggestion reports both
        its separation and, when a lag is known, its slowness. For ``both``
        the slowness is measured within the states, or, when the source holds
        runs whose labels visit two or more states and every held-out fold
        has enough crossings, along those runs, crossings included
        (:mod:`cvdesign.pipeline.transitions`); ``slowness_ranked_on`` of
        each ranking entry says which.
    lag : float, default=None
        Lag time in ps for slowness (required for ``slow`` and ``both``),
        converted to frames with each file's time step; a lag that is not a
        whole number of frames of some file is refused. None: slowness is
        reported at 10 frames when every file has the same known time step.
    method : {'hlda', 'lda'}, default='hlda'
        Discriminant for ``separate`` and ``both``: harmonic LDA (within-state
        scatter the harmonic mean of the state covariances; Mendels, Piccini
        and Parrinello 2018) or plain LDA (arithmetic mean). HLDA is the
        default because the narrow (stiff) state dominates its within-state
        scatter, so the CV does not discount a direction just because one
        state fluctuates widely along it -- the direction a biased run must
        push along to leave the narrow state.
    selection : str, default=None
        mdtraj atom selection for the pool; None: heavy atoms of the solute.
    kinds : sequence of str, default=('distance', 'angle', 'dihedral')
        Descriptor kinds in the pool, from ``cvdesign.kinds.KINDS``: also
        ``'center_distance'`` (distance between the mass centers of the
        selected atoms of two residues, nm) and ``'coordination'`` (their
        coordination number, dimensionless), for every pair of residues.
    cutoff : float, default=1.0
        Prefilter, in nm: an atom pair (or, for the residue kinds, a residue
        pair, by the distance of their centers) is kept if its mean distance
        is below `cutoff` in at least one state.
    prefilter_stride : int, default=None
        The prefilter uses every `prefilter_stride`-th frame of each state; None:
        every 10th, or sparser so that the state with the fewest frames still gives
        about 2,000 (:func:`cvdesign.pool.prefilter_stride_for`). The spec's
        provenance records the stride used.
    coordination_r0 : float, default=0.45
        Switching distance of the coordination numbers, nm (exponents 6, 12).
    max_terms : int, default=5
        Largest number of descriptors in a combination.
    n_suggestions : int, default=10
        Number of ranked combinations (and spec files).
    screen_size : int, default=200
        Descriptors, best first by the objective's univariate score, whose
        full covariance is gathered.
    shortlist_size : int, default=40
        Descriptors the search may combine, one per redundancy group.
    max_correlation : float, default=0.95
        Descriptors are redundant when the pooled within-state |correlation|
        of any of their features exceeds this and, together, they score no
        better than the better one alone (see :mod:`cvdesign.score.redundancy`).
    n_folds : int, default=4
        Folds of the held-out scoring (fewer when a state has fewer
        trajectories, or too few frames).
    n_seeds : int, default=5
        Greedy searches, each started from one of the best single descriptors.
    min_gain : float, default=0.01
        A search adds a descriptor only if it raises the held-out score by
        more than this fraction.
    shrinkage : float, default=1e-3
        Regularization of the within-state covariances of standardized
        features: ``(1 - a) S + a (tr S / p) I``.
    n_bootstrap : int, default=200
        Block-bootstrap replicates for confidence intervals (0: none); fewer than
        20 are refused (a 95 % percentile interval from so few is meaningless;
        common practice is 200 or more).
    seed : int, default=0
        Seed of the bootstrap; same inputs and seed, same outputs byte for byte.
    temperature : float, default=None
        Temperature in K of the biased run, for the bias-parameter hints stored
        in each spec (recompute them with ``cvdesign hints``) and the report's
        ``-kT ln p``; 1 to 5000 K. None: the source's ``temperature`` when it
        holds biased runs (they are reweighted at it), else
        :data:`HINTS_TEMPERATURE_K` (300 K). A value other than the source's,
        with biased runs, is refused: the reweighted populations and the hints
        would describe two temperatures in one output.
    md_step_fs : float, default=2.0
        MD step in fs of the biased run, for the hints; 0.01 to 100 fs (see
        :func:`cvdesign.bias.hints.check_run_conditions`). When the hints of a
        suggestion are refused (e.g. a CV that does not move within the
        states), its ranking entry and spec record ``hints_refused`` with the
        reason instead.
    executor : None, int, str, dask.distributed.Client or cvdesign.parallel.Executor
        Where the passes over the trajectories run: None in this process, an
        int that many local processes, a Dask client or scheduler address
        (``'tcp://host:8786'``) a cluster (see :func:`cvdesign.parallel.as_executor`).
        The results are the same, byte for byte.
    progress : callable, default=None
        Called with a message string at each stage. The same messages are
        logged at INFO on the ``cvdesign.pipeline.suggest`` logger; progress
        bars of the passes and the bootstrap: :func:`cvdesign.show_progress`.

    Returns
    -------
    Suggestions

    Raises
    ------
    InputError
        For a `source` that is not a :class:`~cvdesign.io.source.Source` (e.g. a
        file name), fewer than two states, a state without frames, an empty
        pool, a lag that cannot be converted, and the other input problems
        described in the messages.
    cvdesign.errors.ExecutorError
        When the executor fails (a scheduler that cannot be reached, a worker
        that dies).

    Examples
    --------
    On the bundled demo (two states of an invented flexible molecule)::

        from cvdesign import Source, suggest
        from cvdesign.io.demo import demo_data_dir
        d = demo_data_dir()
        src = Source.from_states(d / "latch.pdb", {"closed": [d / "closed-1.xtc"],
                                                   "open": [d / "open-1.xtc"]})
        result = suggest(src, n_bootstrap=0)
        print(result.top_table())
    """
    if not isinstance(source, Source):
        raise InputError(
            f"suggest() needs a Source (a topology and trajectories grouped by state), not "
            f"{type(source).__name__} {_short_repr(source)}; build one with "
            "Source.from_states('top.pdb', {'closed': ['c1.xtc'], 'open': ['o1.xtc']})")
    temperature = _run_temperature(source, temperature)
    config = SuggestConfig(
        objective=objective, lag_ps=lag, method=method, selection=selection,
        kinds=kinds, cutoff_nm=cutoff, prefilter_stride=prefilter_stride,
        coordination_r0_nm=coordination_r0,
        max_terms=max_terms, n_suggestions=n_suggestions, screen_size=screen_size,
        shortlist_size=shortlist_size, max_correlation=max_correlation, n_folds=n_folds,
        n_seeds=n_seeds, min_gain=min_gain, shrinkage=shrinkage, n_bootstrap=n_bootstrap,
        seed=seed, temperature_k=temperature, md_step_fs=md_step_fs)
    if source.n_states < 2:
        names = ", ".join(repr(s) for s in source.states) or "none"
        raise InputError(
            f"only one state was given ({names}); separating states needs at least two: "
            "give another with --state NAME FILE ..., or give unlabelled runs with --runs")
    from ..parallel import using_executor

    with using_executor(executor) as executor:
        executor.start()  # local workers start up while the pool is enumerated
        checksums = InputChecksums(source, executor)  # hashed while the workers start
        try:
            with recorded_geometry_warnings() as undefined:
                result = _suggest(source, config, executor, progress, checksums)
        finally:
            checksums.cancel()
    # in the summary too: a warning on standard error is gone with the terminal (or -q);
    # sorted, since workers' warnings arrive in the order their tasks end
    result.notes += [f"input frames: {text}" for text in sorted(undefined)]
    return result


def _suggest(source, config, executor, progress, checksums):
    say = stage_messages(_log, progress)
    priors = np.full(source.n_states, 1.0 / source.n_states)
    steps = read_timesteps(source)
    lag_ps = config.lag_ps if config.lag_ps is not None else _default_lag(steps)
    lags = lag_frames(source, lag_ps, steps) if lag_ps is not None else None

    selection = describe_selection(source.topology,
                                   select_atoms(source.topology, config.selection),
                                   config.selection)
    say(selection)
    say("building the candidate pool")
    if config.prefilter_stride is None and needs_prefilter(config.kinds):
        # the stride used goes into the specs' provenance (None: no prefilter ran)
        config = replace(config, prefilter_stride=prefilter_stride_for(source))
    pool = build_pool(source, selection=config.selection, kinds=config.kinds,
                      cutoff=config.cutoff_nm, stride=config.prefilter_stride,
                      coordination_r0=config.coordination_r0_nm, executor=executor)
    notes = list(pool.notes)
    base = plan_tasks(source)
    every = PoolFeaturizer(pool)
    reweighting = source.reweighting()  # biased runs (None without)
    if reweighting is not None and lags is not None:
        lag_ps, lags, rescale_note = _rescaled_lag(reweighting, lags, lag_ps, config)
        notes += rescale_note

    say(f"pool: {len(pool)} descriptors, {pool.n_features} features; screening pass")
    first = _screening_pass(source, base, every, steps, lags, executor)
    notes += source.notes
    seg_counts = first.segment_counts
    _refuse_empty_states(source, seg_counts)
    inputs = describe_inputs(source, seg_counts, steps)
    folded = _folded_distances(pool, first.diagonal, first.min_box_height)
    notes += _box_notes(pool, first.min_box_height, folded)
    boxless = missing_box_warning(source.topology_path, unboxed_files(source))
    if boxless is not None:  # (every file without a box, also beside files with one)
        notes.append("warning: " + boxless)
    notes += _timing_notes(inputs)
    notes += _overlap_note(source.states, seg_counts, reweighting)
    lag_ps, lags, lag_note = _slowness_lag(source, config, seg_counts, steps, first, lag_ps,
                                           lags, reweighting)
    notes += lag_note
    if reweighting is not None:
        _refuse_single_frame_states(source, reweighting)
        rw_notes, _ = reweighting.describe(lags, default_lag=config.lag_ps is None)
        notes += rw_notes
        say("reweighted biased runs; effective sample sizes (Kish): " + ", ".join(
            f"{source.states[s]!r} {reweighting.ess[s]:.1f} of {reweighting.frames[s]} frames"
            for s in reweighting.biased_states))
    # (planned before the screening: a state of too few frames is refused as that, not as
    # 'frozen' when its single frame cannot move)
    folds = Folds.plan(base.layouts, config.n_folds, state_names=source.states)
    screening = screen(pool, source.states, first, priors, objective=config.objective,
                       screen_size=config.screen_size, lagged=lags is not None)
    notes += screening.notes
    notes.append(_folds_note(folds, config.n_folds))
    say(f"statistics pass ({len(screening.screened)} descriptors screened)")
    effective = _run_effective_frames(source, reweighting)  # (reweighted runs' Kish sizes)
    fm, iat_desc, iat_note, transit, scatter = _statistics_pass(
        source, base, pool, screening, folds, priors, steps, lags, lag_ps, seg_counts, config,
        executor, reweighting, effective)
    notes += iat_note

    short = shortlist(pool, screening, fm, priors, config, notes)
    say(f"searching combinations of up to {config.max_terms} of {len(short.members)} "
        "descriptors")
    ranked = search(fm, screening, short, config, notes)
    fits = fit_ranked(ranked, fm, screening, short, config)

    say("held-out and bootstrap pass")
    held = _heldout_pass(source, base, pool, screening, short, fits, fm, folds, lags, iat_desc,
                         seg_counts, steps, first, config, executor)
    notes += held.notes

    boot = card_ci = None
    if config.n_bootstrap:
        say(f"bootstrap ({config.n_bootstrap} replicates)")
        boot = bootstrap_ranked(
            held, fits, short, screening, priors, fm, config, lags is not None,
            None if transit is None else transit.standardized_blocks(
                screening.center[screening.features], screening.scale[screening.features]))
        notes += _bootstrap_notes(boot, held, config, fm)
        card_ci = card_interval_rows(held.card, held.card_desc, held.card_feat, pool,
                                     screening.center, priors, screening.unscored,
                                     config.n_bootstrap, config.seed)
        if card_ci is None:
            counts = ", ".join(f"{name!r} {len(g)}" for name, g in
                               zip(source.states, held.card.blocks() if held.card else []))
            notes.append(f"score card: no bootstrap intervals (blocks per state: "
                         f"{counts or 'none'}; fewer than {MIN_INTERVAL_BLOCKS} in a state give "
                         "intervals that cover the truth far less often than they say); give "
                         "more or longer runs")

    transit_ci = None
    if transit is not None and config.n_bootstrap:
        transit_ci = transition_intervals(
            transit.standardized_blocks(screening.center[screening.features],
                                        screening.scale[screening.features]),
            fits, fm, lag_ps, n_boot=config.n_bootstrap, seed=config.seed + 3)
        if transit_ci is None:
            notes.append(f"transition slowness: no bootstrap intervals (a crossing run has "
                         f"fewer than {MIN_INTERVAL_BLOCKS} sub-blocks in a held-out fold: "
                         "intervals from so few cover the truth far less often than they "
                         "say); give longer crossing runs")
    scorecard = _scorecard(pool, screening, short, held.overlap_desc, iat_desc, card_ci)
    cv_times, frame_ps, cv_frames = [None] * len(fits), None, [None] * len(fits)
    if held.report is not None and held.report.get("cv_grid") is not None:
        frame_ps = next(iter(steps.values()))  # (one spacing for every file, or unknown)
        # without a spacing the times are in frames: no time to report, but the held-out
        # noise level needs them
        cv_frames = cv_integrated_times(held.report["cv_grid"], held.report_lags,
                                        1.0 if frame_ps is None else frame_ps,
                                        _state_frames(seg_counts, reweighting),
                                        grid=_lag_grid(steps, seg_counts),
                                        effective=effective)
        if frame_ps is not None:
            cv_times = cv_frames
            short_cvs = sum(t is not None and t[3] for t in cv_times)
            if short_cvs:
                notes.append(_short_runs_note(short_cvs, "ranked CVs"))
    run_ps = [_run_frames(source, reweighting, seg_counts, si) * dt for si, dt in steps.items()
              if dt is not None]
    longest_run_ps = float(max(run_ps)) if run_ps else None
    if longest_run_ps is not None and not math.isfinite(longest_run_ps):
        # a biased run's rescaled length overflows (bias energies of thousands of kT): no
        # run length to compare timescales with
        longest_run_ps = None
        notes.append("warning: the rescaled length of a biased run overflows (its bias "
                     "energies reach thousands of kT: check their unit, kJ/mol, and "
                     "--temperature), so no timescale is compared with the run length")
    # pairs within one state cover at most its longest run or visit of a labelled file
    longest_visit = longest_visit_ps(source, reweighting, seg_counts, steps)
    params = config.parameters(lag_ps, folds)
    checksums = checksums.result(inputs)
    ranking, specs, record, noisy, overlapping, spread = [], [], None, [], [], []
    fraction = _effective_fraction(seg_counts, reweighting)
    for rank, (comb, fit, ov) in enumerate(zip(ranked, fits, held.overlap), 1):
        entry = ranking_entry(rank, comb, fit, ov, pool=pool, screening=screening, fm=fm,
                              priors=priors, states=source.states, config=config, lag_ps=lag_ps,
                              boot=boot)
        if transit is not None:
            entry.update(transition_columns(fit, fm, lag_ps))
            if transit_ci is not None:
                entry.update(transit_ci[rank - 1])
        _add_times(entry, longest_run_ps, longest_visit, cv_times[rank - 1], frame_ps,
                   source.states)
        add_ranges(entry, pool, held.observed[rank - 1], source.states)
        if add_pair_overlap(entry, held.closest[rank - 1], source.states):
            overlapping.append(rank)
        for did in dict.fromkeys(t["descriptor"] for t in entry["terms"]):
            if did in folded:
                entry["warnings"].append(
                    f"its term {did} reaches {folded[did]:.3g} nm in some frame, beyond half "
                    f"the smallest box height ({0.5 * first.min_box_height:.3g} nm): there "
                    "the minimum image folds the distance back (the CV turns back, its "
                    "gradient flips); check that the box is large enough for it, or choose a "
                    "CV without it")
        own = cv_frames[rank - 1]  # (per state, its own time in frames: [5])
        state_times = None if own is None else [
            t * scatter.get(s, 1.0) for s, t in enumerate(own[5])]
        warned = add_noise_level(entry, fm, frame_ps, warn=config.objective != "slow",
                                 state_frames=state_times, effective_fraction=fraction)
        if warned:
            noisy.append(rank)
        if add_fold_spread_warning(entry, fold_noise_level(
                entry, fm, frame_ps, state_frames=state_times, effective_fraction=fraction),
                noise_warned=warned):
            spread.append(rank)
        if entry.get("timescale_resolved") and _offsets_hold_autocorrelation(entry):
            entry["timescale_resolved"] = False
        entry["hints"], refused = hints_for(entry, config.temperature_k, config.md_step_fs,
                                            from_biased_runs=reweighting is not None)
        if refused:
            entry["hints_refused"] = refused
            notes.append(f"bias hints refused for {entry['spec']}: {refused}")
        ranking.append(entry)
        if record is None:
            record = SourceRecord.of(source)  # the topology and bias files, hashed once
        specs.append(spec_document(source, pool, entry, params, checksums,
                                   config.seed if config.n_bootstrap else None, record))
    if noisy and noisy[0] == 1:
        notes.append(_noise_note(noisy, ranking[0]))
    if overlapping and overlapping[0] == 1:
        notes.append(_pair_overlap_note(overlapping, ranking))
    if spread and spread[0] == 1:
        first = ranking[0]
        within = float(np.mean(first["heldout_fisher_ratio_folds"]))
        notes.append(
            f"warning: within each held-out fold the Fisher ratio of rank 1 averages "
            f"{within:.3g}, {within / first['fisher_ratio_all']:.2g} times its ratio on all "
            f"frames ({first['fisher_ratio_all']:.3g}): the states' runs (or blocks) sit at "
            "different means along it (its warning says more); the held-out score pools "
            "the folds, so the ranking counts that spread")
    report_data = None
    if held.report is not None:
        report_data = report_document(held.report, held.report_plans, ranking, source=source,
                                      states=list(source.states), steps=steps,
                                      lags=held.report_lags,
                                      temperature_k=config.temperature_k, lag_ps=lag_ps,
                                      within_states=reweighting is None)
    return Suggestions(states=list(source.states), pool=pool, scorecard=scorecard,
                       ranking=ranking, specs=specs, notes=notes, inputs=inputs,
                       input_files=output_inputs(source), objective=config.objective,
                       lag_ps=lag_ps, selection=selection, report_data=report_data)


# --------------------------------------------------------------------------- passes
def _plan_for(base, n_features, executor):
    """The base plan's leaves sized for `n_features`, in tasks for the executor's workers
    (the results depend on the leaves, which depend on `n_features` only)."""
    return base.for_features(n_features, executor.n_workers)


def _screening_pass(source, base, every, steps, lags, executor):
    """Per-state diagonal moments, counts, per-run lagged moments, box heights; even spacing."""
    plan = _plan_for(base, every.n_features, executor)
    shift = reference_features(plan, every) if lags is not None else None
    first = ScreeningPass(every, lags=lags, shift=shift)
    checked = checked_segments(source, steps)
    spacing = EvenSpacingPass(every, steps, checked, bias_times(source, checked))
    result, _ = run_pass((first, spacing), source, executor=executor, tasks=plan,
                         label="screening")
    return result


def _lag_grid(steps, seg_counts):
    """The integrated-time lag grid (frames) when every file has the same frame spacing
    (known or not), else None."""
    uniform = len({None if v is None else round(v, 9) for v in steps.values()}) == 1
    return iat_lags(seg_counts) if uniform else None


#: Fewest lagged pairs in every (state, held-out fold) below which objective 'both' is
#: warned to rank on noise: an autocorrelation from n independent pairs has a standard error
#: of about 1/sqrt(n) (Bartlett 1946, J. R. Stat. Soc. Suppl. 8, 27; from memory), 0.1 at
#: 100, the order of the differences the weight ranks by (our choice).
MIN_WITHIN_PAIRS = 100


def _statistics_pass(source, base, pool, screening, folds, priors, steps, lags, lag_ps,
                     seg_counts, config, executor, reweighting=None, effective=None):
    """Fold moments (full and lagged) and integrated times of the screened descriptors, and
    per state the factor by which their run means scatter more than those times allow
    (:func:`~cvdesign.pipeline.timing.scatter_factors`; empty without times; from times in
    frames when the frame spacing is unknown, for the held-out noise level). `effective`:
    the Kish effective frames of reweighted runs (:func:`_run_effective_frames`)."""
    feats = PoolFeaturizer(pool.subset(screening.screened))
    shift = screening.center[screening.features]
    passes = [FoldMomentsPass(feats, folds)]
    if lags is not None:
        passes.append(LaggedPass(feats, lags, shift=shift, folds=folds, within_fold=True))
    grid = _lag_grid(steps, seg_counts)
    if grid is not None:
        passes.append(LagGridPass(feats, grid, shift=shift))
    results = run_pass(tuple(passes), source, executor=executor,
                       tasks=_plan_for(base, feats.n_features, executor), label="statistics")
    fold_m = results[0]
    for s, per_fold in enumerate(fold_m):
        for k, m in enumerate(per_fold):
            if m.count == 0:
                raise InputError(f"state {source.states[s]!r} has no frames in held-out fold "
                                 f"{k + 1} of {folds.n_folds}; give more frames or trajectories")
    fold_lag = None
    if lags is not None:
        fold_lag = results[1].by_state_fold()  # [state][fold]: within-state slowness too
        if config.objective in ("slow", "both") and any(
                sum(row[k].count for row in fold_lag) == 0 for k in range(folds.n_folds)):
            raise InputError(f"a held-out fold has no lagged pairs at lag {lag_ps:g} ps; "
                             "choose a shorter --lag or give longer runs")
    # runs that cross between the states: slowness along them (one more read of those runs)
    transit = None if lags is None else gather_transitions(source, feats, shift, lags,
                                                           folds.n_folds, executor=executor)
    fm = FoldMoments(fold_m, priors, fold_lag,
                     None if transit is None else transit.by_fold(feats.n_features),
                     rank_transitions=transit is not None and transit.ranks).standardized(
        screening.center[screening.features], screening.scale[screening.features])

    notes, iat_desc = ([] if transit is None else
                       transit.notes + transit.ranking_notes(config.objective)), {}
    if config.objective == "both" and fold_lag is not None and (
            transit is None or not transit.ranks):
        fewest = min(m.n_pairs for row in fold_lag for m in row)
        if fewest < MIN_WITHIN_PAIRS:
            notes.append(
                f"warning: objective 'both' weighs each CV by its autocorrelation at the lag "
                f"within the states, but in some state and held-out fold it rests on "
                f"{fewest} lagged pair{'' if fewest == 1 else 's'} (fewer than "
                f"{MIN_WITHIN_PAIRS}): that weight is mostly noise, and the ranking may "
                "change with the lag; give longer runs, a shorter --lag, or rank with "
                "--objective separate")
    if grid is None:
        notes.append("integrated autocorrelation times not computed: the files' time steps "
                     "differ (or some are unknown)")
        return fm, iat_desc, notes, transit, {}
    dt = next(iter(steps.values()))
    n = feats.n_features
    by_lag = [r.by_run() for r in results[-1]]  # (folds merged once per lag)
    if dt is None:
        # no frame spacing: no time in ps to report, but the times in frames still give
        # the held-out noise level
        in_frames = {s: v[0] for s, v in state_integrated_times(
            by_lag, grid, n, return_window=True).items()}
        return (fm, iat_desc, notes, transit,
                scatter_factors(by_lag[0], in_frames, n, effective=effective))
    # within runs: each (file, state) series about its own mean; each descriptor's time is
    # that of the state where it is longest (pooled, a narrow slow state hides behind a
    # broad fast one, and the bootstrap blocks sized from it would be too short for it)
    per_state = state_integrated_times(by_lag, grid, n, dt=dt, return_window=True)
    tau, decayed, window, state = slowest_state_times(per_state, n)
    # runs too short for a time (their means scatter more than it allows): shown as a lower
    # bound; the bootstrap blocks still follow the measured time (whole runs for every
    # such descriptor would leave a few runs per state without any interval)
    in_frames = {s: v[0] / dt for s, v in per_state.items()}
    short = runs_too_short(by_lag[0], in_frames, n, effective=effective) & decayed
    if short.any():
        notes.append(_short_runs_note(int(sum(short[g].any() for g in screening.groups)),
                                      "screened descriptors"))
    frames = _state_frames(seg_counts, reweighting)[np.maximum(state, 0)]
    tau_lo, tau_hi = integrated_time_interval(tau, window, np.maximum(frames, 1.0))
    for gi, i in enumerate(screening.screened):
        g = screening.groups[gi]
        g = g[np.isfinite(tau[g])]  # (NaN: no pairs at the first lag; no time then)
        if not g.size:
            continue
        j = int(g[np.argmax(tau[g])])
        shown = bool(decayed[j] and not short[g].any())
        ci = [float(tau_lo[j]), float(tau_hi[j])] if shown else None
        # (time ps, decayed as shown, interval, decayed for the bootstrap blocks)
        iat_desc[i] = (float(tau[j]), shown, ci, bool(decayed[j]))
    # how much more the states' run means scatter than their times allow (the screened
    # descriptors' median: the held-out noise level's run offsets)
    scatter = scatter_factors(by_lag[0], in_frames, n, effective=effective)
    return fm, iat_desc, notes, transit, scatter


@dataclass
class HeldOut:
    """What the held-out pass gathers.

    Attributes
    ----------
    overlap : list of float
        Held-out overlap of the states along each ranked CV.
    closest : list of tuple or None
        Per ranked CV, the two states that overlap most along it and their overlap
        (:func:`~cvdesign.pipeline.ranking.closest_pairs`).
    overlap_desc : ndarray
        Per descriptor of the pool, the overlap of the state histograms (best feature).
    blocks : dict of (int, int) to list of tuple
        Bootstrap blocks ``(Moments, LaggedMoments, ArraySum)`` of the shortlisted
        features, per (state, fold).
    where : dict of int to int
        Column of a screened feature (position in the fold moments) in the blocks.
    block_desc : str
        How long the blocks are, for the notes.
    card : CardSums or None
    card_desc : list of int
    card_feat : ndarray of int
    notes : list of str
    observed : list of (ndarray, ndarray)
        Per ranked CV, its smallest and largest value in each state (CV units,
        shape (n_states,) each; +inf and -inf for a state without frames).
    report : dict or None
        What :class:`~cvdesign.pipeline.report_data.CVReportPass` gathered, its
        ``lagged`` entry from :class:`~cvdesign.pipeline.report_data.CVLaggedPass`
        (None without ranked CVs).
    report_plans : list of CVPlan
    report_lags : ndarray of int or None
        Lags of the implied timescales, frames.
    """

    overlap: list
    closest: list
    overlap_desc: np.ndarray
    blocks: dict
    where: dict
    block_desc: str
    card: object
    card_desc: list
    card_feat: np.ndarray
    notes: list
    observed: list
    report: object = None
    report_plans: list = None
    report_lags: object = None


def _cv_plans(fits, fm, where):
    """Per ranked CV: its columns in the blocks, fold directions (in one unit and agreeing
    in sign, :func:`~cvdesign.search.scaled_fold_directions`) and one histogram range for
    every fold, so that the folds' held-out histograms add up bin by bin (the held-out
    overlap pools the folds, as the held-out scores do)."""
    plans = []
    for fit in fits:
        p_idx = np.array([where[int(i)] for i in fit.idx], dtype=np.intp)
        directions = scaled_fold_directions(fm, fit.idx, fit.fold_w)
        lo, hi = np.inf, -np.inf
        for k, wk in enumerate(directions):
            test = fm.test(k)
            mu = np.array([m.mean[fit.idx] @ wk for m in test])
            sd = np.array([math.sqrt(max(wk @ m.covariance[np.ix_(fit.idx, fit.idx)] @ wk, 0.0))
                           for m in test])
            lo, hi = min(lo, float(np.min(mu - 5 * sd))), max(hi, float(np.max(mu + 5 * sd)))
        if not hi > lo:
            lo, hi = lo - 1.0, hi + 1.0
        plans.append((p_idx, directions, [(lo, hi)] * fm.n_folds))
    return plans


def _heldout_pass(source, base, pool, screening, short, fits, fm, folds, lags, iat_desc,
                  seg_counts, steps, first, config, executor):
    """Histograms of every feature; held-out CV histograms, bootstrap blocks and the ranked
    CVs' per-state extremes from the shortlisted features; the score card's block sums --
    one read of every feature."""
    screened = screening.screened
    short_set = set(screened[g] for g in short.members)
    local = []  # shortlisted features, as columns of the fold moments
    for i, g in zip(screened, screening.groups):
        if i in short_set:
            local.extend(g.tolist())
    local = np.array(local, dtype=np.intp)
    where = {int(i): p for p, i in enumerate(local)}
    cols = screening.features[local]
    every = PoolFeaturizer(pool)
    if config.n_bootstrap:
        bf = block_frames(seg_counts, [iat_desc.get(screened[g]) for g in short.members],
                          steps, lags)
        if bf is not None:  # at most MAX_BOOTSTRAP_BLOCKS per state: memory bounded
            bf = max(bf, -(-int(seg_counts.sum(axis=0).max()) // MAX_BOOTSTRAP_BLOCKS))
    else:
        bf = None  # no bootstrap: one block per run and fold, for the held-out histograms
    blocks = BlockPass(every, folds=folds, block_frames=bf, moments=bool(config.n_bootstrap),
                       lags=lags if config.n_bootstrap else None, pairs_within_block=True,
                       sums=CVBlockHistograms(_cv_plans(fits, fm, where), N_BINS), columns=cols,
                       center=screening.center[cols], scale=screening.scale[cols])
    # the ranked CVs' smallest and largest values per state (their spec's CV: the full-data
    # direction on the standardized features, as the spec's terms)
    extremes = ProjectionRangePass(
        every, [(np.array([where[int(i)] for i in fit.idx], dtype=np.intp), fit.w)
                for fit in fits], columns=cols, center=screening.center[cols],
        scale=screening.scale[cols])
    passes = [blocks, extremes]
    notes, card, card_desc, card_feat = [], None, [], np.zeros(0, dtype=np.intp)
    if config.n_bootstrap:
        card, card_desc, card_feat, note = _card_pass(every, pool, screening, seg_counts,
                                                      iat_desc, steps, lags, first)
        passes.append(card)
        notes.append(note)
    # histograms of every feature: the score card's blocks hold those of its features (the
    # same bins), so only the others are binned again
    rest = np.setdiff1d(np.arange(pool.n_features), card_feat)
    if rest.size:
        passes.append(HistogramPass(every, screening.low[rest], screening.high[rest],
                                    n_bins=N_BINS, columns=rest))
    report, plans, report_lags = None, [], None
    if fits:
        report, lagged, plans, report_lags = _report_pass(every, base, screening, fits, fm,
                                                          folds, lags, seg_counts, steps)
        passes.append(report)
    results = run_pass(tuple(passes), source, executor=executor,
                       tasks=_plan_for(base, every.n_features, executor), label="held-out")
    report_result = results[-1] if report is not None else None
    if report is not None:
        results = results[:-1]
        if lagged is not None:
            lagged, cv_grid = run_pass(
                lagged, source, executor=executor,
                tasks=_plan_for(base, lagged[0].featurizer.n_features, executor),
                label="timescales")
            report_result = dict(report_result, lagged=lagged, cv_grid=cv_grid)
    block_sums, observed = results[0], results[1]
    card_sums = results[2] if card is not None else None
    counts = np.zeros((source.n_states, pool.n_features, N_BINS))
    if rest.size:
        counts[:, rest] = results[-1].counts
    if card is not None:
        for s, state_blocks in enumerate(card_sums.groups):
            hist = np.zeros((card_feat.size, N_BINS))
            for b in state_blocks:  # integer counts: their sum is exact in any order
                hist += b["hist"]
            counts[s, card_feat] = hist
    overlap_desc = np.ones(len(pool))
    np.minimum.at(overlap_desc, pool.feature_descriptor, overlap_coefficient(counts))
    counts = np.zeros((folds.n_folds, source.n_states, len(fits), N_BINS))
    for (s, k), blist in block_sums.items():
        for b in blist:
            counts[k, s] += b[2]["h"]
    overlap = [float(v) for v in heldout_overlap(counts)] if fits else []
    closest = closest_pairs(counts) if fits else []
    n_blocks = sum(len(v) for v in block_sums.values())
    desc = (f"{bf} frames" if bf else "whole runs (or their pieces in each fold)") + \
        f" ({n_blocks} blocks)"
    return HeldOut(overlap=overlap, closest=closest, overlap_desc=overlap_desc, blocks=block_sums, where=where,
                   block_desc=desc, card=card_sums,
                   card_desc=card_desc, card_feat=card_feat, notes=notes,
                   observed=[(observed[0, c], observed[1, c]) for c in range(len(fits))],
                   report=report_result, report_plans=plans, report_lags=report_lags)


def _report_pass(every, base, screening, fits, fm, folds, lags, seg_counts, steps):
    """The report's pass over the ranked CVs' terms (see :mod:`.report_data`): the pass,
    the CVs' plans, and the lags (frames) of their implied timescales."""
    cols = sorted({int(screening.features[i]) for fit in fits for i in fit.idx})
    pos = {c: j for j, c in enumerate(cols)}
    local = {int(i): pos[int(screening.features[i])] for fit in fits for i in fit.idx}
    plans = cv_plans(fits, fm, local)
    # (without a known spacing the grid's times are in frames: the report shows none, the
    # held-out noise level takes them)
    grid = _lag_grid(steps, seg_counts)
    lag = None if lags is None else next(iter(lags.values()))
    report_lags = timescale_lags(grid, lag)
    shift = [float(np.mean([m.mean[fit.idx] @ fit.w for m in fm.pooled()])) for fit in fits]
    strides = {lay.index: trace_stride(lay.hi - lay.lo) for lay in base.layouts}
    cols = np.array(cols, dtype=np.intp)
    center, scale = screening.center[cols], screening.scale[cols]
    report = CVReportPass(every, plans, folds, strides, None, shift, columns=cols,
                          center=center, scale=scale)
    lagged = None
    if report_lags is not None:
        # a read of its own over the terms' descriptors: its halo (up to 2000 frames) in
        # the read of every feature would keep those frames of every feature in memory;
        # the same read gives each CV's own integrated time (per run, on the descriptors'
        # grid)
        featurizer, columns = terms_featurizer(every.pool, cols)
        lagged = (CVLaggedPass(featurizer, plans, report_lags, shift, columns=columns,
                               center=center, scale=scale),
                  CVGridPass(featurizer, plans, report_lags, shift, columns=columns,
                             center=center, scale=scale))
    return report, lagged, plans, report_lags


def terms_featurizer(pool, cols):
    """A featurizer of the descriptors behind some pool features, and where they are in it.

    Parameters
    ----------
    pool : Pool
    cols : array-like of int
        Features of `pool` (a dihedral's cos and sin are two).

    Returns
    -------
    featurizer : PoolFeaturizer
        Of the descriptors of `cols` alone, in pool order (each with all its features).
    columns : ndarray of int
        ``featurizer``'s column of each of `cols`, in their order.

    Examples
    --------
    >>> import mdtraj as md
    >>> from cvdesign.pool import Descriptor, Pool
    >>> top = md.Topology(); r = top.add_residue("TOY", top.add_chain())
    >>> for i in range(5):
    ...     _ = top.add_atom(f"C{i}", md.element.carbon, r)
    >>> pool = Pool([Descriptor("distance", (0, 1), "a"),
    ...              Descriptor("dihedral", (0, 1, 2, 3), "b"),  # features 1, 2: cos, sin
    ...              Descriptor("distance", (2, 4), "c")], top)
    >>> feat, columns = terms_featurizer(pool, [3, 2])  # distance c, sin of dihedral b
    >>> [d.label for d in feat.pool.descriptors], columns.tolist()
    (['b', 'c'], [2, 1])
    """
    cols = np.asarray(cols, dtype=np.intp)
    terms = np.unique(pool.feature_descriptor[cols])  # their features come in pool order
    return (PoolFeaturizer(pool.subset(terms)),
            np.searchsorted(pool.features_of(terms), cols).astype(np.intp))


def _card_pass(every, pool, screening, seg_counts, iat_desc, steps, lags, first):
    """The score card's block sums: which descriptors fit the memory budget, what blocks."""
    bf = block_frames(seg_counts, list(iat_desc.values()), steps, lags)
    has_lag = lags is not None
    bf, kept = plan_card_blocks(seg_counts, bf, pool.n_features, n_bins=N_BINS,
                                has_lag=has_lag)
    card_desc, n = [], 0
    for i in screening.order:  # best separating first
        k = len(pool.descriptors[i].transforms)
        if n + k > kept:
            break
        card_desc.append(i)
        n += k
    card_feat = (np.concatenate([pool.features_of([i]) for i in card_desc]) if card_desc
                 else np.zeros(0, dtype=np.intp))
    means = None
    if has_lag:
        means = {key: m.covariances(reversible=True)[0][card_feat]
                 for key, m in first.lagged.items() if m.count > 0}
    card = CardPass(every, center=screening.center[card_feat], low=screening.low[card_feat],
                    high=screening.high[card_feat], n_bins=N_BINS, block_frames=bf,
                    lags=lags if has_lag else None, run_means=means, columns=card_feat)
    what = ("every descriptor" if len(card_desc) == len(pool)
            else f"the best {len(card_desc)} of {len(pool)} descriptors (memory budget)")
    blocks = f"blocks of {bf} frames" if bf else "whole runs as blocks"
    note = (f"score card: nominal 95 % block-bootstrap intervals for {what}, {blocks} of each run "
            "resampled within each state (lagged pairs in the block of their first frame); "
            "integrated times: asymptotic 95 % intervals (Madras and Sokal 1988), since "
            + ("their window can be longer than a block" if bf else
               "the runs themselves are the blocks, too few to resample a time"))
    return card, card_desc, card_feat, note


# --------------------------------------------------------------------------- small stages
def _run_temperature(source, temperature):
    """The temperature of the hints (K): the given one, else the source's when it holds
    biased runs, else HINTS_TEMPERATURE_K; refuse one that differs from the source's."""
    own = source.temperature if source.biased else None
    if temperature is None:
        return HINTS_TEMPERATURE_K if own is None else own
    if (own is not None and isinstance(temperature, (int, float, np.integer, np.floating))
            and not isinstance(temperature, bool) and float(temperature) != float(own)):
        raise InputError(
            f"temperature={temperature!r} (K, for the bias hints and the report's -kT ln p) "
            f"differs from the source's temperature={own!r} (K), at which its biased runs are "
            "reweighted; leave temperature= out to use the source's (hints for a run at "
            "another temperature: cvdesign hints SPEC --temperature K)")
    return temperature


def _default_lag(steps):
    """10 frames when every file has the same known frame spacing (slowness columns only)."""
    known = {round(v, 9) for v in steps.values() if v is not None}
    if len(known) == 1 and all(v is not None for v in steps.values()):
        return 10 * next(iter(steps.values()))
    return None


def _rescaled_lag(reweighting, lags, lag_ps, config):
    """(lag in ps, lags, notes) once lagged pairs in rescaled time are known to be possible:
    a lag the user gave is refused when they are not, the default one dropped with a note."""
    try:
        reweighting.check_rescaled_time(lags)
    except InputError as exc:
        if config.lag_ps is not None:
            raise
        return None, None, [f"slowness not measured: {exc}"]
    return lag_ps, lags, []


def _run_frames(source, reweighting, seg_counts, si):
    """Length of a segment in frame spacings: its frames, or its rescaled time when biased."""
    if reweighting is None or si not in reweighting.clocks:
        return seg_counts[si].sum()
    seg = source.segments[si]
    if seg.labels is not None:
        return reweighting.rescaled_frames(si, 0, seg.labels.shape[0])
    n = reweighting.weights[si].size
    return reweighting.rescaled_frames(si, seg.start or 0, n if seg.stop is None else seg.stop)


def _run_effective_frames(source, reweighting):
    """Per (segment, state) of the reweighted runs, the Kish effective frames of the run's
    weights (:func:`~cvdesign.io.bias.kish_ess`); empty without biased runs."""
    if reweighting is None:
        return {}
    from ..io.bias import kish_ess, state_codes

    index = {name: i for i, name in enumerate(source.states)}
    out = {}
    for si, w in sorted(reweighting.weights.items()):
        codes = state_codes(source.segments[si], w.size, index)
        for s in np.unique(codes[codes >= 0]):
            out[(si, int(s))] = kish_ess(w[codes == s])
    return out


def _effective_fraction(seg_counts, reweighting):
    """Per state, its effective over its actual frames (1 for a state of unweighted
    frames), or None without biased runs."""
    if reweighting is None:
        return None
    frames = seg_counts.sum(axis=0).astype(np.float64)
    return _state_frames(seg_counts, reweighting) / np.maximum(frames, 1.0)


def _short_runs_note(count, what):
    """The note on integrated times that the runs are too short to show
    (:func:`~cvdesign.pipeline.timing.runs_too_short`)."""
    return (f"integrated times: for {count} of the {what} the runs of some state are too short "
            "for the time measured within them (their means scatter far more than that "
            "time allows, as for a time three times longer or more: a slower motion, or "
            "distinct sub-states "
            "the runs do not cross between; a reweighted run counts its effective frames); "
            "those times "
            "are marked lower bounds (not decayed), while the "
            "bootstrap blocks still follow the times measured, so the intervals of those "
            "descriptors may be too narrow")


def _state_frames(seg_counts, reweighting):
    """Frames of each state, the effective sample size of a reweighted state in its place."""
    per_state = seg_counts.sum(axis=0).astype(np.float64)
    if reweighting is not None:
        for s in reweighting.biased_states:
            per_state[s] = reweighting.ess[s]
    return per_state


#: Fewer frames than this in a state (effective ones when reweighted) get the note of
#: :func:`_overlap_note`: 20 per bin of the histograms (common practice; at 1000 frames two
#: samples of one distribution still overlap only about 0.90, our measurement in the note).
FEW_FRAMES_FOR_OVERLAP = 20 * N_BINS


def _overlap_note(states, seg_counts, reweighting):
    """A note when some state has too few frames for an unbiased histogram overlap."""
    frames = _state_frames(seg_counts, reweighting)
    few = [f"{states[s]!r} {frames[s]:.0f}" for s in range(len(states))
           if frames[s] < FEW_FRAMES_FOR_OVERLAP]
    if not few:
        return []
    return [f"overlap: few frames ({', '.join(few)}{' effective' if reweighting else ''}; "
            f"histograms of {N_BINS} bins): the overlap of histograms of few frames is biased "
            "low, so states look better separated than they are (two samples of one normal "
            "distribution overlap about 0.66 with 100 frames each, 0.78 with 250, 0.90 with "
            "1000; our measurement, independent frames: correlated frames lower still, and "
            "the held-out overlaps use the frames of one fold); compare overlaps of runs of "
            "similar length, and read small differences with care"]


def _refuse_single_frame_states(source, reweighting):
    """Refuse a reweighted state whose effective sample size is below 2: one frame carries
    all its weight, so it has no spread, and it would be refused later as 'frozen' (not
    moving), which names the wrong cause."""
    for s in reweighting.biased_states:
        if not reweighting.ess[s] < 2.0:
            continue
        name = source.states[s]
        files = sorted({str(seg.bias_path) for seg in source.segments
                        if seg.bias_path is not None and (
                            seg.state == name or (seg.labels is not None
                                                  and (seg.labels == name).any()))})
        raise InputError(
            f"state {name!r}: after reweighting its effective sample size is "
            f"{reweighting.ess[s]:.2f} of {int(reweighting.frames[s])} frames: one frame "
            f"carries almost all its weight exp(V/kT), so the state has no spread to measure; "
            f"check the bias energies of {', '.join(map(repr, files))} (their unit is kJ/mol, "
            f"positive where the bias pushes the system away; a jump of hundreds of kJ/mol "
            f"between frames gives this) and the temperature ({reweighting.temperature_k:g} K)")


def _refuse_empty_states(source, seg_counts):
    empty = [source.states[s] for s in range(source.n_states) if seg_counts[:, s].sum() == 0]
    if empty:
        raise InputError(f"state(s) {', '.join(map(repr, empty))} have no frames; check the "
                         "files and frame ranges given for them")


def _timing_notes(inputs):
    unknown = [i["file"] for i in inputs if i["frame_step_ps"] is None]
    if not unknown:
        return []
    return ["time step unknown for " + ", ".join(unknown[:5]) + (" ..." if len(unknown) > 5
                                                                else "")
            + " (the format stores no times, or a single frame)"]


def _slowness_lag(source, config, seg_counts, steps, first, lag_ps, lags, reweighting):
    """(lag in ps, lags in frames, notes): slowness is measured only when every state has
    runs longer than the lag; otherwise it is refused (slow, both) or left unmeasured."""
    if lags is None:
        if lag_ps is None and config.lag_ps is None:
            return None, None, ["slowness not scored: the files' time steps are unknown or "
                                "differ; give --lag PS (and --frame-step-ps PS for files that "
                                "store no times)"]
        return lag_ps, lags, []
    with_pairs = {s for (_, s), m in first.lagged.items() if m.count > 0}
    lagless = [s for s in range(source.n_states) if s not in with_pairs]
    objective = config.objective
    # a biased run's rescaled clock that hardly moves (a shifted or sign-flipped clock bias)
    # leaves no pairs at any lag: the cause, not the lag, is then what to fix
    slow = None if reweighting is None else reweighting.slow_clock_warning()
    why = "" if slow is None else f"; but first: {slow}"
    if len(lagless) == source.n_states:
        longest = longest_run_text(source, reweighting, seg_counts, steps,
                                    range(source.n_states))
        if objective in ("slow", "both"):
            raise InputError(
                f"lag={lag_ps:g} ps is longer than every run ({longest}): there are no lagged "
                f"pairs to measure slowness with, which objective {objective!r} needs; choose "
                f"a shorter --lag or give longer runs{why}")
        return None, None, [
            f"slowness not measured: no run is longer than the lag ({lag_ps:g} ps; "
            f"{longest}), so there are no lagged pairs; the autocorrelation and timescale "
            f"columns are left empty (give a shorter --lag to measure them){why}"]
    if lagless:
        # the other states' runs alone would measure motion within those states, not the
        # slowness of a CV that separates them (the slow coordinate would look fast)
        names = ", ".join(repr(source.states[s]) for s in lagless)
        longest = longest_run_text(source, reweighting, seg_counts, steps, lagless)
        if objective in ("slow", "both"):
            raise InputError(
                f"lag={lag_ps:g} ps is longer than every run of state(s) {names} ({longest}): "
                "slowness would be measured on the other states' runs alone, within them, "
                f"which objective {objective!r} cannot rank on; choose a shorter --lag or give "
                f"longer runs of those states{why}")
        return None, None, [
            f"slowness not measured: no run of state(s) {names} is longer than the lag "
            f"({lag_ps:g} ps; {longest}), and the other states' runs alone would measure "
            "motion within those states, not between them; the autocorrelation and "
            "timescale columns are left empty (give a shorter --lag or longer runs of those "
            f"states to measure them){why}"]
    return lag_ps, lags, [
        f"lag: {lag_ps:g} ps"
        + (" (default: 10 frames, for the slowness columns only)" if config.lag_ps is None
           else "")
        + "; lagged pairs never span a file, a state change or a gap in frames"
        + ("" if not source.crossing_runs() else
           " (except along the runs that cross between the states, for the transition "
           "slowness below)")]


def _folds_note(folds, asked):
    """The note on the folds; it says so when fewer than the `asked` ones were possible."""
    if folds.mode == "trajectory":
        note = (f"held-out scoring: {folds.n_folds}-fold cross-validation by whole "
                "trajectories (each state's files are split among the folds)")
        why = "a state has no more trajectories than that"
    else:
        note = (f"held-out scoring: {folds.n_folds}-fold cross-validation by contiguous blocks "
                "of each trajectory (a state has a single trajectory, or too few frames per "
                f"trajectory for whole-trajectory folds of at least {MIN_FRAMES_PER_FOLD} "
                "frames); the blocks border each other with no gap, so a motion about as slow "
                "as a block is long carries across their boundaries, and then the held-out "
                "scores are somewhat optimistic (null runs whose integrated time was near the "
                "block length gave held-out ratios about 1.3 to 1.4 times those of "
                "independent runs; at a fifth of it no difference was measurable); "
                "whole-trajectory folds (two or more trajectories per state, each long "
                "enough) avoid it")
        why = (f"no more folds of at least {MIN_FRAMES_PER_FOLD} frames fit in the state with "
               "the fewest frames")
    if folds.n_folds < asked:
        given = ("the default" if asked == SuggestConfig.n_folds
                 else "the number given")
        note += (f"; {folds.n_folds} are used, not {asked} ({given}; --folds, n_folds=): "
                 f"{why}")
    return note


def _folded_distances(pool, diag, min_box):
    """``{descriptor id: longest value (nm)}`` of the pool's distances that reach beyond half
    the smallest box height in some frame (the minimum image folds them back there)."""
    if min_box is None:
        return {}
    longest = np.max([d.maximum for d in diag if d.count], axis=0)
    out = {}
    for f, i in enumerate(pool.feature_descriptor):
        desc = pool.descriptors[i]
        if desc.unit == "nm" and longest[f] > 0.5 * min_box:
            out[desc.id] = max(out.get(desc.id, 0.0), float(longest[f]))
    return out


def _box_notes(pool, min_box, folded):
    """The notes on the box; `folded` from :func:`_folded_distances`."""
    if min_box is None:
        return ["no periodic box: distances are plain Euclidean"]
    out = [f"periodic box: distances use the minimum image (smallest box height "
           f"{min_box:.3g} nm)"]
    if folded:
        labels = {d.id: d.label for d in pool.descriptors}
        worst = sorted(folded, key=lambda i: (-folded[i], i))
        named = ", ".join(f"{labels[i]} ({folded[i]:.3g} nm)" for i in worst[:3])
        more = f" and {len(worst) - 3} more" if len(worst) > 3 else ""
        out.append(f"warning: {len(worst)} distance{'s' if len(worst) > 1 else ''} of the pool "
                   f"reach{'' if len(worst) > 1 else 'es'} beyond half the smallest box "
                   f"height ({0.5 * min_box:.3g} nm; the height is {min_box:.3g} nm), where the minimum image folds them back: "
                   f"{named}{more}; a ranked CV with such a term says so. --cutoff governs "
                   "the pairs kept for their mean distance, not the farther pairs kept "
                   "because they separate the states best; check the box, or leave such "
                   "CVs out")
    return out


def _bootstrap_notes(boot, held, config, fm=None):
    if boot is None:
        return [f"uncertainties: none (blocks of {held.block_desc}: a state has fewer than "
                f"{MIN_INTERVAL_BLOCKS}, and intervals from so few blocks cover the truth far "
                "less often than they say); give more or longer runs per state"]
    out = [f"uncertainties: block bootstrap, {config.n_bootstrap} replicates (seed "
           f"{config.seed}), blocks of {held.block_desc} resampled within each state; nominal "
           "95 % intervals, each the hull of the percentile and basic bootstrap intervals (it "
           "contains the estimate, and is wider where resampling biases the statistic)"]
    if boot.get("selection_skipped"):
        out.append(boot["selection_skipped"])
    if config.objective == "both" and fm is not None and fm.slowness == "transitions":
        if boot.get("transitions_resampled"):
            out.append("uncertainties: the refits behind the held-out score's interval and "
                       "the selection frequencies also resample the crossing runs' sub-blocks "
                       "within each run and held-out fold, so they carry the noise of the "
                       "transition slowness")
        elif "combos" in boot and not boot.get("selection_skipped"):
            out.append("uncertainties: the intervals of the held-out score and the selection "
                       "frequencies keep the crossing runs' lagged pairs fixed (each has a "
                       "single sub-block per held-out fold: nothing to resample), so they "
                       "leave out the noise of the transition slowness and are too narrow by "
                       "that much; give longer crossing runs")
    return out


def _pair_overlap_note(overlapping, ranking):
    """The warning when two states overlap along the best CV (three or more states)."""
    ranks = ", ".join(str(r) for r in overlapping)
    whole = [e["rank"] for e in ranking if e["rank"] not in overlapping]
    better = (f"; rank {whole[0]} does not leave two states overlapping" if whole else "")
    return (f"warning: along the CV of rank{'s' if len(overlapping) > 1 else ''} {ranks}, two "
            f"of the states overlap by at least {PAIR_OVERLAP_WARN:g} (held-out; their "
            f"warnings name them): the Fisher ratio pools every state and can be high while "
            f"two lie on top of each other, and a bias along such a CV hardly tells them "
            f"apart{better}")


def _noise_note(noisy, first):
    """The warning when the best CV separates the states about as well as noise would."""
    ranks = ", ".join(map(str, noisy))
    return (f"warning: the held-out Fisher ratio of rank{'s' if len(noisy) > 1 else ''} "
            f"{ranks} is less than {NOISE_LEVEL_FACTOR:g} times what noise alone gives a fixed "
            f"direction with these runs (rank 1: {first['heldout_fisher_ratio']:.3g} against "
            f"{first['heldout_fisher_ratio_noise']:.3g}, heldout_fisher_ratio_noise): the "
            "states may not differ along any CV found, since the search keeps the best of "
            "many held-out scores, which lifts the best above that level. Check that the "
            "states are distinct (more or longer runs of each) before using these CVs")


def _offsets_hold_autocorrelation(entry):
    """Whether the offsets between the states make up at least half of the CV's common-mean
    autocorrelation at the lag. Its pairs never leave their state, so it does not decay
    below the between-state share of the variance, ``B / (B + W)`` (frames weighted), and
    its timescale then grows with the lag: a measure of the separation (a CV with a Fisher
    ratio of 26 gave 272 ps for a relaxation of 0.8 ps inside the states), not of a
    process the runs resolve. Offsets of noise are not taken as holding it up: a CV that
    does not separate can have a between-state share of noise (0.003) beside an
    autocorrelation of noise (0.005); so the between-state over the within-state variance
    must be at least :data:`~cvdesign.pipeline.ranking.NOISE_LEVEL_FACTOR` times the
    entry's ``heldout_fisher_ratio_noise`` when it has one.

    Examples
    --------
    >>> e = {"autocorrelation_all": 0.96, "states": {
    ...     "a": {"mean": 0.0, "std": 0.1, "n_frames": 100},
    ...     "b": {"mean": 1.0, "std": 0.1, "n_frames": 100}}}
    >>> _offsets_hold_autocorrelation(e)  # B / (B + W) = 0.25 / 0.26, against 0.96 / 2
    True
    >>> _offsets_hold_autocorrelation(dict(e, heldout_fisher_ratio_noise=1.5))  # 25 < 30
    False
    """
    rho = entry.get("autocorrelation_all")
    stats = list(entry["states"].values())
    n = np.array([s["n_frames"] for s in stats], dtype=np.float64)
    if rho is None or n.sum() <= 0:
        return False
    # between over within variance, the states weighted by their frames (as the pooled
    # autocorrelation weighs them); B / (B + W) = J / (1 + J)
    j = float(fisher_ratio(np.array([[s["mean"]] for s in stats]),
                           np.array([[s["std"] ** 2] for s in stats]), priors=n)[0])
    level = entry.get("heldout_fisher_ratio_noise")
    if not j > 0 or (level is not None and not j >= NOISE_LEVEL_FACTOR * level):
        return False  # no offsets, or offsets of noise
    return (1.0 if math.isinf(j) else j / (1.0 + j)) >= 0.5 * rho


def _add_times(entry, longest_run_ps, longest_visit_ps, cv_time, frame_spacing_ps, states):
    """Whether the timescale is resolved by the runs, and the CV's own integrated time
    within the runs of the state where it is longest (``cv_time``: from
    :func:`cv_integrated_times`, None when the frame spacing is unknown or differs between
    files; that state's name from `states`), with the frame spacing it was measured at.

    The timescales of pairs within one state (``timescale``, ``timescale_within_states``)
    are resolved below the longest run or visit of one state (`longest_visit_ps`: a
    labelled file's crossings are not among their pairs, so its own length does not
    resolve them; with runs crossing between the states these pairs keep the offsets
    between the states and make a separating CV look slow); those along the crossing
    runs (``timescale_transitions``) below the longest run."""
    entry["longest_run_ps"] = longest_run_ps
    entry["longest_visit_ps"] = longest_visit_ps
    for key in ("timescale", "timescale_within_states", "timescale_transitions"):
        if key == "timescale_transitions" and "timescale_transitions_ps" not in entry:
            continue  # no crossing runs
        bound = resolving_span_ps(entry, key)
        ts = entry.get(f"{key}_ps")
        entry[f"{key}_resolved"] = None if ts is None else bool(
            bound is not None and ts < bound)
    entry["integrated_time_ps"] = None if cv_time is None else cv_time[0]
    entry["integrated_time_ci_ps"] = None if cv_time is None else cv_time[2]
    entry["integrated_time_decayed"] = None if cv_time is None else cv_time[1]
    entry["frame_spacing_ps"] = None if cv_time is None else frame_spacing_ps
    entry["integrated_time_state"] = None if cv_time is None else states[cv_time[4]]


def _scorecard(pool, screening, short, overlap_desc, iat_desc, card_ci):
    """One row per descriptor of the pool, best Fisher ratio first.

    Unscored descriptors keep their cells empty, never a value standing for "not
    measured": a *constant* one (every feature the same in every frame of every state)
    has every score cell empty; a *frozen* one (not moving within some state) keeps only
    its overlap, the one score its histograms still measure, and its note says so
    (``docs/scorecard-v1.md``).
    """
    rows = []
    screened_set = set(screening.screened)
    short_set = {screening.screened[g] for g in short.members}
    frozen = screening.frozen_desc
    constant = _constant_descriptors(pool, screening)
    rho, local = screening.rho_desc, screening.local_desc
    for i in screening.order:
        d = pool.descriptors[i]
        tau = iat_desc.get(i)
        unscored = i in frozen or i in constant
        row = {
            "id": d.id, "kind": d.kind, "label": d.label, "atoms": list(d.atoms),
            **({"groups": [list(g) for g in d.groups]} if d.groups else {}),
            "fisher_ratio": None if unscored else float(screening.fisher_desc[i]),
            "overlap": None if i in constant else _finite(overlap_desc[i]),
            "autocorrelation": None if rho is None or unscored else _finite(rho[i]),
            "autocorrelation_within_runs": (None if local is None or unscored
                                            else _finite(local[i])),
            "integrated_time": None if tau is None else tau[0],
            "integrated_time_decayed": None if tau is None else tau[1],
            "screened": i in screened_set, "shortlisted": i in short_set,
            "stands_for": short.stands_for.get(i, []),
            "note": (f"frozen: does not move within state(s) {', '.join(frozen[i])}; "
                     "not scored (only the overlap of its histograms is reported)"
                     if i in frozen else "constant: not scored" if i in constant
                     else short.notes_by_desc.get(i, "")),
        }
        if tau is not None and tau[2] is not None:
            row["integrated_time_ci"] = tau[2]
        if card_ci is not None and i in card_ci and not unscored:
            row.update(card_ci[i])
        elif card_ci is not None and i in card_ci and i in frozen:
            row["overlap_ci"] = card_ci[i]["overlap_ci"]
        rows.append(row)
    return rows


def _constant_descriptors(pool, screening):
    """Descriptors every feature of which is constant over all frames (not frozen:
    :func:`~.screening.screen` marks a descriptor frozen when one of its unscored
    features moves in some state)."""
    all_unscored = np.ones(len(pool), dtype=bool)
    np.logical_and.at(all_unscored, pool.feature_descriptor, screening.unscored)
    return {int(i) for i in np.flatnonzero(all_unscored)} - set(screening.frozen_desc)


def _finite(x):
    x = float(x)
    return x if math.isfinite(x) else None


def _short_repr(value, limit=80):
    text = repr(value)
    return text if len(text) <= limit else text[:limit] + "..."


# kept for the type annotation readers of this module meet first
__all__ += ["HeldOut", "Screening"]
