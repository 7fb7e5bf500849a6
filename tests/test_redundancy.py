"""Redundancy graph: exactly correlated descriptors collapse to one representative."""

import numpy as np

from cvdesign.moments import Moments
from cvdesign.redundancy import descriptor_correlation, redundancy_graph, representatives


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


def test_chains_of_correlation_form_one_component():
    # a~b and b~c above the threshold, a~c below: one group, represented by the best.
    corr = np.array([[1.0, 0.97, 0.90], [0.97, 1.0, 0.97], [0.90, 0.97, 1.0]])
    reps = representatives(redundancy_graph(corr, 0.95), {0: 0.1, 1: 0.2, 2: 0.3})
    assert reps == [(2, [1, 0])]


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
