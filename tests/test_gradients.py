"""Analytic gradients of the spec evaluator: finite differences, invariances, mdtraj, limits.

Finite-difference criterion, used throughout: central differences with a step
of h = 1e-5 nm on every coordinate of every atom, and per frame

    max |analytic - numeric| <= 1e-5 * max |numeric|

(the maximum over atoms and components). The truncation error of a central
difference is about h^2 |f'''| / 6, here ~ (h / 0.1 nm)^2 ~ 1e-8 relative for
geometries whose distances are at least 0.1 nm and whose angles keep away from
0 and pi; the rounding error is ~ 1e-16 |f| / h ~ 1e-11. So 1e-5 leaves three
orders of magnitude of margin and still catches any wrong term (a missing
term or a sign error is an O(1) relative error).
"""

import itertools
import math
import warnings
from decimal import Decimal, localcontext

import mdtraj as md
import numpy as np
import pytest

from cvdesign.geometry import GeometryWarning, coordination_pairs, switching_function
from cvdesign.spec import Spec

STEP = 1e-5  # nm
RTOL = 1e-5

# Boxes (rows are box vectors, nm). Their heights (about 2.3 nm and more)
# exceed twice the size of the test molecule (a 0.9 nm cube), so every
# minimum image inside the molecule is its true bond.
ORTHORHOMBIC = np.diag([2.4, 2.6, 2.8])
TRICLINIC = np.array([[2.6, 0.0, 0.0], [0.8, 2.5, 0.0], [-0.6, 0.7, 2.7]])
BOXES = {"no-box": None, "orthorhombic": ORTHORHOMBIC, "triclinic": TRICLINIC}

ELEMENTS = ["C", "N", "O", "S", "H", "C", "O", "N", "C", "H", "P", "C", "O", "C"]
N_ATOMS = len(ELEMENTS)


def molecule_topology():
    """14 atoms of varied elements in two residues, so mass and geometric centers differ."""
    top = md.Topology()
    chain = top.add_chain()
    residues = [top.add_residue("LIG", chain, resSeq=1), top.add_residue("LIG", chain, resSeq=2)]
    for i, symbol in enumerate(ELEMENTS):
        top.add_atom(f"{symbol}{i}", md.element.get_by_symbol(symbol), residues[i // 7])
    return top


TOP = molecule_topology()

# descriptor records by name; atoms chosen to span the molecule
DESCRIPTORS = {
    "distance": {"id": "d", "kind": "distance", "atoms": [0, 9]},
    "angle": {"id": "a", "kind": "angle", "atoms": [1, 4, 7]},
    "dihedral": {"id": "phi", "kind": "dihedral", "atoms": [2, 5, 8, 11]},
    "center_distance_mass": {"id": "com", "kind": "center_distance", "groups": [[0, 1, 2, 3, 4], [8, 9, 10, 11]],
                             "weighting": "mass"},
    "center_distance_geometric": {"id": "geo", "kind": "center_distance", "groups": [[3, 6, 12], [1, 7, 13]],
                                  "weighting": "geometric"},
    "coordination": {"id": "c", "kind": "coordination", "groups": [[0, 2, 4, 6], [5, 7, 9, 11, 13]], "r0": 0.45},
    # overlapping groups with fractional exponents
    "coordination_overlap": {"id": "co", "kind": "coordination", "groups": [[1, 3, 5, 7], [5, 7, 10, 12]],
                             "r0": 0.4, "n": 4.5, "m": 10.25},
}


def term(descriptor_id, transform="identity", center=0.3, scale=0.7, weight=1.3):
    return {"descriptor": descriptor_id, "transform": transform, "center": center, "scale": scale, "weight": weight}


def single_spec(name, transform="identity"):
    desc = DESCRIPTORS[name]
    periodic = desc["kind"] == "dihedral" and transform == "identity"
    return Spec(name=f"cv-{name}-{transform}", topology=TOP, descriptors=[dict(desc)],
                terms=[term(desc["id"], transform, center=0.0 if periodic else 0.3,
                            scale=1.0 if periodic else 0.7, weight=1.0 if periodic else 1.3)],
                periodic=periodic)


def combined_spec():
    """Every kind and every transform in one CV."""
    terms = [term("d", weight=0.8), term("a", weight=-1.1, center=1.9), term("phi", "cos", weight=0.6),
             term("phi", "sin", weight=-0.9, center=-0.1), term("com", weight=0.5), term("geo", weight=1.4),
             term("c", weight=-0.7, center=1.0), term("co", weight=0.35, center=0.5)]
    return Spec(name="cv-all", topology=TOP, descriptors=[dict(d) for d in DESCRIPTORS.values()], terms=terms)


CASES = [
    ("distance", "identity"),
    ("angle", "identity"),
    ("dihedral", "identity"),
    ("dihedral", "cos"),
    ("dihedral", "sin"),
    ("center_distance_mass", "identity"),
    ("center_distance_geometric", "identity"),
    ("coordination", "identity"),
    ("coordination_overlap", "identity"),
]


def _sines(xyz, i, j, k):
    u, v = xyz[:, i] - xyz[:, j], xyz[:, k] - xyz[:, j]
    return np.linalg.norm(np.cross(u, v), axis=-1) / (np.linalg.norm(u, axis=-1) * np.linalg.norm(v, axis=-1))


def well_posed(xyz):
    """Frames whose pair distances are >= 0.1 nm and whose used angles have sine >= 0.2."""
    diff = xyz[:, :, None, :] - xyz[:, None, :, :]
    dist = np.linalg.norm(diff, axis=-1) + np.eye(N_ATOMS) * 10
    ok = dist.min(axis=(1, 2)) >= 0.1
    for i, j, k in [(1, 4, 7), (2, 5, 8), (5, 8, 11)]:
        ok &= _sines(xyz, i, j, k) >= 0.2
    return ok


def molecule(rng, n_frames):
    """Well-posed random frames of the molecule: atoms uniform in a 0.9 nm cube."""
    frames = []
    while len(frames) < n_frames:
        xyz = rng.uniform(0.0, 0.9, size=(4 * n_frames, N_ATOMS, 3))
        frames.extend(xyz[well_posed(xyz)])
    return np.array(frames[:n_frames])


def wrap_into_box(xyz, box):
    """Put every atom into the unit cell (fractional coordinates in [0, 1))."""
    frac = xyz @ np.linalg.inv(box)
    return (frac - np.floor(frac)) @ box


def frames_for(box, rng, n_frames=3):
    """Frames of the molecule; with a box, centered on a cell corner and wrapped, so it is split."""
    xyz = molecule(rng, n_frames)
    if box is None:
        return xyz
    wrapped = wrap_into_box(xyz - xyz.mean(axis=1, keepdims=True), box)
    # the wrap really split the molecule: some raw displacements are not their minimum image
    assert np.abs(wrapped - wrapped[:, :1]).max() > 1.2
    return wrapped


def numeric_gradient(spec, xyz, box, atoms, h=STEP):
    """Central differences of spec.evaluate w.r.t. the listed atoms; (n_frames, n_atoms, 3)."""
    out = np.zeros(xyz.shape)
    period = spec.period
    for a, k in itertools.product(atoms, range(3)):
        plus, minus = xyz.copy(), xyz.copy()
        plus[:, a, k] += h
        minus[:, a, k] -= h
        diff = spec.evaluate(plus, box) - spec.evaluate(minus, box)
        if period is not None:  # a periodic CV: the difference is defined modulo the period
            diff -= period * np.round(diff / period)
        out[:, a, k] = diff / (2 * h)
    return out


def used_atoms(spec):
    atoms = set()
    for d in spec.descriptors:
        atoms.update(d["atoms"] if "atoms" in d else d["groups"][0] + d["groups"][1])
    return sorted(atoms)


def assert_gradient_matches(spec, xyz, box):
    value, grad = spec.evaluate(xyz, box, gradient=True)
    assert value.shape == (xyz.shape[0],) and grad.shape == xyz.shape and grad.dtype == np.float64
    np.testing.assert_allclose(value, spec.evaluate(xyz, box), rtol=0, atol=0)
    atoms = used_atoms(spec)
    numeric = numeric_gradient(spec, xyz, box, atoms)
    unused = np.setdiff1d(np.arange(N_ATOMS), atoms)
    assert np.all(grad[:, unused] == 0.0)
    scale = np.abs(numeric).max(axis=(1, 2))
    error = np.abs(grad - numeric).max(axis=(1, 2))
    assert np.all(scale > 0)
    assert np.all(error <= RTOL * scale), f"relative errors {error / scale}"


# --------------------------------------------------------------------------
# finite differences


@pytest.mark.parametrize("box_name", list(BOXES))
@pytest.mark.parametrize(("name", "transform"), CASES, ids=[f"{n}-{t}" for n, t in CASES])
def test_gradient_equals_central_differences(name, transform, box_name):
    rng = np.random.default_rng(100 + 10 * CASES.index((name, transform)) + list(BOXES).index(box_name))
    box = BOXES[box_name]
    assert_gradient_matches(single_spec(name, transform), frames_for(box, rng), box)


@pytest.mark.parametrize("box_name", list(BOXES))
def test_gradient_of_a_combination_of_every_kind_equals_central_differences(box_name):
    box = BOXES[box_name]
    assert_gradient_matches(combined_spec(), frames_for(box, np.random.default_rng(7), n_frames=4), box)


def test_gradient_with_one_box_per_frame():
    rng = np.random.default_rng(8)
    xyz = molecule(rng, 3)
    boxes = np.array([TRICLINIC, TRICLINIC * 1.1, ORTHORHOMBIC])
    wrapped = np.array([wrap_into_box(x - x.mean(axis=0), b) for x, b in zip(xyz, boxes)])
    spec = combined_spec()
    assert_gradient_matches(spec, wrapped, boxes)
    # and the wrapped molecule has the values and gradients of the whole one
    v0, g0 = spec.evaluate(xyz, gradient=True)
    v1, g1 = spec.evaluate(wrapped, boxes, gradient=True)
    np.testing.assert_allclose(v1, v0, atol=1e-10)
    np.testing.assert_allclose(g1, g0, atol=1e-8)


def test_dihedral_gradient_is_smooth_across_the_jump_at_pi():
    # phi just below +pi and just above -pi: values jump by 2 pi, gradients agree
    spec = single_spec("dihedral", "identity")
    base = molecule(np.random.default_rng(9), 1)[0]
    frames = []
    for phi in (math.pi - 1e-7, -math.pi + 1e-7):
        xyz = base.copy()
        xyz[[2, 5, 8, 11]] = [[1.0, 0.0, 0.0], [0.0, 0.0, 0.0], [0.0, 0.0, 0.15],
                              [math.cos(phi), math.sin(phi), 0.15]]
        frames.append(xyz * 0.3)
    value, grad = spec.evaluate(np.array(frames), gradient=True)
    np.testing.assert_allclose(value, [math.pi - 1e-7, -math.pi + 1e-7], atol=1e-12)
    np.testing.assert_allclose(grad[0], grad[1], atol=1e-5)
    assert np.abs(grad).max() > 1.0


# --------------------------------------------------------------------------
# invariances


def random_rotation(rng):
    q, r = np.linalg.qr(rng.normal(size=(3, 3)))
    q = q * np.sign(np.diag(r))
    if np.linalg.det(q) < 0:
        q[:, 0] = -q[:, 0]
    return q


@pytest.mark.parametrize("box_name", list(BOXES))
def test_values_and_gradients_are_invariant_under_rigid_translation(box_name):
    box = BOXES[box_name]
    spec = combined_spec()
    xyz = frames_for(box, np.random.default_rng(10))
    v0, g0 = spec.evaluate(xyz, box, gradient=True)
    v1, g1 = spec.evaluate(xyz + [3.7, -1.2, 0.45], box, gradient=True)
    np.testing.assert_allclose(v1, v0, atol=1e-10)
    np.testing.assert_allclose(g1, g0, atol=1e-8)


@pytest.mark.parametrize("box_name", ["no-box", "triclinic"])
def test_values_are_invariant_and_gradients_rotate_under_rigid_rotation(box_name):
    # x' = x R^T (rows are positions), so the gradient rotates the same way: g' = g R^T;
    # with a box, the box vectors (rows) are rotated too.
    box = BOXES[box_name]
    rng = np.random.default_rng(11)
    spec = combined_spec()
    xyz = frames_for(box, rng)
    rotation = random_rotation(rng)
    # with a frame axis: a rotated box is not lower-triangular, and (3, 3) for 3 frames is ambiguous
    rotated_box = None if box is None else np.tile(box @ rotation.T, (len(xyz), 1, 1))
    v0, g0 = spec.evaluate(xyz, box, gradient=True)
    v1, g1 = spec.evaluate(xyz @ rotation.T, rotated_box, gradient=True)
    np.testing.assert_allclose(v1, v0, atol=1e-10)
    np.testing.assert_allclose(g1, g0 @ rotation.T, atol=1e-8)


@pytest.mark.parametrize("box_name", ["orthorhombic", "triclinic"])
def test_values_and_gradients_are_invariant_under_shifting_atoms_by_box_vectors(box_name):
    box = BOXES[box_name]
    spec = combined_spec()
    xyz = frames_for(box, np.random.default_rng(12))
    shifted = xyz.copy()
    shifted[:, 0] += box[0] - 2 * box[1]  # the first atom of two groups
    shifted[:, 5] += box[2]
    shifted[:, 9] -= box[0] + box[1] + box[2]
    v0, g0 = spec.evaluate(xyz, box, gradient=True)
    v1, g1 = spec.evaluate(shifted, box, gradient=True)
    np.testing.assert_allclose(v1, v0, atol=1e-10)
    np.testing.assert_allclose(g1, g0, atol=1e-8)


def test_gradient_has_no_net_force_or_torque_without_a_box():
    # every descriptor depends on relative positions only and is rotation invariant,
    # so the gradient sums to zero and carries no torque (common practice)
    spec = combined_spec()
    xyz = molecule(np.random.default_rng(13), 4)
    _, grad = spec.evaluate(xyz, gradient=True)
    np.testing.assert_allclose(grad.sum(axis=1), 0.0, atol=1e-9)
    np.testing.assert_allclose(np.cross(xyz, grad).sum(axis=1), 0.0, atol=1e-9)


# --------------------------------------------------------------------------
# agreement with mdtraj


@pytest.mark.parametrize("box_name", list(BOXES))
def test_evaluator_values_agree_with_mdtraj(box_name):
    box = BOXES[box_name]
    xyz = frames_for(box, np.random.default_rng(14), n_frames=5)
    traj = md.Trajectory(xyz.astype(np.float32), TOP)
    ours_box = None
    if box is not None:
        traj.unitcell_vectors = np.tile(box, (len(xyz), 1, 1)).astype(np.float32)
        ours_box = traj.unitcell_vectors.astype(np.float64)
    same = traj.xyz.astype(np.float64)  # the same float32-rounded frames for both
    periodic = box is not None
    pairs = np.array(list(itertools.combinations(range(N_ATOMS), 2)))
    triples = np.array([[1, 4, 7], [0, 2, 3], [9, 12, 5], [6, 10, 13]])
    quads = np.array([[2, 5, 8, 11], [0, 3, 6, 9], [13, 1, 4, 10]])
    descriptors = (
        [{"id": f"d{i}", "kind": "distance", "atoms": p.tolist()} for i, p in enumerate(pairs)]
        + [{"id": f"a{i}", "kind": "angle", "atoms": t.tolist()} for i, t in enumerate(triples)]
        + [{"id": f"q{i}", "kind": "dihedral", "atoms": q.tolist()} for i, q in enumerate(quads)]
    )
    spec = Spec(name="cv-many", topology=TOP, descriptors=descriptors, terms=[term("d0")])
    values = spec.descriptor_values(same, ours_box)
    n_d, n_a = len(pairs), len(triples)
    np.testing.assert_allclose(values[:, :n_d], md.compute_distances(traj, pairs, periodic=periodic), atol=1e-5)
    np.testing.assert_allclose(values[:, n_d:n_d + n_a], md.compute_angles(traj, triples, periodic=periodic), atol=1e-4)
    theirs = md.compute_dihedrals(traj, quads, periodic=periodic)
    difference = np.abs((values[:, n_d + n_a:] - theirs + np.pi) % (2 * np.pi) - np.pi)
    np.testing.assert_allclose(difference, 0.0, atol=1e-4)
    if box is not None:
        # the evaluator sees through the boundary: without the box the values differ
        assert not np.allclose(spec.descriptor_values(same)[:, :n_d], values[:, :n_d], atol=1e-3)


def test_center_of_mass_distance_agrees_with_mdtraj_centers_of_mass():
    # mdtraj.compute_center_of_mass weights by the element masses of the topology,
    # which is where the spec's stored masses come from
    xyz = molecule(np.random.default_rng(15), 5)
    traj = md.Trajectory(xyz.astype(np.float32), TOP)
    same = traj.xyz.astype(np.float64)
    spec = single_spec("center_distance_mass")
    group_a, group_b = spec.descriptors[0]["groups"]
    com_a = md.compute_center_of_mass(traj.atom_slice(group_a))
    com_b = md.compute_center_of_mass(traj.atom_slice(group_b))
    np.testing.assert_allclose(spec.descriptor_values(same)[:, 0], np.linalg.norm(com_b - com_a, axis=1), atol=1e-5)


# --------------------------------------------------------------------------
# the switching function at and near r0


# s(r) = (1 - x^n) / (1 - x^m), x = r / r0, is 0/0 at r = r0. With x = 1 + e,
# 1 - x^k = -k e (1 + (k-1)/2 e + O(e^2)), so
# s = (n/m) (1 + (n-1)/2 e) / (1 + (m-1)/2 e) + O(e^2) = (n/m) (1 + (n - m)/2 e) + O(e^2):
# s(r0) = n/m and s'(r0) = (n/m) (n - m) / 2 / r0 = n (n - m) / (2 m r0)
# (derived by hand, a first-order expansion of the binomial series).
EXPONENTS = [(6, 12), (8, 16), (4.5, 10.25), (0.5, 0.75), (1, 3), (50, 100), (6, 1000)]


@pytest.mark.parametrize(("n", "m"), EXPONENTS)
def test_switching_function_at_r0_equals_its_analytic_limits(n, m):
    r0 = 0.37
    s, ds = switching_function(r0, r0, n, m, derivative=True)
    assert float(s) == pytest.approx(n / m, rel=1e-15)
    assert float(ds) == pytest.approx(n * (n - m) / (2 * m * r0), rel=1e-15)


def exact_switch(r, r0, n, m):
    """s and ds/dr from the closed forms in 200-digit decimal arithmetic.

    ds/dx = (-n x^(n-1) (1 - x^m) + m x^(m-1) (1 - x^n)) / (1 - x^m)^2 (quotient rule).
    Near x = 1 both are 0/0-like, but 200 digits leave far more than 16 correct
    digits for |x - 1| >= 1e-12, the closest point tested.
    """
    with localcontext() as ctx:
        ctx.prec = 200
        x = Decimal(repr(r)) / Decimal(repr(r0))
        n, m = Decimal(repr(float(n))), Decimal(repr(float(m)))
        xn, xm = x**n, x**m
        s = (1 - xn) / (1 - xm)
        ds = (-n * xn / x * (1 - xm) + m * xm / x * (1 - xn)) / (1 - xm) ** 2 / Decimal(repr(r0))
        return float(s), float(ds)


@pytest.mark.parametrize(("n", "m"), EXPONENTS)
def test_switching_function_matches_high_precision_arithmetic_near_and_far_from_r0(n, m):
    # both sides of the series' range |x - 1| max(m, 1) < 2e-3, its edges, and far away;
    # tolerances: 1e-13 for values; 1e-11 for derivatives (the direct formula's
    # derivative loses digits to cancellation just outside the series' range)
    r0 = 0.37
    edge = 2e-3 / max(m, 1)
    rel = [1e-12, -3e-9, 1e-6, 0.5 * edge, -0.999 * edge, 1.001 * edge, -1.001 * edge, 3 * edge, -0.02, 0.3, -0.5,
           1.7, -0.95]
    for e in rel:
        r = r0 * (1 + e)
        s, ds = switching_function(r, r0, n, m, derivative=True)
        es, eds = exact_switch(r, r0, n, m)
        assert float(s) == pytest.approx(es, rel=1e-13), (e, s, es)
        assert float(ds) == pytest.approx(eds, rel=1e-11), (e, ds, eds)


def test_switching_function_at_zero_and_far_away():
    s, ds = switching_function([0.0, 1e3], 0.3, derivative=True)
    assert s[0] == 1.0 and ds[0] == 0.0
    # far away s ~ x^(n - m) = x^-6 and ds/dr ~ -6 x^-6 / r, to relative order x^-6
    x = 1e3 / 0.3
    assert s[1] == pytest.approx(x**-6, rel=1e-12) and ds[1] == pytest.approx(-6 * x**-6 / 1e3, rel=1e-12)
    s, ds = switching_function(0.0, 0.3, n=1, m=2, derivative=True)
    assert float(ds) == pytest.approx(-1 / 0.3)
    assert np.isfinite(switching_function(1e300, 1e-300))


def test_coordination_gradient_at_exactly_r0():
    # a single pair exactly at r0 along x: the value is n/m, the derivative n (n - m) / (2 m r0)
    r0 = 0.4
    xyz = np.zeros((1, N_ATOMS, 3)) + np.arange(N_ATOMS)[None, :, None] * 2.0
    xyz[0, 0] = [0.0, 0.0, 0.0]
    xyz[0, 1] = [r0, 0.0, 0.0]
    spec = Spec(name="cv-pair", topology=TOP,
                descriptors=[{"id": "c", "kind": "coordination", "groups": [[0], [1]], "r0": r0}],
                terms=[term("c", center=0.0, scale=1.0, weight=1.0)])
    value, grad = spec.evaluate(xyz, gradient=True)
    assert value[0] == pytest.approx(0.5, rel=1e-15)
    np.testing.assert_allclose(grad[0, 1], [6 * (6 - 12) / (2 * 12 * r0), 0, 0], rtol=1e-14)
    np.testing.assert_allclose(grad[0, 0], -grad[0, 1], rtol=1e-14)


def test_coordination_counts_each_pair_of_distinct_atoms_once():
    assert coordination_pairs([0, 1, 2], [1, 2, 3]).tolist() == [[0, 1], [0, 2], [0, 3], [1, 2], [1, 3], [2, 3]]
    assert coordination_pairs([4], [4, 5]).tolist() == [[4, 5]]
    # a group against itself counts every unordered pair once: n (n - 1) / 2 pairs
    assert len(coordination_pairs(range(6), range(6))) == 15


# --------------------------------------------------------------------------
# singular geometries: finite values, a warning, no NaN


def base_frame():
    """One well-posed frame, into which the singular cases place a few atoms."""
    return molecule(np.random.default_rng(16), 1)


SINGULAR = {
    "straight angle": ("angle", {1: [0.0, 0, 0], 4: [0.2, 0, 0], 7: [0.5, 0, 0]}, np.pi,
                       r"angles: the gradient of 1 of 1 values is undefined \(three collinear atoms, angle 0 or pi\)"),
    "zero angle": ("angle", {1: [0.4, 0, 0], 4: [0.1, 0, 0], 7: [0.3, 0, 0]}, 0.0,
                   r"angles: the gradient of 1 of 1 values is undefined"),
    "coincident angle arm": ("angle", {1: [0.1, 0.2, 0], 4: [0.1, 0.2, 0], 7: [0.3, 0, 0]}, np.pi / 2,
                             r"angles: 1 of 1 values are undefined \(an arm has zero length\); they were set to pi/2 \(gradient 0\)"),
    "coincident atoms": ("distance", {0: [0.3, 0.3, 0.3], 9: [0.3, 0.3, 0.3]}, 0.0,
                         r"distances: the gradient of 1 of 1 values is undefined \(coincident atoms\); it was set to 0"),
    "collinear dihedral": ("dihedral", {2: [0.0, 0.1, 0], 5: [0.0, 0, 0], 8: [0.15, 0, 0], 11: [0.3, 0, 0]}, 0.0,
                           r"dihedrals: 1 of 1 values are undefined \(collinear or coincident atoms\); they were set to 0 \(gradient 0\)"),
}


@pytest.mark.parametrize("case", list(SINGULAR))
def test_singular_geometry_gives_finite_values_zero_gradient_and_a_warning(case):
    name, positions, expected, message = SINGULAR[case]
    transforms = ["identity", "cos", "sin"] if name == "dihedral" else ["identity"]
    for transform in transforms:
        spec = single_spec(name, transform)
        xyz = base_frame()
        for atom, where in positions.items():
            xyz[0, atom] = where
        with pytest.warns(GeometryWarning, match=message):
            value, grad = spec.evaluate(xyz, gradient=True)
        assert np.all(np.isfinite(value)) and np.all(np.isfinite(grad))
        assert np.all(grad == 0.0)
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", GeometryWarning)
            assert spec.descriptor_values(xyz)[0, 0] == pytest.approx(expected, abs=1e-12)


def test_coincident_centers_and_coincident_pairs_warn_and_stay_finite():
    xyz = base_frame()
    xyz[0, [3, 6, 12]] = [[0.1, 0, 0], [-0.1, 0, 0], [0.0, 0.3, 0]]
    xyz[0, [1, 7, 13]] = [[0.0, 0.2, 0], [0.0, -0.1, 0], [0.0, 0.2, 0]]  # the same geometric center
    with pytest.warns(GeometryWarning, match=r"center_distance: the gradient of 1 of 1 values is undefined \(the two centers coincide\)"):
        value, grad = single_spec("center_distance_geometric").evaluate(xyz, gradient=True)
    assert np.all(np.isfinite(grad)) and np.all(grad == 0.0) and np.isfinite(value).all()
    xyz = base_frame()
    xyz[0, 5] = xyz[0, 0]  # atoms 0 and 5 of the two coordination groups coincide
    spec = single_spec("coordination")
    with pytest.warns(GeometryWarning, match=r"coordination: the gradient of 1 of 20 values is undefined \(two atoms of a pair coincide\); it was set to 0\. First: frame 0, pair of atoms \[0, 5\]"):
        value, grad = spec.evaluate(xyz, gradient=True)
    assert np.all(np.isfinite(grad)) and np.isfinite(value).all()
    # the coincident pair counts s(0) = 1, and the other pairs keep their gradient
    moved = xyz.copy()
    moved[0, 5] += [1e-3, 0, 0]
    assert value[0] == pytest.approx(spec.evaluate(moved)[0], abs=1e-2)
    assert np.abs(grad).max() > 0


def test_well_posed_geometry_gives_no_warning():
    spec = combined_spec()
    xyz = molecule(np.random.default_rng(17), 3)
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        spec.evaluate(xyz, TRICLINIC, gradient=True)
