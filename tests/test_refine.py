"""Refinement from a biased run: basin labels, crossings, effective sample sizes, and the
comparison of two CVs (cvdesign.pipeline.refine)."""

import math

import numpy as np
import pytest

from cvdesign.constants import BOLTZMANN_KJ_MOL_K
from cvdesign.errors import InputError
from cvdesign.io.source import Source
from cvdesign.pipeline.refine import (basins_from_spec, compare_specs, fisher_separation,
                                      label_basins)
from cvdesign.spec import Spec
from cvdesign.testbed import two_wells

CORES = {"a": (-1.5, -0.5), "b": (0.5, 1.5)}


def _hand_made_series(rng, visits, dwell=20, gap=5):
    """A series visiting the cores in `visits` order with noisy gaps between them, and
    the number of core changes it makes by construction."""
    centre = {"a": -1.0, "b": 1.0}
    parts, expected = [], []
    for i, state in enumerate(visits):
        parts.append(centre[state] + rng.uniform(-0.4, 0.4, dwell))
        expected += [state] * dwell
        parts.append(rng.uniform(-0.45, 0.45, gap))  # between the cores
        expected += [None] * gap
    changes = sum(1 for x, y in zip(visits, visits[1:]) if x != y)
    return np.concatenate(parts), expected, changes


def test_label_basins_counts_the_crossings_of_hand_made_series():
    rng = np.random.default_rng(3)
    for visits in (["a", "b", "a", "a", "b"], ["b", "b", "b"], ["a", "b"] * 7):
        x, expected, changes = _hand_made_series(rng, visits)
        res = label_basins(x, CORES, timestep_ps=0.1)
        assert res.labels.tolist() == expected
        assert res.crossings == changes
        assert res.transition_frames == expected.count(None)
        assert res.frames == {s: expected.count(s) for s in "ab"}
        assert res.ess == {s: float(expected.count(s)) for s in "ab"}  # no bias: all frames
        assert math.isclose(res.crossings_per_ns, changes / (x.size * 0.1 / 1000))
        # each crossing is marked at the first frame of the dwell in the new core
        starts = [i * 25 for i in range(1, len(visits)) if visits[i] != visits[i - 1]]
        assert res.crossing_frames.tolist() == starts


def test_a_recrossing_into_the_same_core_is_not_a_crossing():
    x = [-1.0, -0.2, 0.3, -0.1, -1.1, 0.0, 1.0, 0.2, 1.2]
    res = label_basins(x, CORES)
    assert res.crossings == 1 and res.crossing_frames.tolist() == [6]


def test_periodic_cores_wrap_around_the_circle():
    # a core across +-pi (the open state of a torsion) and one about 0
    cores = {"open": (2.5, 2.5 + 1.2833), "closed": (-0.6, 0.6)}
    phi = [3.1, -3.1, 0.1, 1.5, -2.9, -0.3]
    res = label_basins(phi, cores, period=2 * np.pi)
    assert res.labels.tolist() == ["open", "open", "closed", None, "open", "closed"]
    assert res.crossings == 3


def test_ess_follows_the_bias_weights():
    """Kish's (sum w)^2 / sum w^2 (Kish, Survey Sampling, Wiley, 1965) of exp(V/kT)."""
    kt = BOLTZMANN_KJ_MOL_K * 300.0
    x = [-1.0, -1.0, -1.0, 1.0, 1.0]
    v = kt * np.log([1.0, 1.0, 2.0, 1.0, 1.0])
    res = label_basins(x, CORES, bias=v, temperature=300.0)
    assert res.ess["a"] == pytest.approx(16 / 6)
    assert res.ess["b"] == pytest.approx(2.0)


def test_labels_go_to_a_biased_source(tmp_path):
    """The labels and a bias-energy file make a labelled biased run of a Source."""
    import mdtraj as md
    system = two_wells()
    rng = np.random.default_rng(0)
    xyz = np.stack([system.states["slowA"]] * 3 + [system.states["slowB"]] * 3)
    xyz = xyz + rng.normal(0, 0.002, xyz.shape)
    path = tmp_path / "run.xtc"
    md.Trajectory(xyz.astype(np.float32), system.topology).save_xtc(str(path))
    (tmp_path / "run-bias.txt").write_text("bias\n" + "1.0\n" * 6, encoding="utf-8")
    phi = system.slow_angle(xyz)
    res = label_basins(phi, {"slowA": (-0.5, 0.5), "slowB": (np.pi - 0.5, np.pi + 0.5)},
                       period=2 * np.pi)
    src = Source(system.topology, temperature=300.0)
    src.add_labelled(path, res.labels, bias=tmp_path / "run-bias.txt")
    assert src.states == ["slowA", "slowB"] and res.crossings == 1


def _spec(terms, states=None, periodic=False):
    system = two_wells()
    return Spec(name="cv", topology=system.topology,
                descriptors=[{"id": i, "kind": k, "atoms": a, "label": f"{k} {i}"}
                             for i, k, a, *_ in terms],
                terms=[{"descriptor": i, "transform": t, "center": 0.0, "scale": s,
                        "weight": w} for i, _, _, t, s, w in terms],
                states=states or {}, periodic=periodic)


def test_basins_from_spec_uses_means_and_spreads():
    spec = _spec([("d", "distance", [0, 3], "identity", 1.0, 1.0)],
                 states={"slowA": {"mean": 0.27, "std": 0.01, "n_frames": 10},
                         "slowB": {"mean": 0.39, "std": 0.02, "n_frames": 10}})
    assert basins_from_spec(spec, core=2.0) == {"slowA": (0.25, 0.29), "slowB": (0.35, 0.43)}
    with pytest.raises(InputError, match="'slowA' .* and 'slowB' .* overlap"):
        basins_from_spec(spec, core=4.0)


def test_compare_specs_matches_terms_by_atoms_and_standardizes_weights():
    one = _spec([("x", "distance", [0, 3], "identity", 0.5, 1.0),
                 ("y", "distance", [1, 4], "identity", 1.0, 1.0)])
    # the same two distances under other ids and scales, plus a torsion
    two = _spec([("p", "distance", [0, 3], "identity", 1.0, 2.0),
                 ("q", "distance", [1, 4], "identity", 2.0, 2.0),
                 ("t", "dihedral", [0, 1, 2, 3], "cos", 1.0, 0.0)])
    c = compare_specs(one, two)
    assert c.kept == ("identity(distance p)", "identity(distance q)")
    assert c.added == ("cos(dihedral t)",) and c.removed == ()
    # raw coefficients: one (2, 1), two (2, 1) -> same direction
    assert c.cosine == pytest.approx(1.0)
    flipped = _spec([("p", "distance", [0, 3], "identity", 1.0, -1.0),
                     ("q", "distance", [1, 4], "identity", 2.0, 4.0)])
    # one in CV 2's scales: (2*1, 1*2) = (2, 2); flipped: (-1, 4); |cos| = 6 / (sqrt8 sqrt17)
    assert compare_specs(one, flipped).cosine == pytest.approx(6 / math.sqrt(8 * 17))
    other = _spec([("t", "dihedral", [0, 1, 2, 3], "sin", 1.0, 1.0)])
    assert compare_specs(one, other).cosine == 0.0


def test_fisher_separation_weighs_frames_and_wraps_periodic_values():
    x = [0.0, 2.0, 4.0, 6.0]
    labels = ["a", "a", "b", "b"]
    assert fisher_separation(x, labels, ("a", "b")) == pytest.approx(8.0)
    # integer weights equal repeated frames
    assert fisher_separation(x, labels, ("a", "b"), weights=[2, 1, 1, 1]) == pytest.approx(
        fisher_separation([0.0, 0.0, 2.0, 4.0, 6.0], ["a"] * 3 + ["b"] * 2, ("a", "b")))
    # across the cut at +-pi the circular means are pi and 0
    phi = [3.0, -3.0, 0.1, -0.1]
    j = fisher_separation(phi, labels, ("a", "b"), period=2 * np.pi)
    d = np.pi - 3.0
    assert j == pytest.approx(np.pi ** 2 / (d ** 2 + 0.01))


def test_bad_input_is_refused_with_the_argument_named():
    with pytest.raises(InputError, match="values has a non-finite value at frame 1"):
        label_basins([0.0, np.nan], CORES)
    with pytest.raises(InputError, match="shape \\(n_frames,\\).*each run"):
        label_basins(np.zeros((3, 2)), CORES)
    with pytest.raises(InputError, match="bias has 1 values but values has 2 frames"):
        label_basins([0.0, 1.0], CORES, bias=[0.0], temperature=300.0)
    with pytest.raises(InputError, match="temperature=None: a bias needs"):
        label_basins([0.0, 1.0], CORES, bias=[0.0, 0.0])
    with pytest.raises(InputError, match="at least two state names"):
        label_basins([0.0], {"a": (0, 1)})
    with pytest.raises(InputError, match="basin 'b': core .* needs finite lo < hi"):
        label_basins([0.0], {"a": (0, 1), "b": (3, 2)})
    with pytest.raises(InputError, match="as wide as the period"):
        label_basins([0.0], {"a": (0, 7), "b": (8, 9)}, period=2 * np.pi)
