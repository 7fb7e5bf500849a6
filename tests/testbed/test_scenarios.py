"""Tests of the two-wells toy and of cvdesign.testbed.scenarios.write_two_wells.

The default data set is generated once per module (about 5 s); the
determinism tests use short runs.
"""

from pathlib import Path

import mdtraj as md
import numpy as np
import pytest

from cvdesign.testbed import (TwoWellsData, TwoWellSystem, count_transitions, two_wells,
                              write_two_wells)

SLOW, FAST = (0, 1, 2, 3), (6, 7, 8, 9)
FILES = ["slowA-1.xtc", "slowA-2.xtc", "slowB-1.xtc", "slowB-2.xtc", "two_wells.pdb"]
# Committed (core-to-core) transitions of the fast dihedral per default run
# (1500 frames, 89.94 ps). From our own sweep of seeds 0..29 (120 runs): 18 to
# 48, mean about 32; the default seed gives 25 to 38. The range leaves room
# for other platforms' floating-point differences.
TRANSITIONS_RANGE = (15, 60)


@pytest.fixture(scope="module")
def generated(tmp_path_factory):
    out = tmp_path_factory.mktemp("two_wells")
    return write_two_wells(out), None


@pytest.fixture(scope="module")
def data(generated):
    return generated[0]


@pytest.fixture(scope="module")
def system():
    return two_wells()


def read_back(data, path):
    return md.load(path, top=data.topology)


def mdtraj_dihedral(traj, quad):
    """The dihedral as computed by mdtraj (an implementation independent of ours)."""
    return md.compute_dihedrals(traj, [quad], periodic=False)[:, 0].astype(np.float64)


def in_well_near(phi, center):
    """Within pi/2 of `center` on the circle."""
    return np.abs(np.angle(np.exp(1j * (phi - center)))) < np.pi / 2


def rotate_end(x, quad, angle):
    """Rotate the last atom of `quad` about its central bond, to dihedral `angle`.

    The dihedral of a reversed quadruplet is the same angle, so
    ``rotate_end(x, quad[::-1], angle)`` turns the first atom instead.
    """
    from cvdesign.testbed import dihedral_angles

    i, j, k, l = quad
    axis = (x[k] - x[j]) / np.linalg.norm(x[k] - x[j])
    turn = angle - dihedral_angles(x, [quad])[0]
    v = x[l] - x[k]
    # Rodrigues' rotation formula (common practice).
    v_rot = (v * np.cos(turn) + np.cross(axis, v) * np.sin(turn)
             + axis * (axis @ v) * (1 - np.cos(turn)))
    y = x.copy()
    y[l] = x[k] + v_rot
    return y


# ------------------------------------------------------------------ the toy


def test_two_wells_toy_is_built_as_documented(system):
    top = system.topology
    assert isinstance(system, TwoWellSystem)
    assert [a.name for a in top.atoms] == [f"C{i}" for i in range(1, 11)]
    assert top.n_residues == 1 and top.residue(0).name == "TWW"
    assert sorted((a.index, b.index) for a, b in top.bonds) == [(i, i + 1) for i in range(9)]
    np.testing.assert_allclose(system.masses, md.element.carbon.mass)
    assert system.slow_dihedral == SLOW and system.fast_dihedral == FAST
    assert not set(SLOW) & set(FAST)
    for name, x in system.states.items():
        assert system.force_field.energy(x) < 1e-6, name  # strain-free minima
    slow_a, slow_b = system.states["slowA"], system.states["slowB"]
    assert abs(system.slow_angle(slow_a)) < 1e-3
    assert abs(abs(system.slow_angle(slow_b)) - np.pi) < 1e-3
    for x in (slow_a, slow_b):
        assert abs(abs(system.fast_angle(x)) - np.pi) < 1e-3
    slow, fast = system.assign_wells(np.stack([slow_a, slow_b]))
    assert slow.tolist() == ["slowA", "slowB"] and fast.tolist() == ["fastB", "fastB"]
    d = {s: np.linalg.norm(x[0] - x[3]) for s, x in system.states.items()}
    assert d["slowA"] < 0.3 < 0.35 < d["slowB"]


def test_labels_follow_the_half_circles_around_0_and_pi(system):
    x = system.states["slowA"]
    angles = [0.0, 1.4, 1.7, np.pi, -1.7, -1.4]
    expected = ["fastA", "fastA", "fastB", "fastB", "fastB", "fastA"]
    frames = np.stack([rotate_end(x, FAST, a) for a in angles])
    np.testing.assert_allclose(np.angle(np.exp(1j * (system.fast_angle(frames) - angles))),
                               0.0, atol=1e-9)
    assert system.assign_fast_state(frames).tolist() == expected
    assert set(system.assign_state(frames)) == {"slowA"}  # the slow dihedral is untouched


@pytest.mark.parametrize("state", ["slowA", "slowB"])
def test_barrier_heights_by_rigid_rotation_of_the_end_atoms(system, state):
    # Turning only the end atom about the central bond changes only that
    # dihedral's torsion term (bonds, angles and the other torsions are
    # unchanged, and no repulsive pair comes into range), so the energy
    # difference is the barrier of the two-fold term, whatever the slow state.
    ff = system.force_field
    x = system.states[state]
    slow_min = 0.0 if state == "slowA" else np.pi
    e_min = ff.energy(x)
    # C1 and C10 are the chain's ends: turn C1 for the slow dihedral (reversed).
    for quad, minimum, barrier in [(SLOW[::-1], slow_min, 30.0), (FAST, np.pi, 5.0)]:
        for sign in (1, -1):
            y = rotate_end(x, quad, minimum + sign * np.pi / 2)
            assert ff.energy(y) - e_min == pytest.approx(barrier, abs=1e-9)
            assert ff.terms(y)["pair"] == 0.0
        other = 0.0 if minimum == np.pi else np.pi
        assert ff.energy(rotate_end(x, quad, other)) == pytest.approx(e_min, abs=1e-9)
    assert system.notes["slow_barrier_kj_mol"] == 30.0
    assert system.notes["fast_barrier_kj_mol"] == 5.0


def test_two_wells_force_equals_central_difference(system):
    ff = system.force_field
    rng = np.random.default_rng(0)
    h = 1e-6
    for x0 in system.states.values():
        x = x0 + rng.normal(scale=0.01, size=x0.shape)
        _, f = ff.energy_forces(x)
        fd = np.zeros_like(x)
        for i in range(x.shape[0]):
            for d in range(3):
                xp, xm = x.copy(), x.copy()
                xp[i, d] += h
                xm[i, d] -= h
                fd[i, d] = -(ff.energy(xp) - ff.energy(xm)) / (2 * h)
        assert np.abs(f - fd).max() / np.abs(f).max() < 1e-6


# ------------------------------------------------------------------ count_transitions


def test_count_transitions_counts_core_to_core_only():
    core = np.pi / 3
    # Recrossing the barrier top (pi/2) without reaching the other core: none.
    assert count_transitions([0.0, 1.2, 1.7, 1.9, 1.2, 0.1]) == 0
    # 0 -> pi -> 0 -> pi, with stops outside both cores in between.
    assert count_transitions([0.0, 1.5, 3.0, 1.5, 0.2, 1.6, -3.0]) == 3
    # Wrapping through +-pi stays in the same core.
    assert count_transitions([3.1, -3.1, 3.0, -2.9]) == 0
    assert count_transitions([-0.5, 0.5, -2.5]) == 1
    assert count_transitions([1.5, 1.6]) == 0 and count_transitions([]) == 0
    assert count_transitions([0.0, 0.9, 2.0], core=core) == 0
    assert count_transitions([0.0, 2.0, 0.0], core=1.2) == 2
    assert count_transitions([0.0, 2.1, 4.2, 0.0], centers=[0.0, 2.1, 4.2], core=0.5) == 3


# ------------------------------------------------------------------ generated data


def test_generated_files_and_returned_fields(data, generated):
    assert isinstance(data, TwoWellsData)
    out = Path(data.out_dir)
    assert sorted(p.name for p in out.iterdir()) == FILES
    assert Path(data.topology) == out / "two_wells.pdb"
    assert {s: [Path(p).name for p in ps] for s, ps in data.files.items()} == {
        "slowA": ["slowA-1.xtc", "slowA-2.xtc"], "slowB": ["slowB-1.xtc", "slowB-2.xtc"]}
    assert data.paths == data.files["slowA"] + data.files["slowB"]
    assert data.slow_dihedral == SLOW and data.fast_dihedral == FAST
    assert data.n_frames == 1500 and data.frame_step_ps == 0.06
    for path in data.paths:
        labels = data.fast_labels[path]
        assert isinstance(labels, np.ndarray) and labels.dtype.kind == "U"
        assert labels.shape == (1500,) and set(labels) <= {"fastA", "fastB"}
        assert sum(data.fast_fractions[path].values()) == pytest.approx(1.0)


def test_pdb_has_bonds_and_xtc_reads_back_with_frames_and_time_step(data):
    top = md.load_topology(data.topology)
    assert top.n_atoms == 10 and top.n_bonds == 9 and top.residue(0).name == "TWW"
    assert sum(line.startswith("CONECT") for line in
               Path(data.topology).read_text().splitlines()) == 10
    for path in data.paths:
        traj = read_back(data, path)
        assert traj.n_frames == 1500
        assert traj.timestep == pytest.approx(0.06, rel=1e-5)
        assert traj.time[0] == 0.0 and traj.time[-1] == pytest.approx(89.94, rel=1e-6)


def test_slow_dihedral_never_leaves_its_starting_well(data):
    for state, center in (("slowA", 0.0), ("slowB", np.pi)):
        for path in data.files[state]:
            phi = mdtraj_dihedral(read_back(data, path), SLOW)
            assert np.all(in_well_near(phi, center)), (path, np.rad2deg(phi).round(1))


def test_fast_labels_match_an_independent_dihedral_computation(data):
    for path in data.paths:
        phi = mdtraj_dihedral(read_back(data, path), FAST)
        expected = np.where(in_well_near(phi, 0.0), "fastA", "fastB")
        assert np.array_equal(data.fast_labels[path], expected), path


def test_fast_dihedral_hops_many_times_and_visits_both_wells_in_every_run(data):
    lo, hi = TRANSITIONS_RANGE
    for path in data.paths:
        labels = data.fast_labels[path]
        n = data.fast_transitions[path]
        assert n == count_transitions(mdtraj_dihedral(read_back(data, path), FAST))
        assert lo <= n <= hi, (path, n)
        # Every committed transition changes the half-circle label at least once.
        assert np.count_nonzero(labels[1:] != labels[:-1]) >= n
        for well in ("fastA", "fastB"):
            frac = np.mean(labels == well)
            assert frac >= 0.2, (path, well, frac)
            assert data.fast_fractions[path][well] == frac


SHORT = dict(n_frames=40, check=False)  # 2.34 ps per run: too short for the fast checks


def test_same_arguments_give_identical_bytes(tmp_path):
    a = write_two_wells(tmp_path / "a", **SHORT)
    b = write_two_wells(tmp_path / "b", **SHORT)
    for name in FILES:
        assert (tmp_path / "a" / name).read_bytes() == (tmp_path / "b" / name).read_bytes(), name
    assert [Path(p).name for p in a.paths] == [Path(p).name for p in b.paths]
    for p, q in zip(a.paths, b.paths):
        assert np.array_equal(a.fast_labels[p], b.fast_labels[q])
        assert a.fast_transitions[p] == b.fast_transitions[q]
        assert a.fast_fractions[p] == b.fast_fractions[q]


def test_shorter_run_is_a_prefix_of_the_default_and_another_seed_differs(data, tmp_path):
    # The noise of step n does not depend on the run length, so a shorter run
    # with the same seed reproduces the first frames of the default run exactly:
    # together with the test above, the default run is reproducible too.
    short = write_two_wells(tmp_path / "short", **SHORT)
    other = write_two_wells(tmp_path / "other", seed=8, **SHORT)
    assert (tmp_path / "short" / "two_wells.pdb").read_bytes() == \
        Path(data.topology).read_bytes()
    for p, q, r in zip(data.paths, short.paths, other.paths):
        full = read_back(data, p).xyz
        assert np.array_equal(read_back(short, q).xyz, full[:40])
        assert not np.array_equal(read_back(other, r).xyz, full[:40])
        assert np.array_equal(short.fast_labels[q], data.fast_labels[p][:40])


def test_checks_raise_for_runs_too_short_to_hop(tmp_path):
    with pytest.raises(RuntimeError, match=r"transitions of the fast dihedral .*try another seed"):
        write_two_wells(tmp_path, n_runs_per_state=1, n_frames=20, equilibration_steps=10)


@pytest.mark.parametrize("kwargs, match", [
    (dict(n_frames=0), r"n_frames=0 must be a positive integer"),
    (dict(n_runs_per_state=1.5), r"n_runs_per_state=1.5 must be a positive integer"),
    (dict(report_interval=-2), r"report_interval=-2 must be a positive integer"),
    (dict(equilibration_steps=-1), r"equilibration_steps=-1 must be an integer >= 0"),
])
def test_invalid_arguments_raise_with_the_argument_name(tmp_path, kwargs, match):
    with pytest.raises(ValueError, match=match):
        write_two_wells(tmp_path, **kwargs)
