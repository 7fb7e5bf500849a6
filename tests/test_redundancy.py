"""Redundancy graph: exactly correlated descriptors collapse to one representative."""

import numpy as np
import pytest

from cvdesign.stats.moments import Moments
from cvdesign.score.redundancy import descriptor_correlation, redundancy_graph, representatives


def test_exactly_correlated_descriptors_collapse_to_one_that_lists_the_other():
    rng = np.random.default_rng(0)
    a = rng.normal(size=500)
    b = rng.normal(size=500)
    # Descriptor 1 is an exact affine function of descriptor 0; descriptor 2 is a
    # dihedral-like pair (two features) unrelated to both.
    x = np.c_[a, 2.0 * a + 3.0, b, rng.normal(size=500)]
    cov = Moments.from_data(x).covariance
    groups = [[0], [1], [2, 3]]
    corr = descriptor_correlation(cov, groups)
    assert corr[0, 1] == 1.0 or abs(corr[0, 1] - 1.0) < 1e-12
    graph = redundancy_graph(corr, 0.95, nodes=["d0", "d1", "t2"])
    reps = representatives(graph, {"d0": 1.0, "d1": 2.0, "t2": 0.5})
    assert reps == [("d1", ["d0"]), ("t2", [])]


def test_a_representative_stands_only_for_its_direct_neighbours():
    # a~b and b~c above the threshold, a~c below: c (best) stands for b; a is not
    # redundant with c, so it stays a representative (no chains of correlation).
    corr = np.array([[1.0, 0.97, 0.90], [0.97, 1.0, 0.97], [0.90, 0.97, 1.0]])
    reps = representatives(redundancy_graph(corr, 0.95), {0: 0.1, 1: 0.2, 2: 0.3})
    assert reps == [(2, [1]), (0, [])]


def test_correlated_pairs_that_add_something_are_not_edges():
    corr = np.array([[1.0, 0.99, 0.0], [0.99, 1.0, 0.97], [0.0, 0.97, 1.0]])
    asked = []

    def adds_nothing(i, j):
        asked.append((i, j))
        return (i, j) != (0, 1)

    graph = redundancy_graph(corr, 0.95, adds_nothing=adds_nothing)
    assert sorted(asked) == [(0, 1), (1, 2)]  # only correlated pairs are asked about
    assert sorted(graph.edges) == [(1, 2)]


def test_constant_feature_is_correlated_with_nothing():
    cov = np.array([[1.0, 0.0], [0.0, 0.0]])
    corr = descriptor_correlation(cov, [[0], [1]])
    assert corr[0, 1] == 0.0


def test_scorecard_redundancy_is_consistent_on_real_protein_data(adk_result_for_redundancy):
    # Adenylate kinase CA distances (MDAnalysis test data): many neighbouring CA-CA
    # distances move together; every 'represented by' must point at a row that lists it.
    rows = {r["id"]: r for r in adk_result_for_redundancy.scorecard}
    represented = [r for r in rows.values() if r["note"].startswith("represented by")]
    assert represented, "expected some redundant CA-CA distances in a domain motion"
    for r in represented:
        rep = r["note"].split()[2]
        assert r["id"] in rows[rep]["stands_for"]
        assert rows[rep]["fisher_ratio"] >= r["fisher_ratio"]


# ---------------------------------------------------------------------------------------
# Complementary descriptors through the whole pipeline.
#
# Two distances share a large within-state fluctuation n (correlation about 0.99, or
# -0.99), while the states shift their means by +-delta so that the difference (or the
# sum) of the two cancels n. Each alone overlaps badly; the pair separates the states.
# The Bayes error of two Gaussian classes with equal covariance Sigma and equal priors is
# Phi(-Delta/2), Delta the Mahalanobis distance between the means (Fisher 1936; Duda,
# Hart and Stork, *Pattern Classification*, 2nd ed. 2001, sect. 2.8). Here Sigma has
# eigenvector (1, +-1) with eigenvalue sigma_e^2 along the mean shift, so
# Delta^2 = 2 delta^2 / sigma_e^2.

SIGMA_N, SIGMA_E, DELTA, LENGTH = 0.1, 0.01, 0.0283, 0.6


def _pair_model(rng, n_frames, state, kind, sigma_e=SIGMA_E):
    """(x1, x2) distances in nm for one state: kind 'difference', 'sum' or 'duplicate'."""
    n = rng.normal(0.0, SIGMA_N, n_frames)
    shift = DELTA * state
    x1 = LENGTH + n + shift + rng.normal(0.0, sigma_e, n_frames)
    if kind == "difference":    # x1 - x2 separates
        x2 = LENGTH + n - shift + rng.normal(0.0, sigma_e, n_frames)
    elif kind == "sum":         # x1 + x2 separates
        x2 = LENGTH - n + shift + rng.normal(0.0, sigma_e, n_frames)
    else:                       # an affine copy, means included
        x2 = 0.8 * x1 + 0.1
    return x1, x2


def _topology():
    import mdtraj as md

    top = md.Topology()
    chain = top.add_chain()
    for r, name in enumerate(("AAA", "BBB", "CCC")):
        res = top.add_residue(name, chain, resSeq=r + 1)
        for a in ("X1", "X2"):
            top.add_atom(a, md.element.carbon, res)
    return top


def _frames(x1, x2, noise):
    """Three 2-atom fragments 3 nm apart (cross distances beyond the pool's cutoff):
    distances x1, x2 and an unrelated `noise` distance."""
    xyz = np.zeros((x1.size, 6, 3), dtype=np.float32)
    xyz[:, 1, 0] = x1
    xyz[:, 2:4, 1] = 3.0
    xyz[:, 3, 0] = x2
    xyz[:, 4:6, 2] = 3.0
    xyz[:, 5, 0] = noise
    return xyz


def _write_pair_source(tmp_path, kind, seed, n_files=2, n_frames=1500, sigma_e=SIGMA_E):
    import mdtraj as md

    from cvdesign import Source

    top = _topology()
    rng = np.random.default_rng(seed)
    src = Source(top)
    for state, name in enumerate(("A", "B")):
        for f in range(n_files):
            x1, x2 = _pair_model(rng, n_frames, state, kind, sigma_e)
            xyz = _frames(x1, x2, LENGTH + rng.normal(0.0, 0.05, n_frames))
            path = tmp_path / f"{kind}-{name}-{f}.dcd"
            md.Trajectory(xyz, top).save_dcd(str(path))
            src.add(str(path), name)
    return src, top


def _misclassification(spec, top, kind, seed, n_frames=20_000):
    """Held-out error rate of classifying fresh frames by the nearer state mean of the CV."""
    rng = np.random.default_rng(seed)
    mean = {s: spec.states[s]["mean"] for s in ("A", "B")}
    cut = 0.5 * (mean["A"] + mean["B"])
    errors = 0
    for state, name in enumerate(("A", "B")):
        x1, x2 = _pair_model(rng, n_frames, state, kind)
        v = spec.evaluate(_frames(x1, x2, np.full(n_frames, LENGTH)))
        on_b_side = (v > cut) if mean["B"] > mean["A"] else (v < cut)
        errors += int(np.sum(on_b_side != (name == "B")))
    return errors / (2 * n_frames)


@pytest.mark.parametrize("kind", ["difference", "sum"])
def test_descriptors_with_shared_noise_are_combined_not_merged(tmp_path, kind):
    from scipy.stats import norm

    from cvdesign import Spec, suggest

    src, top = _write_pair_source(tmp_path, kind, seed=11)
    result = suggest(src, n_bootstrap=0, max_terms=3)
    d1, d2 = "distance:0-1", "distance:2-3"
    rows = {r["id"]: r for r in result.scorecard}
    assert abs(rows[d1]["overlap"]) > 0.5 and abs(rows[d2]["overlap"]) > 0.5  # each alone fails
    assert rows[d1]["shortlisted"] and rows[d2]["shortlisted"]
    rank1 = {t["descriptor"] for t in result.ranking[0]["terms"]}
    assert {d1, d2} <= rank1
    bayes = float(norm.cdf(-0.5 * np.sqrt(2.0) * DELTA / SIGMA_E))  # about 2.3 %
    err = _misclassification(Spec.from_dict(result.specs[0]), top, kind, seed=99)
    assert abs(err - bayes) < 0.01, (err, bayes)
    # the best single distance, by contrast, misclassifies about 44 % (Phi(-0.14))
    single = float(norm.cdf(-0.5 * DELTA / np.hypot(SIGMA_N, SIGMA_E)))
    assert single > 0.4


def test_an_affine_copy_still_collapses_to_one_representative(tmp_path):
    from cvdesign import suggest

    src, _ = _write_pair_source(tmp_path, "duplicate", seed=12, n_frames=600)
    result = suggest(src, n_bootstrap=0, max_terms=3)
    rows = {r["id"]: r for r in result.scorecard}
    d1, d2 = "distance:0-1", "distance:2-3"
    rep, other = (d1, d2) if rows[d1]["shortlisted"] else (d2, d1)
    assert rows[rep]["shortlisted"] and not rows[other]["shortlisted"]
    assert rows[rep]["stands_for"] == [other]
    assert rows[other]["note"].startswith(f"represented by {rep}")


def test_a_combination_rigid_within_the_states_is_reported_with_a_warning(tmp_path):
    # the 'difference' model without independent noise: x1 - x2 is exactly 2 delta_s in
    # every frame, so the rank-1 CV does not move within a state (float precision only)
    from cvdesign import suggest

    src, _ = _write_pair_source(tmp_path, "difference", seed=13, n_frames=400, sigma_e=0.0)
    result = suggest(src, n_bootstrap=0, max_terms=2, n_suggestions=1)
    (warning,) = result.ranking[0]["warnings"]
    assert warning.startswith("the CV barely moves within the states (Fisher ratio")
    assert "**Warning** (rank 1, cv-01.json): the CV barely moves" in result.summary_md()
    assert "Warning: the CV barely moves" in result.specs[0]["caution"]
