"""Tests of cvdesign.testbed.forcefield: analytic forces, invariances, conventions."""

import mdtraj as md
import numpy as np
import pytest

from cvdesign.testbed import ToyForceField, dihedral_angles, latch, pairs_beyond


def numerical_forces(ff, x, h=1e-6):
    """Minus the central finite-difference gradient of ff.energy, float64."""
    f = np.zeros_like(x)
    for i in range(x.shape[0]):
        for d in range(3):
            xp, xm = x.copy(), x.copy()
            xp[i, d] += h
            xm[i, d] -= h
            f[i, d] = -(ff.energy(xp) - ff.energy(xm)) / (2 * h)
    return f


def relative_force_error(ff, x):
    _, f = ff.energy_forces(x)
    fd = numerical_forces(ff, x)
    return np.abs(f - fd).max() / np.abs(f).max()


def random_chain(rng, n, step=0.15):
    """A random walk with steps of about `step` nm: no overlaps, no straight angles."""
    x = [np.zeros(3)]
    while len(x) < n:
        d = rng.normal(size=3)
        d *= step * rng.uniform(0.8, 1.2) / np.linalg.norm(d)
        cand = x[-1] + d
        if len(x) >= 2:
            u, v = x[-2] - x[-1], d
            cos = u @ v / np.linalg.norm(u) / np.linalg.norm(v)
            if abs(cos) > 0.95:
                continue
        x.append(cand)
    return np.array(x)


def bond_only(rng, n):
    bonds = [(i, i + 1) for i in range(n - 1)]
    return ToyForceField(n, bonds=bonds, bond_k=rng.uniform(1e3, 3e5, n - 1),
                         bond_r0=rng.uniform(0.1, 0.2, n - 1))


def angle_only(rng, n):
    angles = [(i, i + 1, i + 2) for i in range(n - 2)]
    return ToyForceField(n, angles=angles, angle_k=rng.uniform(50, 800, n - 2),
                         angle_theta0=rng.uniform(1.5, 2.5, n - 2))


def torsion_only(rng, n):
    quads = [(i, i + 1, i + 2, i + 3) for i in range(n - 3)]
    quads = quads + quads  # sums of two cosines on each dihedral
    m = len(quads)
    return ToyForceField(n, torsions=quads, torsion_k=rng.uniform(0.5, 20, m),
                         torsion_n=rng.integers(1, 5, m),
                         torsion_delta=rng.uniform(-np.pi, np.pi, m))


def pair_only(rng, n):
    bonds = [(i, i + 1) for i in range(n - 1)]
    pairs = pairs_beyond(n, bonds)
    return ToyForceField(n, pairs=pairs, pair_epsilon=rng.uniform(0.5, 3, len(pairs)),
                         pair_sigma=rng.uniform(0.25, 0.45, len(pairs)))


@pytest.mark.parametrize("seed", range(4))
@pytest.mark.parametrize("make", [bond_only, angle_only, torsion_only, pair_only],
                         ids=["bond", "angle", "torsion", "pair"])
def test_each_term_force_equals_central_difference(make, seed):
    rng = np.random.default_rng(seed)
    n = 9
    ff = make(rng, n)
    x = random_chain(rng, n)
    if make is pair_only:  # make sure some pairs are inside the repulsive range
        x = random_chain(rng, n, step=0.12)
        assert ff.energy(x) > 0
    assert relative_force_error(ff, x) < 1e-6


def test_latch_force_equals_central_difference_at_thermal_configurations():
    from cvdesign.testbed import LangevinBAOAB

    system = latch()
    integ = LangevinBAOAB(system.force_field, system.masses, temperature=300.0,
                          friction=1.0, md_step_ps=0.002, seed=3)
    x0 = np.stack([system.states["closed"], system.states["open"]])
    xyz, _ = integ.run(x0, 600, report_interval=300)
    for x in xyz.reshape(-1, system.n_atoms, 3):
        assert relative_force_error(system.force_field, x) < 1e-6


def test_energy_is_invariant_under_rigid_motion_and_forces_rotate():
    system = latch()
    ff = system.force_field
    rng = np.random.default_rng(0)
    x = system.states["closed"] + rng.normal(scale=0.01, size=(system.n_atoms, 3))
    # A random proper rotation from the QR decomposition of a Gaussian matrix.
    q, r = np.linalg.qr(rng.normal(size=(3, 3)))
    rot = q * np.sign(np.diag(r))
    if np.linalg.det(rot) < 0:
        rot[:, 0] *= -1
    shift = rng.normal(size=3)
    e0, f0 = ff.energy_forces(x)
    e1, f1 = ff.energy_forces(x @ rot.T + shift)
    assert e1 == pytest.approx(e0, rel=1e-10, abs=1e-10)
    np.testing.assert_allclose(f1, f0 @ rot.T, rtol=1e-8, atol=1e-8)
    # Forces of an isolated molecule sum to zero (no external field).
    np.testing.assert_allclose(f0.sum(axis=0), 0.0, atol=1e-8)


def test_dihedral_sign_convention_matches_mdtraj():
    rng = np.random.default_rng(1)
    x = rng.normal(scale=0.3, size=(20, 3))
    quads = np.array([rng.choice(20, 4, replace=False) for _ in range(30)])
    top = md.Topology()
    res = top.add_residue("X", top.add_chain())
    for _ in range(20):
        top.add_atom("C", md.element.carbon, res)
    ref = md.compute_dihedrals(md.Trajectory(x[None], top), quads, periodic=False)[0]
    ours = dihedral_angles(x, quads)
    np.testing.assert_allclose(np.angle(np.exp(1j * (ours - ref))), 0.0, atol=1e-5)


def test_dihedral_hand_computed_cis_trans_and_sign():
    # Looking down 1->2 (the z axis), atom 0 on +x: atom 3 on +x is cis (0),
    # on -x trans (pi), on +y a counter-clockwise turn, +90 deg by IUPAC.
    base = [[1.0, 0, 0], [0, 0, 0], [0, 0, 1]]
    cases = {(1.0, 0.0): 0.0, (-1.0, 0.0): np.pi, (0.0, 1.0): np.pi / 2,
             (0.0, -1.0): -np.pi / 2}
    for (a, b), expected in cases.items():
        phi = dihedral_angles(base + [[a, b, 1.0]], [[0, 1, 2, 3]])[0]
        assert abs(np.angle(np.exp(1j * (phi - expected)))) < 1e-12


def test_torsion_energy_is_sum_of_cosines_by_hand():
    # phi = +90 deg; 3 (1 + cos(2 phi - 0)) + 2 (1 + cos(phi - pi/2)) = 0 + 4.
    ff = ToyForceField(4, torsions=[(0, 1, 2, 3)] * 2, torsion_k=[3.0, 2.0],
                       torsion_n=[2, 1], torsion_delta=[0.0, np.pi / 2])
    x = [[1.0, 0, 0], [0, 0, 0], [0, 0, 1], [0, 1, 1]]
    assert ff.energy(x) == pytest.approx(4.0, abs=1e-12)


def test_repulsion_is_zero_beyond_cutoff_and_continuous_at_it():
    sigma, eps = 0.3, 2.0
    ff = ToyForceField(2, pairs=[(0, 1)], pair_epsilon=eps, pair_sigma=sigma)
    rc = 2 ** (1 / 6) * sigma
    for r, expect in [(rc * 1.001, 0.0), (rc * 0.999999, 0.0), (sigma, eps)]:
        e, f = ff.energy_forces([[0, 0, 0], [r, 0, 0]])
        assert e == pytest.approx(expect, abs=1e-6)
    e, f = ff.energy_forces([[0, 0, 0], [rc * 1.5, 0, 0]])
    assert e == 0.0 and np.all(f == 0.0)


def test_stack_of_configurations_matches_one_by_one():
    system = latch()
    rng = np.random.default_rng(2)
    xs = system.states["open"] + rng.normal(scale=0.02, size=(2, 3, system.n_atoms, 3))
    e, f = system.force_field.energy_forces(xs)
    assert e.shape == (2, 3) and f.shape == xs.shape
    for idx in np.ndindex(2, 3):
        e1, f1 = system.force_field.energy_forces(xs[idx])
        assert isinstance(e1, float)
        assert e[idx] == pytest.approx(e1, rel=1e-12)
        np.testing.assert_allclose(f[idx], f1, rtol=1e-12, atol=1e-12)


def test_bias_hook_adds_energy_and_forces_and_leaves_original_alone():
    ff = ToyForceField(2, bonds=[(0, 1)], bond_k=1000.0, bond_r0=0.1)
    calls = []

    def pull(x):  # 10 kJ/mol/nm along +x on atom 1: energy -10 x
        calls.append(x.shape)
        f = np.zeros_like(x)
        f[1, 0] = 10.0
        return -10.0 * x[1, 0], f

    biased = ff.with_bias(pull)
    x = np.array([[0.0, 0, 0], [0.12, 0, 0]])
    e0, f0 = ff.energy_forces(x)
    e1, f1 = biased.energy_forces(x)
    assert e1 == pytest.approx(e0 - 1.2)
    np.testing.assert_allclose(f1 - f0, [[0, 0, 0], [10.0, 0, 0]])
    assert ff.bias is None and biased.bias is pull
    e2, _ = biased.energy_forces(np.stack([x, x]))
    assert e2.shape == (2,) and calls[-2:] == [(2, 3), (2, 3)]
    assert ToyForceField(2, bias=pull).energy(x) == pytest.approx(-1.2)


def test_pairs_beyond_excludes_up_to_three_bonds():
    assert pairs_beyond(5, [(0, 1), (1, 2), (2, 3), (3, 4)]).tolist() == [[0, 4]]
    assert pairs_beyond(3, [(0, 1)]).tolist() == [[0, 2], [1, 2]]  # not connected
    assert pairs_beyond(4, []).shape == (6, 2)
    ring = [(0, 1), (1, 2), (2, 3), (3, 4), (4, 5), (5, 0)]
    assert pairs_beyond(6, ring).shape == (0, 2)


@pytest.mark.parametrize("kwargs, match", [
    (dict(bonds=[(0, 1, 2)]), r"bonds must have shape \(n, 2\); got an array of shape \(1, 3\)"),
    (dict(bonds=[(0, 5)], bond_k=1.0, bond_r0=0.1), r"bonds refer to atoms outside 0..2"),
    (dict(bonds=[(0, 1)], bond_k=[1.0, 2.0], bond_r0=0.1),
     r"bond_k must be a scalar or have shape \(1,\)"),
    (dict(torsions=[(0, 1, 2, 0)], torsion_k=1.0, torsion_n=0, torsion_delta=0.0),
     r"torsion_n must be positive integers"),
])
def test_invalid_parameters_raise_with_the_argument_name(kwargs, match):
    with pytest.raises(ValueError, match=match):
        ToyForceField(3, **kwargs)


def test_wrong_position_shape_names_expected_shape():
    ff = ToyForceField(3)
    expected = r"x must have shape \(3, 3\) or \(\.\.\., 3, 3\) in nm; got shape \(2, 3\)"
    with pytest.raises(ValueError, match=expected):
        ff.energy_forces(np.zeros((2, 3)))
    with pytest.raises(TypeError, match="bias must be a callable"):
        ToyForceField(3, bias=1.0)
