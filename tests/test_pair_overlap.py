"""Three or more states: a ranked CV along which two states lie on top of each other.

The Fisher ratio pools every state (between- over within-state variance), so a CV that
sets one state far from the others scores high even when it leaves the other two
overlapping. Such a CV gets a warning naming the two states, and the summary says so when
it is rank 1. The overlapping coefficient of two histograms is checked against its closed
form for two Gaussians elsewhere (tests/test_scoring.py, Inman and Bradley 1989).
"""

import numpy as np

from cvdesign import Source, suggest
from cvdesign.pipeline.ranking import PAIR_OVERLAP_WARN, add_pair_overlap, closest_pairs
from cvdesign.score.univariate import overlap_coefficient, pairwise_overlaps

def _suggest(three_states, **kw):
    top, files = three_states
    return suggest(Source.from_states(top, files), n_bootstrap=0, **kw)


def test_pairwise_overlaps_give_each_pair_and_their_worst_is_the_overlap_coefficient():
    rng = np.random.default_rng(2)
    counts = rng.integers(0, 20, size=(4, 3, 10)).astype(float)
    pairs, ov = pairwise_overlaps(counts)
    assert pairs == [(0, 1), (0, 2), (0, 3), (1, 2), (1, 3), (2, 3)]
    p = counts / counts.sum(axis=2, keepdims=True)
    for k, (i, j) in enumerate(pairs):  # sum_b min(p_i(b), p_j(b)), by hand
        np.testing.assert_allclose(ov[k], [sum(min(a, b) for a, b in zip(p[i, f], p[j, f]))
                                           for f in range(3)], rtol=1e-12)
    np.testing.assert_array_equal(overlap_coefficient(counts), ov.max(axis=0))


def test_closest_pair_is_the_one_of_the_largest_overlap_of_the_folds_pooled():
    counts = np.zeros((2, 3, 2, 4))
    counts[:, 0, :] = [4, 0, 0, 0]
    counts[:, 1, :] = [0, 2, 2, 0]
    counts[0, 2, 0] = [0, 2, 2, 0]  # CV 0: states 1 and 2 the same in fold 0 ...
    counts[1, 2, 0] = [0, 0, 2, 2]  # ... half the same in fold 1: pooled, state 1 is
    # [0, 1/2, 1/2, 0] and state 2 [0, 1/4, 1/2, 1/4]: overlap 1/4 + 1/2 = 0.75
    counts[:, 2, 1] = [2, 0, 0, 2]  # CV 1: state 2 half on state 0
    assert closest_pairs(counts) == [(1, 2, 0.75, 0.0), (0, 2, 0.5, 0.0)]
    counts[0, 1, 1] = 0  # a fold without frames of a state: the other fold's count
    assert closest_pairs(counts)[1] == (0, 2, 0.5, 0.0)
    counts[:, 1, 1] = 0  # a state without frames at all: not defined
    assert closest_pairs(counts)[1] is None


def test_the_warning_needs_three_states_and_an_overlap_of_at_least_the_threshold():
    entry = {"warnings": []}
    assert not add_pair_overlap(entry, (0, 1, 0.9, 0.1), ["A", "B"])  # two states: J says it
    assert not add_pair_overlap(entry, (0, 1, PAIR_OVERLAP_WARN - 1e-9, 0.0), ["A", "B", "C"])
    assert not add_pair_overlap(entry, None, ["A", "B", "C"])
    assert entry["warnings"] == []
    assert add_pair_overlap(entry, (1, 2, PAIR_OVERLAP_WARN, 0.0), ["A", "B", "C"])
    assert entry["warnings"][0].startswith("states 'B' and 'C' overlap by 0.50 along it")
    # every pair overlapping: not one pair the others hide, none is separated
    entry = {"warnings": []}
    assert add_pair_overlap(entry, (1, 2, 0.9, 0.6), ["A", "B", "C"])
    assert entry["warnings"] == [
        "every pair of the states overlaps by 0.60 or more along it (held-out overlapping "
        "coefficient of their histograms; most, 0.90, states 'B' and 'C'): it separates none "
        "of them well"]


def test_a_cv_that_leaves_two_of_three_states_on_top_of_each_other_is_warned_about(
        three_states):
    res = _suggest(three_states, max_terms=1)
    first = res.ranking[0]
    # one distance: high Fisher ratio (A far from the others) yet B and C overlap
    assert first["heldout_fisher_ratio"] > 5
    assert first["heldout_overlap"] > 0.8
    means = {s: v["mean"] for s, v in first["states"].items()}
    pair = sorted(means, key=means.get)
    close = {pair[1], pair[2]} if abs(means[pair[1]] - means[pair[2]]) < abs(
        means[pair[0]] - means[pair[1]]) else {pair[0], pair[1]}
    warning = [w for w in first["warnings"] if "overlap by" in w]
    assert len(warning) == 1
    named = warning[0].split(" overlap by")[0]
    assert {s for s in three_states[1] if f"'{s}'" in named} == close
    assert any(n.startswith("warning: along the CV of rank") and " 1" in n.split(",")[0]
               for n in res.notes)
    # the spec's caution carries it, and the summary the warning of rank 1
    assert "overlap by" in res.specs[0]["caution"]
    assert warning[0] in res.summary_md()


def test_a_cv_that_separates_all_three_states_is_not_warned_about(three_states):
    res = _suggest(three_states, max_terms=2)
    first = res.ranking[0]
    assert len(first["terms"]) == 2 and first["heldout_overlap"] < 0.1
    assert not any("overlap by" in w for w in first["warnings"])
    assert not any(n.startswith("warning: along the CV of rank") for n in res.notes)
    # the single distances below it still are
    assert all(any("overlap by" in w or "overlaps by" in w for w in e["warnings"])
               for e in res.ranking[1:] if e["heldout_overlap"] >= PAIR_OVERLAP_WARN)
