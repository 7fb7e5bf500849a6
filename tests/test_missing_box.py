"""A topology file with a periodic box beside trajectories that store none.

The frames are then read without periodic images (their distances plain Euclidean), which
is wrong if the run was periodic: `apply`, `check` and `suggest` say so, naming the files;
a trajectory that stores its box, or a topology without one, gets no such word.
"""

import mdtraj as md
import numpy as np
import pytest

from cvdesign import Source, Spec, suggest
from cvdesign.cli import main
from cvdesign.io.source import missing_box_warning, topology_box_nm

_BOX_NM = 3.0


def _four_atoms():
    """A residue BOX of four carbons C1-C4."""
    top = md.Topology()
    res = top.add_residue("BOX", top.add_chain())
    for i in range(4):
        top.add_atom(f"C{i + 1}", md.element.carbon, res)
    return top


@pytest.fixture(scope="module")
def runs(tmp_path_factory):
    """Four atoms in a 3 nm cube: a PDB with CRYST1, the same frames as a DCD without unit
    cells and as an XTC (which stores the box), two states (atom C2 near or far)."""
    d = tmp_path_factory.mktemp("box")
    rng = np.random.default_rng(21)
    top = _four_atoms()
    out = {}
    for state, reach in (("near", 0.4), ("far", 0.9)):
        place = np.array([[0.2, 0.2, 0.2], [0.2 + reach, 0.2, 0.2], [0.2, 1.0, 0.2],
                          [1.0, 1.0, 1.0]])
        xyz = (place + rng.normal(0.0, 0.02, size=(300, 4, 3))).astype(np.float32)
        traj = md.Trajectory(xyz, top, time=np.arange(300.0),
                             unitcell_lengths=np.full((300, 3), _BOX_NM, np.float32),
                             unitcell_angles=np.full((300, 3), 90.0, np.float32))
        traj.save_xtc(str(d / f"{state}.xtc"))
        bare = md.Trajectory(xyz, top, time=np.arange(300.0))
        bare.save_dcd(str(d / f"{state}.dcd"))
        out[state] = (str(d / f"{state}.xtc"), str(d / f"{state}.dcd"))
        if state == "near":
            traj[:1].save_pdb(str(d / "boxed.pdb"))
            bare[:1].save_pdb(str(d / "plain.pdb"))
    spec = Spec(name="d", topology=top,
                descriptors=[{"id": "d", "kind": "distance", "atoms": [0, 1]}],
                terms=[{"descriptor": "d", "transform": "identity", "center": 0.0,
                        "scale": 1.0, "weight": 1.0}])
    spec.save(d / "d.json")
    return d, out


def test_the_topology_box_is_read_from_a_pdb_and_its_absence_said(runs):
    d, out = runs
    np.testing.assert_allclose(topology_box_nm(d / "boxed.pdb"), _BOX_NM * np.eye(3), atol=1e-3)
    assert topology_box_nm(d / "plain.pdb") is None
    text = missing_box_warning(d / "boxed.pdb", [out["near"][1]])
    assert text.startswith(f"topology file '{d / 'boxed.pdb'}' has a periodic box (3 x 3 x 3 "
                           f"nm), but trajectory '{out['near'][1]}' stores none: distances")
    assert missing_box_warning(d / "plain.pdb", [out["near"][1]]) is None
    assert missing_box_warning(d / "boxed.pdb", []) is None


def test_apply_and_check_say_when_the_trajectory_has_no_box_the_topology_has(
        runs, capsys):
    d, out = runs
    spec, top = str(d / "d.json"), str(d / "boxed.pdb")
    assert main(["apply", spec, "--topology", top, out["near"][1]]) == 0
    assert "has a periodic box (3 x 3 x 3 nm), but trajectory" in capsys.readouterr().err
    assert main(["apply", spec, "--topology", top, out["near"][0]]) == 0  # XTC: its box
    assert "periodic box" not in capsys.readouterr().err
    assert main(["apply", spec, "--topology", str(d / "plain.pdb"), out["near"][1]]) == 0
    assert "periodic box" not in capsys.readouterr().err
    assert main(["check", spec, "--topology", top, "--trajectory", out["near"][1]]) == 0
    assert "warning: topology file" in capsys.readouterr().out
    assert main(["check", spec, "--topology", top, "--trajectory", out["near"][0]]) == 0
    assert "warning: topology file" not in capsys.readouterr().out


def test_suggest_names_the_files_without_a_box_also_beside_files_with_one(runs):
    d, out = runs
    from cvdesign.io.source import unboxed_files

    mixed = Source.from_states(str(d / "boxed.pdb"), {"near": [out["near"][0]],
                                                      "far": [out["far"][1]]})
    assert unboxed_files(mixed) == [out["far"][1]]
    res = suggest(mixed, n_bootstrap=0, max_terms=1, n_suggestions=1)
    note = next(n for n in res.notes if n.startswith("warning: topology file"))
    assert f"trajectory '{out['far'][1]}' stores none" in note
    assert out["near"][0] not in note


def test_suggest_warns_when_no_trajectory_stores_the_box_the_topology_has(runs):
    d, out = runs
    kw = dict(n_bootstrap=0, max_terms=1, n_suggestions=1)
    bare = suggest(Source.from_states(str(d / "boxed.pdb"),
                                      {s: [f[1]] for s, f in out.items()}), **kw)
    assert any(n.startswith("warning: topology file") and "stores each none" in n
               for n in bare.notes)
    boxed = suggest(Source.from_states(str(d / "boxed.pdb"),
                                       {s: [f[0]] for s, f in out.items()}), **kw)
    assert not any("warning: topology file" in n for n in boxed.notes)


def test_distances_beyond_half_the_box_are_named_and_the_cvs_using_them_warned(tmp_path):
    """In a 2 nm cube, C1-C2 of state "far" lies along a face diagonal near 1.13 nm, beyond
    half the box height (1 nm), where the minimum image starts folding such distances: the
    note names it (not only 'some distances', with advice about --cutoff that does not
    govern such pairs), and a ranked CV with that term carries a warning."""
    rng = np.random.default_rng(5)
    top = _four_atoms()
    files = {}
    for state, c2 in (("near", [0.5, 0.2, 0.2]), ("far", [1.0, 1.0, 0.2])):
        place = np.array([[0.2, 0.2, 0.2], c2, [0.2, 0.6, 0.2], [0.6, 0.6, 0.6]])
        xyz = (place + rng.normal(0.0, 0.02, size=(300, 4, 3))).astype(np.float32)
        traj = md.Trajectory(xyz, top, time=np.arange(300.0),
                             unitcell_lengths=np.full((300, 3), 2.0, np.float32),
                             unitcell_angles=np.full((300, 3), 90.0, np.float32))
        files[state] = [str(tmp_path / f"{state}.xtc")]
        traj.save_xtc(files[state][0])
        traj[:1].save_pdb(str(tmp_path / "top.pdb"))
    res = suggest(Source.from_states(str(tmp_path / "top.pdb"), files), n_bootstrap=0,
                  max_terms=1, n_suggestions=3)
    note = next(n for n in res.notes if "beyond half the smallest box height" in n)
    assert note.startswith("warning: 1 distance of the pool reaches beyond half")
    assert "dist BOX0:C1-C2 (1." in note and "--cutoff governs" in note
    with_term = [e for e in res.ranking if any(t["label"] == "dist BOX0:C1-C2"
                                               for t in e["terms"])]
    assert with_term and all(any("beyond half the smallest box height" in w
                                 for w in e["warnings"]) for e in with_term)
    without = [e for e in res.ranking if e not in with_term]
    assert all(not any("beyond half the smallest box height" in w for w in e["warnings"])
               for e in without)
