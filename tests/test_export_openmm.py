"""The OpenMM export: OpenMM's CV and forces equal the spec's reference evaluator.

The forces of ``Spec.to_openmm`` and ``Spec.restraint_to_openmm`` are evaluated by OpenMM
itself (Eastman et al., PLoS Comput. Biol. 13, e1005659, 2017) on its Reference platform
(double precision) and compared with ``Spec.evaluate`` and ``Spec.restraint_energy``, the
project's reference evaluator (its geometry is checked against mdtraj and finite
differences in tests/test_geometry.py, tests/test_gradients.py and
tests/test_restraints.py): values and forces (= minus the gradients) agree to 1e-6
relative to the largest magnitude compared. Geometries are random (seeded) and, with a
box, every molecule is moved by a random lattice vector, so that the periodic images
matter.
"""

import json
import re
import sys
import warnings

import mdtraj as md
import numpy as np
import openmm
import pytest
from openmm import unit

from cvdesign import Source, Spec, suggest
from cvdesign.cli import main
from cvdesign.bias.funnel import funnel_reach
from cvdesign.errors import InputError
from cvdesign.geometry import box_heights

RTOL = 1e-6

#: Boxes as rows of box vectors, nm; the triclinic one in OpenMM's reduced form
#: (a along x, b in the xy plane, |b_x| <= a_x/2, |c_x| <= a_x/2, |c_y| <= b_y/2).
BOXES = {"none": None,
         "orthorhombic": np.diag([3.1, 3.3, 4.7]),
         "triclinic": np.array([[3.2, 0.0, 0.0], [0.9, 3.0, 0.0], [0.6, -0.7, 4.9]])}


# ---------------------------------------------------------------- helpers
def _topology(n_atoms):
    top = md.Topology()
    res = top.add_residue("MOL", top.add_chain(), resSeq=1)
    for k in range(n_atoms):
        top.add_atom(f"C{k + 1}", md.element.carbon, res)
    return top


def _openmm_eval(force, xyz, box=None):
    """(energies (n_frames,) in kJ/mol, forces (n_frames, n_atoms, 3) in kJ/mol/nm) from
    OpenMM's Reference platform, one frame at a time."""
    xyz = np.asarray(xyz, dtype=np.float64)
    system = openmm.System()
    for _ in range(xyz.shape[1]):
        system.addParticle(12.0)
    if box is not None:
        system.setDefaultPeriodicBoxVectors(*(openmm.Vec3(*row) for row in box))
    system.addForce(openmm.XmlSerializer.clone(force))  # the System owns what it is given
    context = openmm.Context(system, openmm.VerletIntegrator(0.001),
                             openmm.Platform.getPlatformByName("Reference"))
    energies, forces = [], []
    for frame in xyz:
        context.setPositions(frame)
        state = context.getState(getEnergy=True, getForces=True)
        energies.append(state.getPotentialEnergy().value_in_unit(unit.kilojoule_per_mole))
        forces.append(state.getForces(asNumpy=True).value_in_unit(
            unit.kilojoule_per_mole / unit.nanometer))
    return np.array(energies), np.array(forces)


def _assert_close(actual, expected, rtol=RTOL):
    """Equal to `rtol` relative to the largest magnitude of `expected`."""
    scale = max(float(np.max(np.abs(expected))), 1e-300)
    np.testing.assert_allclose(actual, expected, rtol=rtol, atol=rtol * scale)


def _moved(xyz, molecules, box, rng):
    """Every molecule (list of atoms) moved as a whole by a random lattice vector."""
    out = xyz.copy()
    for atoms in molecules:
        shift = rng.integers(-2, 3, size=(xyz.shape[0], 3)) @ box
        out[:, atoms] += shift[:, None, :]
    return out


def _assert_matches_spec(spec, xyz, box):
    """OpenMM's CV and forces equal Spec.evaluate and minus its gradient."""
    values, grad = spec.evaluate(xyz, box=box, gradient=True)
    energy, forces = _openmm_eval(spec.to_openmm(periodic=box is not None), xyz, box)
    _assert_close(energy, values)
    _assert_close(forces, -grad)
    return values


# A hand-made spec with every descriptor kind and transform: 12 atoms in five molecules
# (the groups of the centre distances are whole molecules, as OpenMM keeps them).
MOLECULES = [[0, 1, 2], [3, 4], [5], [6, 7, 8, 9], [10, 11]]
N_ATOMS = 12


def _every_kind_spec(rng):
    descriptors = [
        {"id": "dist", "kind": "distance", "atoms": [0, 5]},
        {"id": "ang", "kind": "angle", "atoms": [1, 2, 3]},
        {"id": "dih-a", "kind": "dihedral", "atoms": [0, 1, 2, 3]},
        {"id": "dih-b", "kind": "dihedral", "atoms": [4, 5, 6, 7]},
        {"id": "com", "kind": "center_distance", "groups": [[0, 1, 2], [6, 7, 8, 9]],
         "weighting": "mass", "masses": [rng.uniform(1.0, 40.0, 3).tolist(),
                                         rng.uniform(1.0, 40.0, 4).tolist()]},
        {"id": "geo", "kind": "center_distance", "groups": [[3, 4], [10, 11]],
         "weighting": "geometric"},
        {"id": "contacts", "kind": "coordination", "groups": [[0, 1, 2], [5, 6, 7, 8]],
         "r0": 0.35, "n": 6.0, "m": 12.0},
        {"id": "contacts-odd", "kind": "coordination", "groups": [[9, 10, 11], [10, 11, 0]],
         "r0": 0.5, "n": 4.5, "m": 10.25},
        {"id": "unused", "kind": "distance", "atoms": [2, 9]},
    ]
    uses = [("dist", "identity"), ("ang", "identity"), ("dih-a", "cos"), ("dih-a", "sin"),
            ("dih-b", "sin"), ("com", "identity"), ("geo", "identity"),
            ("contacts", "identity"), ("contacts-odd", "identity")]
    terms = [{"descriptor": d, "transform": t, "center": float(rng.normal(0.0, 0.5)),
              "scale": float(rng.uniform(0.2, 2.0)), "weight": float(rng.normal())}
             for d, t in uses]
    return Spec(name="every-kind", topology=_topology(N_ATOMS), descriptors=descriptors,
                terms=terms, offset=float(rng.normal()))


def _compact_frames(rng, n_frames, n_atoms, spread=0.22):
    """Frames of atoms around the origin: every vector far shorter than half a box height."""
    return rng.normal(0.0, spread, size=(n_frames, n_atoms, 3))


def _check_short_enough(xyz, box):
    """Every pair of atoms closer than half the smallest box height, so that OpenMM's
    periodic image is the exact minimum image the spec uses."""
    pairs = np.linalg.norm(xyz[:, :, None, :] - xyz[:, None, :, :], axis=-1)
    assert pairs.max() < 0.5 * box_heights(box).min()


# ---------------------------------------------------------------- the CV
@pytest.mark.parametrize("box_name", BOXES)
def test_every_kind_and_transform_equals_the_reference_evaluator(box_name):
    rng = np.random.default_rng(1201)
    spec = _every_kind_spec(rng)
    xyz = _compact_frames(rng, 8, N_ATOMS)
    box = BOXES[box_name]
    if box is not None:
        _check_short_enough(xyz, box)
        xyz = _moved(xyz, MOLECULES, box, rng)
    values = _assert_matches_spec(spec, xyz, box)
    assert np.ptp(values) > 0.1  # the frames differ: the comparison sees the CV move


@pytest.mark.parametrize("kind", ["distance", "angle", "dihedral-cos", "dihedral-sin",
                                  "center_distance-mass", "center_distance-geometric",
                                  "coordination"])
@pytest.mark.parametrize("box_name", BOXES)
def test_each_kind_alone_equals_the_reference_evaluator(kind, box_name):
    # one term at a time, so that a wrong kind cannot hide behind the others
    rng = np.random.default_rng(1202)
    full = _every_kind_spec(rng).to_dict()
    wanted = {"distance": ("dist", "identity"), "angle": ("ang", "identity"),
              "dihedral-cos": ("dih-a", "cos"), "dihedral-sin": ("dih-a", "sin"),
              "center_distance-mass": ("com", "identity"),
              "center_distance-geometric": ("geo", "identity"),
              "coordination": ("contacts", "identity")}[kind]
    full["terms"] = [t for t in full["terms"] if (t["descriptor"], t["transform"]) == wanted]
    del full["reachable_range"]  # that of all the terms; a spec may leave it out
    spec = Spec.from_dict(full)
    box = BOXES[box_name]
    xyz = _compact_frames(rng, 6, N_ATOMS)
    if box is not None:
        xyz = _moved(xyz, MOLECULES, box, rng)
    _assert_matches_spec(spec, xyz, box)


def test_without_periodic_images_the_moved_molecules_give_other_values():
    # the boxed comparisons above can fail: the same moved frames without periodic images
    # no longer match the spec's minimum-image values
    rng = np.random.default_rng(1203)
    spec = _every_kind_spec(rng)
    box = BOXES["triclinic"]
    xyz = _moved(_compact_frames(rng, 4, N_ATOMS), MOLECULES, box, rng)
    values = spec.evaluate(xyz, box=box)
    energy, _ = _openmm_eval(spec.to_openmm(periodic=False), xyz, box)
    assert np.max(np.abs(energy - values)) > 1e-2


def test_periodic_dihedral_cv_equals_the_reference_evaluator_away_from_the_jump():
    rng = np.random.default_rng(1204)
    weight, scale = -1.7, 0.8
    spec = Spec(name="torsion", topology=_topology(4),
                descriptors=[{"id": "phi", "kind": "dihedral", "atoms": [0, 1, 2, 3]}],
                terms=[{"descriptor": "phi", "transform": "identity", "center": 0.3,
                        "scale": scale, "weight": weight}], offset=0.2, periodic=True)
    assert spec.period == pytest.approx(2 * np.pi * abs(weight) / scale, rel=1e-15)
    xyz = _compact_frames(rng, 12, 4)
    phi = spec.descriptor_values(xyz)[:, 0]
    keep = np.pi - np.abs(phi) > 1e-3  # no frame at the branch cut +-pi
    for box_name, box in BOXES.items():
        frames = xyz[keep] if box is None else _moved(xyz[keep], [[0], [1], [2], [3]], box, rng)
        values = _assert_matches_spec(spec, frames, box)
        # the values fill one period: offset + weight (phi - center) / scale, phi in (-pi, pi]
        assert np.ptp(values) < spec.period


@pytest.fixture(scope="module")
def demo_suggestions(demo_files):
    top, states = demo_files
    return suggest(Source.from_states(top, states), n_bootstrap=0, n_suggestions=5)


def test_the_demo_suggestions_equal_the_reference_evaluator_on_demo_frames(
        demo_suggestions, demo_files):
    top, states = demo_files
    frames = md.join([md.load(states["closed"][0], top=top)[::250],
                      md.load(states["open"][0], top=top)[::250]])
    xyz = frames.xyz.astype(np.float64)
    transforms = set()
    for doc in demo_suggestions.specs:
        spec = Spec.from_dict(doc)
        _assert_matches_spec(spec, xyz, None)
        transforms |= {t["transform"] for t in doc["terms"]}
        # and in a periodic box, every atom moved by its own lattice vector
        box = np.diag([4.0, 4.3, 4.6])
        rng = np.random.default_rng(1205)
        _assert_matches_spec(spec, _moved(xyz, [[a] for a in range(spec.n_atoms)], box, rng),
                             box)
    assert {"cos", "sin"} <= transforms


def test_a_bias_of_ones_own_on_the_exported_cv_gets_the_chain_rule_forces():
    # OpenMM's convention: the exported force is a collective variable of the user's bias
    rng = np.random.default_rng(1206)
    spec = _every_kind_spec(rng)
    box = BOXES["orthorhombic"]
    xyz = _moved(_compact_frames(rng, 3, N_ATOMS), MOLECULES, box, rng)
    kappa, s0 = 250.0, 0.4
    bias = openmm.CustomCVForce(f"0.5*{kappa}*(s - {s0})^2")
    bias.addCollectiveVariable("s", spec.to_openmm(periodic=True))
    energy, forces = _openmm_eval(bias, xyz, box)
    values, grad = spec.evaluate(xyz, box=box, gradient=True)
    _assert_close(energy, 0.5 * kappa * (values - s0) ** 2)
    _assert_close(forces, -kappa * (values - s0)[:, None, None] * grad)


# ---------------------------------------------------------------- the switching function
def _pair_spec(r0, n, m):
    return Spec(name="pair", topology=_topology(2),
                descriptors=[{"id": "c", "kind": "coordination", "groups": [[0], [1]],
                              "r0": r0, "n": n, "m": m}],
                terms=[{"descriptor": "c", "transform": "identity", "center": 0.0,
                        "scale": 1.0, "weight": 1.0}])


def test_a_coordination_pair_exactly_at_r0_gives_the_finite_limit():
    # s(r0) = n/m and s'(r0) = n (n - m) / (2 m r0): l'Hopital's rule on
    # (1 - x^n) / (1 - x^m) at x = 1 (derived in cvdesign.geometry.switching_function)
    r0, n, m = 0.5, 6.0, 12.0  # 0.5 nm is exact in binary, so OpenMM's r is exactly r0
    xyz = np.array([[[0.0, 0.0, 0.0], [r0, 0.0, 0.0]]])
    energy, forces = _openmm_eval(_pair_spec(r0, n, m).to_openmm(periodic=False), xyz)
    slope = n * (n - m) / (2 * m * r0)
    assert energy[0] == pytest.approx(n / m, rel=1e-15)
    np.testing.assert_allclose(forces[0], [[slope, 0, 0], [-slope, 0, 0]], rtol=1e-12)
    # the formula as written is 0/0 there: OpenMM evaluates it to NaN
    naive = openmm.CustomBondForce(f"(1 - (r/{r0})^{n})/(1 - (r/{r0})^{m})")
    naive.addBond(0, 1, [])
    assert np.isnan(_openmm_eval(naive, xyz)[0][0])


@pytest.mark.parametrize("n, m", [(6.0, 12.0), (4.5, 10.25), (0.5, 1.5), (8.0, 200.0)])
def test_the_switching_function_equals_the_reference_on_both_sides_of_r0(n, m):
    # on and around the edge of the series' range |r/r0 - 1| max(m, 1) < 2e-3, and far out
    r0 = 0.37
    edge = 2e-3 / max(m, 1.0)
    offsets = np.array([-0.9, -0.5, -3 * edge, -1.001 * edge, -0.999 * edge, -1e-6, 0.0,
                        1e-6, 0.999 * edge, 1.001 * edge, 3 * edge, 0.5, 4.0, 30.0])
    direction = np.array([0.48, -0.6, 0.64])
    xyz = np.zeros((len(offsets), 2, 3))
    xyz[:, 1] = r0 * (1 + offsets)[:, None] * direction
    _assert_matches_spec(_pair_spec(r0, n, m), xyz, None)


# ---------------------------------------------------------------- the funnel restraint
FUNNEL_LIGAND, FUNNEL_POCKET = [5, 6], [0, 1, 2, 3]
FUNNEL = {"id": "funnel", "kind": "funnel", "groups": [FUNNEL_LIGAND, FUNNEL_POCKET],
          "axis": (np.array([0.2, -0.3, 1.0]) / np.linalg.norm([0.2, -0.3, 1.0])).tolist(),
          "reference_pocket_nm": [[0.3, 0.0, 0.0], [-0.3, 0.0, 0.0], [0.0, 0.3, 0.0],
                                  [0.0, -0.3, 0.0]],
          "lower_wall_z_nm": -0.2, "upper_wall_z_nm": 2.0, "cone_end_z_nm": 0.8,
          "cone_half_angle_rad": 0.6, "cylinder_radius_nm": 0.25, "blend_half_width_nm": 0.1,
          "wall_force_constant_kj_mol_nm2": 1500.0}

#: Boxes large enough for the funnel (its reach, ~2.3 nm, below half the smallest height).
FUNNEL_BOXES = {"none": None, "orthorhombic": np.diag([5.1, 5.3, 6.7]),
                "triclinic": np.array([[5.2, 0.0, 0.0], [1.9, 5.0, 0.0], [1.6, -1.7, 6.9]])}


def _funnel_spec(funnel=FUNNEL):
    return Spec(name="funnel", topology=_topology(7),
                descriptors=[{"id": "d", "kind": "center_distance",
                              "groups": [FUNNEL_POCKET, FUNNEL_LIGAND],
                              "weighting": "geometric"}],
                terms=[{"descriptor": "d", "transform": "identity", "center": 0.0,
                        "scale": 1.0, "weight": 1.0}], restraints=[funnel])


def _funnel_frames(rng, centres):
    """Pocket atoms around the origin, the ligand's two atoms either side of each centre,
    centres given in the frame of the axis (x, y across, z along)."""
    axis = np.asarray(FUNNEL["axis"])
    across = np.cross(axis, [1.0, 0.0, 0.0])
    across /= np.linalg.norm(across)
    basis = np.stack([across, np.cross(axis, across), axis])  # rows: x, y, z directions
    xyz = rng.normal(0.0, 0.3, size=(len(centres), 7, 3))
    xyz[:, FUNNEL_POCKET] -= xyz[:, FUNNEL_POCKET].mean(axis=1, keepdims=True)
    centre = np.asarray(centres) @ basis
    xyz[:, FUNNEL_LIGAND] = centre[:, None, :] + rng.normal(0.0, 0.05, size=(len(centres), 1, 3)) * [[1], [-1]]
    return xyz


#: Ligand centres (across, across, along the axis) in every regime of the funnel: the cone
#: wall, the blend of cone and cylinder, the cylinder, below the lower wall, above the
#: upper wall, a corner beyond the upper wall and the cylinder, and inside.
REGIMES = [[0.9, 0.2, 0.2], [0.0, 0.45, 0.8], [0.32, 0.05, 0.75], [0.4, 0.1, 1.5],
           [0.05, 0.0, -0.35], [0.0, 0.1, 2.2], [0.6, -0.3, 2.3], [0.0, 0.05, 0.3],
           [0.1, -0.1, 0.9]]


@pytest.mark.parametrize("box_name", FUNNEL_BOXES)
def test_funnel_energy_and_forces_equal_the_reference_restraint_energy(box_name):
    rng = np.random.default_rng(1207)
    spec = _funnel_spec()
    xyz = _funnel_frames(rng, REGIMES)
    box = FUNNEL_BOXES[box_name]
    if box is not None:
        xyz = _moved(xyz, [FUNNEL_POCKET, FUNNEL_LIGAND, [4]], box, rng)
    energy, grad = spec.restraint_energy(xyz, box=box, gradient=True)
    assert np.count_nonzero(energy > 1.0) >= 6  # most regimes push back
    with warnings.catch_warnings():  # (the boxes hold the funnel; said in the warning)
        warnings.filterwarnings("ignore", message=".*make sure the Context's box has a_x")
        force = spec.restraint_to_openmm(periodic=box is not None)
    omm_energy, omm_forces = _openmm_eval(force, xyz, box)
    _assert_close(omm_energy, energy)
    _assert_close(omm_forces, -grad)


def test_funnel_with_the_ligand_centre_on_the_pocket_centre_has_finite_forces():
    # exactly coincident centres (binary fractions, so the centres are exactly 0): the
    # angle to the axis has no direction there; OpenMM's forces must stay finite
    xyz = np.zeros((1, 7, 3))
    xyz[0, FUNNEL_POCKET] = [[0.25, 0, 0], [-0.25, 0, 0], [0, 0.25, 0], [0, -0.25, 0]]
    xyz[0, FUNNEL_LIGAND] = [[0.0625, 0.125, 0], [-0.0625, -0.125, 0]]
    for lower in (-0.2, 0.1):  # inside the funnel, and below a lower wall above the pocket
        spec = _funnel_spec(dict(FUNNEL, lower_wall_z_nm=lower))
        energy, grad = spec.restraint_energy(xyz, gradient=True)
        omm_energy, omm_forces = _openmm_eval(spec.restraint_to_openmm(periodic=False), xyz)
        assert np.all(np.isfinite(omm_forces))
        _assert_close(omm_energy, energy)
        if lower < 0:
            np.testing.assert_array_equal(omm_forces, 0.0)


# ---------------------------------------------------------------- XML round trip
def test_xml_round_trip_gives_the_same_values():
    rng = np.random.default_rng(1208)
    spec = _every_kind_spec(rng)
    box = BOXES["triclinic"]
    xyz = _moved(_compact_frames(rng, 4, N_ATOMS), MOLECULES, box, rng)
    force = spec.to_openmm(periodic=True)
    back = openmm.XmlSerializer.deserialize(openmm.XmlSerializer.serialize(force))
    assert isinstance(back, openmm.CustomCVForce) and back.usesPeriodicBoundaryConditions()
    before, after = _openmm_eval(force, xyz, box), _openmm_eval(back, xyz, box)
    np.testing.assert_array_equal(after[0], before[0])
    np.testing.assert_array_equal(after[1], before[1])
    funnel = _funnel_spec().restraint_to_openmm(periodic=False)
    fxyz = _funnel_frames(rng, REGIMES)
    again = openmm.XmlSerializer.deserialize(openmm.XmlSerializer.serialize(funnel))
    np.testing.assert_array_equal(_openmm_eval(again, fxyz)[1], _openmm_eval(funnel, fxyz)[1])


# ---------------------------------------------------------------- the System argument
def _system(n_particles, periodic, box=BOXES["orthorhombic"]):
    """A System of carbons, periodic (with `box`, rows in nm; None leaves OpenMM's default
    box) or not."""
    system = openmm.System()
    for _ in range(n_particles):
        system.addParticle(12.0)
    if periodic:  # any force with periodic boundary conditions makes the System periodic
        marker = openmm.CustomBondForce("0")
        marker.setUsesPeriodicBoundaryConditions(True)
        system.addForce(marker)
        if box is not None:
            system.setDefaultPeriodicBoxVectors(*(openmm.Vec3(*row) for row in box))
    return system


def test_the_system_decides_the_periodic_images_and_must_fit_the_spec():
    spec = _every_kind_spec(np.random.default_rng(1209))
    assert spec.to_openmm(system=_system(N_ATOMS, True)).usesPeriodicBoundaryConditions()
    assert not spec.to_openmm(system=_system(N_ATOMS, False)).usesPeriodicBoundaryConditions()
    with pytest.raises(InputError, match=r"periodic=False but the openmm\.System uses a "
                                         r"periodic box; leave periodic out"):
        spec.to_openmm(False, system=_system(N_ATOMS, True))
    with pytest.raises(InputError, match=r"the openmm\.System has 11 particles, but spec "
                                         r"'every-kind' was made for a topology of 12 atoms"):
        spec.to_openmm(system=_system(N_ATOMS - 1, False))
    with pytest.raises(InputError, match=r"periodic must be True or False; got 'yes'"):
        spec.to_openmm("yes")


def test_a_funnel_longer_than_half_the_systems_box_is_refused(tmp_path, capsys):
    # a funnel sized without a box (reach 2.3 nm) exported for a 3 nm cube: the periodic
    # image folded the ligand's offset, and a ligand inside the funnel got 2444 kJ/mol
    reach = funnel_reach(FUNNEL)[0]
    assert 1.5 < reach < 2.55
    small = _system(7, True, box=3.0 * np.eye(3))
    message = (rf"spec 'funnel': the funnel reaches {reach:.4g} nm from the pocket centre "
               r"\(its upper wall\), more than half the smallest of a_x, b_y and c_z of the "
               r"openmm\.System's box \(1\.5 nm\).* a_x, b_y and c_z are each above")
    for build in (_funnel_spec().restraint_to_openmm, _funnel_spec().to_openmm):
        with pytest.raises(InputError, match=message):
            build(system=small)
    # a box whose heights are all above twice the reach is fine
    assert _funnel_spec().restraint_to_openmm(system=_system(7, True, box=5.1 * np.eye(3)))
    # OpenMM's default 2 nm cube (a box never set) is checked too; with periodic=True and no
    # System the box the Context needs is said
    with pytest.warns(UserWarning, match="default, a 2 nm cube"), \
            pytest.raises(InputError, match=r"more than half the smallest of a_x, b_y and c_z "
                                            r".* \(1 nm\)"):
        _funnel_spec().restraint_to_openmm(system=_system(7, True, box=None))
    with pytest.warns(UserWarning, match=rf"make sure the Context's box has a_x, b_y and c_z "
                                         rf"each above {2 * reach:.4g} nm"):
        _funnel_spec().restraint_to_openmm(periodic=True)
    # and the command leaves nothing behind
    _funnel_spec().save(tmp_path / "funnel.json")
    system = tmp_path / "system.xml"
    system.write_text(openmm.XmlSerializer.serialize(small))
    before = sorted(tmp_path.iterdir())
    assert main(["export", str(tmp_path / "funnel.json"), "--to", "openmm",
                 "--out", str(tmp_path / "cv.xml"), "--restraint-out",
                 str(tmp_path / "restraint.xml"), "--system", str(system)]) == 2
    assert "more than half the smallest of a_x, b_y and c_z" in capsys.readouterr().err
    assert sorted(tmp_path.iterdir()) == before
    # a System whose box was never set: the default box is named before the refusal
    unset = tmp_path / "unset.xml"
    unset.write_text(openmm.XmlSerializer.serialize(_system(7, True, box=None)))
    assert main(["export", str(tmp_path / "funnel.json"), "--to", "openmm",
                 "--out", str(tmp_path / "cv.xml"), "--restraint-out",
                 str(tmp_path / "restraint.xml"), "--system", str(unset)]) == 2
    err = capsys.readouterr().err
    assert err.index("box is OpenMM's default, a 2 nm cube") < err.index(
        "more than half the smallest of a_x, b_y and c_z of the openmm.System's box (1 nm)")
    # --periodic without a System: the box the run needs is said once, as a warning
    assert main(["export", str(tmp_path / "funnel.json"), "--to", "openmm",
                 "--out", str(tmp_path / "cv.xml"), "--restraint-out",
                 str(tmp_path / "restraint.xml"), "--periodic"]) == 0
    err = capsys.readouterr().err
    assert err.count(f"make sure the Context's box has a_x, b_y and c_z each above "
                     f"{2 * reach:.4g} nm") == 1 and "cvdesign export: warning: spec 'funnel'" in err


def test_a_funnel_beyond_openmms_exact_reach_in_a_triclinic_box_is_refused():
    """A rhombic dodecahedron (square xy face) of image distance d: OpenMM takes periodic
    images one box vector at a time, exact only within half the smallest of a_x, b_y, c_z
    (c_z / 2 = 0.354 d), below half its faces' distance; the last float32 bit of c_x (as a
    trajectory stores it) had moved the check to half the heights of another cell (0.408 d),
    and a funnel between the two was exported, OpenMM giving a ligand inside it 560 kJ/mol
    (a review's measurement)."""
    reach = funnel_reach(FUNNEL)[0]
    d = reach / 0.38  # the reach between 0.354 d and 0.408 d
    for cx in (d / 2, float(np.nextafter(np.float32(d / 2), np.float32(0.0)))):
        box = np.array([[d, 0.0, 0.0], [0.0, d, 0.0], [cx, d / 2, d / 2 ** 0.5]])
        assert reach < 0.5 * box_heights(box).max()
        with pytest.raises(InputError, match=rf"more than half the smallest of a_x, b_y and "
                                             rf"c_z of the openmm\.System's box "
                                             rf"\({d / 2 ** 1.5:.4g} nm\)"):
            _funnel_spec().restraint_to_openmm(system=_system(7, True, box=box))


def test_without_openmm_the_export_says_how_to_install_it(monkeypatch):
    monkeypatch.setitem(sys.modules, "openmm", None)
    spec = _every_kind_spec(np.random.default_rng(1210))
    with pytest.raises(InputError, match=re.escape("pip install 'cvdesign[openmm]'")):
        spec.to_openmm(periodic=False)
    with pytest.raises(InputError, match=r"exporting to OpenMM needs the openmm package"):
        _funnel_spec().restraint_to_openmm(periodic=False)


# ---------------------------------------------------------------- the command
def test_export_command_writes_forces_that_reproduce_the_spec(tmp_path, capsys):
    rng = np.random.default_rng(1211)
    spec = _every_kind_spec(rng)
    spec.save(tmp_path / "cv.json")
    out = tmp_path / "cv.xml"
    assert main(["export", str(tmp_path / "cv.json"), "--to", "openmm", "--out", str(out),
                 "--periodic"]) == 0
    printed = capsys.readouterr().out
    assert "as an OpenMM CustomCVForce whose energy is the CV value" in printed
    assert "with periodic images in the box" in printed
    assert "check: the groups of centre distances and restraints must be whole" in printed
    force = openmm.XmlSerializer.deserialize(out.read_text())
    box = BOXES["orthorhombic"]
    xyz = _moved(_compact_frames(rng, 3, N_ATOMS), MOLECULES, box, rng)
    values, grad = spec.evaluate(xyz, box=box, gradient=True)
    energy, forces = _openmm_eval(force, xyz, box)
    _assert_close(energy, values)
    _assert_close(forces, -grad)
    # the same again with --force; the bytes are those of the serializer, unchanged
    first = out.read_bytes()
    assert main(["export", str(tmp_path / "cv.json"), "--to", "openmm", "--out", str(out),
                 "--periodic", "--force"]) == 0
    assert out.read_bytes() == first
    assert sorted(p.name for p in tmp_path.iterdir()) == ["cv.json", "cv.xml"]


def test_export_command_writes_the_funnel_restraint_beside_the_cv(tmp_path, capsys):
    _funnel_spec().save(tmp_path / "funnel.json")
    system = tmp_path / "system.xml"
    system.write_text(openmm.XmlSerializer.serialize(
        _system(7, True, box=FUNNEL_BOXES["orthorhombic"])))
    assert main(["export", str(tmp_path / "funnel.json"), "--to", "openmm",
                 "--out", str(tmp_path / "cv.xml"), "--restraint-out",
                 str(tmp_path / "restraint.xml"), "--system", str(system)]) == 0
    printed = capsys.readouterr().out
    assert re.search(r"wrote .*restraint\.xml: the spec's restraints as an OpenMM "
                     r"CustomCentroidBondForce \(kJ/mol\)", printed)
    restraint = openmm.XmlSerializer.deserialize((tmp_path / "restraint.xml").read_text())
    assert restraint.usesPeriodicBoundaryConditions()  # from the System
    rng = np.random.default_rng(1212)
    box = FUNNEL_BOXES["orthorhombic"]
    xyz = _moved(_funnel_frames(rng, REGIMES), [FUNNEL_POCKET, FUNNEL_LIGAND, [4]], box, rng)
    energy, grad = _funnel_spec().restraint_energy(xyz, box=box, gradient=True)
    omm_energy, omm_forces = _openmm_eval(restraint, xyz, box)
    _assert_close(omm_energy, energy)
    _assert_close(omm_forces, -grad)


def test_export_of_a_periodic_cv_says_what_the_bias_must_do(tmp_path, capsys):
    spec = Spec(name="torsion", topology=_topology(4),
                descriptors=[{"id": "phi", "kind": "dihedral", "atoms": [0, 1, 2, 3]}],
                terms=[{"descriptor": "phi", "transform": "identity", "center": 0.0,
                        "scale": 1.0, "weight": 2.0}], periodic=True)
    spec.save(tmp_path / "phi.json")
    assert main(["export", str(tmp_path / "phi.json"), "--to", "openmm", "--out",
                 str(tmp_path / "phi.xml"), "--no-periodic"]) == 0
    printed = capsys.readouterr().out
    assert f"the CV is periodic with period {4 * np.pi!r} (CV units)" in printed
    assert "the bias on it must be periodic with that period" in printed
    doc = json.loads((tmp_path / "phi.json").read_text())
    assert doc["period"] == pytest.approx(4 * np.pi)


# ---------------------------------------------------------------- the System's box
def _distance_spec(n_atoms):
    return Spec(name="d", topology=_topology(n_atoms),
                descriptors=[{"id": "d", "kind": "distance", "atoms": [0, 1]}],
                terms=[{"descriptor": "d", "transform": "identity", "center": 0.0,
                        "scale": 1.0, "weight": 1.0}])


def test_a_periodic_system_left_in_the_default_box_is_warned_about():
    # why: a periodic force in a System whose box was never set runs in OpenMM's default
    # 2 nm cube, where a 1.5 nm distance reads 0.5 nm without an error
    spec = _distance_spec(2)
    xyz = np.array([[[0.2, 0.3, 0.4], [1.7, 0.3, 0.4]]])
    system = _system(2, True, box=None)
    system.addForce(spec.to_openmm(periodic=True))
    context = openmm.Context(system, openmm.VerletIntegrator(0.001),
                             openmm.Platform.getPlatformByName("Reference"))
    context.setPositions(xyz[0] * unit.nanometer)
    wrapped = context.getState(getEnergy=True).getPotentialEnergy().value_in_unit(
        unit.kilojoule_per_mole)
    assert abs(wrapped - 0.5) < 1e-9 and abs(spec.evaluate(xyz)[0] - 1.5) < 1e-12
    # given that System, the export warns; given one with its box set, it does not
    with pytest.warns(UserWarning, match=r"the openmm\.System uses periodic boundary "
                                         r"conditions, but its box is OpenMM's default, a 2 nm "
                                         r"cube, .* every distance longer than 1 nm is wrapped"):
        force = spec.to_openmm(system=_system(2, True, box=None))
    assert force.usesPeriodicBoundaryConditions()
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        spec.to_openmm(system=_system(2, True))
        spec.to_openmm(system=_system(2, False))  # no periodic box at all: nothing to say


def test_export_command_warns_about_a_system_in_the_default_box_and_notes_periodic(
        tmp_path, capsys):
    _distance_spec(2).save(tmp_path / "d.json")
    default = tmp_path / "default.xml"
    default.write_text(openmm.XmlSerializer.serialize(_system(2, True, box=None)))
    assert main(["export", str(tmp_path / "d.json"), "--to", "openmm", "--out",
                 str(tmp_path / "a.xml"), "--system", str(default)]) == 0
    captured = capsys.readouterr()
    assert re.search(r"cvdesign export: warning: --system \S+default\.xml: the openmm\.System "
                     r"uses periodic boundary conditions, but its box is OpenMM's default",
                     captured.err), captured.err
    assert captured.err.count("OpenMM's default") == 1 and "--periodic" not in captured.out
    # and on standard output, which -q keeps (it hides the log's line)
    assert main(["-q", "export", str(tmp_path / "d.json"), "--to", "openmm", "--out",
                 str(tmp_path / "q.xml"), "--system", str(default)]) == 0
    captured = capsys.readouterr()
    assert "OpenMM's default" not in captured.err
    assert re.search(r"warning: --system \S+default\.xml: the openmm\.System uses periodic "
                     r"boundary conditions, but its box is OpenMM's default", captured.out)
    boxed = tmp_path / "boxed.xml"
    boxed.write_text(openmm.XmlSerializer.serialize(_system(2, True)))
    assert main(["export", str(tmp_path / "d.json"), "--to", "openmm", "--out",
                 str(tmp_path / "b.xml"), "--system", str(boxed)]) == 0
    assert "OpenMM's default" not in capsys.readouterr().err
    # --periodic gives no System to look at: the note says what the System must carry
    assert main(["export", str(tmp_path / "d.json"), "--to", "openmm", "--out",
                 str(tmp_path / "c.xml"), "--periodic"]) == 0
    out = capsys.readouterr().out
    assert ("note: --periodic: OpenMM takes the box from the System the force goes into; "
            "that System must carry the simulation's box") in out
    assert "default 2 nm cube, where every distance over 1 nm is wrapped" in out
    assert "export with --system SYSTEM.xml instead" in out
    assert main(["export", str(tmp_path / "d.json"), "--to", "openmm", "--out",
                 str(tmp_path / "e.xml"), "--no-periodic"]) == 0
    assert "--periodic" not in capsys.readouterr().out


# ---------------------------------------------------------------- the documented mapping
def test_the_spec_format_documents_the_openmm_force_of_every_kind():
    # docs/spec-v1.md, "OpenMM export": one row per descriptor kind naming the OpenMM class
    # that the export really builds for it
    from pathlib import Path

    from cvdesign.kinds import KINDS

    text = (Path(__file__).resolve().parents[1] / "docs" / "spec-v1.md").read_text(
        encoding="utf-8")
    section = re.search(r"\n## OpenMM export\n(.*?)\n## ", text, re.S)
    assert section, "docs/spec-v1.md has no 'OpenMM export' section"
    rows = {m.group(1): m.group(2) for m in
            re.finditer(r"^\| `(\w+)` \| `(\w+)[(`]", section.group(1), re.M)}
    spec = _every_kind_spec(np.random.default_rng(1213))
    kinds = {d["id"]: d["kind"] for d in spec.descriptors}
    force = spec.to_openmm(periodic=False)
    built = {kinds[force.getCollectiveVariable(i).getName()]:
             type(force.getCollectiveVariable(i)).__name__
             for i in range(force.getNumCollectiveVariables())}
    assert set(built) == set(KINDS)  # the spec above uses every kind
    assert rows == built
    assert "CustomCentroidBondForce" in section.group(1)  # the funnel restraint too


def test_export_of_a_cv_without_groups_does_not_ask_for_whole_groups(tmp_path, capsys):
    # review finding: a dihedral CV's export told the user to keep groups whole it has none of
    spec = Spec(name="dih", topology=_topology(N_ATOMS),
                descriptors=[{"id": "d", "kind": "dihedral", "atoms": [0, 1, 2, 3]}],
                terms=[{"descriptor": "d", "transform": t, "center": 0.0, "scale": 1.0,
                        "weight": w} for t, w in (("cos", 0.6), ("sin", 0.8))])
    spec.save(tmp_path / "cv.json")
    assert main(["export", str(tmp_path / "cv.json"), "--to", "openmm",
                 "--out", str(tmp_path / "cv.xml"), "--no-periodic"]) == 0
    printed = capsys.readouterr().out
    assert "check: compare the engine's CV values on a trajectory with 'cvdesign check" in printed
    assert "must be whole" not in printed
