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
            "--select", "all", "--no-report", "--out", str(tmp_path / "out")]
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


# ---------------------------------------------------------------- review of the pool


def _loose_atoms(n, *, per_residue=False, name="C", element=md.element.carbon, resname="X"):
    """`n` unbonded atoms, in one residue or (`per_residue`) one residue each."""
    top = md.Topology()
    ch = top.add_chain()
    res = None
    for i in range(n):
        if res is None or per_residue:
            res = top.add_residue(resname, ch, i + 1)
        top.add_atom(name, element, res)
    return top


def test_a_selection_of_too_many_atom_pairs_is_refused_naming_atoms_pairs_and_remedies():
    from cvdesign.pool import MAX_PAIRS, check_pair_count

    assert MAX_PAIRS == 2_000_000
    check_pair_count(2000)  # 1,999,000 pairs: accepted
    top = _loose_atoms(2001)
    with pytest.raises(InputError, match=r"holds 2001 atoms, which make 2,001,000 pairs for "
                       r"distances, more than the 2,000,000 .*--select .*'name CA' or "
                       r"'backbone'.*--kinds center_distance,coordination"):
        candidate_pairs(top, range(2001))
    with pytest.raises(InputError, match=r"holds 2001 atoms"):
        candidate_pool(top, range(2001), kinds=("distance",))


def test_a_selection_of_too_many_residue_pairs_is_refused_for_the_group_kinds():
    top = _loose_atoms(2001, per_residue=True)
    with pytest.raises(InputError, match=r"spans 2001 residues, which make 2,001,000 residue "
                       r"pairs .*narrow it with --select"):
        candidate_pool(top, range(2001), kinds=("coordination",))


def test_build_pool_refuses_a_crowded_default_selection_before_reading_and_names_the_solvent(
        tmp_path):
    from cvdesign import Source
    from cvdesign.pool import build_pool

    # 2100 one-carbon 'MOH' residues (a made-up solvent): 2100 atoms by default
    top = _loose_atoms(2100, per_residue=True, resname="MOH")
    rng = np.random.default_rng(3)
    traj = md.Trajectory(rng.uniform(0, 5, (2, 2100, 3)).astype(np.float32), top)
    traj.save_pdb(str(tmp_path / "top.pdb"))
    for state in ("a", "b"):
        traj.save_dcd(str(tmp_path / f"{state}.dcd"))
    src = Source.from_states(str(tmp_path / "top.pdb"), {"a": [str(tmp_path / "a.dcd")],
                                                        "b": [str(tmp_path / "b.dcd")]})
    with pytest.raises(InputError, match=r"holds 2100 atoms, which make 2,203,950 pairs.*"
                       r"Note: the default selection holds 2100 copies of residue MOH .*"
                       r"'not resname MOH and not element H'"):
        build_pool(src)


def _solvated():
    """A bonded 4-carbon solute 'LIG' (with one hydrogen), then waters of several models
    and names, one-atom ions, and 21 methanol-like 'MOH' residues."""
    top = md.Topology()
    ch = top.add_chain()
    lig = top.add_residue("LIG", ch, 1)
    c = [top.add_atom(f"C{i}", md.element.carbon, lig) for i in range(4)]
    for a, b in zip(c, c[1:]):
        top.add_bond(a, b)
    top.add_bond(c[0], top.add_atom("H1", md.element.hydrogen, lig))
    n = 2
    for name in ("SPC", "TP3", "OPC", "HOH"):  # names (HOH: mdtraj's own list)
        w = top.add_residue(name, ch, n)
        n += 1
        for atom, el in (("OW", "O"), ("HW1", "H"), ("HW2", "H")):
            top.add_atom(atom, md.element.get_by_symbol(el), w)
    w = top.add_residue("QQQ", ch, n)  # a four-site water by composition (virtual site)
    n += 1
    for atom, el in (("OW", md.element.oxygen), ("HW1", md.element.hydrogen),
                     ("HW2", md.element.hydrogen), ("MW", None)):
        top.add_atom(atom, el, w)
    w = top.add_residue("XOX", ch, n)  # an unknown name, water by composition
    n += 1
    top.add_atom("O", md.element.oxygen, w)
    # calcium as a reader may see it (atom 'CA' guessed as carbon), and a sodium by element
    top.add_atom("CA", md.element.carbon, top.add_residue("CA", ch, n))
    top.add_atom("NA1", md.element.sodium, top.add_residue("ION", ch, n + 1))
    for k in range(21):
        r = top.add_residue("MOH", ch, n + 2 + k)
        o = top.add_atom("O1", md.element.oxygen, r)
        top.add_bond(top.add_atom("C1", md.element.carbon, r), o)
    return top


def test_default_selection_leaves_out_water_by_name_and_composition_and_ions_and_says_so():
    from cvdesign.io.source import describe_selection

    top = _solvated()
    atoms = select_atoms(top)
    kept = sorted({top.atom(int(a)).residue.name for a in atoms})
    assert kept == ["LIG", "MOH"]  # the methanol-like residues stay (with a warning)
    assert atoms.size == 4 + 2 * 21
    text = describe_selection(top, atoms)
    assert text.endswith("; left out: 6 water residues (HOH, OPC, QQQ, SPC, TP3, XOX), "
                         "2 ion residues (CA, ION), 1 hydrogens")


def test_a_residue_name_with_more_than_20_copies_in_the_default_selection_is_warned_about():
    from cvdesign.io.source import default_selection_warnings

    top = _solvated()
    (warning,) = default_selection_warnings(top)
    assert warning.startswith("warning: the default selection holds 21 copies of residue MOH "
                              "(42 atoms)")
    assert "'not resname MOH and not element H'" in warning
    # 20 copies, or residues bonded into a chain (a polymer), give no warning
    twenty = md.Topology()
    ch = twenty.add_chain()
    for k in range(20):
        twenty.add_atom("C1", md.element.carbon, twenty.add_residue("MOH", ch, k + 1))
    assert default_selection_warnings(twenty) == []
    chain = _loose_atoms(30, per_residue=True, resname="UNK")
    atoms = list(chain.atoms)
    for a, b in zip(atoms, atoms[1:]):
        chain.add_bond(a, b)
    assert default_selection_warnings(chain) == []


def test_the_no_bond_note_tells_a_bondless_topology_from_a_selection_without_bonds():
    top = _topology(4, [(0, 1), (1, 2), (2, 3)])
    pool = candidate_pool(top, [0, 2], kinds=("distance", "angle", "dihedral"))
    (note,) = [n for n in pool.notes if n.startswith("angles and dihedrals")]
    assert "none of the topology's 3 bonds joins two selected atoms" in note
    assert "give a topology with bonds" not in note
    bare = candidate_pool(_topology(4, []), range(4))
    (note,) = [n for n in bare.notes if n.startswith("angles and dihedrals")]
    assert "the topology has no bonds" in note and "give a topology with bonds" in note


def test_one_atom_residues_get_no_center_distance_beside_their_atom_distance():
    top = _loose_atoms(3, per_residue=True, resname="LIG")
    both = candidate_pool(top, range(3), kinds=("distance", "center_distance", "coordination"))
    kinds = [d.kind for d in both.descriptors]
    assert kinds.count("distance") == 3 and kinds.count("coordination") == 3
    assert "center_distance" not in kinds
    assert ("center distances: 3 pairs of one-atom residues left out (the same as the atom "
            "distances in the pool)") in both.notes
    # without the atom distances, the center distances stay
    alone = candidate_pool(top, range(3), kinds=("center_distance",))
    assert [d.kind for d in alone.descriptors] == ["center_distance"] * 3
    # groups of two atoms are not the atom distance: kept beside it
    top2 = md.Topology()
    ch = top2.add_chain()
    for k in range(2):
        r = top2.add_residue("LIG", ch, k + 1)
        top2.add_atom("C1", md.element.carbon, r)
        top2.add_atom("C2", md.element.carbon, r)
    pool2 = candidate_pool(top2, range(4), kinds=("distance", "center_distance"))
    assert [d.kind for d in pool2.descriptors].count("center_distance") == 1


@pytest.mark.parametrize("kind, atoms, why", [
    ("distance", (3, 3), r"an atom repeats"),
    ("distance", (-1, 2), r"-1 is not a non-negative whole number"),
    ("distance", (2.7, 0), r"2\.7 is not a non-negative whole number"),
    ("distance", (True, 2), r"True is not a non-negative whole number"),
    ("angle", (0, 1, 0), r"an atom repeats"),
])
def test_a_descriptor_refuses_bad_atom_indices_naming_itself_and_the_atoms(kind, atoms, why):
    with pytest.raises(InputError, match=rf"^{kind} descriptor 'd1': atoms {re.escape(str(atoms))}"
                       rf" must be {len(atoms)} distinct non-negative integer atom indices "
                       rf"\(0-based\); {why}"):
        Descriptor(kind, atoms, "d1")


def test_a_descriptor_takes_numpy_integers_and_stores_python_ints():
    d = Descriptor("distance", (np.int64(4), np.int32(9)), "d")
    assert d.atoms == (4, 9) and all(type(a) is int for a in d.atoms)
    with pytest.raises(InputError, match=r"groups \(\(0, 0\), \(2,\)\) must hold distinct"):
        Descriptor("center_distance", (), "g", groups=((0, 0), (2,)))


def test_kinds_given_as_a_comma_separated_string_reach_suggest_as_the_pool_takes_them():
    from cvdesign.pipeline.suggest import SuggestConfig

    assert SuggestConfig(kinds="distance, angle").kinds == ("distance", "angle")
    with pytest.raises(InputError, match=r"unknown descriptor kinds \['torsion'\]"):
        SuggestConfig(kinds="distance,torsion")


def test_propose_states_takes_the_shared_coordination_switching_distance_by_default():
    import inspect

    from cvdesign.constants import COORDINATION_R0_NM
    from cvdesign.pipeline.explore import propose_states

    # the same object, not a copy of its value (a literal would drift if the constant moved)
    default = inspect.signature(propose_states).parameters["coordination_r0"].default
    assert default is COORDINATION_R0_NM
