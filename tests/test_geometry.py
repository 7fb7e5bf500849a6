"""Tests of cvdesign.geometry: reference distances, angles, dihedrals with periodic boxes."""

import importlib.resources
import itertools
import warnings

import mdtraj as md
import numpy as np
import pytest

from cvdesign.errors import InputError
from cvdesign.geometry import (
    GeometryWarning,
    angles,
    center_distance,
    coordination,
    dihedrals,
    group_centers,
    whole_groups,
    distances,
    minimum_image,
    switching_function,
)

# --------------------------------------------------------------------------
# helpers


def mdanalysis_test_file(name):
    """Path of a file of the MDAnalysis test data set (package ``mdanalysistests``).

    Source: the MDAnalysis test suite; Michaud-Agrawal et al., J. Comput. Chem.
    32, 2319 (2011); Gowers et al., Proc. 15th Python in Science Conf. (SciPy
    2016), 98.
    """
    path = importlib.resources.files("MDAnalysisTests") / "data" / name
    assert path.is_file(), f"missing test data file {name}; install the test extra (mdanalysistests)"
    return str(path)


def brute_force_minimum_image(dr, box_vectors):
    """Slow, obviously right minimum image: try every image dr + n @ box with |n_i| <= reach.

    `dr` (m, 3), `box_vectors` (3, 3) rows. An image no longer than dr itself
    has |n @ box| <= 2 |dr|, so |n_i| <= 2 |dr| |column i of inv(box)|; the
    reach is chosen from that bound, which makes the search provably complete.
    """
    dr = np.asarray(dr, dtype=np.float64)
    box_vectors = np.asarray(box_vectors, dtype=np.float64)
    bound = 2 * np.linalg.norm(dr, axis=1).max() * np.linalg.norm(np.linalg.inv(box_vectors), axis=0).max()
    reach = int(np.ceil(bound))
    assert reach <= 12, "brute-force search too wide for a test; use shorter vectors"
    best = dr.copy()
    best_sq = np.einsum("mk,mk->m", dr, dr)
    for n in itertools.product(range(-reach, reach + 1), repeat=3):
        candidate = dr + np.asarray(n, dtype=np.float64) @ box_vectors
        candidate_sq = np.einsum("mk,mk->m", candidate, candidate)
        better = candidate_sq < best_sq
        best[better], best_sq[better] = candidate[better], candidate_sq[better]
    return best


def toy_trajectory(xyz, box_vectors=None):
    """An mdtraj.Trajectory of carbon atoms with the given coordinates (nm) and box."""
    xyz = np.asarray(xyz)
    top = md.Topology()
    residue = top.add_residue("UNK", top.add_chain())
    for i in range(xyz.shape[1]):
        top.add_atom(f"C{i}", md.element.carbon, residue)
    traj = md.Trajectory(xyz.astype(np.float32), top)
    if box_vectors is not None:
        box = np.asarray(box_vectors, dtype=np.float32)
        traj.unitcell_vectors = np.broadcast_to(box, (xyz.shape[0], 3, 3)).copy()
    return traj


def random_rotation(rng):
    q, r = np.linalg.qr(rng.normal(size=(3, 3)))
    q = q * np.sign(np.diag(r))
    if np.linalg.det(q) < 0:
        q[:, 0] = -q[:, 0]
    return q


def angular_difference(a, b):
    return np.abs((a - b + np.pi) % (2 * np.pi) - np.pi)


def distinct_tuples(rng, n_atoms, n, width):
    rows = rng.randint(0, n_atoms, size=(4 * n, width))
    rows = rows[[len(set(r)) == width for r in rows]]
    return rows[:n]


CUBE = np.diag([3.0, 3.0, 3.0])
ORTHORHOMBIC = np.diag([3.0, 3.5, 4.0])
# Moderately skewed lower-triangular box (angles roughly 75-80 degrees).
SKEWED = np.array([[3.0, 0.0, 0.0], [0.8, 3.1, 0.0], [-0.6, 0.7, 3.2]])
# Rhombic dodecahedron (xy-square) and truncated octahedron in reduced form,
# box vectors from memory of the common GROMACS conventions.
DODECAHEDRON = 3.0 * np.array([[1.0, 0.0, 0.0], [0.0, 1.0, 0.0], [0.5, 0.5, np.sqrt(0.5)]])
OCTAHEDRON = 3.0 * np.array(
    [[1.0, 0.0, 0.0], [1 / 3, 2 * np.sqrt(2) / 3, 0.0], [-1 / 3, np.sqrt(2) / 3, np.sqrt(6) / 3]]
)
# Strongly skewed and not reduced: the lattice of SKEWED written with other
# box vectors (an integer matrix of determinant 1 mixes them), so the brute-force
# reference can search the images of SKEWED itself.
UNIMODULAR = np.array([[1, 0, 0], [3, 1, 0], [2, -2, 1]])
VERY_SKEWED = UNIMODULAR @ SKEWED


# --------------------------------------------------------------------------
# minimum_image


def test_minimum_image_without_box_returns_float64_copy():
    dr = np.array([[1.0, 2.0, 3.0]], dtype=np.float32)
    out = minimum_image(dr, None)
    assert out.dtype == np.float64
    np.testing.assert_array_equal(out, dr)
    out[0, 0] = 99.0
    assert dr[0, 0] == 1.0


def test_minimum_image_orthorhombic_lands_in_half_box_and_shifts_by_whole_boxes():
    rng = np.random.RandomState(0)
    lengths = np.array([3.0, 3.5, 4.0])
    dr = rng.uniform(-20, 20, size=(500, 3))
    out = minimum_image(dr, lengths)
    assert out.shape == dr.shape
    assert np.all(np.abs(out) <= lengths / 2 + 1e-12)
    shifts = (dr - out) / lengths
    np.testing.assert_allclose(shifts, np.round(shifts), atol=1e-9)


@pytest.mark.parametrize(
    "box",
    [CUBE, ORTHORHOMBIC, SKEWED, DODECAHEDRON, OCTAHEDRON, VERY_SKEWED],
    ids=["cube", "orthorhombic", "skewed", "dodecahedron", "octahedron", "very-skewed"],
)
def test_minimum_image_is_the_shortest_image_by_brute_force(box):
    rng = np.random.RandomState(1)
    dr = rng.uniform(-4, 4, size=(400, 3))
    out = minimum_image(dr, box)
    same_lattice = SKEWED if box is VERY_SKEWED else box
    reference = brute_force_minimum_image(dr, same_lattice)
    np.testing.assert_allclose(np.linalg.norm(out, axis=1), np.linalg.norm(reference, axis=1), rtol=0, atol=1e-12)
    # out - dr must be a whole lattice vector
    coefficients = (out - dr) @ np.linalg.inv(box)
    np.testing.assert_allclose(coefficients, np.round(coefficients), atol=1e-9)


def test_minimum_image_accepts_a_box_that_is_not_lower_triangular():
    # The same lattice as SKEWED, rotated: rows are no longer lower-triangular.
    rng = np.random.RandomState(2)
    rotation = random_rotation(rng)
    box = SKEWED @ rotation
    dr = rng.uniform(-4, 4, size=(300, 3))
    reference = brute_force_minimum_image(dr, box)
    np.testing.assert_allclose(
        np.linalg.norm(minimum_image(dr, box), axis=1), np.linalg.norm(reference, axis=1), atol=1e-12
    )


def test_minimum_image_is_exact_for_a_thin_box_that_needs_a_wider_search():
    # A flat lattice (height 0.2 nm along z): searching the 27 neighbours of the
    # wrapped vector is not enough here, and the wider search must take over.
    box = np.array([[3.0, 0.0, 0.0], [1.5, 0.3, 0.0], [1.5, 0.15, 0.2]])
    dr = np.random.RandomState(15).uniform(-0.5, 0.5, size=(300, 3))
    out = minimum_image(dr, box)
    reference = brute_force_minimum_image(dr, box)
    np.testing.assert_allclose(np.linalg.norm(out, axis=1), np.linalg.norm(reference, axis=1), atol=1e-12)


def test_minimum_image_box_forms_agree():
    rng = np.random.RandomState(3)
    n_frames = 4
    dr = rng.uniform(-5, 5, size=(n_frames, 7, 3))
    lengths = np.array([3.0, 3.5, 4.0])
    forms = [
        lengths,
        np.tile(lengths, (n_frames, 1)),
        np.diag(lengths),
        np.tile(np.diag(lengths), (n_frames, 1, 1)),
    ]
    results = [minimum_image(dr, box) for box in forms]
    for result in results[1:]:
        np.testing.assert_allclose(result, results[0], atol=1e-12)


def test_minimum_image_uses_each_frames_own_box():
    dr = np.array([[[2.9, 0.0, 0.0]], [[2.9, 0.0, 0.0]]])
    out = minimum_image(dr, [[3.0, 3.0, 3.0], [10.0, 10.0, 10.0]])
    np.testing.assert_allclose(out[:, 0, 0], [-0.1, 2.9], atol=1e-12)
    vectors = np.array([np.diag([3.0] * 3), SKEWED * 4])
    out = minimum_image(dr, vectors)
    np.testing.assert_allclose(out[:, 0, 0], [-0.1, 2.9], atol=1e-12)


def test_minimum_image_three_frames_lower_triangular_box_is_read_as_vectors():
    dr = np.zeros((3, 2, 3)) + [2.9, 0.0, 0.0]
    out = minimum_image(dr, SKEWED)
    np.testing.assert_allclose(out[..., 0], -0.1, atol=1e-12)


@pytest.mark.parametrize(
    ("box", "message"),
    [
        ([3.0, 3.0], r"box has shape \(2,\); expected orthorhombic lengths"),
        ([3.0, 0.0, 3.0], r"box has a box length <= 0 in frame 0"),
        ([3.0, np.nan, 3.0], r"box contains NaN or infinity"),
        ([[3.0, 0, 0], [6.0, 0, 0], [0, 0, 3.0]], r"box: the box vectors of frame 0 are \(nearly\) linearly dependent"),
        (np.ones((5, 3)), r"box has 5 frames \(shape \(5, 3\)\) but the coordinates have 2 frames"),
        (np.tile(CUBE, (5, 1, 1)), r"box has 5 frames \(shape \(5, 3, 3\)\) but the coordinates have 2 frames"),
        ("big", r"box must be a numeric array"),
    ],
)
def test_minimum_image_rejects_bad_boxes(box, message):
    with pytest.raises(InputError, match=message):
        minimum_image(np.zeros((2, 4, 3)), box)


def test_minimum_image_rejects_ambiguous_three_by_three_box_for_three_frames():
    lengths_table = np.array([[3.0, 3.1, 3.2], [3.0, 3.1, 3.2], [3.0, 3.1, 3.2]])
    with pytest.raises(InputError, match=r"box of shape \(3, 3\) is ambiguous for 3 frames"):
        minimum_image(np.zeros((3, 4, 3)), lengths_table)


def test_minimum_image_rejects_vectors_that_are_not_three_dimensional():
    with pytest.raises(InputError, match=r"dr has shape \(4, 2\); expected displacement vectors"):
        minimum_image(np.zeros((4, 2)), [3.0, 3.0, 3.0])


# --------------------------------------------------------------------------
# hand-computed values


def test_distance_of_a_3_4_5_triangle():
    xyz = np.array([[[0.0, 0.0, 0.0], [0.3, 0.0, 0.0], [0.3, 0.4, 0.0]]])
    out = distances(xyz, [[0, 2], [0, 1], [1, 2]])
    assert out.shape == (1, 3) and out.dtype == np.float64
    np.testing.assert_allclose(out, [[0.5, 0.3, 0.4]], rtol=1e-15)


def test_right_straight_and_zero_angles():
    xyz = np.array([[[1.0, 0.0, 0.0], [0.0, 0.0, 0.0], [0.0, 2.0, 0.0], [-3.0, 0.0, 0.0], [2.0, 0.0, 0.0]]])
    out = angles(xyz, [[0, 1, 2], [0, 1, 3], [0, 1, 4]])
    np.testing.assert_allclose(out, [[np.pi / 2, np.pi, 0.0]], atol=1e-15)


def test_angle_of_60_degrees_in_an_equilateral_triangle():
    xyz = np.array([[[0.0, 0.0, 0.0], [0.2, 0.0, 0.0], [0.1, 0.1 * np.sqrt(3), 0.0]]])
    np.testing.assert_allclose(angles(xyz, [[1, 0, 2]]), [[np.pi / 3]], atol=1e-14)


def _newman(phi_deg):
    """a-b-c-d with b at the origin, c on +z, a on +x, d turned by phi from +x towards +y."""
    phi = np.radians(phi_deg)
    return np.array([[[1.0, 0.0, 0.0], [0.0, 0.0, 0.0], [0.0, 0.0, 0.15], [np.cos(phi), np.sin(phi), 0.15]]])


def test_dihedral_plus_60_has_the_iupac_sign():
    # IUPAC-IUB Commission on Biochemical Nomenclature (1970), Biochemistry 9,
    # 3471 (journal reference from memory):
    # looking along b->c (here along +z, so +x is to the right and +y is down),
    # the torsion angle is positive when the front bond b->a (+x) must turn
    # clockwise, i.e. from +x towards +y, to eclipse the rear bond c->d.
    # d is placed 60 degrees from +x towards +y, so the angle is +60 degrees.
    np.testing.assert_allclose(dihedrals(_newman(60.0), [[0, 1, 2, 3]]), [[np.pi / 3]], atol=1e-14)
    # The mirror image has the opposite sign.
    np.testing.assert_allclose(dihedrals(_newman(-60.0), [[0, 1, 2, 3]]), [[-np.pi / 3]], atol=1e-14)


def test_dihedral_sign_agrees_with_mdtraj_on_the_same_construction():
    traj = toy_trajectory(_newman(60.0))
    assert md.compute_dihedrals(traj, [[0, 1, 2, 3]])[0, 0] == pytest.approx(np.pi / 3, abs=1e-6)


def test_trans_is_pi_and_cis_is_zero():
    trans = np.array([[[0.1, 0.1, 0.0], [0.0, 0.0, 0.0], [0.0, 0.0, 0.15], [-0.1, -0.1, 0.15]]])
    cis = np.array([[[0.1, 0.1, 0.0], [0.0, 0.0, 0.0], [0.0, 0.0, 0.15], [0.1, 0.1, 0.15]]])
    # trans sits on the branch cut: its sign is not asserted, only |phi| and the range
    phi = dihedrals(trans, [[0, 1, 2, 3]])[0, 0]
    assert abs(phi) == pytest.approx(np.pi, abs=1e-12) and -np.pi < phi <= np.pi
    assert dihedrals(cis, [[0, 1, 2, 3]])[0, 0] == 0.0


def test_dihedrals_lie_in_the_half_open_range():
    rng = np.random.RandomState(4)
    xyz = rng.normal(size=(50, 12, 3))
    quads = distinct_tuples(rng, 12, 80, 4)
    out = dihedrals(xyz, quads)
    assert np.all(out > -np.pi) and np.all(out <= np.pi)
    # exact trans built several ways stays in the half-open range (never -pi); which side
    # of the cut rounding puts it on is not asserted, only that it is within 1e-12 of it
    for sign in (1.0, -1.0):
        trans = np.array([[[sign, 0.0, 0.0], [0.0, 0.0, 0.0], [0.0, 0.0, 1.0], [-sign, 0.0, 1.0]]])
        phi = dihedrals(trans, [[0, 1, 2, 3]])[0, 0]
        assert -np.pi < phi <= np.pi and abs(phi) == pytest.approx(np.pi, abs=1e-12)


# --------------------------------------------------------------------------
# periodic wrap-around and invariances


def test_two_atoms_across_the_boundary_are_0_2_nm_apart():
    xyz = np.array([[[0.1, 1.0, 1.0], [2.9, 1.0, 1.0]]])
    np.testing.assert_allclose(distances(xyz, [[0, 1]], box=[3.0, 3.0, 3.0]), [[0.2]], atol=1e-12)
    np.testing.assert_allclose(distances(xyz, [[0, 1]], box=CUBE), [[0.2]], atol=1e-12)
    np.testing.assert_allclose(distances(xyz, [[0, 1]]), [[2.8]], atol=1e-12)


def test_two_atoms_across_the_boundary_of_a_triclinic_box():
    # b is displaced from a by -0.2 nm along x plus one box vector of SKEWED
    a = np.array([1.0, 1.0, 1.0])
    b = a + np.array([-0.2, 0.0, 0.0]) + SKEWED[2]
    xyz = np.array([[a, b]])
    np.testing.assert_allclose(distances(xyz, [[0, 1]], box=SKEWED), [[0.2]], atol=1e-12)


@pytest.mark.parametrize("box", [ORTHORHOMBIC, SKEWED, OCTAHEDRON], ids=["orthorhombic", "skewed", "octahedron"])
def test_shifting_an_atom_by_box_vectors_changes_nothing(box):
    rng = np.random.RandomState(5)
    xyz = rng.uniform(0, 3, size=(3, 10, 3))
    shifted = xyz.copy()
    shifted[:, 4] += box[0] - 2 * box[1] + box[2]
    shifted[:, 7] -= box[2]
    pairs = distinct_tuples(rng, 10, 30, 2)
    triples = distinct_tuples(rng, 10, 30, 3)
    quads = distinct_tuples(rng, 10, 30, 4)
    np.testing.assert_allclose(distances(shifted, pairs, box), distances(xyz, pairs, box), atol=1e-12)
    np.testing.assert_allclose(angles(shifted, triples, box), angles(xyz, triples, box), atol=1e-12)
    np.testing.assert_allclose(
        angular_difference(dihedrals(shifted, quads, box), dihedrals(xyz, quads, box)), 0.0, atol=1e-11
    )


def test_a_molecule_split_across_the_boundary_has_its_whole_geometry():
    # a compact 4-atom chain near the corner of a 3 nm cube
    whole = np.array([[[0.05, 0.05, 0.05], [0.12, 0.1, -0.03], [0.2, 0.02, 0.04], [0.25, 0.1, 0.12]]])
    wrapped = whole % 3.0  # some atoms jump to the far side
    assert np.any(np.abs(wrapped - whole) > 1.0)
    quads = [[0, 1, 2, 3]]
    np.testing.assert_allclose(dihedrals(wrapped, quads, CUBE), dihedrals(whole, quads), atol=1e-12)
    np.testing.assert_allclose(angles(wrapped, [[0, 1, 2]], CUBE), angles(whole, [[0, 1, 2]]), atol=1e-12)


def test_rigid_motion_changes_nothing_without_box():
    rng = np.random.RandomState(7)
    xyz = rng.normal(size=(4, 9, 3))
    rotation = random_rotation(rng)
    moved = xyz @ rotation.T + rng.normal(size=3) * 10
    pairs = distinct_tuples(rng, 9, 20, 2)
    triples = distinct_tuples(rng, 9, 20, 3)
    quads = distinct_tuples(rng, 9, 20, 4)
    np.testing.assert_allclose(distances(moved, pairs), distances(xyz, pairs), atol=1e-12)
    np.testing.assert_allclose(angles(moved, triples), angles(xyz, triples), atol=1e-10)
    np.testing.assert_allclose(angular_difference(dihedrals(moved, quads), dihedrals(xyz, quads)), 0, atol=1e-10)


def test_rigid_motion_of_coordinates_and_box_together_changes_nothing():
    rng = np.random.RandomState(8)
    xyz = rng.uniform(0, 3, size=(2, 12, 3))
    rotation = random_rotation(rng)
    moved = xyz @ rotation.T + [5.0, -2.0, 1.0]
    moved_box = SKEWED @ rotation.T  # rows are vectors: rotate each row
    pairs = distinct_tuples(rng, 12, 40, 2)
    quads = distinct_tuples(rng, 12, 40, 4)
    np.testing.assert_allclose(distances(moved, pairs, moved_box), distances(xyz, pairs, SKEWED), atol=1e-12)
    np.testing.assert_allclose(
        angular_difference(dihedrals(moved, quads, moved_box), dihedrals(xyz, quads, SKEWED)), 0, atol=1e-10
    )


def test_translation_changes_nothing_with_a_box():
    rng = np.random.RandomState(9)
    xyz = rng.uniform(0, 3, size=(2, 12, 3))
    pairs = distinct_tuples(rng, 12, 40, 2)
    for box in (ORTHORHOMBIC, SKEWED):
        np.testing.assert_allclose(
            distances(xyz + [7.1, -3.3, 0.4], pairs, box), distances(xyz, pairs, box), atol=1e-12
        )


def test_a_huge_box_is_the_same_as_no_box():
    rng = np.random.RandomState(10)
    xyz = rng.uniform(0, 3, size=(3, 10, 3))
    pairs = distinct_tuples(rng, 10, 30, 2)
    triples = distinct_tuples(rng, 10, 30, 3)
    quads = distinct_tuples(rng, 10, 30, 4)
    for box in ([1e4, 1e4, 1e4], SKEWED * 1e4):
        np.testing.assert_allclose(distances(xyz, pairs, box), distances(xyz, pairs), atol=1e-12)
        np.testing.assert_allclose(angles(xyz, triples, box), angles(xyz, triples), atol=1e-12)
        np.testing.assert_allclose(dihedrals(xyz, quads, box), dihedrals(xyz, quads), atol=1e-12)


# --------------------------------------------------------------------------
# agreement with mdtraj on random frames


@pytest.mark.parametrize(
    ("box", "periodic"),
    [(None, False), (ORTHORHOMBIC, True), (ORTHORHOMBIC, False), (SKEWED, True), (OCTAHEDRON, True)],
    ids=["no-box", "orthorhombic", "orthorhombic-ignored", "skewed", "octahedron"],
)
def test_agreement_with_mdtraj_on_random_frames(box, periodic):
    # Moderately skewed boxes only: mdtraj's triclinic minimum image searches
    # the neighbouring images of a reduced box, which may be approximate for
    # very skewed boxes (from memory of its implementation).
    rng = np.random.RandomState(11)
    n_atoms = 40
    xyz = rng.uniform(-1.0, 4.0, size=(5, n_atoms, 3))
    traj = toy_trajectory(xyz, box)
    xyz32 = traj.xyz.astype(np.float64)  # compare on the same float32-rounded input
    ours_box = traj.unitcell_vectors.astype(np.float64) if (box is not None and periodic) else None
    pairs = np.array(list(itertools.combinations(range(n_atoms), 2)))
    triples = distinct_tuples(rng, n_atoms, 300, 3)
    quads = distinct_tuples(rng, n_atoms, 300, 4)

    np.testing.assert_allclose(
        distances(xyz32, pairs, ours_box), md.compute_distances(traj, pairs, periodic=periodic), atol=1e-5
    )
    np.testing.assert_allclose(
        angles(xyz32, triples, ours_box), md.compute_angles(traj, triples, periodic=periodic), atol=1e-4
    )
    ours = dihedrals(xyz32, quads, ours_box)
    theirs = md.compute_dihedrals(traj, quads, periodic=periodic)
    # float32 in mdtraj: compare away from the ill-conditioned near-collinear cases
    bonds_ok = np.all(angles(xyz32, np.concatenate([quads[:, :3], quads[:, 1:]]), ours_box) > 0.05, axis=0)
    well_posed = bonds_ok[: len(quads)] & bonds_ok[len(quads):]
    assert well_posed.mean() > 0.9
    np.testing.assert_allclose(angular_difference(ours, theirs)[:, well_posed], 0.0, atol=1e-4)


# --------------------------------------------------------------------------
# shapes, dtypes and input checks


def test_empty_index_arrays_give_empty_results():
    xyz = np.zeros((3, 5, 3))
    for function in (distances, angles, dihedrals):
        for empty in ([], np.zeros((0, 4), dtype=int), np.array([])):
            out = function(xyz, empty)
            assert out.shape == (3, 0) and out.dtype == np.float64
        assert function(xyz, [], box=[3.0, 3.0, 3.0]).shape == (3, 0)


def test_float32_input_gives_float64_output():
    xyz = np.random.RandomState(12).normal(size=(2, 4, 3)).astype(np.float32)
    assert distances(xyz, [[0, 1]]).dtype == np.float64
    assert angles(xyz, [[0, 1, 2]]).dtype == np.float64
    assert dihedrals(xyz, [[0, 1, 2, 3]]).dtype == np.float64


@pytest.mark.parametrize(
    ("function", "indices", "message"),
    [
        (distances, [[0, 5]], r"pairs\[0\] = \[0, 5\] refers to atom 5, but xyz has 5 atoms \(valid indices 0\.\.4\)"),
        (distances, [[0, 1], [-1, 2]], r"pairs\[1\] = \[-1, 2\] refers to atom -1"),
        (distances, [[0, 1, 2]], r"pairs has shape \(1, 3\); expected \(n, 2\)"),
        (distances, [0, 1], r"pairs has shape \(2,\); expected \(n, 2\)"),
        (distances, [[0.0, 1.0]], r"pairs must hold integer atom indices \(0-based\); got dtype float64"),
        (angles, [[0, 1]], r"triples has shape \(1, 2\); expected \(n, 3\)"),
        (angles, [[0, 1, 7]], r"triples\[0\] = \[0, 1, 7\] refers to atom 7"),
        (dihedrals, [[0, 1, 2]], r"quads has shape \(1, 3\); expected \(n, 4\)"),
        (dihedrals, [[True, False, True, False]], r"quads must hold integer atom indices"),
    ],
)
def test_bad_indices_are_rejected_naming_the_argument(function, indices, message):
    with pytest.raises(InputError, match=message):
        function(np.zeros((2, 5, 3)), indices)


def test_bad_coordinates_are_rejected():
    with pytest.raises(InputError, match=r"xyz has shape \(5, 3\); expected \(n_frames, n_atoms, 3\) in nm \(add a frame axis"):
        distances(np.zeros((5, 3)), [[0, 1]])
    with pytest.raises(InputError, match=r"xyz has shape \(1, 5, 2\)"):
        distances(np.zeros((1, 5, 2)), [[0, 1]])
    xyz = np.zeros((2, 5, 3))
    xyz[1, 3, 0] = np.nan
    with pytest.raises(InputError, match=r"xyz has NaN or infinite coordinates in frame 1, atom 3 \(used by pairs\[1\]\)"):
        distances(xyz, [[0, 1], [2, 3]])
    # a NaN in an atom no index uses is not an error
    assert np.all(np.isfinite(distances(xyz, [[0, 1]])))


# --------------------------------------------------------------------------
# singular geometries


def test_coincident_atoms_give_distance_zero_without_warning():
    xyz = np.zeros((1, 2, 3))
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        assert distances(xyz, [[0, 1]])[0, 0] == 0.0


def test_angle_with_coincident_atoms_warns_and_is_pi_over_2():
    xyz = np.array([[[0.0, 0.0, 0.0], [0.0, 0.0, 0.0], [1.0, 0.0, 0.0]], [[1.0, 0.0, 0.0], [0.0, 0.0, 0.0], [0.0, 1.0, 0.0]]])
    with pytest.warns(GeometryWarning, match=r"angles: 1 of 2 values are undefined \(an arm has zero length\); they were set to pi/2\. First: frame 0, triples\[0\] = atoms \[0, 1, 2\]"):
        out = angles(xyz, [[0, 1, 2]])
    np.testing.assert_allclose(out[:, 0], [np.pi / 2, np.pi / 2])
    assert issubclass(GeometryWarning, UserWarning) and not issubclass(GeometryWarning, RuntimeWarning)


def test_collinear_angle_atoms_are_not_singular_for_the_value():
    xyz = np.array([[[0.0, 0.0, 0.0], [1.0, 0.0, 0.0], [2.0, 0.0, 0.0]]])
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        assert angles(xyz, [[0, 1, 2]])[0, 0] == np.pi


@pytest.mark.parametrize(
    "xyz",
    [
        [[0.0, 0.0, 0.0], [1.0, 0.0, 0.0], [2.0, 0.0, 0.0], [2.0, 1.0, 0.0]],  # a, b, c collinear
        [[0.0, 1.0, 0.0], [0.0, 0.0, 0.0], [1.0, 0.0, 0.0], [2.0, 0.0, 0.0]],  # b, c, d collinear
        [[0.0, 1.0, 0.0], [0.0, 0.0, 0.0], [0.0, 0.0, 0.0], [1.0, 0.0, 1.0]],  # b and c coincide
    ],
    ids=["abc-collinear", "bcd-collinear", "bc-coincident"],
)
def test_undefined_dihedral_warns_and_is_zero(xyz):
    with pytest.warns(GeometryWarning, match=r"dihedrals: 1 of 1 values are undefined \(collinear or coincident atoms\); they were set to 0"):
        out = dihedrals(np.array([xyz]), [[0, 1, 2, 3]])
    assert out[0, 0] == 0.0


# --------------------------------------------------------------------------
# real molecular-dynamics data (MDAnalysis test files; see mdanalysis_test_file)


def _straddling_and_random_pairs(rng, xyz, box_vectors, n_atoms, n_random, n_straddling):
    """Random pairs plus pairs whose raw displacement is not their minimum image.

    Straddling is decided from fractional coordinates (some component beyond
    one half), independently of the code under test.
    """
    pool = rng.randint(0, n_atoms, size=(40 * n_straddling, 2))
    pool = pool[pool[:, 0] != pool[:, 1]]
    dr = xyz[0, pool[:, 1]] - xyz[0, pool[:, 0]]
    frac = dr @ np.linalg.inv(box_vectors[0])
    straddling = pool[np.any(np.abs(frac) > 0.5, axis=1)][:n_straddling]
    assert len(straddling) == n_straddling
    random_pairs = rng.randint(0, n_atoms, size=(n_random, 2))
    return np.concatenate([random_pairs, straddling])


def test_distances_match_mdtraj_on_solvated_adenylate_kinase():
    # adk_oplsaa: solvated adenylate kinase, 47681 atoms, 10 frames. Its box is
    # a rhombic dodecahedron (box vectors [8, 0, 0], [0, 8, 0], [4, 4, 5.66] nm).
    traj = md.load(mdanalysis_test_file("adk_oplsaa.xtc"), top=mdanalysis_test_file("adk_oplsaa.gro"))
    assert traj.n_frames == 10 and traj.n_atoms == 47681
    xyz = traj.xyz.astype(np.float64)
    box = traj.unitcell_vectors.astype(np.float64)
    rng = np.random.RandomState(13)
    pairs = _straddling_and_random_pairs(rng, xyz, box, traj.n_atoms, 2000, 1500)
    ours = distances(xyz, pairs, box)
    np.testing.assert_allclose(ours, md.compute_distances(traj, pairs, periodic=True), atol=2e-5)
    # and against the slow brute-force search, frame 0
    dr = xyz[0, pairs[:, 1]] - xyz[0, pairs[:, 0]]
    reference = np.linalg.norm(brute_force_minimum_image(dr, box[0]), axis=1)
    np.testing.assert_allclose(ours[0], reference, atol=1e-12)
    # the straddling pairs really were wrapped
    assert np.mean(np.abs(ours[0] - np.linalg.norm(dr, axis=1)) > 0.1) > 0.3


def _tip125_box_vectors():
    """Box vectors (n_frames, 3, 3), nm, of tip125_tric_C36.dcd, read from its unit-cell records.

    This CHARMM file stores the six cell numbers as the symmetric box matrix
    (h11, h21, h22, h31, h32, h33) rather than as lengths and cosines (from
    memory of the CHARMM DCD convention); mdtraj 1.11 reads them as lengths
    and angles in degrees and gets a broken box (NaN in frame 0). mdtraj's
    raw reader returns them as cell_lengths = (h11, h22, h33) and
    cell_angles = (h32, h31, h21), in angstrom.
    """
    with md.formats.DCDTrajectoryFile(mdanalysis_test_file("tip125_tric_C36.dcd")) as dcd:
        _, lengths, raw_angles = dcd.read()
    h11, h22, h33 = lengths.astype(np.float64).T
    h32, h31, h21 = raw_angles.astype(np.float64).T
    box = np.stack(
        [np.stack([h11, h21, h31], 1), np.stack([h21, h22, h32], 1), np.stack([h31, h32, h33], 1)], axis=1
    )
    return box / 10.0


def test_distances_match_mdtraj_on_a_triclinic_water_box():
    traj = md.load(mdanalysis_test_file("tip125_tric_C36.dcd"), top=mdanalysis_test_file("tip125_tric_C36.psf"))
    assert traj.n_atoms == 375 and traj.n_frames == 10
    box = _tip125_box_vectors()
    # frame 0 cell: a = 3.5446 nm, alpha/beta/gamma = 91.33/61.74/44.41 degrees,
    # as MDAnalysis 2.11 reads this file (checked by hand)
    a, b, c = np.linalg.norm(box[0], axis=1)
    assert a == pytest.approx(3.5446, abs=1e-4)
    gamma = np.degrees(np.arccos(box[0, 0] @ box[0, 1] / (a * b)))
    assert gamma == pytest.approx(44.407, abs=1e-3)
    xyz = traj.xyz.astype(np.float64)
    rng = np.random.RandomState(14)
    pairs = _straddling_and_random_pairs(rng, xyz, box, traj.n_atoms, 2000, 600)
    ours = distances(xyz, pairs, box)  # the symmetric (not lower-triangular) box as is

    # mdtraj wants lower-triangular box vectors: rotate coordinates and box together
    # (Q from the QR decomposition of the box, per frame), which changes no distance.
    rotated_xyz = np.empty_like(xyz)
    lower = np.empty_like(box)
    for f in range(len(box)):
        q, r = np.linalg.qr(box[f].T)
        q = q * np.sign(np.diag(r))
        lower[f] = box[f] @ q
        rotated_xyz[f] = xyz[f] @ q
    np.testing.assert_allclose(np.triu(lower, 1), 0.0, atol=1e-12)
    rotated = md.Trajectory(rotated_xyz.astype(np.float32), traj.topology)
    rotated.unitcell_vectors = lower.astype(np.float32)
    np.testing.assert_allclose(ours, md.compute_distances(rotated, pairs, periodic=True), atol=2e-5)
    np.testing.assert_allclose(distances(rotated_xyz, pairs, lower), ours, atol=1e-11)
    dr = xyz[0, pairs[:, 1]] - xyz[0, pairs[:, 0]]
    reference = np.linalg.norm(brute_force_minimum_image(dr, box[0]), axis=1)
    np.testing.assert_allclose(ours[0], reference, atol=1e-12)


# --------------------------------------------------------------------------
# gradients: shapes, and the functions beyond index tuples
# (finite-difference checks of every gradient are in tests/test_gradients.py)


def test_gradients_have_one_row_per_atom_of_each_tuple():
    xyz = np.random.RandomState(16).normal(size=(3, 6, 3))
    for function, width in ((distances, 2), (angles, 3), (dihedrals, 4)):
        rows = distinct_tuples(np.random.RandomState(width), 6, 5, width)
        value, grad = function(xyz, rows, gradient=True)
        assert value.shape == (3, 5) and grad.shape == (3, 5, width, 3) and grad.dtype == np.float64
        np.testing.assert_array_equal(value, function(xyz, rows))
        np.testing.assert_allclose(grad.sum(axis=2), 0.0, atol=1e-10)  # no net force
        value, grad = function(xyz, [], gradient=True)
        assert value.shape == (3, 0) and grad.shape == (3, 0, width, 3)


def test_angle_gradient_of_a_right_angle_by_hand():
    # i on +x at 0.2 nm, k on +y at 0.5 nm: moving i along +y closes the angle at
    # rate 1/0.2 per nm, moving k along +x at rate 1/0.5; j takes minus the sum
    xyz = np.array([[[0.2, 0.0, 0.0], [0.0, 0.0, 0.0], [0.0, 0.5, 0.0]]])
    _, grad = angles(xyz, [[0, 1, 2]], gradient=True)
    np.testing.assert_allclose(grad[0, 0], [[0, -5.0, 0], [2.0, 5.0, 0], [-2.0, 0, 0]], atol=1e-14)


def test_collinear_angle_gradient_warns_and_is_zero():
    xyz = np.array([[[0.0, 0.0, 0.0], [1.0, 0.0, 0.0], [2.0, 0.0, 0.0]], [[1.0, 0.0, 0.0], [0.0, 0.0, 0.0], [0.0, 1.0, 0.0]]])
    with pytest.warns(GeometryWarning, match=r"angles: the gradient of 1 of 2 values is undefined \(three collinear atoms, angle 0 or pi\); it was set to 0\. First: frame 0, triples\[0\] = atoms \[0, 1, 2\]"):
        value, grad = angles(xyz, [[0, 1, 2]], gradient=True)
    np.testing.assert_allclose(value[:, 0], [np.pi, np.pi / 2])
    assert np.all(grad[0] == 0) and np.abs(grad[1]).max() == pytest.approx(1.0)


def test_coincident_atoms_warn_only_for_the_gradient_of_a_distance():
    xyz = np.zeros((1, 2, 3))
    with pytest.warns(GeometryWarning, match=r"distances: the gradient of 1 of 1 values is undefined \(coincident atoms\)"):
        value, grad = distances(xyz, [[0, 1]], gradient=True)
    assert value[0, 0] == 0.0 and np.all(grad == 0.0)


def test_center_distance_by_hand_mass_and_geometric():
    xyz = np.array([[[0.0, 0.0, 0.0], [0.3, 0.0, 0.0], [1.0, 0.0, 0.0], [1.0, 0.4, 0.0]]])
    np.testing.assert_allclose(center_distance(xyz, [0, 1], [2, 3]), [np.hypot(0.85, 0.2)], rtol=1e-14)
    # masses 2:1 put center a at 0.1; masses 1:3 put center b at y = 0.3
    value = center_distance(xyz, [0, 1], [2, 3], masses_a=[2.0, 1.0], masses_b=[1.0, 3.0])
    np.testing.assert_allclose(value, [np.hypot(0.9, 0.3)], rtol=1e-14)


@pytest.mark.parametrize("box", [CUBE, SKEWED], ids=["cube", "skewed"])
def test_center_distance_of_groups_split_across_the_boundary(box):
    # two small groups near a cell corner; wrapping scatters their atoms over the cell
    whole = np.array([[[0.05, 0.02, 0.01], [-0.08, 0.04, -0.03], [0.02, -0.09, 0.06],
                       [0.5, 0.1, -0.1], [0.6, -0.05, -0.08]]])
    frac = whole @ np.linalg.inv(box)
    wrapped = (frac - np.floor(frac)) @ box
    assert np.abs(wrapped - whole).max() > 1.0
    reference = center_distance(whole, [0, 1, 2], [3, 4], masses_a=[12.0, 16.0, 14.0])
    np.testing.assert_allclose(center_distance(wrapped, [0, 1, 2], [3, 4], box, masses_a=[12.0, 16.0, 14.0]),
                               reference, atol=1e-12)
    # without the box the split groups give a different, wrong answer
    assert abs(center_distance(wrapped, [0, 1, 2], [3, 4])[0] - reference[0]) > 0.1


def test_coordination_by_hand_and_across_the_boundary():
    # pairs at r0 (counts 1/2) and at 2 r0 (counts (1 - 2^6) / (1 - 2^12) = 63/4095)
    xyz = np.array([[[0.1, 1.0, 1.0], [0.4, 1.0, 1.0], [0.7, 1.0, 1.0]]])
    np.testing.assert_allclose(coordination(xyz, [0], [1, 2], r0=0.3), [0.5 + 63 / 4095], rtol=1e-14)
    # the same pairs, atom 0 moved by a box vector
    shifted = xyz.copy()
    shifted[0, 0] += CUBE[0]
    np.testing.assert_allclose(coordination(shifted, [0], [1, 2], r0=0.3, box=CUBE), [0.5 + 63 / 4095], rtol=1e-13)
    # overlapping groups: the pairs (0,1), (0,2), (1,2), each once
    np.testing.assert_allclose(coordination(xyz, [0, 1], [0, 1, 2], r0=0.3), [0.5 + 63 / 4095 + 0.5], rtol=1e-14)


def test_coordination_in_frame_chunks_equals_one_pass(monkeypatch):
    import cvdesign.geometry.contacts as contacts

    rng = np.random.RandomState(17)
    xyz = rng.uniform(0, 2, size=(7, 12, 3))
    boxes = rng.uniform(2.0, 2.5, size=(7, 3))
    one = coordination(xyz, range(6), range(4, 12), 0.5, boxes, gradient=True)
    monkeypatch.setattr(contacts, "_PAIRS_PER_CHUNK", 100)  # 2 frames per chunk
    chunked = coordination(xyz, range(6), range(4, 12), 0.5, boxes, gradient=True)
    np.testing.assert_allclose(chunked[0], one[0], rtol=1e-15)
    np.testing.assert_allclose(chunked[1], one[1], rtol=1e-15)


@pytest.mark.parametrize(
    ("call", "message"),
    [
        (lambda x: center_distance(x, [], [1]), r"group_a is empty; a group needs at least one atom"),
        (lambda x: center_distance(x, [0, 9], [1]), r"group_a\[1\] = 9 is not an atom of xyz \(5 atoms, valid indices 0\.\.4\)"),
        (lambda x: center_distance(x, [0], [1, 2, 1]), r"group_b lists atom 1 more than once"),
        (lambda x: center_distance(x, [0], [[1, 2]]), r"group_b has shape \(1, 2\); expected a flat list"),
        (lambda x: center_distance(x, [0], [1.0]), r"group_b must hold integer atom indices"),
        (lambda x: center_distance(x, [0, 1], [2], masses_a=[1.0]), r"masses_a has shape \(1,\); expected \(2,\), one mass per atom of group_a"),
        (lambda x: center_distance(x, [0, 1], [2], masses_a=[1.0, -1.0]), r"masses_a\[1\] = -1\.0; masses must be finite and > 0"),
        (lambda x: coordination(x, [0], [0], 0.3), r"group_a \[0\] and group_b \[0\] give no pair of distinct atoms"),
        (lambda x: coordination(x, [0], [1], 0.0), r"r0=0\.0 must be > 0 \(nm\)"),
        (lambda x: coordination(x, [0], [1], 0.3, n=12, m=6), r"n=12\.0, m=6\.0: the switching function needs 0 < n < m <= 1000"),
        (lambda x: coordination(x, [0], [1], 0.3, n=0), r"n=0\.0, m=12\.0: the switching function needs 0 < n < m"),
        (lambda x: coordination(x, [0], [1], float("nan")), r"r0 must be finite; got nan"),
        (lambda x: coordination(x, [0], [1], "far"), r"r0 must be a number; got 'far'"),
        (lambda x: switching_function([0.1, -0.2], 0.3), r"r must hold finite distances >= 0 in nm; got -0\.2"),
    ],
)
def test_group_functions_reject_bad_arguments_naming_them(call, message):
    with pytest.raises(InputError, match=message):
        call(np.zeros((2, 5, 3)))


def test_group_functions_reject_non_finite_coordinates_of_group_atoms():
    xyz = np.zeros((2, 5, 3))
    xyz[1, 3, 2] = np.inf
    with pytest.raises(InputError, match=r"xyz has NaN or infinite coordinates in frame 1, atom 3 \(used by group_b\[1\]\)"):
        coordination(xyz, [0], [1, 3], 0.3)
    assert np.isfinite(center_distance(xyz, [0], [1, 2])).all()


def _chain_across(n_atoms, step, box_length, seed):
    """A straight chain of `n_atoms` atoms `step` nm apart along x, jittered, wrapped into
    a cubic box of `box_length` nm (2 frames)."""
    rng = np.random.default_rng(seed)
    x = np.zeros((2, n_atoms, 3))
    x[:, :, 0] = 0.1 + step * np.arange(n_atoms)
    x += 0.01 * rng.standard_normal(x.shape)
    return np.mod(x, box_length)


def test_a_group_spanning_more_than_half_the_box_is_warned_about_and_its_values_kept():
    box = [2.0, 2.0, 2.0]
    # a straight chain reaching 1.76 nm: made whole, it comes back cut near x = 1.1 nm, every
    # atom within 1 nm of atom 0 but spread over the whole cell
    wide = _chain_across(12, 0.16, 2.0, seed=1)
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        centers = group_centers(wide, [[0, 1], list(range(12))], box)
        whole_groups(wide, [list(range(12))], box)
        center_distance(wide, [0], list(range(12)), box)
    texts = [str(w.message) for w in caught if issubclass(w.category, GeometryWarning)]
    assert texts[0].startswith("groups[1] (atoms 0, 1, ..., 11): made whole about its first "
                               "atom, the group comes back cut in some frames")
    assert len(texts) == 3 and texts[1].startswith("groups[0] (atoms 0, 1, ..., 11)")
    assert texts[2].startswith("group_b (atoms 0, 1, ..., 11)")
    assert not any("groups[0] (atoms 0, 1)" in t for t in texts)  # the compact group is fine
    # the values are those computed without the check: atoms at their minimum image
    # from atom 0, averaged
    shift = wide - wide[:, :1]
    shift -= 2.0 * np.round(shift / 2.0)
    np.testing.assert_allclose(centers[:, 1], (wide[:, :1] + shift).mean(axis=1), atol=1e-12)


def test_a_compact_group_split_by_the_boundary_gives_no_warning():
    split = _chain_across(6, 0.15, 2.0, seed=2)
    split[:, :, 0] = np.mod(split[:, :, 0] + 1.6, 2.0)  # the chain crosses x = 2 nm
    with warnings.catch_warnings():
        warnings.simplefilter("error", GeometryWarning)
        group_centers(split, [list(range(6))], [2.0, 2.0, 2.0])
