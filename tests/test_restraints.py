"""Funnel restraints in the spec: validation on load, energy and analytic gradient."""

import math

import mdtraj as md
import numpy as np
import pytest

from cvdesign import Spec
from cvdesign.errors import SpecError, TopologyMismatchError
from cvdesign.bias.funnel import funnel_radius

N_ATOMS = 7
LIGAND, POCKET = [5, 6], [0, 1, 2, 3]
AXIS = [0.0, 0.0, 1.0]
REFERENCE = [[0.3, 0.0, 0.0], [-0.3, 0.0, 0.0], [0.0, 0.3, 0.0], [0.0, -0.3, 0.0]]
FUNNEL = {"id": "funnel", "kind": "funnel", "groups": [LIGAND, POCKET], "axis": AXIS,
          "reference_pocket_nm": REFERENCE, "lower_wall_z_nm": -0.2, "upper_wall_z_nm": 2.0,
          "cone_end_z_nm": 0.8, "cone_half_angle_rad": 0.6, "cylinder_radius_nm": 0.25,
          "blend_half_width_nm": 0.1, "wall_force_constant_kj_mol_nm2": 1500.0}
K_WALL = FUNNEL["wall_force_constant_kj_mol_nm2"]


def _topology():
    top = md.Topology()
    chain = top.add_chain()
    host = top.add_residue("HST", chain, resSeq=1)
    for k in range(5):
        top.add_atom(f"C{k + 1}", md.element.carbon, host)
    guest = top.add_residue("GST", chain, resSeq=2)
    for k in range(2):
        top.add_atom(f"O{k + 1}", md.element.oxygen, guest)
    return top


def _spec(**changes):
    funnel = dict(FUNNEL, **changes)
    return Spec(name="f", topology=_topology(),
                descriptors=[{"id": "d", "kind": "center_distance", "groups": [POCKET, LIGAND],
                              "weighting": "geometric"}],
                terms=[{"descriptor": "d", "transform": "identity", "center": 0.0, "scale": 1.0,
                        "weight": 1.0}],
                restraints=[funnel])


def _frames(rng, n_frames, ligand_center):
    """Pocket atoms around the origin; the two ligand atoms 0.05 nm either side of a centre."""
    xyz = rng.normal(0.0, 0.3, size=(n_frames, N_ATOMS, 3))
    xyz[:, POCKET] -= xyz[:, POCKET].mean(axis=1, keepdims=True)
    xyz[:, LIGAND] = np.asarray(ligand_center)[:, None, :] + np.array([[0.05, 0, 0],
                                                                      [-0.05, 0, 0]])
    return xyz


def _regimes():
    """Ligand centres outside the funnel in each regime: cone wall, junction, cylinder,
    below the lower wall, above the upper wall; and one inside."""
    return np.array([[0.9, 0.2, 0.2], [0.0, 0.45, 0.8], [0.4, 0.1, 1.5], [0.05, 0.0, -0.35],
                     [0.0, 0.1, 2.2], [0.0, 0.05, 0.3]])


def _fd_gradient(spec, xyz, box, h=1e-6):
    grad = np.zeros_like(xyz)
    for i in range(N_ATOMS):
        for k in range(3):
            plus, minus = xyz.copy(), xyz.copy()
            plus[:, i, k] += h
            minus[:, i, k] -= h
            grad[:, i, k] = (spec.restraint_energy(plus, box) -
                             spec.restraint_energy(minus, box)) / (2 * h)
    return grad


BOXES = {"none": None, "orthorhombic": np.array([3.1, 3.3, 4.7]),
         "triclinic": np.array([[3.2, 0.0, 0.0], [0.9, 3.0, 0.0], [0.6, -0.7, 4.9]])}


@pytest.mark.parametrize("box_name", BOXES)
def test_funnel_gradient_equals_central_finite_differences(box_name):
    box = BOXES[box_name]
    spec = _spec()
    xyz = _frames(np.random.default_rng(3), 6, _regimes())
    energy, grad = spec.restraint_energy(xyz, box=box, gradient=True)
    assert np.all(energy[:5] > 0) and energy[5] == 0.0
    fd = _fd_gradient(spec, xyz, box)
    scale = np.abs(grad).max(axis=(1, 2), keepdims=True) + 1e-12
    assert np.max(np.abs(grad - fd) / scale) < 1e-5
    # the pocket atoms feel the opposite of the ligand's total force (momentum is conserved)
    np.testing.assert_allclose(grad[:, POCKET].sum(axis=1), -grad[:, LIGAND].sum(axis=1),
                               atol=1e-9)


def test_funnel_energy_follows_the_documented_formula():
    # independent evaluation of E = k/2 [max(r - R(z), 0)^2 + walls] with numpy
    spec = _spec()
    centres = _regimes()
    xyz = _frames(np.random.default_rng(4), len(centres), centres)
    d = centres - xyz[:, POCKET].mean(axis=1)
    z, r = d[:, 2], np.hypot(d[:, 0], d[:, 1])
    R, _ = funnel_radius(z, FUNNEL)
    expected = 0.5 * K_WALL * (np.maximum(r - R, 0) ** 2
                               + np.maximum(FUNNEL["lower_wall_z_nm"] - z, 0) ** 2
                               + np.maximum(z - FUNNEL["upper_wall_z_nm"], 0) ** 2)
    np.testing.assert_allclose(spec.restraint_energy(xyz), expected, rtol=1e-12)


def test_funnel_energy_is_invariant_under_translation_and_box_shifts():
    spec = _spec()
    box = BOXES["triclinic"]
    xyz = _frames(np.random.default_rng(5), 6, _regimes())
    e0, g0 = spec.restraint_energy(xyz, box=box, gradient=True)
    e1, g1 = spec.restraint_energy(xyz + np.array([0.7, -1.3, 2.1]), box=box, gradient=True)
    np.testing.assert_allclose(e1, e0, rtol=1e-10, atol=1e-12)
    np.testing.assert_allclose(g1, g0, rtol=1e-9, atol=1e-9)
    shifted = xyz.copy()
    shifted[:, LIGAND[1]] += box[1] - box[2]  # one ligand atom moved by box vectors
    shifted[:, POCKET[2]] += box[0]
    e2, g2 = spec.restraint_energy(shifted, box=box, gradient=True)
    np.testing.assert_allclose(e2, e0, rtol=1e-10, atol=1e-12)
    np.testing.assert_allclose(g2, g0, rtol=1e-9, atol=1e-9)


def test_a_spec_without_restraints_has_zero_restraint_energy():
    spec = Spec(name="d", topology=_topology(),
                descriptors=[{"id": "d", "kind": "distance", "atoms": [0, 5]}],
                terms=[{"descriptor": "d", "transform": "identity", "center": 0.0, "scale": 1.0,
                        "weight": 1.0}])
    energy, grad = spec.restraint_energy(np.ones((2, N_ATOMS, 3)), gradient=True)
    assert spec.restraints == [] and np.all(energy == 0) and np.all(grad == 0)


def test_restraints_survive_a_round_trip_and_take_identities_from_the_topology():
    spec = _spec()
    again = Spec.from_json(spec.to_json())
    assert again == spec and again.to_json() == spec.to_json()
    (res,) = again.restraints
    assert res["label"] == "funnel"
    assert [i["residue"] for i in res["atom_identities"][0]] == ["GST", "GST"]


@pytest.mark.parametrize("change, path, message", [
    ({"groups": [[5, 6], [0, 1, 5]]}, r"\$\.restraints\[0\]\.groups", "must not share atoms"),
    ({"groups": [[5, 7], [0, 1]]}, r"\$\.restraints\[0\]\.groups\[0\]\[1\]", "out of range"),
    ({"axis": [0.0, 0.0, 2.0]}, r"\$\.restraints\[0\]\.axis", "unit vector"),
    ({"cone_end_z_nm": 2.5}, r"\$\.restraints\[0\]\.cone_end_z_nm",
     "lower_wall_z_nm < cone_end_z_nm < upper_wall_z_nm"),
    ({"cone_half_angle_rad": math.pi / 2}, r"\$\.restraints\[0\]\.cone_half_angle_rad",
     "below pi/2"),
    ({"wall_force_constant_kj_mol_nm2": 0.0},
     r"\$\.restraints\[0\]\.wall_force_constant_kj_mol_nm2", ""),
    ({"kind": "wall"}, r"\$\.restraints\[0\]\.kind", ""),
    ({"cylinder_radius_nm": float("nan")}, r"\$\.restraints\[0\]\.cylinder_radius_nm", "NaN"),
    ({"reference_pocket_nm": REFERENCE[:3]}, r"\$\.restraints\[0\]\.reference_pocket_nm",
     "has 3 rows but the pocket \\(groups\\[1\\]\\) has 4 atoms"),
    ({"reference_pocket_nm": [[x + 1.0, y, z] for x, y, z in REFERENCE]},
     r"\$\.restraints\[0\]\.reference_pocket_nm", "must be centred"),
    ({"reference_pocket_nm": [[-0.3, 0, 0], [-0.1, 0, 0], [0.1, 0, 0], [0.3, 0, 0]]},
     r"\$\.restraints\[0\]\.reference_pocket_nm", "does not fix an orientation"),
    ({"z_cc": 0.8}, r"\$\.restraints\[0\]", "z_cc"),
])
def test_bad_funnels_are_refused_with_their_json_path(change, path, message):
    doc = _spec().to_dict()
    doc["restraints"][0].update(change)
    if "groups" in change:  # keep identities parallel so the index check is what fails
        doc["restraints"][0]["atom_identities"] = [
            [doc["restraints"][0]["atom_identities"][0][0]] * len(change["groups"][0]),
            [doc["restraints"][0]["atom_identities"][1][0]] * len(change["groups"][1])]
    with pytest.raises(SpecError, match=f"^{path}.*{message}"):
        Spec.from_dict(doc)


def test_duplicate_restraint_ids_are_refused():
    doc = _spec().to_dict()
    doc["restraints"].append(dict(doc["restraints"][0]))
    with pytest.raises(SpecError, match=r"^\$\.restraints\[1\]\.id: restraint id 'funnel' is "
                                        "used twice"):
        Spec.from_dict(doc)


def test_check_topology_names_a_restraint_atom_that_differs():
    # the CV uses atoms 0 and 5 only, so atom 6 is checked through the restraint
    spec = Spec(name="f", topology=_topology(),
                descriptors=[{"id": "d", "kind": "distance", "atoms": [0, 5]}],
                terms=[{"descriptor": "d", "transform": "identity", "center": 0.0, "scale": 1.0,
                        "weight": 1.0}], restraints=[FUNNEL])
    top = _topology()
    top.atom(6).name = "N9"
    with pytest.raises(TopologyMismatchError, match=r"\$\.restraints\[0\]\.atom_identities\[0\]"
                                                    r"\[1\].*used by restraint 'funnel'"):
        spec.check_topology(top)


def test_schema_restraint_fields_are_the_funnel_module_keys():
    from cvdesign.bias.funnel import SHAPE_KEYS
    from cvdesign.spec import spec_schema

    restraint = spec_schema()["$defs"]["restraint"]
    expected = {"id", "kind", "label", "groups", "atom_identities", "axis", "reference_pocket_nm",
                "wall_force_constant_kj_mol_nm2", *SHAPE_KEYS}
    assert set(restraint["properties"]) == expected == set(restraint["required"])
