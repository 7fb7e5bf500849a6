"""Spec.evaluate, descriptor_values and restraint_energy take an mdtraj.Trajectory.

The trajectory's coordinates and unit cell are used; the result must equal passing
``traj.xyz`` with ``box=traj.unitcell_vectors``, and, in a box where the minimum image
matters, differ from ignoring the box. The periodic distance is also checked against
mdtraj's own (McGibbon et al., Biophys. J. 109:1528, 2015).
"""

import mdtraj as md
import numpy as np
import pytest

from cvdesign import Spec, TopologyMismatchError


def _topology():
    top = md.Topology()
    res = top.add_residue("HST", top.add_chain(), resSeq=1)
    for name in ("C1", "C2", "C3", "C4"):
        top.add_atom(name, md.element.carbon, res)
    return top


def _spec(top, restraints=None):
    return Spec(name="cv", topology=top,
                descriptors=[{"id": "d", "kind": "distance", "atoms": [0, 2]},
                             {"id": "a", "kind": "angle", "atoms": [0, 1, 2]}],
                terms=[{"descriptor": "d", "transform": "identity", "center": 0.2,
                        "scale": 0.1, "weight": 1.5},
                       {"descriptor": "a", "transform": "identity", "center": 1.0,
                        "scale": 0.5, "weight": -0.5}],
                restraints=restraints)


def _frames(seed, n_frames=6, edge=1.2):
    """Atoms scattered over a cubic box of `edge` nm, some pairs closer through its faces."""
    rng = np.random.default_rng(seed)
    return rng.uniform(0.0, edge, size=(n_frames, 4, 3)).astype(np.float32)


def test_evaluate_takes_the_coordinates_and_box_of_a_trajectory():
    top = _topology()
    spec = _spec(top)
    edge = 1.2
    xyz = _frames(1, edge=edge)
    traj = md.Trajectory(xyz, top, unitcell_lengths=np.full((len(xyz), 3), edge),
                         unitcell_angles=np.full((len(xyz), 3), 90.0))
    boxed = spec.evaluate(traj.xyz, box=traj.unitcell_vectors)
    np.testing.assert_array_equal(spec.evaluate(traj), boxed)
    assert np.abs(spec.evaluate(traj.xyz) - boxed).max() > 0.1  # the box matters here
    value, grad = spec.evaluate(traj, gradient=True)
    ref_value, ref_grad = spec.evaluate(traj.xyz, box=traj.unitcell_vectors, gradient=True)
    np.testing.assert_array_equal(value, ref_value)
    np.testing.assert_array_equal(grad, ref_grad)
    d = spec.descriptor_values(traj)[:, 0]
    np.testing.assert_allclose(d, md.compute_distances(traj, [[0, 2]], periodic=True)[:, 0],
                               atol=1e-5)


def test_a_trajectory_without_a_box_is_evaluated_without_one():
    top = _topology()
    spec = _spec(top)
    traj = md.Trajectory(_frames(2), top)
    assert traj.unitcell_vectors is None
    np.testing.assert_array_equal(spec.evaluate(traj), spec.evaluate(traj.xyz))
    np.testing.assert_array_equal(spec.descriptor_values(traj), spec.descriptor_values(traj.xyz))


def test_restraint_energy_takes_the_box_of_a_trajectory():
    top = _topology()
    funnel = {"id": "funnel", "kind": "funnel", "groups": [[3], [0, 1, 2]],
              "axis": [0.0, 0.0, 1.0], "lower_wall_z_nm": -0.2, "upper_wall_z_nm": 0.4,
              "cone_end_z_nm": 0.2, "cone_half_angle_rad": 0.5, "cylinder_radius_nm": 0.1,
              "blend_half_width_nm": 0.05, "wall_force_constant_kj_mol_nm2": 1000.0,
              "reference_pocket_nm": [[-0.1, -0.05, 0.0], [0.1, -0.05, 0.0], [0.0, 0.1, 0.0]]}
    spec = _spec(top, restraints=[funnel])
    edge = 1.2
    xyz = _frames(3, edge=edge)
    traj = md.Trajectory(xyz, top, unitcell_lengths=np.full((len(xyz), 3), edge),
                         unitcell_angles=np.full((len(xyz), 3), 90.0))
    energy, grad = spec.restraint_energy(traj, gradient=True)
    ref_energy, ref_grad = spec.restraint_energy(traj.xyz, box=traj.unitcell_vectors,
                                                 gradient=True)
    np.testing.assert_array_equal(energy, ref_energy)
    np.testing.assert_array_equal(grad, ref_grad)
    assert not np.allclose(spec.restraint_energy(traj.xyz), ref_energy)


def test_a_trajectory_of_another_topology_is_refused():
    top = _topology()
    spec = _spec(top)
    traj = md.Trajectory(_frames(4), top)
    spec.evaluate(traj)
    renamed = md.Trajectory(_frames(4), _topology())
    renamed.topology.atom(2).name = "Q3"
    with pytest.raises(TopologyMismatchError, match=r"atom 2 .* in the spec but .*Q3"):
        spec.evaluate(renamed)
