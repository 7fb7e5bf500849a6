"""Funnel sizing in the frame in which the restraint is evaluated.

The restraint (Spec.restraint_energy) measures the pocket-to-ligand vector frame by frame
(minimum image) along an axis fixed in the box frame; sizing fits every frame's pocket onto
the reference pocket (the first frame's) and works with the rotated vectors. So drift,
rotation and periodic boundaries must not change the sizing.
"""

import mdtraj as md
import numpy as np
import pytest
from scipy.spatial.transform import Rotation

from cvdesign import Spec
from cvdesign.errors import InputError
from cvdesign.bias.funnel import SHAPE_KEYS, align_to_reference_pocket, size_funnel
from cvdesign.geometry import (box_heights, center_displacement, kabsch_rotation,
                               whole_groups)

N_POCKET, N_LIGAND = 10, 3
POCKET, LIGAND = list(range(N_POCKET)), list(range(N_POCKET, N_POCKET + N_LIGAND))
SCALAR_OBSERVED = ("z_min_nm", "z_max_nm", "z_mean_nm", "z_std_nm", "r_max_nm", "r_std_nm",
                   "r_q95_nm", "ligand_radius_nm", "center_distance_mean_nm",
                   "center_distance_std_nm", "pocket_fit_rmsd_mean_nm", "pocket_fit_rmsd_max_nm")
ORTHO = np.diag([6.0, 6.4, 7.0])
TRICLINIC = np.array([[6.0, 0.0, 0.0], [2.1, 5.8, 0.0], [-1.7, 1.9, 5.6]])


def _complex(seed=0, n=240):
    """An invented asymmetric cup of 10 atoms that wobbles (a few degrees) and fluctuates,
    with a 3-atom guest sitting off-centre toward the cup's mouth (+z of the cup)."""
    rng = np.random.default_rng(seed)
    phi = rng.uniform(0, 2 * np.pi, N_POCKET)
    height = rng.uniform(0.0, 0.45, N_POCKET)
    cup = np.stack([(0.4 + 0.4 * height) * np.cos(phi), (0.4 + 0.4 * height) * np.sin(phi),
                    height], axis=1)
    cup -= cup.mean(axis=0)
    wobble = Rotation.from_rotvec(rng.normal(0, 0.06, size=(n, 3))).as_matrix()
    pocket = np.einsum("aj,fkj->fak", cup, wobble) + rng.normal(0, 0.02, (n, N_POCKET, 3))
    site = np.einsum("j,fkj->fk", np.array([0.05, -0.03, 0.25]), wobble)
    centre = site + rng.normal(0, [0.07, 0.07, 0.05], size=(n, 3))
    guest = np.array([[-0.12, 0.0, 0.0], [0.0, 0.06, 0.0], [0.12, 0.0, 0.0]])
    turn = Rotation.random(n, random_state=seed + 1).as_matrix()
    ligand = centre[:, None] + np.einsum("aj,fkj->fak", guest, turn)
    return np.concatenate([pocket, ligand], axis=1)


def _tumble(xyz, seed, box=None):
    """Every frame of the whole system turned about the origin and moved, independently;
    with a box (rows), the box turns with it (a rigid motion of the periodic system)."""
    rng = np.random.default_rng(seed)
    rot = Rotation.random(len(xyz), random_state=seed).as_matrix()
    moved = np.einsum("faj,fkj->fak", xyz, rot) + rng.uniform(-20, 20, size=(len(xyz), 1, 3))
    if box is None:
        return moved, None
    return moved, np.einsum("ij,fkj->fik", box, rot)


def _wrap(xyz, box):
    """Every atom into the primary cell of box vectors (rows), per frame or one box."""
    box = np.broadcast_to(box, (len(xyz), 3, 3))
    frac = np.einsum("faj,fjk->fak", xyz, np.linalg.inv(box))
    return np.einsum("faj,fjk->fak", frac - np.floor(frac), box)


def _size(xyz, box=None, **kwargs):
    return size_funnel(xyz[:, POCKET], xyz[:, LIGAND], box, **kwargs)


def _assert_same_sizing(a, b, rotation=None):
    """Every sizing number within 1 %; vectors equal after the rotation between the frames."""
    for key in SHAPE_KEYS:
        assert np.isclose(a["params"][key], b["params"][key], rtol=0.01, atol=1e-12), key
    for key in SCALAR_OBSERVED:
        assert np.isclose(a["observed"][key], b["observed"][key], rtol=0.01, atol=1e-12), key
    assert a["axis_rule"] == b["axis_rule"]
    rotation = np.eye(3) if rotation is None else rotation
    np.testing.assert_allclose(np.asarray(a["params"]["axis"]) @ rotation, b["params"]["axis"],
                               atol=1e-8)
    np.testing.assert_allclose(np.asarray(a["reference_pocket_nm"]) @ rotation,
                               b["reference_pocket_nm"], atol=1e-8)


def _spec(result, k=2000.0):
    top = md.Topology()
    chain = top.add_chain()
    for name, count in (("HST", N_POCKET), ("GST", N_LIGAND)):
        res = top.add_residue(name, chain)
        for j in range(count):
            top.add_atom(f"C{j}", md.element.carbon, res)
    restraint = {"id": "funnel", "kind": "funnel", "groups": [LIGAND, POCKET],
                 "axis": result["params"]["axis"],
                 "reference_pocket_nm": result["reference_pocket_nm"],
                 **{key: result["params"][key] for key in SHAPE_KEYS},
                 "wall_force_constant_kj_mol_nm2": k}
    return Spec(name="f", topology=top,
                descriptors=[{"id": "d", "kind": "center_distance", "groups": [POCKET, LIGAND],
                              "weighting": "geometric"}],
                terms=[{"descriptor": "d", "transform": "identity", "center": 0.0,
                        "scale": 1.0, "weight": 1.0}], restraints=[restraint])


# -- the geometry the sizing rests on ---------------------------------------------------


def test_kabsch_rotation_equals_scipy_alignment_and_excludes_reflections():
    # Reference: scipy.spatial.transform.Rotation.align_vectors (SciPy; Virtanen et al., 2020,
    # Nature Methods 17, 261), which solves the same least-squares problem (Kabsch, 1976,
    # Acta Cryst. A32, 922-923).
    rng = np.random.default_rng(3)
    ref = rng.normal(size=(7, 3))
    ref -= ref.mean(axis=0)
    turns = Rotation.random(5, random_state=4).as_matrix()
    mobile = np.einsum("aj,fkj->fak", ref, turns) + rng.normal(0, 0.05, size=(5, 7, 3))
    mobile -= mobile.mean(axis=1, keepdims=True)
    rot, rmsd = kabsch_rotation(mobile, ref)
    for f in range(5):
        expected, _ = Rotation.align_vectors(ref, mobile[f])
        np.testing.assert_allclose(rot[f], expected.as_matrix().T, atol=1e-10)
        fitted = mobile[f] @ rot[f]
        assert np.isclose(rmsd[f], np.sqrt(((fitted - ref) ** 2).sum(axis=1).mean()))
    np.testing.assert_allclose(np.linalg.det(rot), 1.0)
    # a mirror image is fitted by a proper rotation, with a larger deviation
    mirror = (ref * [1.0, 1.0, -1.0])[None]
    rot_m, rmsd_m = kabsch_rotation(mirror, ref)
    assert np.isclose(np.linalg.det(rot_m[0]), 1.0) and rmsd_m[0] > 0.1


def test_kabsch_rotation_refuses_points_on_a_line():
    line = np.array([[-1.0, 0, 0], [0.0, 0, 0], [1.0, 0, 0]])
    with pytest.raises(InputError, match="do not fix an orientation"):
        kabsch_rotation(line[None], line)
    ref = np.array([[1.0, 0, 0], [-0.5, 0.8, 0], [-0.5, -0.8, 0]])
    with pytest.raises(InputError, match="frame 7 lie \\(nearly\\) on one line"):
        kabsch_rotation(np.stack([ref, line]), ref, frame_offset=6)


def test_whole_groups_put_split_groups_back_together():
    box = np.array([3.0, 3.0, 3.0])
    xyz = np.array([[[2.95, 1.0, 1.0], [0.05, 1.0, 1.0], [2.9, 2.95, 0.1]]])
    (whole,) = whole_groups(xyz, [[0, 1, 2]], box)
    np.testing.assert_allclose(whole[0], [[2.95, 1.0, 1.0], [3.05, 1.0, 1.0], [2.9, -0.05, 0.1]])
    d, _, _ = center_displacement(xyz, [0, 1], [2], box)
    np.testing.assert_allclose(d[0], [2.9 - 3.0, -0.05 - 1.0, 0.1 - 1.0], atol=1e-12)


def test_box_heights_equal_volume_over_face_area():
    np.testing.assert_allclose(box_heights(np.diag([3.0, 4.0, 5.0])), [[3.0, 4.0, 5.0]])
    a, b, c = TRICLINIC
    volume = abs(np.linalg.det(TRICLINIC))
    expected = [volume / np.linalg.norm(np.cross(b, c)), volume / np.linalg.norm(np.cross(c, a)),
                volume / np.linalg.norm(np.cross(a, b))]
    np.testing.assert_allclose(box_heights(TRICLINIC)[0], expected)
    # the same lattice given by skewed vectors: the reduced box's heights are no smaller than
    # the skewed box's, and the smallest is at most the shortest lattice vector (brute force),
    # so half of it stays a safe minimum-image radius
    skewed = np.array([a, b + 3 * a, c - 2 * b + a])
    raw = 1.0 / np.linalg.norm(np.linalg.inv(skewed), axis=0)
    grid = np.array(np.meshgrid(*[np.arange(-4, 5)] * 3)).reshape(3, -1).T
    shortest = np.linalg.norm(grid[np.any(grid != 0, axis=1)] @ TRICLINIC, axis=1).min()
    heights = box_heights(skewed)[0]
    assert heights.min() >= raw.min() - 1e-12 and heights.min() <= shortest + 1e-12
    assert box_heights(TRICLINIC)[0].min() <= shortest


# -- sizing does not depend on the frame of the input ------------------------------------


def test_sizing_is_unchanged_when_every_frame_is_turned_and_moved():
    xyz = _complex()
    plain = _size(xyz)
    moved, _ = _tumble(xyz, seed=5)
    turned = _size(moved)
    first = Rotation.random(len(xyz), random_state=5).as_matrix()[0]
    _assert_same_sizing(plain, turned, rotation=first.T)
    # without the fit the same frames scatter the ligand over many nm: the test can fail
    raw = moved[:, LIGAND].mean(axis=1) - moved[:, POCKET].mean(axis=1)
    assert np.ptp(raw @ np.asarray(turned["params"]["axis"])) > 0.4


@pytest.mark.parametrize("box", [ORTHO, TRICLINIC], ids=["orthorhombic", "triclinic"])
def test_sizing_is_unchanged_when_the_complex_is_split_across_the_boundary(box):
    xyz = _complex()
    plain = _size(xyz)
    # the pocket centre placed on a corner of the cell, every atom wrapped into it
    split = _wrap(xyz - xyz[:, POCKET].mean(axis=1, keepdims=True), box)
    straddles = np.ptp(split, axis=1).max(axis=1) > 0.5 * box_heights(box).min()
    assert straddles.mean() > 0.5, "the test needs frames that are split across the boundary"
    wrapped = _size(split, box)
    _assert_same_sizing(plain, wrapped)
    assert wrapped["warnings"] == []
    assert np.isclose(wrapped["observed"]["half_smallest_box_height_nm"],
                      0.5 * box_heights(box).min())


@pytest.mark.parametrize("box", [ORTHO, TRICLINIC], ids=["orthorhombic", "triclinic"])
def test_sizing_is_unchanged_when_frames_are_turned_moved_and_wrapped(box):
    xyz = _complex()
    plain = _size(xyz)
    moved, boxes = _tumble(xyz, seed=6, box=box)
    wrapped = _size(_wrap(moved, boxes), boxes)
    first = Rotation.random(len(xyz), random_state=6).as_matrix()[0]
    _assert_same_sizing(plain, wrapped, rotation=first.T)


def test_sizing_from_chunks_with_boxes_equals_one_array():
    xyz = _complex()
    moved, boxes = _tumble(xyz, seed=7, box=TRICLINIC)
    moved = _wrap(moved, boxes)
    one = _size(moved, boxes)
    chunks = [(moved[k:k + 50, POCKET], moved[k:k + 50, LIGAND], boxes[k:k + 50])
              for k in range(0, len(moved), 50)]
    parts = size_funnel(chunks=chunks)
    for key in SHAPE_KEYS:
        assert np.isclose(parts["params"][key], one["params"][key], rtol=1e-12, atol=1e-15)
    for key in SCALAR_OBSERVED:
        assert np.isclose(parts["observed"][key], one["observed"][key], rtol=1e-12, atol=1e-15)
    np.testing.assert_allclose(parts["params"]["axis"], one["params"]["axis"], atol=1e-12)


def _tumbled_with_exit_direction():
    """Tumbled, wrapped frames in ORTHO, the first frame's pocket centre (nm) and a unit
    direction for an exit point."""
    moved, boxes = _tumble(_complex(), seed=8, box=ORTHO)
    moved = _wrap(moved, boxes)
    (whole,) = whole_groups(moved[:1], [POCKET], boxes[:1])
    direction = np.array([0.2, -0.5, 0.7]) / np.linalg.norm([0.2, -0.5, 0.7])
    return moved, boxes, whole[0].mean(axis=0), direction


def test_exit_point_is_taken_in_the_coordinates_of_the_first_frame():
    moved, boxes, centre, direction = _tumbled_with_exit_direction()
    out = _size(moved, boxes, exit_point=centre + 1.5 * direction)
    assert out["axis_rule"] == "exit_point"
    np.testing.assert_allclose(out["params"]["axis"], direction, atol=1e-12)
    with pytest.raises(InputError, match="exit point .* from the pocket centre"):
        _size(moved, boxes, exit_point=centre + [0.01, 0.0, 0.0])


def test_an_exit_point_beyond_half_the_box_height_is_refused_not_flipped():
    # Half the smallest height of ORTHO is 3 nm. Farther than that from the pocket centre, a
    # point may have a nearer periodic image on another side of the pocket (the old minimum-
    # image rule then turned the axis around); a periodic image of a near point is as far off.
    moved, boxes, centre, direction = _tumbled_with_exit_direction()
    near = _size(moved, boxes, exit_point=centre + 2.9 * direction)
    np.testing.assert_allclose(near["params"]["axis"], direction, atol=1e-12)
    for exit_point, dist in [(centre + 3.2 * direction, 3.2),
                             (centre + 1.5 * direction + boxes[0, 1], None)]:
        if dist is None:
            dist = np.linalg.norm(exit_point - centre)
        with pytest.raises(InputError, match=(
                rf"the exit point \(exit_point, --exit-point on the command line\) \[.*\] nm "
                rf"lies {dist:.4f} nm from the pocket centre of the first bound frame \[.*\] "
                r"nm, more than half the smallest box height of that frame \(3\.0000 nm\): "
                r"under periodic images its direction from the pocket is ambiguous .* give a "
                r"point within 3\.0000 nm of that pocket centre")):
            _size(moved, boxes, exit_point=exit_point)


def test_an_exit_point_on_the_far_side_of_the_pocket_warns_that_the_funnel_opens_away():
    xyz = _complex()   # the guest sits off-centre toward +z of the cup
    up = _size(xyz, None, exit_point=[0.0, 0.0, 1.0])
    assert up["observed"]["z_mean_nm"] > 0
    assert not any("opens away" in w for w in up["warnings"])
    down = _size(xyz, None, exit_point=[0.0, 0.0, -1.0])
    assert down["params"]["axis"][2] < 0 and down["observed"]["z_mean_nm"] < 0
    (warning,) = [w for w in down["warnings"] if "opens away" in w]
    assert warning.startswith(
        f"the bound ligand's mean position along the axis is z = "
        f"{down['observed']['z_mean_nm']:.3f} nm, at or below the pocket centre (axis by rule "
        "'exit_point'): the funnel opens away from the ligand")
    assert "give an exit point (exit_point, --exit-point) on the ligand's side" in warning
    assert f"WARNING: {warning}" in down["reasoning"]


def test_a_funnel_reaching_beyond_half_the_box_height_is_warned_about():
    xyz = _complex()
    small = np.diag([3.6, 3.8, 4.0])
    out = _size(_wrap(xyz, small), small)
    assert out["observed"]["funnel_reach_nm"] > 1.8
    (warning,) = out["warnings"]
    assert "beyond half the smallest box height of the bound frames (1.800 nm)" in warning
    assert any(line.startswith("WARNING: the funnel reaches") for line in out["reasoning"])
    shorter = _size(_wrap(xyz, small), small, unbound_length=0.5)
    assert shorter["warnings"] == [] and shorter["observed"]["funnel_reach_nm"] < 1.8


# -- the sized funnel, evaluated as the restraint ----------------------------------------


@pytest.mark.parametrize("box", [None, TRICLINIC], ids=["no-box", "triclinic"])
def test_restraint_energy_is_zero_on_every_bound_frame_once_the_pocket_is_held(box):
    xyz = _complex()
    moved, boxes = _tumble(xyz, seed=9, box=box)
    if box is not None:
        moved = _wrap(moved, boxes)
    result = _size(moved, boxes)
    spec = _spec(result)
    aligned, aligned_box = align_to_reference_pocket(moved, POCKET, result["reference_pocket_nm"],
                                                     box=boxes)
    # the pocket is now in the reference orientation (up to its own fluctuations)
    (whole,) = whole_groups(aligned, [POCKET], aligned_box)
    dev = whole - whole.mean(axis=1, keepdims=True) - np.asarray(result["reference_pocket_nm"])
    rmsd = np.sqrt((dev ** 2).sum(axis=2).mean(axis=1))
    assert np.isclose(rmsd.max(), result["observed"]["pocket_fit_rmsd_max_nm"], rtol=1e-9)
    energy, grad = spec.restraint_energy(aligned, box=aligned_box, gradient=True)
    assert np.all(energy == 0.0) and np.all(grad == 0.0)
    # the same frames with the pocket left turned are often outside: holding it matters
    assert np.mean(spec.restraint_energy(moved, box=boxes) > 0) > 0.2
