"""Candidate enumeration on hand-built molecules with hand-counted answers."""

import re

import mdtraj as md
import numpy as np
import pytest

from cvdesign.errors import InputError
from cvdesign.pool import Descriptor, Pool, candidate_pairs, candidate_pool
from cvdesign.io.source import select_atoms


def _topology(n_heavy, bonds, *, hydrogens=(), water=False, ion=False):
    top = md.Topology()
    ch = top.add_chain()
    res = top.add_residue("MOL", ch, 7)
    atoms = [top.add_atom(f"C{i}", md.element.carbon, res) for i in range(n_heavy)]
    for parent in hydrogens:
        h = top.add_atom(f"H{parent}", md.element.hydrogen, res)
        top.add_bond(atoms[parent], h)
    for a, b in bonds:
        top.add_bond(atoms[a], atoms[b])
    if water:
        w = top.add_residue("HOH", ch, 8)
        o = top.add_atom("O", md.element.oxygen, w)
        for name in ("H1", "H2"):
            top.add_bond(o, top.add_atom(name, md.element.hydrogen, w))
    if ion:
        top.add_atom("NA", md.element.sodium, top.add_residue("NA", ch, 9))
    return top


def test_default_selection_is_solute_heavy_atoms():
    top = _topology(3, [(0, 1), (1, 2)], hydrogens=(0, 2), water=True, ion=True)
    assert select_atoms(top).tolist() == [0, 1, 2]


def test_selection_matching_no_atoms_is_refused_with_the_selection_named():
    top = _topology(3, [(0, 1)])
    with pytest.raises(InputError, match=r"selection 'name CA' matches no atoms"):
        select_atoms(top, "name CA")
    with pytest.raises(InputError, match=r"invalid atom selection 'name =='"):
        select_atoms(top, "name ==")


def test_ring_bonds_are_not_rotatable_but_the_bond_to_a_substituent_chain_is():
    # Six-ring 0..5, chain 0-6-7-8: rotatable bonds are 0-6 and 6-7 (bridges whose ends
    # both have other heavy neighbours); 7-8 ends in a terminal atom.
    ring = [(i, (i + 1) % 6) for i in range(6)]
    top = _topology(9, ring + [(0, 6), (6, 7), (7, 8)])
    pool = candidate_pool(top, range(9), kinds=("dihedral",))
    assert [d.atoms for d in pool.descriptors] == [(0, 6, 7, 8), (1, 0, 6, 7)]


def test_angles_are_all_bonded_triples():
    # A branched centre with three neighbours has 3 angles; chain ends have none.
    top = _topology(4, [(0, 1), (1, 2), (1, 3)])
    pool = candidate_pool(top, range(4), kinds=("angle",))
    assert sorted(d.atoms for d in pool.descriptors) == [(0, 1, 2), (0, 1, 3), (2, 1, 3)]


def test_pairs_within_two_bonds_are_left_out():
    top = _topology(5, [(0, 1), (1, 2), (2, 3), (3, 4)])
    pairs, note = candidate_pairs(top, range(5))
    assert pairs.tolist() == [[0, 3], [0, 4], [1, 4]]
    assert "7 pairs within two bonds left out" in note


def test_no_bonds_gives_a_note_instead_of_angles():
    top = _topology(4, [])
    pool = candidate_pool(top, range(4))
    assert all(d.kind == "distance" for d in pool.descriptors)
    assert len(pool.descriptors) == 6
    assert any("no bonds" in n for n in pool.notes)


def test_labels_and_ids_are_stable_and_readable():
    top = _topology(4, [(0, 1), (1, 2), (2, 3)])
    pool = candidate_pool(top, range(4))
    d = {x.id: x.label for x in pool.descriptors}
    assert d["dihedral:0-1-2-3"] == "dihedral MOL7:C0-C1-C2-C3"
    assert d["distance:0-3"] == "dist MOL7:C0-C3"


def test_dihedral_features_are_cos_and_sin_of_the_mdtraj_dihedral():
    top = _topology(4, [(0, 1), (1, 2), (2, 3)])
    rng = np.random.default_rng(0)
    traj = md.Trajectory(rng.normal(size=(20, 4, 3)).astype(np.float32), top)
    pool = Pool([Descriptor("dihedral", (0, 1, 2, 3), "t")], top)
    phi = md.compute_dihedrals(traj, [[0, 1, 2, 3]])[:, 0]
    np.testing.assert_allclose(pool.features(traj), np.c_[np.cos(phi), np.sin(phi)], atol=1e-6)


def test_unknown_kind_is_refused():
    top = _topology(2, [])
    with pytest.raises(InputError, match="unknown descriptor kinds"):
        candidate_pool(top, range(2), kinds=("torsion",))


def test_backbone_and_side_chain_dihedrals_match_mdtraj_on_adenylate_kinase(mda_data):
    # Real protein topology (adk.psf, MDAnalysis test data; Beckstein et al. 2009) against
    # mdtraj's own phi/psi/chi1 definitions. Proline phi is about a bond in the
    # pyrrolidine ring, which is not rotatable, so it is rightly absent.
    top = md.load_topology(str(mda_data / "adk.psf"))
    traj = md.load_frame(str(mda_data / "adk_dims.dcd"), 0, top=top)
    pool = candidate_pool(top, select_atoms(top), kinds=("dihedral",))
    by_bond = {d.atoms[1:3]: d.atoms for d in pool.descriptors}
    phi, _ = md.compute_phi(traj)
    psi, _ = md.compute_psi(traj)
    chi1, _ = md.compute_chi1(traj)
    for kind, quads in (("phi", phi), ("psi", psi), ("chi1", chi1)):
        missing = []
        for q in map(tuple, quads.tolist()):
            bond = tuple(sorted(q[1:3]))
            got = by_bond.get(bond)
            if got is None:
                missing.append(q)
                continue
            if top.atom(q[1]).residue.index == 0:
                continue  # N-terminus: no previous residue, any neighbour is fine
            if kind == "chi1":
                # At CA both N and C lead into the backbone; near the N-terminus the
                # larger branch is C. Either gives a valid chi1; the side-chain atom
                # must be mdtraj's.
                assert got[1:] == q[1:] or got[::-1][1:] == q[1:], [str(top.atom(i)) for i in q]
                continue
            assert got in (q, q[::-1]), (kind, [str(top.atom(i)) for i in q])
        if kind == "phi":
            assert {top.atom(q[2]).residue.name for q in missing} == {"PRO"}
        else:
            assert all(top.atom(q[1]).residue.name == "PRO" for q in missing), kind


def test_a_large_ring_closed_by_a_cross_link_keeps_its_torsions():
    # A 12-atom chain closed into a 12-membered cycle by one extra bond: its bonds are
    # in a ring larger than eight, so they stay rotatable; a 6-ring's bonds do not.
    chain = [(i, i + 1) for i in range(11)]
    top = _topology(12, chain + [(0, 11)])
    pool = candidate_pool(top, range(12), kinds=("dihedral",))
    assert len(pool.descriptors) == 12


def test_features_of_equals_a_mask_over_the_pool():
    """features_of (contiguous ranges per descriptor) equals selecting by a boolean mask
    over feature_descriptor, for repeated, unsorted and negative indices."""
    top = md.Topology()
    res = top.add_residue("X", top.add_chain(), 1)
    for i in range(8):
        top.add_atom(f"C{i}", md.element.carbon, res)
    rng = np.random.default_rng(5)
    descs = {}
    for _ in range(60):
        kind = str(rng.choice(["distance", "angle", "dihedral"]))
        n = {"distance": 2, "angle": 3, "dihedral": 4}[kind]
        d = Descriptor(kind, tuple(int(x) for x in rng.choice(8, n, replace=False)), "x")
        descs[d.id] = d
    pool = Pool(list(descs.values()), top)
    for _ in range(100):
        ix = rng.choice(len(pool), rng.integers(0, 12))
        if rng.random() < 0.3:
            ix = ix - len(pool)
        want = np.zeros(len(pool), dtype=bool)
        want[ix] = True
        np.testing.assert_array_equal(pool.features_of(ix),
                                      np.flatnonzero(want[pool.feature_descriptor]))
    with pytest.raises(IndexError):
        pool.features_of([len(pool)])


def test_labels_stay_unique_when_atom_names_repeat():
    # Two atoms named C in one residue, and a second residue with the same name and
    # number: every descriptor label must still be unique, the repeats telling their
    # atoms apart by index.
    top = md.Topology()
    ch = top.add_chain()
    res = top.add_residue("LIG", ch, 1)
    atoms = [top.add_atom(n, md.element.get_by_symbol(n[0]), res) for n in ("C", "O", "C", "N")]
    twin = top.add_residue("LIG", ch, 1)
    atoms.append(top.add_atom("S", md.element.sulfur, twin))
    atoms.append(top.add_atom("S", md.element.sulfur, res))
    for a, b in [(0, 1), (1, 2), (2, 3), (3, 4)]:
        top.add_bond(atoms[a], atoms[b])
    pool = candidate_pool(top, range(top.n_atoms))
    labels = [d.label for d in pool.descriptors]
    assert len(labels) == len(set(labels)), labels
    # Without the indices these pairs would read 'dist LIG1:C-LIG1:S' twice and
    # 'dist LIG1:C-S' twice (atoms 4 and 5 are both LIG1:S, in two residues).
    assert {"dist LIG1:C[0]-S[5]", "dist LIG1:C[2]-S[5]", "dist LIG1:C[0]-S[4]"} <= set(labels)
    assert "angle LIG1:C[0]-O-C[2]" in labels  # O is not repeated: no index
    assert not any("O[" in lab or "N[" in lab for lab in labels)


def test_the_default_prefilter_stride_keeps_about_2000_frames_of_the_smallest_state(
        tmp_path, demo_files):
    """Every 10th frame (MIN_PREFILTER_STRIDE) for the usual runs; sparser only when every
    state has 22,000 frames or more (PREFILTER_FRAMES = 2000 of the smallest state; common
    practice for means of distances), frame ranges and labels counted; an explicit stride
    is used as given; the specs record the stride used."""
    from cvdesign import Source
    from cvdesign.pool import build_pool, prefilter_stride_for, state_frames

    rng = np.random.default_rng(3)
    top = md.Topology()
    res = top.add_residue("TOY", top.add_chain())
    for name in ("C1", "C2", "C3", "C4"):
        top.add_atom(name, md.element.carbon, res)
    paths = []
    for k, n in enumerate((45_000, 33_000)):
        xyz = np.array([[0, 0, 0], [0.5, 0, 0], [0, 0.6, 0], [0.4, 0.4, 0.3]]) \
            + rng.normal(0, 0.02, (n, 4, 3))
        path = tmp_path / f"run{k}.dcd"
        md.Trajectory(xyz.astype(np.float32), top).save(str(path))
        paths.append(str(path))
    labels = ["B" if 1000 <= i < 4000 else (None if i < 10 else "A") for i in range(33_000)]
    src = Source(top).add(paths[0], "A", frames=(0, 27_000)).add_labelled(paths[1], labels)
    assert state_frames(src) == [27_000 + 33_000 - 3000 - 10, 3000]
    assert prefilter_stride_for(src) == 10  # B has 3000 frames: every 10th
    big = Source(top).add(paths[0], "A").add(paths[1], "B", frames=(100, None))
    assert state_frames(big) == [45_000, 32_900]
    assert prefilter_stride_for(big) == 16  # 32,900 // 2000
    pool = build_pool(big, kinds=("distance",), cutoff=5.0)
    assert any("every 16th frame" in note for note in pool.notes), pool.notes
    pool = build_pool(big, kinds=("distance",), cutoff=5.0, stride=3)
    assert any("every 3rd frame" in note for note in pool.notes), pool.notes
    from cvdesign import suggest

    res = suggest(big, kinds=("distance",), cutoff=5.0, n_bootstrap=0, max_terms=1,
                  n_suggestions=1)
    assert res.specs[0]["provenance"]["parameters"]["prefilter_stride"] == 16
    top, states = demo_files
    demo = Source.from_states(top, {k: v[:1] for k, v in states.items()})
    res = suggest(demo, kinds=("angle",), n_bootstrap=0, max_terms=1, n_suggestions=1)
    assert res.specs[0]["provenance"]["parameters"]["prefilter_stride"] is None  # none ran


@pytest.mark.parametrize("stride", [0, -1, True, 2.5, "3"])
def test_a_bad_prefilter_stride_is_refused_naming_the_argument(demo_files, stride):
    from cvdesign import Source
    from cvdesign.pipeline.explore import propose_states
    from cvdesign.pool import build_pool

    top, states = demo_files
    src = Source(top).add(states["closed"][0], "closed")
    message = r"=%s must be a whole number of frames of at least 1" % re.escape(repr(stride))
    with pytest.raises(InputError, match="stride" + message):
        build_pool(src, stride=stride)
    runs = Source(top).add(states["closed"][0], "runs")
    with pytest.raises(InputError, match="prefilter_stride" + message):
        propose_states(runs, lag=1.0, prefilter_stride=stride)


def _coincident_chain(n_frames, seed, shift=0.0, coincide_from=None):
    """Five bonded carbons with noise (nm); from frame `coincide_from` atom 2 sits on atom 1."""
    rng = np.random.default_rng(seed)
    base = np.array([[0, 0, 0], [0.15, 0, 0], [0.3, 0.1, 0], [0.45, 0.1, 0.1], [0.6, 0.2, 0.1]])
    xyz = base + rng.normal(0.0, 0.01, (n_frames, 5, 3))
    xyz[:, 4, 0] += shift
    if coincide_from is not None:
        xyz[coincide_from:, 2] = xyz[coincide_from:, 1]
    return xyz.astype(np.float32)


def test_an_undefined_angle_is_pi_over_2_as_the_spec_evaluator_gives_it_with_a_warning():
    # mdtraj gives NaN for an angle with an arm of zero length; the pool's features must
    # equal what cvdesign.geometry.angles (the spec's evaluator) gives there: pi/2, with a
    # GeometryWarning. A NaN had reached the histograms and stopped suggest with
    # "cannot merge histograms with different bins".
    from cvdesign.geometry import GeometryWarning, angles

    top = _topology(5, [(i, i + 1) for i in range(4)])
    xyz = _coincident_chain(6, seed=1, coincide_from=3)
    pool = candidate_pool(top, range(5), kinds=("angle",))
    with pytest.warns(GeometryWarning, match=r"angle descriptor of atoms \[0, 1, 2\] \(and "
                      r"any other named in a warning like this\): undefined in some frames "
                      r"\(an arm has zero length: two atoms coincide\); set to pi/2 rad "
                      r"there, as the spec's evaluator does"):
        got = pool.features(md.Trajectory(xyz, top))
    with pytest.warns(GeometryWarning):
        expected = angles(xyz.astype(np.float64), [d.atoms for d in pool.descriptors])
    assert np.all(np.isfinite(got))
    assert got[3:, :2].tolist() == [[float(np.float32(np.pi / 2))] * 2] * 3  # mdtraj's float32
    np.testing.assert_allclose(got, expected, atol=1e-6)


@pytest.mark.parametrize("workers", [None, 2])
def test_suggest_runs_through_angles_that_are_undefined_in_some_frames(tmp_path, workers):
    # with worker processes too: their warnings are raised again in this process (they had
    # only reached the workers' standard error)
    import cvdesign
    from cvdesign.geometry import GeometryWarning

    top = _topology(5, [(i, i + 1) for i in range(4)])
    files = {}
    for state, shift, late in (("A", 0.0, None), ("B", 0.1, 150)):
        path = tmp_path / f"{state}.dcd"
        md.Trajectory(_coincident_chain(200, seed=len(files), shift=shift, coincide_from=late),
                      top).save_dcd(str(path))
        files[state] = [str(path)]
    topology = tmp_path / "top.pdb"
    md.Trajectory(_coincident_chain(1, seed=9), top).save_pdb(str(topology))
    source = cvdesign.Source.from_states(str(topology), files)
    with pytest.warns(GeometryWarning, match=r"set to pi/2 rad there") as caught:
        result = cvdesign.suggest(source, kinds=("angle",), n_bootstrap=0, max_terms=1,
                                  selection="all", executor=workers)
    assert {str(w.message)[:40] for w in caught if w.category is GeometryWarning} == \
        {"angle descriptor of atoms [0, 1, 2] (and"}
    assert result.specs and all(np.isfinite(row["heldout_score"]) for row in result.ranking)
    # and in the run's notes (the summary), once: standard error is gone with the terminal
    said = [n for n in result.notes if "undefined in some frames" in n]
    assert said == ["input frames: angle descriptor of atoms [0, 1, 2] (and any other named "
                    "in a warning like this): undefined in some frames (an arm has zero "
                    "length: two atoms coincide); set to pi/2 rad there, as the spec's "
                    "evaluator does. Check the trajectory and the topology"]


def test_quiet_suggest_keeps_undefined_geometry_in_the_summary(tmp_path, capsys):
    # -q hides the warning on standard error; the written summary still says it
    from cvdesign.cli import main

    top = _topology(5, [(i, i + 1) for i in range(4)])
    args = ["suggest", "-q", "--kinds", "angle", "--bootstrap", "0", "--max-terms", "1",
            "--select", "all", "--out", str(tmp_path / "out")]
    for state, shift, late in (("A", 0.0, None), ("B", 0.1, 150)):
        path = tmp_path / f"{state}.dcd"
        md.Trajectory(_coincident_chain(200, seed=ord(state), shift=shift, coincide_from=late),
                      top).save_dcd(str(path))
        args += ["--state", state, str(path)]
    topology = tmp_path / "top.pdb"
    md.Trajectory(_coincident_chain(1, seed=9), top).save_pdb(str(topology))
    assert main(args[:1] + ["--topology", str(topology)] + args[1:]) == 0
    assert "undefined" not in capsys.readouterr().err
    summary = (tmp_path / "out" / "summary.md").read_text()
    assert "- input frames: angle descriptor of atoms [0, 1, 2] (and any other" in summary
