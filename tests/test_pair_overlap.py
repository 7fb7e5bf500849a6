"""Three or more states: a ranked CV along which two states lie on top of each other.

The Fisher ratio pools every state (between- over within-state variance), so a CV that
sets one state far from the others scores high even when it leaves the other two
overlapping. Such a CV gets a warning naming the two states, and the summary says so when
it is rank 1. The overlapping coefficient of two histograms is checked against its closed
form for two Gaussians elsewhere (tests/test_scoring.py, Inman and Bradley 1989).
"""

import mdtraj as md
import numpy as np
import pytest
from scipy.signal import lfilter

from cvdesign import Source, suggest
from cvdesign.pipeline.ranking import PAIR_OVERLAP_WARN, add_pair_overlap, closest_pairs
from cvdesign.score.univariate import overlap_coefficient, pairwise_overlaps

#: Where the three states put the two distances C1-C2 and C3-C4 (nm): C1-C2 sets A apart
#: from B and C, which it leaves on top of each other; C3-C4 sets C apart from A and B;
#: only their sum separates all three.
_STATES = {"A": (0.4, 0.4), "B": (0.8, 0.4), "C": (0.8, 0.8)}


@pytest.fixture(scope="module")
def three_states(tmp_path_factory):
    """Five atoms jittering about fixed places (AR(1), 0.9 per 1 ps frame, 0.03 nm), two
    runs of 1200 frames per state; the states differ only in where atoms C2 and C4 sit."""
    directory = tmp_path_factory.mktemp("three")
    rng = np.random.default_rng(11)
    top = md.Topology()
    res = top.add_residue("TRI", top.add_chain())
    for i in range(5):
        top.add_atom(f"C{i + 1}", md.element.carbon, res)
    files = {}
    for state, (d12, d34) in _STATES.items():
        place = np.array([[0, 0, 0], [d12, 0, 0], [0, 1.0, 0], [d34, 1.0, 0], [0.5, 0.5, 1.0]])
        for r in range(2):
            noise = lfilter([1.0], [1.0, -0.9], rng.normal(size=(1200, 15)), axis=0)
            xyz = place + 0.03 * np.sqrt(1 - 0.9 ** 2) * noise.reshape(1200, 5, 3)
            traj = md.Trajectory(xyz.astype(np.float32), top, time=np.arange(1200.0))
            path = directory / f"{state}{r}.xtc"
            traj.save_xtc(str(path))
            files.setdefault(state, []).append(str(path))
    pdb = directory / "top.pdb"
    traj[:1].save_pdb(str(pdb))
    return str(pdb), files


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


def test_closest_pair_is_the_one_of_the_largest_overlap_averaged_over_the_folds():
    counts = np.zeros((2, 3, 2, 4))
    counts[:, 0, :] = [4, 0, 0, 0]
    counts[:, 1, :] = [0, 2, 2, 0]
    counts[0, 2, 0] = [0, 2, 2, 0]  # CV 0: states 1 and 2 the same in fold 0 ...
    counts[1, 2, 0] = [0, 0, 2, 2]  # ... half the same in fold 1: mean 0.75
    counts[:, 2, 1] = [2, 0, 0, 2]  # CV 1: state 2 half on state 0
    assert closest_pairs(counts) == [(1, 2, 0.75), (0, 2, 0.5)]
    counts[0, 1, 1] = 0  # a fold without frames of a state: not defined
    assert closest_pairs(counts)[1] is None


def test_the_warning_needs_three_states_and_an_overlap_of_at_least_the_threshold():
    entry = {"warnings": []}
    assert not add_pair_overlap(entry, (0, 1, 0.9), ["A", "B"])  # two states: J says it
    assert not add_pair_overlap(entry, (0, 1, PAIR_OVERLAP_WARN - 1e-9), ["A", "B", "C"])
    assert not add_pair_overlap(entry, None, ["A", "B", "C"])
    assert entry["warnings"] == []
    assert add_pair_overlap(entry, (1, 2, PAIR_OVERLAP_WARN), ["A", "B", "C"])
    assert entry["warnings"][0].startswith("states 'B' and 'C' overlap by 0.50 along it")


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
    assert {s for s in _STATES if f"'{s}'" in named} == close
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
    assert all(any("overlap by" in w for w in e["warnings"])
               for e in res.ranking[1:] if e["heldout_overlap"] >= PAIR_OVERLAP_WARN)
