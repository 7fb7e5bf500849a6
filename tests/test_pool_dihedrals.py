"""A dihedral's pool features (cos, sin) against mdtraj's dihedrals on real protein data.

`Pool.features` forms cos and sin of a dihedral from mdtraj's bond vectors without the
angle (`cvdesign.pool.features._dihedral_cos_sin`, the atan2 arguments of Blondel and
Karplus, J. Comput. Chem. 17, 1132-1141, 1996). These tests check it against the cos and
sin of `mdtraj.compute_dihedrals` and of `cvdesign.geometry.dihedrals` (float64) on
adenylate kinase from the MDAnalysis test data (Beckstein et al., J. Mol. Biol. 2009; the
solvated copy in a triclinic box, adk_oplsaa, whose protein is split by the boundary),
without and with periodic boxes, and that a frame's values do not depend on the frames
or the blocks it is computed with.
"""

import warnings

import mdtraj as md
import numpy as np
import pytest

from cvdesign.geometry import GeometryWarning
from cvdesign.geometry import dihedrals as reference_dihedrals
from cvdesign.io.source import select_atoms
from cvdesign.pool import Descriptor, Pool, candidate_pool
from cvdesign.pool import features as features_module

# Both sides work in float32 (mdtraj's coordinates and geometry); float32 rounding of
# bond vectors of ~0.15 nm leaves errors of a few 1e-7 in cos and sin, more for nearly
# collinear bonds. 1e-5 is far below any real difference (a wrong image or a sign flip
# moves a value by order 1).
ATOL = 1e-5


@pytest.fixture(scope="module")
def adk_fragment(mda_data):
    """Heavy atoms of residues 0-39 of adenylate kinase (adk.psf / adk_dims.dcd), 12 frames
    spread over the closed-to-open transition, and the pool of their dihedrals."""
    top = md.load_topology(str(mda_data / "adk.psf"))
    traj = md.load(str(mda_data / "adk_dims.dcd"), top=top)[::8]
    atoms = select_atoms(top, "not element H and resid 0 to 39")
    pool = candidate_pool(top, atoms, kinds=("dihedral",))
    assert traj.n_frames == 13 and len(pool) > 100
    return traj, pool


def _quads(pool):
    return np.array([d.atoms for d in pool.descriptors], dtype=np.intp)


def _cos_sin(angles):
    """Interleaved (cos, sin) columns, the pool's order, from angles in rad."""
    angles = np.asarray(angles, dtype=np.float64)
    return np.stack([np.cos(angles), np.sin(angles)], axis=2).reshape(len(angles), -1)


def test_dihedral_cos_sin_match_mdtraj_and_the_float64_reference_on_adenylate_kinase(
        adk_fragment):
    traj, pool = adk_fragment
    quads = _quads(pool)
    got = pool.features(traj)
    assert got.dtype == np.float64 and got.shape == (traj.n_frames, 2 * len(quads))
    np.testing.assert_allclose(got, _cos_sin(md.compute_dihedrals(traj, quads)),
                               rtol=0, atol=ATOL)
    np.testing.assert_allclose(got, _cos_sin(reference_dihedrals(traj.xyz, quads)),
                               rtol=0, atol=ATOL)
    # points on the unit circle, and every quadrant is visited (the check can see a
    # swapped or negated component)
    np.testing.assert_allclose(got[:, 0::2] ** 2 + got[:, 1::2] ** 2, 1.0, rtol=0, atol=1e-6)
    signs = {(bool(c > 0.1), bool(s > 0.1)) for c, s in zip(got[:, 0::2].ravel(),
                                                            got[:, 1::2].ravel())}
    assert len(signs) == 4


def test_a_frames_dihedral_features_do_not_depend_on_its_chunk_or_the_blocks(
        adk_fragment, monkeypatch):
    traj, pool = adk_fragment
    whole = pool.features(traj)
    single = np.concatenate([pool.features(traj[i]) for i in range(traj.n_frames)])
    assert np.array_equal(whole, single)
    assert np.array_equal(pool.features(traj[2:9]), whole[2:9])
    # blocks of 7 (frame, dihedral) values: several blocks along the dihedrals of a frame
    monkeypatch.setattr(features_module, "_DIHEDRALS_PER_BLOCK", 7)
    assert np.array_equal(pool.features(traj), whole)
    # 3 frames per block of all the dihedrals
    monkeypatch.setattr(features_module, "_DIHEDRALS_PER_BLOCK", 3 * len(pool))
    assert np.array_equal(pool.features(traj[2:9]), whole[2:9])


def test_a_degenerate_frame_does_not_change_the_bytes_of_the_frames_beside_it(adk_fragment):
    # A frame with every atom at one point (every dihedral undefined, |A||B| = 0) in the
    # same chunk and block as real frames: the real frames keep their bytes (a fallback
    # for squares out of float32's range must act on those values alone, not on the block).
    traj, pool = adk_fragment
    collapsed = md.Trajectory(np.concatenate([traj.xyz, np.zeros_like(traj.xyz[:1])]),
                              traj.topology)
    with pytest.warns(GeometryWarning, match="undefined in some frames"):
        got = pool.features(collapsed)
    assert np.array_equal(got[:-1], pool.features(traj))
    assert np.array_equal(got[-1], np.tile([1.0, 0.0], len(pool)))


def test_dihedral_features_in_a_mixed_pool_land_in_their_own_columns(adk_fragment):
    # Dihedrals between distances: their columns are not evenly spaced (a scatter).
    traj, pool = adk_fragment
    rng = np.random.default_rng(3)
    dihedrals = [pool.descriptors[i] for i in rng.choice(len(pool), 20, replace=False)]
    pairs = [Descriptor("distance", (int(a), int(b)), f"d{k}")
             for k, (a, b) in enumerate(rng.choice(pool.atom_indices(), (20, 2)))
             if a != b]
    mixed = Pool([d for pair in zip(dihedrals, pairs) for d in pair], traj.topology)
    got = mixed.features(traj)
    kinds = np.array([mixed.descriptors[i].kind for i in mixed.feature_descriptor])
    np.testing.assert_array_equal(got[:, kinds == "dihedral"],
                                  Pool(dihedrals, traj.topology).features(traj))
    np.testing.assert_array_equal(
        got[:, kinds == "distance"],
        md.compute_distances(traj, [d.atoms for d in mixed.descriptors if d.kind == "distance"]))


def test_an_undefined_dihedral_gives_cos_1_sin_0_as_mdtraj_angle_0_with_a_warning():
    # mdtraj's compute_dihedrals and the spec's evaluator (cvdesign.geometry.dihedrals)
    # give 0 rad there; the evaluator warns, and so must the pool (it had been silent)
    top = md.Topology()
    res = top.add_residue("X", top.add_chain(), 1)
    for i in range(4):
        top.add_atom(f"C{i}", md.element.carbon, res)
    xyz = np.array([[[0, 0, 0], [1, 0, 0], [2, 0, 0], [2, 1, 0]],  # a, b, c collinear
                    [[0, 0, 0], [1, 0, 0], [1, 0, 0], [2, 1, 0]],  # b and c coincide
                    [[1, 0, 0], [0, 0, 0], [0, 0, 1], [0, 1, 1]]],  # +90 degrees
                   dtype=np.float32)
    traj = md.Trajectory(xyz, top)
    pool = Pool([Descriptor("dihedral", (0, 1, 2, 3), "t")], top)
    assert md.compute_dihedrals(traj, [[0, 1, 2, 3]])[:2, 0].tolist() == [0.0, 0.0]
    with pytest.warns(GeometryWarning, match=r"dihedral descriptor of atoms \[0, 1, 2, 3\] "
                      r"\(and any other named in a warning like this\): undefined in some "
                      r"frames \(collinear or coincident atoms\); set to 0 rad \(cos 1, sin "
                      r"0\) there, as the spec's evaluator does"):
        got = pool.features(traj)
    np.testing.assert_allclose(got, [[1, 0], [1, 0], [0, 1]], atol=1e-7)
    with pytest.warns(GeometryWarning, match="dihedrals: 2 of 3 values are undefined"):
        assert reference_dihedrals(xyz.astype(np.float64), [[0, 1, 2, 3]])[:2, 0].tolist() \
            == [0.0, 0.0]
    with warnings.catch_warnings():  # a defined dihedral: no warning
        warnings.simplefilter("error")
        pool.features(traj[2:])


def test_dihedral_cos_sin_of_tiny_and_huge_bonds_keep_their_angle():
    # Bonds of 1e-8 nm and 1e6 nm: the squares behind |A| |B| leave float32's range, and
    # the cos and sin must still be those of the angle (+60 degrees).
    top = md.Topology()
    res = top.add_residue("X", top.add_chain(), 1)
    for i in range(4):
        top.add_atom(f"C{i}", md.element.carbon, res)
    s = np.sqrt(3) / 2
    shape = np.array([[1, 0, 0], [0, 0, 0], [0, 0, 1], [0.5, s, 1]])
    traj = md.Trajectory(np.stack([1e-8 * shape, 1e6 * shape]).astype(np.float32), top)
    got = Pool([Descriptor("dihedral", (0, 1, 2, 3), "t")], top).features(traj)
    np.testing.assert_allclose(got, [[0.5, s], [0.5, s]], rtol=0, atol=1e-6)


def test_dihedrals_across_an_orthorhombic_boundary_use_the_minimum_image(adk_fragment):
    # The fragment wrapped into a 3 nm box (smaller than the protein: many bonds cross
    # it) gives the features of the unwrapped fragment.
    traj, pool = adk_fragment
    box = np.array([3.0, 3.2, 3.4], dtype=np.float32)
    wrapped = md.Trajectory(np.mod(traj.xyz, box), traj.topology,
                            unitcell_lengths=np.tile(box, (traj.n_frames, 1)),
                            unitcell_angles=np.full((traj.n_frames, 3), 90.0))
    quads = _quads(pool)
    plain = md.compute_dihedrals(wrapped, quads, periodic=False)
    crossing = np.abs(np.cos(plain) - np.cos(md.compute_dihedrals(traj, quads))) > 0.1
    assert crossing.any(axis=0).sum() > 20
    got = pool.features(wrapped)
    np.testing.assert_allclose(got, pool.features(traj), rtol=0, atol=ATOL)
    np.testing.assert_allclose(got, _cos_sin(md.compute_dihedrals(wrapped, quads)),
                               rtol=0, atol=ATOL)


def test_dihedrals_on_the_triclinic_box_of_solvated_adenylate_kinase(mda_data):
    # adk_oplsaa: 10 frames in a triclinic box (angles 60, 60, 90 degrees), the protein
    # split by the boundary. Reference: mdtraj's periodic dihedrals and cvdesign.geometry's
    # (exact minimum image, float64), both on the same atoms.
    gro = str(mda_data / "adk_oplsaa.gro")
    top = md.load_topology(gro)
    atoms = select_atoms(top)
    traj = md.load(str(mda_data / "adk_oplsaa.xtc"), top=gro, atom_indices=atoms)
    assert not np.allclose(traj.unitcell_angles, 90)
    pool = candidate_pool(traj.topology, np.arange(traj.n_atoms), kinds=("dihedral",))
    quads = _quads(pool)
    periodic = md.compute_dihedrals(traj, quads, periodic=True)
    plain = md.compute_dihedrals(traj, quads, periodic=False)
    crossing = np.abs(np.exp(1j * periodic) - np.exp(1j * plain)).max(axis=0) > 0.1
    assert crossing.sum() > 50
    got = pool.features(traj)
    np.testing.assert_allclose(got, _cos_sin(periodic), rtol=0, atol=ATOL)
    np.testing.assert_allclose(
        got, _cos_sin(reference_dihedrals(traj.xyz, quads, traj.unitcell_vectors)),
        rtol=0, atol=ATOL)
