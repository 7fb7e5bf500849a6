"""Score-card intervals: per-block sums (cvdesign.passes.CardPass, run through the pass
engine on small DCD files), their bootstrap (cvdesign.score.card), and the pipeline's
interval columns.

References for checks against outside knowledge:

* Integrated autocorrelation time ``tau_int = 1/2 + sum_{k>=1} rho(k)`` and its
  asymptotic variance ``2 (2 M + 1) / N tau_int**2`` for a window of ``M``
  frames: Sokal, "Monte Carlo methods in statistical mechanics: foundations and
  new algorithms", in *Functional Integration: Basics and Applications* (Plenum,
  1997); Madras and Sokal, J. Stat. Phys. 50, 109 (1988).
* AR(1) ``x_t = phi x_{t-1} + sqrt(1 - phi**2) e_t``: stationary variance 1,
  autocorrelation ``phi**k``, so ``tau_int = (1 + phi) / (2 (1 - phi))``
  (textbook time-series algebra, e.g. Box and Jenkins, *Time Series Analysis*,
  1970; from memory).
* Overlapping coefficient and Fisher ratio conventions: the project's own
  ``cvdesign.score.univariate`` (the reference implementation the card must reproduce).
"""

import csv
import io
import re

import mdtraj as md
import numpy as np
import pytest
from scipy.signal import lfilter

import cvdesign.pipeline.suggest
import cvdesign.score.card
from cvdesign import Source, suggest
from cvdesign.passes import (CardPass, CardSums, CoordinateFeaturizer, ScreeningPass,
                             plan_tasks, run_pass)
from cvdesign.pipeline.timing import integrated_time, local_autocorrelation
from cvdesign.score.card import (MAX_CARD_BLOCKS, MIN_CARD_BLOCKS, card_intervals,
                                 card_statistics, integrated_time_interval, plan_card_blocks)
from cvdesign.score.univariate import Histograms, fisher_ratio, overlap_coefficient
from cvdesign.stats.bootstrap import ArraySum, block_bootstrap, merge_blocks
from cvdesign.stats.moments import merge_all

CARD_COLUMNS = ("fisher_ratio", "overlap", "autocorrelation", "autocorrelation_within_runs")


def _ar1(rng, phi, shape):
    """Stationary unit-variance AR(1) along axis 0 (x_0 ~ N(0, 1))."""
    w = rng.standard_normal(shape)
    w[1:] *= np.sqrt(1.0 - phi ** 2)
    return lfilter([1.0], [1.0, -phi], w, axis=0)


# ------------------------------------------------------------------ 1. exact sums
# The synthetic feature values are the x, y, z coordinates (nm) of one atom, written to DCD
# files (float32) and run through CardPass with CoordinateFeaturizer; the checks by hand use
# the values mdtraj reads back. Runs: (segment, state, frame numbers). Segment 1 has a gap
# (frames 150-169 carry no label); segment 3 has per-frame labels (state 1, then 0, then 1
# again: a gap in state 1's frames); segment 4 is shorter than its lag (no pairs at all).
_RUNS = [
    (0, 0, np.arange(0, 300)),
    (1, 0, np.concatenate([np.arange(0, 150), np.arange(170, 350)])),
    (2, 1, np.arange(0, 250)),
    (3, 1, np.concatenate([np.arange(0, 80), np.arange(160, 260)])),
    (3, 0, np.arange(80, 160)),
    (4, 1, np.arange(0, 3)),
]
_FILE_FRAMES = [300, 350, 250, 260, 3]
_LABELLED = {1, 3}  # segments given as a label array (None for frames of no state)
_STATES = ("a", "b")
_LAGS = {0: 4, 1: 4, 2: 6, 3: 4, 4: 4}
_BLOCK = 7


def _topology(n_atoms):
    top = md.Topology()
    res = top.add_residue("TOY", top.add_chain())
    for i in range(n_atoms):
        top.add_atom(f"C{i}", md.element.carbon, res)
    return top


def _write_dcd(path, xyz, top):
    """Write coordinates (nm, frames x atoms x 3) as float32 DCD; return them as read back."""
    md.Trajectory(np.asarray(xyz, dtype=np.float32), top).save_dcd(str(path))
    return md.load(str(path), top=top).xyz.astype(np.float64)


def _synthetic_source(tmp_path, seed=11):
    """The _RUNS layout as DCD files of one atom whose x, y, z are three features (the last
    constant); returns the Source and {(segment, state): (frames, x as read back)}."""
    rng = np.random.default_rng(seed)
    top = _topology(1)
    src = Source(top)
    runs = {}
    for si, n_file in enumerate(_FILE_FRAMES):
        xyz = np.full((n_file, 3), 40.0)  # frames of no state: far off, would show if read
        codes = np.full(n_file, -1)
        for sj, s, frames in _RUNS:
            if sj == si:
                xyz[frames, 0] = _ar1(rng, 0.7, frames.size) + 1.5 * s + 0.2 * si
                xyz[frames, 1] = 0.5 * _ar1(rng, 0.3, frames.size) - 0.8 * s + 10.0
                xyz[frames, 2] = 2.5
                codes[frames] = s
        path = tmp_path / f"segment{si}.dcd"
        back = _write_dcd(path, xyz[:, None, :], top)[:, 0]
        if si in _LABELLED:
            src.add_labelled(path, [None if c < 0 else _STATES[c] for c in codes])
        else:
            src.add(path, _STATES[codes[0]])
        runs.update({(si, s): (frames, back[frames]) for sj, s, frames in _RUNS if sj == si})
    assert src.states == list(_STATES)
    return src, runs


def _pairs_by_hand(frames, x, lag):
    """(first-frame positions, x_i, x_{i+lag}) of lagged pairs within contiguous frames."""
    n = frames.size
    i = np.arange(max(0, n - lag))
    ok = frames[i + lag] - frames[i] == lag  # frames strictly increase: no gap in between
    i = i[ok]
    return i, x[i], x[i + lag]


def _hand_run_means(runs):
    out = {}
    for (si, s), (frames, x) in runs.items():
        _, xi, yi = _pairs_by_hand(frames, x, _LAGS[si])
        if xi.shape[0]:
            out[(si, s)] = 0.5 * (xi.mean(axis=0) + yi.mean(axis=0))
    return out


def _card_pass(runs, center, featurizer=None):
    allx = np.concatenate([x for _, x in runs.values()])
    return CardPass(featurizer or CoordinateFeaturizer([0]), center=center,
                    low=allx.min(axis=0), high=allx.max(axis=0), n_bins=12,
                    block_frames=_BLOCK, lags=_LAGS, run_means=_hand_run_means(runs))


def test_card_statistics_on_all_blocks_reproduce_numpy(tmp_path):
    """Merged over all blocks, CardPass's sums (run through the pass engine on DCD files)
    give exactly the statistics computed directly with numpy / cvdesign.score.univariate on
    the values read back: Fisher ratio (per-state np.mean and np.var), overlap (Histograms
    on the same bins), the pooled reversible autocorrelation from every lagged pair that
    spans no run boundary or gap, and the within-run autocorrelation (each run about its own
    pair mean; sum of lagged covariances over sum of variances). Constant features follow
    the score card's 0 convention."""
    src, runs = _synthetic_source(tmp_path)
    center = np.array([0.3, 9.0, 2.0])  # deliberately off the data's mean
    card = run_pass(_card_pass(runs, center), src,
                    tasks=plan_tasks(src, leaf_frames=16, frames_per_task=48))
    priors = np.array([0.3, 0.7])
    constant = np.array([False, False, True])
    merged = [merge_blocks(g) for g in card.blocks()]
    got = card_statistics(merged, center, priors, constant, True)

    # Fisher ratio on every frame of each state
    xs = [np.concatenate([x for (si, s), (_, x) in runs.items() if s == k]) for k in (0, 1)]
    f = fisher_ratio([v.mean(axis=0) for v in xs], [v.var(axis=0) for v in xs], priors)
    f[constant] = 0.0
    np.testing.assert_allclose(got["fisher_ratio"], f, rtol=1e-10)
    assert got["fisher_ratio"][0] > 0.5  # the states do differ: not a trivial comparison

    # overlap on the same bins
    allx = np.concatenate(xs)
    h = Histograms(allx.min(axis=0), allx.max(axis=0), n_states=2, n_bins=12)
    h.add(allx, np.repeat([0, 1], [xs[0].shape[0], xs[1].shape[0]]))
    np.testing.assert_allclose(got["overlap"], overlap_coefficient(h.counts), rtol=1e-12)

    # pooled and within-run autocorrelation from the lagged pairs
    px, py, lt, l0 = [], [], 0.0, 0.0
    for (si, s), (frames, x) in runs.items():
        _, xi, yi = _pairs_by_hand(frames, x, _LAGS[si])
        px.append(xi)
        py.append(yi)
        if xi.shape[0]:
            m = 0.5 * (xi.mean(axis=0) + yi.mean(axis=0))
            u, v = xi - m, yi - m
            lt = lt + (u * v).sum(axis=0)
            l0 = l0 + 0.5 * (u * u + v * v).sum(axis=0)
    px, py = np.concatenate(px), np.concatenate(py)
    mm = 0.5 * (px.mean(axis=0) + py.mean(axis=0))
    v0 = 0.5 * ((px - mm) ** 2 + (py - mm) ** 2).mean(axis=0)
    ct = ((px - mm) * (py - mm)).mean(axis=0)
    with np.errstate(invalid="ignore", divide="ignore"):
        rho = np.where(constant, 0.0, ct / v0)
        local = np.where(constant, 0.0, lt / l0)
    np.testing.assert_allclose(got["autocorrelation"], rho, rtol=1e-9, atol=1e-12)
    np.testing.assert_allclose(got["autocorrelation_within_runs"], local, rtol=1e-9,
                               atol=1e-12)
    # the two differ (state offsets inflate the pooled one): both are really checked
    assert got["autocorrelation"][0] > got["autocorrelation_within_runs"][0] + 0.1


def test_card_estimate_equals_what_the_screening_pass_reports(tmp_path):
    """Internal consistency: on the same frames, read once for both passes, the card's
    autocorrelations equal the score card's own estimators in the pipeline (the screening
    pass's per-run lagged moments merged as cvdesign.pipeline.screening merges them, and
    cvdesign.pipeline.timing.local_autocorrelation), so the intervals are about the
    reported value."""
    src, runs = _synthetic_source(tmp_path, seed=3)
    center = np.array([1.0, 10.0, 2.5])
    featurizer = CoordinateFeaturizer([0])
    screening, card = run_pass((ScreeningPass(featurizer, lags=_LAGS, shift=center),
                                _card_pass(runs, center, featurizer)), src)
    per_run = [m for _, m in sorted(screening.lagged.items())]
    assert len(per_run) == 5  # every run but the one shorter than its lag
    unlagged = [m.copy() for m in per_run]
    for m in unlagged:
        m.lag = None  # runs of different files may differ in it
    constant = np.array([False, False, True])
    got = card_statistics([merge_blocks(g) for g in card.blocks()], center,
                          np.array([0.5, 0.5]), constant, True)
    rho = np.nan_to_num(merge_all(unlagged).autocorrelation(), nan=0.0)
    rho[constant] = 0.0
    local = np.nan_to_num(local_autocorrelation(per_run, 3), nan=0.0)
    local[constant] = 0.0
    np.testing.assert_allclose(got["autocorrelation"], rho, rtol=1e-9, atol=1e-12)
    np.testing.assert_allclose(got["autocorrelation_within_runs"], local, rtol=1e-9,
                               atol=1e-12)
    assert np.all(np.abs(rho[:2] - local[:2]) > 0.01)  # two different estimators, both checked


def test_no_pair_is_lost_at_block_boundaries_and_the_split_does_not_matter(
        tmp_path, assert_same, shuffled_executor, random_tasks):
    """Every lagged pair is counted once, in the block of its first frame (per-block frame
    and pair counts by hand, blocks of 7 frames shorter than two lags, per state in (segment,
    block) order), for leaves of 6, 32 and 256 frames. For each leaf length, random task
    splits, read chunk sizes and orders of arrival give the same bytes as one task per
    segment; across leaf lengths (the unit of arithmetic) the sums agree to 1e-12."""
    src, runs = _synthetic_source(tmp_path)
    card = _card_pass(runs, np.zeros(3))
    # by hand: blocks of each state sorted by (segment, block)
    expected = {0: [], 1: []}
    total_pairs = 0
    for (si, s), (frames, x) in sorted(runs.items()):
        first, _, _ = _pairs_by_hand(frames, x, _LAGS[si])
        total_pairs += first.size
        n_blocks = -(-frames.size // _BLOCK)
        for b in range(n_blocks):
            n = min(_BLOCK, frames.size - b * _BLOCK)
            expected[s].append((si, b, n, int(np.sum(first // _BLOCK == b))))
    for s in expected:
        expected[s].sort()
    assert total_pairs > 0
    rng = np.random.default_rng(1)
    results = {}
    for leaf in (6, 32, 256):
        plan = plan_tasks(src, leaf_frames=leaf)
        results[leaf] = run_pass(card, src, tasks=plan)
        groups = results[leaf].blocks()
        for s in (0, 1):
            got = [(int(b["n"]), int(b["n_pairs"])) for b in groups[s]]
            assert got == [(n, p) for _, _, n, p in expected[s]], (leaf, s)
        assert sum(b["n_pairs"] for g in groups for b in g) == total_pairs
        for k in range(2):
            other = run_pass(card, src, tasks=plan.with_tasks(random_tasks(plan, rng)),
                             executor=shuffled_executor(10 * leaf + k),
                             chunk_frames=int(rng.integers(1, 40)))
            assert_same(results[leaf], other)
    ref = results[256].blocks()
    for leaf in (6, 32):
        for g_ref, g in zip(ref, results[leaf].blocks()):
            assert len(g_ref) == len(g)
            for a, b in zip(g_ref, g):
                assert a.arrays.keys() == b.arrays.keys()
                for k in a.arrays:
                    np.testing.assert_allclose(b[k], a[k], rtol=1e-12, atol=1e-9,
                                               err_msg=f"leaf {leaf} {k}")


# -------------------------------------------------------- 2. ArraySum fast path
class _SlowSum(ArraySum):
    """Same sums, another type: block_bootstrap's fast path (exact type check) is off."""

    def merge(self, other):
        return _SlowSum(**{k: v + other.arrays[k] for k, v in self.arrays.items()})


def test_arraysum_fast_weighted_path_matches_plain_merging_and_hand_resampling():
    """block_bootstrap on ArraySum blocks (weighted-sum fast path) gives the same
    replicates as on an ArraySum subclass (plain merges) and as a hand resampling
    with the same numpy default_rng draws (per replicate, one integers(0, n, n) per
    group, in group order)."""
    rng = np.random.default_rng(0)
    groups = [[ArraySum(n=float(rng.integers(1, 9)), s1=rng.normal(size=3),
                        h=rng.integers(0, 5, (3, 4)).astype(float)) for _ in range(n)]
              for n in (5, 8)]
    slow = [[_SlowSum(**b.arrays) for b in g] for g in groups]

    def stat(merged):
        return np.concatenate([np.concatenate([m["s1"] / m["n"], m["h"].max(axis=1)])
                               for m in merged])

    fast = block_bootstrap(groups, stat, n_boot=40, seed=7)
    plain = block_bootstrap(slow, stat, n_boot=40, seed=7)
    hand_rng = np.random.default_rng(7)
    hand = []
    for _ in range(40):
        merged = []
        for g in groups:
            d = hand_rng.integers(0, len(g), len(g))
            merged.append({k: sum(g[i][k] for i in d) for k in ("n", "s1", "h")})
        hand.append(stat(merged))
    hand = np.array(hand)
    np.testing.assert_allclose(fast.replicates, hand, rtol=1e-12)
    np.testing.assert_allclose(plain.replicates, hand, rtol=1e-12)
    np.testing.assert_allclose(fast.estimate, stat([merge_blocks(g) for g in groups]))
    assert np.ptp(hand, axis=0).max() > 0  # replicates really vary


# -------------------------------------------------------------- 3. calibration
def _card_columns(card, cols):
    """The card's sums of some features only (every field but the counts is per feature)."""
    return CardSums([[ArraySum(**{k: v if v.ndim == 0 else v[cols] for k, v in b.arrays.items()})
                      for b in g] for g in card.blocks()], card.has_lag)


def test_card_intervals_cover_known_fisher_ratio_and_autocorrelations(tmp_path):
    """Over 50 repeats of two-state AR(1) data (2 runs of 1500 frames per state, blocks of
    50 frames, at least 10 correlation times), three features per repeat (the x, y, z of its
    own atom in the DCD files; one CardPass over all atoms, each repeat's sums taken from
    it and bootstrapped with its own seed), the 95 % card intervals cover the true Fisher
    ratio mu**2 / 4 (equal priors, unit variances), the pooled autocorrelation
    (phi**L + mu**2 / 4) / (1 + mu**2 / 4) (equal pair counts per state) and the within-run
    autocorrelation phi**L in 85 %-99.5 % of the 150 (repeat, feature) cases. The band is
    common practice for a coarse check: the binomial sd of 150 trials at 95 % is 1.8
    points, and block bootstraps undercover slightly. The overlap has no closed-form truth
    for a histogram estimator (biased low), so it is not calibrated here."""
    phi = np.array([0.8, 0.6, 0.7])
    mu = np.array([1.0, 2.0, 1.5])
    lag, n_frames, n_runs, block, n_rep = 3, 1500, 2, 50, 50
    truth = {"fisher_ratio": mu ** 2 / 4,
             "autocorrelation": (phi ** lag + mu ** 2 / 4) / (1 + mu ** 2 / 4),
             "autocorrelation_within_runs": phi ** lag}
    rng = np.random.default_rng(2024)
    top = _topology(n_rep)
    src = Source(top)
    values = {}  # (segment, state) -> coordinates read back, frames x repeats x 3
    for s in (0, 1):
        for r in range(n_runs):
            x = np.stack([_ar1(rng, p, (n_frames, n_rep)) for p in phi], axis=2) + s * mu
            path = tmp_path / f"state{s}_run{r}.dcd"
            values[(len(values), s)] = _write_dcd(path, x, top)
            src.add(path, _STATES[s])
    # one pass for all repeats: per-feature sums, so repeat r is features 3r .. 3r+2
    runs = {key: x.reshape(n_frames, 3 * n_rep) for key, x in values.items()}
    allx = np.concatenate(list(runs.values()))
    center = allx.mean(axis=0)
    means = {key: 0.5 * (x[:-lag].mean(axis=0) + x[lag:].mean(axis=0))
             for key, x in runs.items()}
    card = run_pass(CardPass(CoordinateFeaturizer(np.arange(n_rep)), center=center,
                             low=allx.min(axis=0), high=allx.max(axis=0), n_bins=20,
                             block_frames=block, lags=lag, run_means=means), src)
    assert [len(g) for g in card.blocks()] == [n_runs * n_frames // block] * 2
    hits = {k: 0 for k in truth}
    width = {k: [] for k in truth}
    for rep in range(n_rep):
        cols = np.arange(3 * rep, 3 * rep + 3)
        res = card_intervals(_card_columns(card, cols), center[cols], np.array([0.5, 0.5]),
                             np.zeros(3, bool), np.arange(3), 3, n_boot=200, seed=rep)
        for k in truth:
            _, lo, hi = res[k]
            hits[k] += int(np.sum((lo <= truth[k]) & (truth[k] <= hi)))
            width[k].append(hi - lo)
    for k in truth:
        cover = hits[k] / (3 * n_rep)
        assert 0.85 <= cover <= 0.995, (k, cover)
        assert np.all(np.array(width[k]) > 0), k


# --------------------------------------------------------- 4. integrated time
def _reversible_rho(runs, max_lag):
    """rho(k), k = 1..max_lag: per run about its own mean, sum of lagged products over
    sum of the pairs' mean squares, summed over runs (numpy FFT for the products)."""
    num = np.zeros(max_lag)
    den = np.zeros(max_lag)
    k = np.arange(1, max_lag + 1)
    for x in runs:
        u = x - x.mean()
        n = u.size
        f = np.fft.rfft(u, 2 * n)
        acov = np.fft.irfft(f * np.conj(f))[:n]
        c2 = np.concatenate([[0.0], np.cumsum(u * u)])
        num += acov[k]
        # sum_{t < n-k} (u_t^2 + u_{t+k}^2) / 2
        den += 0.5 * (c2[n - k] + (c2[n] - c2[k]))
    return num / den


def test_integrated_time_interval_covers_ar1_tau_int():
    """Asymptotic Madras-Sokal intervals around integrated_time (Sokal's self-consistent
    window, c = 5) cover the AR(1) tau_int = (1 + phi) / (2 (1 - phi)) (phi = 0.9:
    9.5 frames) in 85 %-99.5 % of 200 repeats of 4 runs x 5000 frames (band: common
    practice, binomial sd 1.5 points). The estimator's known downward bias is
    small against the interval's half width (~19 %): the window cut misses
    about phi**(M+1) / (1 - phi) ~ 0.06 frames (0.6 %) and subtracting each run's
    mean lowers each rho(k) by about 2 tau_int / n (Priestley, *Spectral Analysis and
    Time Series*, 1981; from memory), ~ 2 % summed over the window; so the mean
    estimate must lie between -6 % and +1 % of the truth."""
    phi, n_runs, n = 0.9, 4, 5000
    tau_true = (1 + phi) / (2 * (1 - phi))
    lags = np.arange(1, 301)
    rng = np.random.default_rng(99)
    hits, taus, rel_half = 0, [], []
    n_rep = 200
    for _ in range(n_rep):
        runs = [_ar1(rng, phi, n) for _ in range(n_runs)]
        rho = _reversible_rho(runs, lags[-1])
        tau, decayed, window = integrated_time(lags, rho[:, None], 1.0, return_window=True)
        assert decayed[0]
        lo, hi = integrated_time_interval(tau, window, n_runs * n)
        hits += int(lo[0] <= tau_true <= hi[0])
        taus.append(tau[0])
        rel_half.append((hi[0] - lo[0]) / 2 / tau[0])
    cover = hits / n_rep
    assert 0.85 <= cover <= 0.995, cover
    bias = np.mean(taus) / tau_true - 1
    assert -0.06 <= bias <= 0.01, bias
    # the interval's width is the stated formula (1.96 sd, sd = tau sqrt(2 (2M+1) / N))
    assert 0.12 < np.median(rel_half) < 0.30


def test_integrated_time_interval_formula_and_positivity():
    """The interval is tau exp(+-z sd/tau) with sd = tau sqrt(2 (2 M + 1) / N) (Madras and
    Sokal 1988; on log tau by the delta method), z from memory = 1.959964: positive even
    when the window is as long as the data, where a symmetric one would cross 0."""
    lo, hi = integrated_time_interval([4.0, 2.0], [20, 400], 1000)
    rel = np.sqrt(2 * (2 * np.array([20, 400]) + 1) / 1000)
    np.testing.assert_allclose(hi, [4.0, 2.0] * np.exp(1.959964 * rel), rtol=1e-6)
    np.testing.assert_allclose(lo, [4.0, 2.0] * np.exp(-1.959964 * rel), rtol=1e-6)
    assert lo[1] > 0 and 1 - 1.959964 * rel[1] < 0


# ---------------------------------------------------------------- 5. planning
def test_plan_caps_blocks_per_state_by_lengthening_blocks():
    """Many short blocks: the plan lengthens them to the shortest length giving at most
    MAX_CARD_BLOCKS per state, never below the requested length; few blocks, or whole
    runs, are left alone."""
    counts = np.zeros((8, 2), dtype=int)
    counts[:5, 0] = [10_000, 7_000, 3_333, 999, 20_000]
    counts[5:, 1] = [4_000, 12_345, 8_000]

    def per_state(bf):
        return np.ceil(counts / bf).sum(axis=0).max()

    bf, kept = plan_card_blocks(counts, 10, 30, budget=10 ** 12)
    assert bf > 10 and per_state(bf) <= MAX_CARD_BLOCKS < per_state(bf - 1)
    assert kept == 30
    # already few blocks: unchanged (never shortened)
    assert plan_card_blocks(counts, 5_000, 30, budget=10 ** 12) == (5_000, 30)
    assert plan_card_blocks(counts, None, 30, budget=10 ** 12) == (None, 30)
    # more runs per state than the cap: whole runs, as documented
    many = np.zeros((2 * (MAX_CARD_BLOCKS + 5), 2), dtype=int)
    many[::2, 0] = 50
    many[1::2, 1] = 50
    assert plan_card_blocks(many, 10, 3, budget=10 ** 12)[0] is None


def test_plan_keeps_fewer_features_under_a_small_budget():
    """A small budget: blocks go down to at most MIN_CARD_BLOCKS per state, and only as
    many features are kept as fit; the count grows with the budget (twice the budget,
    twice the features with the same blocks) up to all features."""
    counts = np.array([[10_000, 0], [0, 10_000], [5_000, 0], [0, 6_000]])
    n_feat = 500
    big = plan_card_blocks(counts, 10, n_feat, budget=10 ** 12)
    assert big[1] == n_feat
    small_bf, small = plan_card_blocks(counts, 10, n_feat, budget=2_000_000)
    assert np.ceil(counts / small_bf).sum(axis=0).max() <= MIN_CARD_BLOCKS
    assert 0 < small < n_feat
    bf2, double = plan_card_blocks(counts, 10, n_feat, budget=4_000_000)
    assert bf2 == small_bf and double in (2 * small, 2 * small + 1)
    assert plan_card_blocks(counts, 10, n_feat, budget=0)[1] == 0


# ----------------------------------------------------------------- 6. pipeline
def test_demo_scorecard_and_ranking_carry_intervals(demo_result):
    """On the demo (default bootstrap) every score-card row has the four card intervals,
    well ordered, containing the reported value; decayed
    integrated times have an interval containing them; ranking entries carry the new
    intervals; the CSV headers have the new columns and the values in them."""
    rows = demo_result.scorecard
    assert any("intervals for every descriptor" in n for n in demo_result.notes)
    for row in rows:
        for name in CARD_COLUMNS:
            lo, hi = row[f"{name}_ci"]
            assert lo is not None and hi is not None and lo <= hi, (row["id"], name)
    # every row's interval contains its value (the hull of the percentile and basic
    # intervals): a percentile interval alone fell beside the overlap of 30 of the demo's 62
    # descriptors, since histograms of resampled blocks overlap less; and it stays within
    # the column's range
    ranges = {"fisher_ratio": (0.0, np.inf), "overlap": (0.0, 1.0),
              "autocorrelation": (-1.0, 1.0), "autocorrelation_within_runs": (-1.0, 1.0)}
    for row in rows:
        for name in CARD_COLUMNS:
            lo, hi = row[f"{name}_ci"]
            assert lo - 1e-12 <= row[name] <= hi + 1e-12, (row["id"], name)
            assert ranges[name][0] <= lo and hi <= ranges[name][1], (row["id"], name)
    decayed = [r for r in rows if r["integrated_time_decayed"]]
    assert decayed
    for row in decayed:
        lo, hi = row["integrated_time_ci"]
        assert 0 <= lo <= row["integrated_time"] <= hi
    for entry in demo_result.ranking:
        for key in ("heldout_overlap_ci", "heldout_autocorrelation_ci",
                    "integrated_time_ci_ps"):
            lo, hi = entry[key]
            assert lo is not None and lo <= hi, (entry["rank"], key)
        lo, hi = entry["integrated_time_ci_ps"]
        assert lo <= entry["integrated_time_ps"] <= hi
        # every bootstrap interval of a ranked CV contains its value (held-out scores from
        # the refits too: a percentile interval had fallen beside one)
        # (the full-data fit's values are the `_all` keys)
        value = {"fisher_ratio_ci": "fisher_ratio_all", "autocorrelation_ci": "autocorrelation_all"}
        checked = {k: value.get(k, k[:-3]) for k in entry
                   if k.endswith("_ci") and entry[k] is not None}
        assert {"heldout_score_ci", "heldout_overlap_ci", "fisher_ratio_ci",
                "autocorrelation_within_states_ci"} <= set(checked)
        for key, name in checked.items():
            lo, hi = entry[key]
            assert lo - 1e-12 <= entry[name] <= hi + 1e-12, (entry["rank"], key)

    card = list(csv.DictReader(io.StringIO(demo_result.scorecard_csv())))
    for name in CARD_COLUMNS:
        for i in (0, len(rows) - 1):
            assert float(card[i][f"{name}_ci_low"]) == pytest.approx(
                rows[i][f"{name}_ci"][0], rel=1e-4, abs=1e-9)
            assert float(card[i][f"{name}_ci_high"]) == pytest.approx(
                rows[i][f"{name}_ci"][1], rel=1e-4, abs=1e-9)
    assert {"integrated_time_ci_low_ps", "integrated_time_ci_high_ps"} <= set(card[0])
    rank = list(csv.DictReader(io.StringIO(demo_result.ranking_csv())))
    for col in ("heldout_overlap_ci_low", "heldout_overlap_ci_high",
                "heldout_autocorrelation_ci_low", "heldout_autocorrelation_ci_high",
                "integrated_time_ci_low_ps", "integrated_time_ci_high_ps"):
        assert col in rank[0]
        assert rank[0][col] != ""
    assert float(rank[0]["heldout_overlap_ci_high"]) == pytest.approx(
        demo_result.ranking[0]["heldout_overlap_ci"][1], rel=1e-4, abs=1e-9)


def test_memory_budget_gives_intervals_to_the_best_descriptors_only(demo_files, monkeypatch):
    """With a budget for about ten features, the note says "the best N of M
    descriptors", exactly the first N score-card rows have the card intervals, the rest
    none, and N is the longest prefix of the card whose features fit the plan."""
    top, states = demo_files
    src = Source(top)
    for state, files in states.items():
        src.add(files[0], state, frames=(0, 600))
    monkeypatch.setattr(cvdesign.score.card, "CARD_BUDGET_BYTES", 400_000)
    plans = []
    real_plan = cvdesign.pipeline.suggest.plan_card_blocks

    def spy(*args, **kwargs):
        plans.append(real_plan(*args, **kwargs))
        return plans[-1]

    monkeypatch.setattr(cvdesign.pipeline.suggest, "plan_card_blocks", spy)
    res = suggest(src, n_bootstrap=20, max_terms=1, n_suggestions=1)
    note = next(n for n in res.notes if n.startswith("score card:"))
    m = re.search(r"the best (\d+) of (\d+) descriptors", note)
    assert m, note
    n_kept, n_all = int(m.group(1)), int(m.group(2))
    assert n_all == len(res.scorecard) and 0 < n_kept < n_all
    for i, row in enumerate(res.scorecard):
        has = [f"{name}_ci" in row for name in CARD_COLUMNS]
        assert all(has) if i < n_kept else not any(has), (i, row["id"])
    # the kept descriptors are the longest prefix of the card within the planned features
    (_, kept_features), = plans
    by_id = {d.id: len(d.transforms) for d in res.pool.descriptors}
    sizes = [by_id[row["id"]] for row in res.scorecard]
    assert sum(sizes[:n_kept]) <= kept_features < sum(sizes[:n_kept + 1])
