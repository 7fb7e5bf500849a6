"""Tests of cvdesign.spec: the engine-neutral CV file (format, validation, evaluator, topology check)."""

import copy
import json
import math
import re
import warnings
from pathlib import Path

import jsonschema
import mdtraj as md
import numpy as np
import pytest

from cvdesign.errors import InputError, SpecError, TopologyMismatchError
from cvdesign.geometry import GeometryWarning
from cvdesign.spec import Spec, atom_identity, load_spec, residue_hashes, spec_schema, topology_fingerprint

# --------------------------------------------------------------------------
# helpers

BACKBONE = [("N", "N"), ("CA", "C"), ("C", "C"), ("O", "O"), ("CB", "C")]


def peptide_topology(n_residues=3, *, rename=None, waters=0, first_resid=10):
    """A chain of ALA-like residues (N, CA, C, O, CB), then optional waters in a second chain.

    `rename` maps an atom index to a new atom name.
    """
    top = md.Topology()
    chain = top.add_chain()
    index = 0
    for r in range(n_residues):
        residue = top.add_residue("ALA", chain, resSeq=first_resid + r)
        for name, symbol in BACKBONE:
            if rename and index in rename:
                name = rename[index]
            top.add_atom(name, md.element.get_by_symbol(symbol), residue)
            index += 1
    if waters:
        solvent = top.add_chain()
        for w in range(waters):
            residue = top.add_residue("HOH", solvent, resSeq=w + 1)
            for name, symbol in [("O", "O"), ("H1", "H"), ("H2", "H")]:
                top.add_atom(name, md.element.get_by_symbol(symbol), residue)
    return top


SHA = "ab" * 32


def make_spec(top=None, **overrides):
    """A spec with one distance, one angle and one dihedral (as cos and sin)."""
    top = peptide_topology() if top is None else top
    parts = dict(
        name="cv-01",
        topology=top,
        descriptors=[
            {"id": "dist:1-11", "kind": "distance", "atoms": [1, 11], "label": "dist ALA10:CA-ALA12:CA"},
            {"id": "angle:0-1-2", "kind": "angle", "atoms": [0, 1, 2], "label": "angle ALA10:N-CA-C"},
            {"id": "dihedral:0-1-2-5", "kind": "dihedral", "atoms": [0, 1, 2, 5], "label": "psi ALA10"},
        ],
        terms=[
            {"descriptor": "dist:1-11", "transform": "identity", "center": 0.8, "scale": 0.2, "weight": 1.5},
            {"descriptor": "angle:0-1-2", "transform": "identity", "center": 1.9, "scale": 0.1, "weight": -0.5},
            {"descriptor": "dihedral:0-1-2-5", "transform": "cos", "center": 0.1, "scale": 0.7, "weight": 0.3},
            {"descriptor": "dihedral:0-1-2-5", "transform": "sin", "center": -0.2, "scale": 0.6, "weight": 0.8},
        ],
        offset=0.25,
        states={"closed": {"mean": -1.0, "std": 0.3, "n_frames": 500}, "open": {"mean": 1.2, "std": 0.4, "n_frames": 450}},
        scores={"heldout_fisher_ratio": 3.25, "folds": [2.5, 4.0], "per_state": {"open": 0.5}, "rank": 1},
        provenance={
            "cvdesign_version": "0.1.0",
            "method": "lda",
            "inputs": [{"file": "closed.xtc", "sha256": SHA, "state": "closed"}],
            "seed": 7,
            "parameters": {"lag": 10.0},
        },
        caution="Check the CV in your own data before relying on it.",
    )
    parts.update(overrides)
    return Spec(**parts)


def random_coordinates(n_frames, n_atoms, seed):
    return np.random.RandomState(seed).uniform(0.0, 1.5, size=(n_frames, n_atoms, 3))


def hand_dihedral(p0, p1, p2, p3):
    """Torsion angle from projections onto the plane normal to the central bond.

    A second, independent formula: project the outer bonds onto the plane
    normal to b-c and measure the signed angle between the projections
    (common practice; IUPAC sign, checked on an explicit +60 degree case below).
    """
    b0 = p0 - p1
    b1 = p2 - p1
    b2 = p3 - p2
    b1 = b1 / np.linalg.norm(b1, axis=-1, keepdims=True)
    v = b0 - np.sum(b0 * b1, axis=-1, keepdims=True) * b1
    w = b2 - np.sum(b2 * b1, axis=-1, keepdims=True) * b1
    x = np.sum(v * w, axis=-1)
    y = np.sum(np.cross(b1, v) * w, axis=-1)
    return np.arctan2(y, x)


def hand_cv(xyz):
    """The CV of make_spec(), written out by hand."""
    dist = np.linalg.norm(xyz[:, 11] - xyz[:, 1], axis=-1)
    u, v = xyz[:, 0] - xyz[:, 1], xyz[:, 2] - xyz[:, 1]
    cosine = np.sum(u * v, -1) / (np.linalg.norm(u, axis=-1) * np.linalg.norm(v, axis=-1))
    angle = np.arccos(np.clip(cosine, -1, 1))
    phi = hand_dihedral(xyz[:, 0], xyz[:, 1], xyz[:, 2], xyz[:, 5])
    return (
        0.25
        + 1.5 * (dist - 0.8) / 0.2
        - 0.5 * (angle - 1.9) / 0.1
        + 0.3 * (np.cos(phi) - 0.1) / 0.7
        + 0.8 * (np.sin(phi) + 0.2) / 0.6
    )


# --------------------------------------------------------------------------
# identities and fingerprint


def test_atom_identity_reports_chain_residue_number_name_and_element():
    top = peptide_topology(waters=1)
    assert atom_identity(top, 6) == {"chain": 0, "residue": "ALA", "resid": 11, "name": "CA", "element": "C"}
    assert atom_identity(top, 16) == {"chain": 1, "residue": "HOH", "resid": 1, "name": "H1", "element": "H"}


def test_atom_identity_of_an_atom_without_element_is_empty():
    top = md.Topology()
    residue = top.add_residue("DUM", top.add_chain(), resSeq=3)
    atom = top.add_atom("X", None, residue)  # mdtraj makes this a virtual site
    assert atom_identity(top, 0)["element"] == "VS"
    atom.element = None
    assert atom_identity(top, 0)["element"] == ""


def test_atom_identity_rejects_bad_index_and_non_topology():
    top = peptide_topology()
    with pytest.raises(InputError, match=r"i=15 is not an atom of this topology \(15 atoms, valid indices 0\.\.14\)"):
        atom_identity(top, 15)
    with pytest.raises(InputError, match=r"i must be an integer atom index; got 1\.5"):
        atom_identity(top, 1.5)
    with pytest.raises(InputError, match=r"topology must be an mdtraj\.Topology .*; got str"):
        atom_identity("protein.pdb", 0)


def test_fingerprint_is_deterministic_and_sees_every_atom():
    fp = topology_fingerprint(peptide_topology(waters=2))
    assert fp == topology_fingerprint(peptide_topology(waters=2))
    assert fp.startswith("sha256:") and len(fp) == len("sha256:") + 64
    assert topology_fingerprint(peptide_topology(waters=2, rename={14: "CX"})) != fp
    assert topology_fingerprint(peptide_topology(waters=1)) != fp
    assert topology_fingerprint(peptide_topology(waters=2, first_resid=11)) != fp


def test_fingerprint_ignores_coordinates_and_accepts_a_trajectory():
    top = peptide_topology()
    traj = md.Trajectory(random_coordinates(1, 15, 0).astype(np.float32), top)
    assert topology_fingerprint(traj) == topology_fingerprint(top)


# --------------------------------------------------------------------------
# construction and round trips


def test_constructor_fills_identities_labels_and_periodic_flags_from_the_topology():
    spec = make_spec()
    descriptors = spec.descriptors
    assert [d["periodic"] for d in descriptors] == [False, False, True]
    assert descriptors[0]["atom_identities"][1] == {"chain": 0, "residue": "ALA", "resid": 12, "name": "CA", "element": "C"}
    assert spec.n_atoms == 15
    assert spec.fingerprint == topology_fingerprint(peptide_topology())
    doc = spec.to_dict()
    assert doc["format"] == "cvdesign-spec" and doc["version"] == 1
    assert doc["units"] == {"length": "nm", "angle": "rad", "time": "ps", "energy": "kJ/mol"}


def test_constructor_needs_identities_when_given_only_a_topology_record():
    record = {"n_atoms": 15, "fingerprint": "sha256:" + SHA}
    with pytest.raises(SpecError, match=r"^\$\.descriptors\[0\]: missing key 'atom_identities'"):
        make_spec(topology=record)


def test_constructor_rejects_identities_that_contradict_the_topology():
    wrong = {"chain": 0, "residue": "GLY", "resid": 10, "name": "CA", "element": "C"}
    descriptors = [{"id": "d", "kind": "distance", "atoms": [1, 11], "atom_identities": [wrong, wrong]}]
    terms = [{"descriptor": "d", "transform": "identity", "center": 0.0, "scale": 1.0, "weight": 1.0}]
    with pytest.raises(SpecError, match=r"^\$\.descriptors\[0\]\.atom_identities\[0\]: the identity given for atom 1 \(GLY10:CA"):
        make_spec(descriptors=descriptors, terms=terms, states={})


def test_constructor_defaults_provenance_and_converts_numpy_numbers():
    spec = make_spec(
        provenance=None,
        offset=np.float32(0.5),
        states={"a": {"mean": np.float64(1.0), "std": np.float64(0.5), "n_frames": np.int64(3)}},
    )
    doc = spec.to_dict()
    assert doc["provenance"]["inputs"] == [] and doc["provenance"]["seed"] is None
    assert doc["provenance"]["cvdesign_version"]
    assert type(doc["offset"]) is float and type(doc["states"]["a"]["n_frames"]) is int


def test_round_trip_through_json_dumps_and_loads():
    spec = make_spec()
    text = json.dumps(spec.to_dict())
    again = Spec.from_dict(json.loads(text))
    assert again == spec
    assert again.to_dict() == spec.to_dict()
    assert Spec.from_json(spec.to_json()) == spec


def test_save_then_load_then_save_is_byte_identical(tmp_path):
    spec = make_spec()
    first = spec.save(tmp_path / "cv-01.json")
    second = load_spec(first).save(tmp_path / "again.json")
    assert first.read_bytes() == second.read_bytes()
    text = first.read_text(encoding="utf-8")
    assert text.endswith("}\n")
    assert text == json.dumps(json.loads(text), indent=2, sort_keys=True, allow_nan=False) + "\n"
    assert sorted(p.name for p in tmp_path.iterdir()) == ["again.json", "cv-01.json"]  # no temporary files left


def test_same_parts_give_the_same_bytes():
    assert make_spec().to_json() == make_spec().to_json()


def test_save_into_a_missing_directory_is_an_input_error(tmp_path):
    with pytest.raises(InputError, match=r"cannot write spec .*directory .*nowhere.* does not exist"):
        make_spec().save(tmp_path / "nowhere" / "cv.json")
    assert not (tmp_path / "nowhere").exists()


def test_hints_are_kept_when_given():
    spec = make_spec(hints={"kernel_width": 0.1, "walls": [-2.0, 2.0]})
    assert Spec.from_json(spec.to_json()).hints == {"kernel_width": 0.1, "walls": [-2.0, 2.0]}
    assert make_spec().hints is None and "hints" not in make_spec().to_dict()


def test_shipped_schema_is_valid_and_accepts_a_written_spec():
    schema = spec_schema()
    jsonschema.Draft202012Validator.check_schema(schema)
    jsonschema.Draft202012Validator(schema).validate(make_spec().to_dict())


# --------------------------------------------------------------------------
# evaluation


def test_evaluate_equals_the_hand_computed_formula():
    spec = make_spec()
    xyz = random_coordinates(20, 15, 1)
    cv = spec.evaluate(xyz)
    assert cv.shape == (20,) and cv.dtype == np.float64
    np.testing.assert_allclose(cv, hand_cv(xyz), rtol=0, atol=1e-10)


def test_hand_dihedral_has_the_iupac_sign():
    # b at the origin, c on +z, a on +x, d turned 60 degrees from +x towards +y:
    # clockwise as seen looking from b to c, so +60 degrees (IUPAC-IUB 1970).
    p = [np.array([[1.0, 0, 0]]), np.zeros((1, 3)), np.array([[0, 0, 1.0]]), np.array([[0.5, math.sqrt(3) / 2, 1.0]])]
    assert hand_dihedral(*p)[0] == pytest.approx(math.pi / 3)


def test_evaluate_equals_a_computation_with_mdtraj():
    # reference: mdtraj geometry (McGibbon et al. 2015, Biophys. J. 109, 1528), float32
    top = peptide_topology()
    spec = make_spec(top)
    traj = md.Trajectory(random_coordinates(20, 15, 2).astype(np.float32), top)
    dist = md.compute_distances(traj, [[1, 11]])[:, 0]
    angle = md.compute_angles(traj, [[0, 1, 2]])[:, 0]
    phi = md.compute_dihedrals(traj, [[0, 1, 2, 5]])[:, 0]
    expected = (
        0.25 + 1.5 * (dist - 0.8) / 0.2 - 0.5 * (angle - 1.9) / 0.1
        + 0.3 * (np.cos(phi) - 0.1) / 0.7 + 0.8 * (np.sin(phi) + 0.2) / 0.6
    )
    np.testing.assert_allclose(spec.evaluate(traj.xyz), expected, atol=2e-4)


def test_descriptor_values_in_descriptor_order():
    spec = make_spec()
    xyz = random_coordinates(4, 15, 3)
    values = spec.descriptor_values(xyz)
    assert values.shape == (4, 3)
    np.testing.assert_allclose(values[:, 0], np.linalg.norm(xyz[:, 11] - xyz[:, 1], axis=-1), atol=1e-12)
    np.testing.assert_allclose(values[:, 2], hand_dihedral(xyz[:, 0], xyz[:, 1], xyz[:, 2], xyz[:, 5]), atol=1e-10)


def test_evaluate_with_a_box_sees_through_the_boundary():
    spec = make_spec()
    xyz = random_coordinates(5, 15, 4)
    box = np.array([[3.0, 0.0, 0.0], [0.5, 3.0, 0.0], [0.4, -0.6, 3.0]])
    shifted = xyz.copy()
    shifted[:, [2, 11]] += box[0] - box[2]
    shifted[:, 5] += box[1]
    np.testing.assert_allclose(spec.evaluate(shifted, box=box), spec.evaluate(xyz), atol=1e-10)
    assert not np.allclose(spec.evaluate(shifted), spec.evaluate(xyz))


def test_evaluate_rejects_coordinates_of_another_atom_count():
    with pytest.raises(InputError, match=r"xyz has 14 atoms per frame; this spec \('cv-01'\) was made for a topology of 15 atoms"):
        make_spec().evaluate(np.zeros((2, 14, 3)))
    with pytest.raises(InputError, match=r"xyz has shape \(15, 3\); expected \(n_frames, 15, 3\) in nm"):
        make_spec().evaluate(np.zeros((15, 3)))


def test_a_single_dihedral_can_be_a_periodic_cv():
    spec = make_spec(
        descriptors=[{"id": "psi", "kind": "dihedral", "atoms": [0, 1, 2, 5], "label": "psi"}],
        terms=[{"descriptor": "psi", "transform": "identity", "center": 0.0, "scale": 1.0, "weight": 1.0}],
        offset=0.0,
        periodic=True,
    )
    xyz = random_coordinates(6, 15, 5)
    np.testing.assert_allclose(spec.evaluate(xyz), hand_dihedral(xyz[:, 0], xyz[:, 1], xyz[:, 2], xyz[:, 5]), atol=1e-10)


# --------------------------------------------------------------------------
# rejections, each with its JSON path


def _set(path, value):
    def mutate(doc):
        target = doc
        for key in path[:-1]:
            target = target[key]
        target[path[-1]] = value

    return mutate


def _delete(path):
    def mutate(doc):
        target = doc
        for key in path[:-1]:
            target = target[key]
        del target[path[-1]]

    return mutate


def _append_duplicate_descriptor(doc):
    extra = copy.deepcopy(doc["descriptors"][1])
    extra["id"] = doc["descriptors"][0]["id"]
    doc["descriptors"].insert(1, extra)


REJECTIONS = [
    (
        "unknown version",
        _set(["version"], 2),
        r"^\$\.version: this cvdesign reads spec version 1; the file says version 2",
    ),
    (
        "version as text",
        _set(["version"], "1"),
        r"^\$\.version: this cvdesign reads spec version 1; the file says version \"1\"",
    ),
    (
        "wrong format",
        _set(["format"], "other-format"),
        r"^\$\.format: this is not a cvdesign spec: format is \"other-format\", expected 'cvdesign-spec'",
    ),
    (
        "no format",
        _delete(["format"]),
        r"^\$: missing key 'format'",
    ),
    (
        "unknown kind",
        _set(["descriptors", 0, "kind"], "bond"),
        r"^\$\.descriptors\[0\]\.kind: \"bond\" is not one of 'distance', 'angle', 'dihedral', "
        r"'center_distance', 'coordination'",
    ),
    (
        "bad atom count",
        _set(["descriptors", 1, "atoms"], [0, 1]),
        r"^\$\.descriptors\[1\]\.atoms: an angle takes 3 atoms; got 2",
    ),
    (
        "too many atoms",
        _set(["descriptors", 0, "atoms"], [0, 1, 2, 3, 4]),
        r"^\$\.descriptors\[0\]\.atoms: takes at most 4 items; has 5",
    ),
    (
        "out-of-range atom",
        _set(["descriptors", 0, "atoms", 1], 15),
        r"^\$\.descriptors\[0\]\.atoms\[1\]: atom index 15 is out of range for a topology of 15 atoms \(0-based indices 0\.\.14\)",
    ),
    (
        "negative atom",
        _set(["descriptors", 0, "atoms", 0], -1),
        r"^\$\.descriptors\[0\]\.atoms\[0\]: must be at least 0; got -1",
    ),
    (
        "repeated atom",
        _set(["descriptors", 0, "atoms"], [3, 3]),
        r"^\$\.descriptors\[0\]\.atoms: the atoms of one descriptor must be distinct",
    ),
    (
        "duplicate id",
        _append_duplicate_descriptor,
        r"^\$\.descriptors\[1\]\.id: descriptor id 'dist:1-11' is used twice \(first at \$\.descriptors\[0\]\)",
    ),
    (
        "unknown descriptor",
        _set(["terms", 1, "descriptor"], "nope"),
        r"^\$\.terms\[1\]\.descriptor: refers to descriptor 'nope', which this spec does not define",
    ),
    (
        "cos on a distance",
        _set(["terms", 0, "transform"], "cos"),
        r"^\$\.terms\[0\]\.transform: transform 'cos' applies to dihedrals only; descriptor 'dist:1-11' is a distance",
    ),
    (
        "sin on an angle",
        _set(["terms", 1, "transform"], "sin"),
        r"^\$\.terms\[1\]\.transform: transform 'sin' applies to dihedrals only; descriptor 'angle:0-1-2' is an angle",
    ),
    (
        "unknown transform",
        _set(["terms", 0, "transform"], "log"),
        r"^\$\.terms\[0\]\.transform: \"log\" is not one of 'identity', 'cos', 'sin'",
    ),
    (
        "raw dihedral in a combination",
        _set(["terms", 2, "transform"], "identity"),
        r"^\$\.terms\[2\]\.transform: an identity term on dihedral 'dihedral:0-1-2-5' is allowed only as the single term of a periodic CV",
    ),
    (
        "zero scale",
        _set(["terms", 0, "scale"], 0.0),
        r"^\$\.terms\[0\]\.scale: must be greater than 0; got 0\.0",
    ),
    (
        "negative scale",
        _set(["terms", 3, "scale"], -0.5),
        r"^\$\.terms\[3\]\.scale: must be greater than 0; got -0\.5",
    ),
    (
        "NaN weight",
        _set(["terms", 0, "weight"], float("nan")),
        r"^\$\.terms\[0\]\.weight: nan is not allowed in a spec \(JSON has no NaN or Infinity\)",
    ),
    (
        "infinite center",
        _set(["terms", 1, "center"], float("inf")),
        r"^\$\.terms\[1\]\.center: inf is not allowed in a spec",
    ),
    (
        "NaN score",
        _set(["scores", "per_state", "open"], float("nan")),
        r"^\$\.scores\.per_state\.open: nan is not allowed",
    ),
    (
        "text as number",
        _set(["offset"], "0.25"),
        r"^\$\.offset: must be of type number; got string \"0\.25\"",
    ),
    (
        "boolean as number",
        _set(["terms", 0, "weight"], True),
        r"^\$\.terms\[0\]\.weight: must be of type number; got boolean true",
    ),
    (
        "missing key",
        _delete(["terms", 0, "center"]),
        r"^\$\.terms\[0\]: missing key 'center'",
    ),
    (
        "unknown key",
        _set(["terms", 0, "colour"], "red"),
        r"^\$\.terms\[0\]: unknown key 'colour'; allowed keys: center, descriptor, scale, transform, weight",
    ),
    (
        "unknown top-level key",
        _set(["extra"], 1),
        r"^\$: unknown key 'extra'",
    ),
    (
        "other units",
        _set(["units", "length"], "angstrom"),
        r"^\$\.units\.length: must be \"nm\"; got \"angstrom\"",
    ),
    (
        "bad fingerprint",
        _set(["topology", "fingerprint"], "md5:1234"),
        r"^\$\.topology\.fingerprint: \"md5:1234\" does not have the expected form",
    ),
    (
        "identities count",
        _set(["descriptors", 0, "atom_identities"], []),
        r"^\$\.descriptors\[0\]\.atom_identities: has 0 atom identities for 2 atoms",
    ),
    (
        "periodic distance",
        _set(["descriptors", 0, "periodic"], True),
        r"^\$\.descriptors\[0\]\.periodic: periodic must be false for a distance",
    ),
    (
        "periodic combination",
        lambda doc: doc.update(periodic=True, period=2 * math.pi),
        r"^\$\.periodic: a periodic CV must have exactly one term: a dihedral with the identity transform",
    ),
    (
        "periodic without period",
        _set(["periodic"], True),
        r"^\$: missing key 'period': a periodic CV gives its period in its own units, 2 pi \|weight\| / scale",
    ),
    (
        "period of a CV that is not periodic",
        _set(["period"], 2 * math.pi),
        r"^\$\.period: only a periodic CV \(periodic: true\) has a period",
    ),
    (
        "huge integer",
        _set(["provenance", "seed"], 10**30),
        r"^\$\.provenance\.seed: the integer 1000000000000000000000000000000 is too large for a spec",
    ),
    (
        "huge integer as a number",
        _set(["terms", 0, "weight"], 10**400),
        r"^\$\.terms\[0\]\.weight: the integer 1000000000.*\(401 digits\) is too large for a spec",
    ),
    (
        "negative std",
        _set(["states", "open", "std"], -1.0),
        r"^\$\.states\.open\.std: must be at least 0; got -1\.0",
    ),
    (
        "score as text",
        _set(["scores", "rank"], "first"),
        r"^\$\.scores\.rank: a score must be a number, a list of numbers or an object of those",
    ),
    (
        "input with directory",
        _set(["provenance", "inputs", 0, "file"], "runs/closed.xtc"),
        r"^\$\.provenance\.inputs\[0\]\.file: \"runs/closed\.xtc\" does not have the expected form",
    ),
    (
        "no terms",
        _set(["terms"], []),
        r"^\$\.terms: needs at least 1 item; has 0",
    ),
    (
        "state with an odd name",
        _set(["states", "state A"], {"mean": 0.0, "std": -1.0, "n_frames": 1}),
        r"^\$\.states\[\"state A\"\]\.std: must be at least 0",
    ),
]


@pytest.mark.parametrize(("mutate", "message"), [r[1:] for r in REJECTIONS], ids=[r[0] for r in REJECTIONS])
def test_invalid_documents_are_rejected_with_their_json_path(mutate, message):
    doc = make_spec().to_dict()
    mutate(doc)
    with pytest.raises(SpecError, match=message):
        Spec.from_dict(doc)


def test_a_document_that_is_not_an_object_is_rejected():
    with pytest.raises(SpecError, match=r"^\$: a spec is a JSON object; got array"):
        Spec.from_dict([])


@pytest.mark.parametrize("literal", ["NaN", "Infinity", "-Infinity"])
def test_nan_and_infinity_in_a_file_are_rejected_with_their_path(tmp_path, literal):
    text = make_spec().to_json().replace('"weight": 1.5', f'"weight": {literal}')
    assert literal in text
    path = tmp_path / "cv.json"
    path.write_text(text, encoding="utf-8")
    with pytest.raises(SpecError, match=rf"^\$\.terms\[0\]\.weight: {literal} is not allowed in a spec \(JSON has no NaN or Infinity\); write a finite number \[spec file '.*cv\.json'\]"):
        load_spec(path)
    with pytest.raises(SpecError, match=rf"^\$\.terms\[0\]\.weight: {literal} is not allowed"):
        Spec.from_json(text)


def test_a_repeated_key_in_a_file_is_rejected():
    text = make_spec().to_json().replace('"weight": 1.5', '"weight": 1.5, "weight": 2.5')
    with pytest.raises(SpecError, match=r"^\$\.terms\[0\]: key 'weight' appears more than once in this object"):
        Spec.from_json(text)


def test_load_spec_names_the_file_for_missing_invalid_and_wrong_files(tmp_path):
    with pytest.raises(InputError, match=r"spec file '.*absent\.json' does not exist"):
        load_spec(tmp_path / "absent.json")
    with pytest.raises(InputError, match=r"spec file '.*' is not a regular file"):
        load_spec(tmp_path)
    broken = tmp_path / "broken.json"
    broken.write_text('{"format": "cvdesign-spec", ', encoding="utf-8")
    with pytest.raises(InputError, match=r"spec file '.*broken\.json' is not valid JSON: .* at line 1, column \d+"):
        load_spec(broken)
    latin = tmp_path / "latin.json"
    latin.write_bytes(b'{"name": "\xe9"}')
    with pytest.raises(InputError, match=r"spec file '.*latin\.json' is not UTF-8 text"):
        load_spec(latin)
    other = tmp_path / "other.json"
    doc = make_spec().to_dict()
    doc["version"] = 3
    other.write_text(json.dumps(doc), encoding="utf-8")
    with pytest.raises(SpecError, match=r"^\$\.version: this cvdesign reads spec version 1; the file says version 3\. .*\[spec file '.*other\.json'\]$") as info:
        load_spec(other)
    assert info.value.path == "$.version"


# --------------------------------------------------------------------------
# topology checks


def test_the_topology_the_spec_was_made_for_passes():
    top = peptide_topology(waters=2)
    make_spec(top).check_topology(peptide_topology(waters=2))


def test_a_topology_with_another_atom_count_is_refused():
    spec = make_spec(peptide_topology(waters=2))
    with pytest.raises(TopologyMismatchError, match=r"^\$\.topology\.n_atoms: the spec was made for a topology of 21 atoms; this topology has 18 atoms"):
        spec.check_topology(peptide_topology(waters=1))


def test_a_renamed_atom_used_by_the_cv_is_named():
    spec = make_spec(peptide_topology())
    renamed = peptide_topology(rename={11: "CX"})
    with pytest.raises(
        TopologyMismatchError,
        match=r"^\$\.descriptors\[0\]\.atom_identities\[1\]: atom 11 \(used by descriptor 'dist:1-11', "
        r"dist ALA10:CA-ALA12:CA\) is ALA12:CA \(chain 0, element C\) in the spec but ALA12:CX "
        r"\(chain 0, element C\) in this topology",
    ):
        spec.check_topology(renamed)


def test_a_difference_in_atoms_the_cv_does_not_use_is_refused():
    spec = make_spec(peptide_topology())
    elsewhere = peptide_topology(rename={14: "CG"})
    with pytest.raises(TopologyMismatchError, match=r"^\$\.topology\.fingerprint: the atoms the CV uses match, but the topology differs elsewhere .*refusing"):
        spec.check_topology(elsewhere)


def test_check_topology_rejects_something_that_is_not_a_topology():
    with pytest.raises(InputError, match=r"topology must be an mdtraj\.Topology"):
        make_spec().check_topology({"n_atoms": 15})


def test_load_spec_checks_a_topology_object_or_file(tmp_path):
    top = peptide_topology(waters=1)
    traj = md.Trajectory(random_coordinates(1, top.n_atoms, 6).astype(np.float32), top)
    pdb = tmp_path / "system.pdb"
    traj.save_pdb(str(pdb))
    from_file = md.load_topology(str(pdb))
    path = make_spec(from_file).save(tmp_path / "cv-01.json")
    assert load_spec(path, topology=str(pdb)) == load_spec(path)
    assert load_spec(path, topology=from_file).name == "cv-01"
    with pytest.raises(TopologyMismatchError, match=r"^\$\.topology\.n_atoms: the spec was made for a topology of 18 atoms; this topology has 15 atoms\. .*\[spec file '.*cv-01\.json'\]"):
        load_spec(path, topology=peptide_topology())
    with pytest.raises(InputError, match=r"topology file '.*missing\.pdb' does not exist"):
        load_spec(path, topology=tmp_path / "missing.pdb")
    junk = tmp_path / "junk.pdb"
    junk.write_text("not a pdb file at all\n", encoding="utf-8")
    with pytest.raises(InputError, match=r"cannot read topology file '.*junk\.pdb' with mdtraj|topology file '.*junk\.pdb' has no atoms"):
        load_spec(path, topology=junk)


# --------------------------------------------------------------------------
# group descriptors (center_distance, coordination) and periodic CVs


def make_group_spec(top=None, **overrides):
    """A spec with a mass-weighted and a geometric center distance and a coordination number."""
    top = peptide_topology(waters=2) if top is None else top
    parts = dict(
        name="cv-groups",
        topology=top,
        descriptors=[
            {"id": "com", "kind": "center_distance", "groups": [[0, 1, 2, 3], [15, 16, 17]],
             "weighting": "mass", "label": "com ALA10 - HOH1"},
            {"id": "geo", "kind": "center_distance", "groups": [[5, 6, 7], [18, 19, 20]],
             "weighting": "geometric"},
            {"id": "contacts", "kind": "coordination", "groups": [[3, 8, 13], [15, 18]], "r0": 0.35},
        ],
        terms=[
            {"descriptor": "com", "transform": "identity", "center": 0.9, "scale": 0.2, "weight": 1.0},
            {"descriptor": "geo", "transform": "identity", "center": 0.7, "scale": 0.3, "weight": -0.5},
            {"descriptor": "contacts", "transform": "identity", "center": 1.5, "scale": 0.5, "weight": 2.0},
        ],
    )
    parts.update(overrides)
    return Spec(**parts)


def test_group_descriptors_store_identities_masses_and_switching_defaults():
    top = peptide_topology(waters=2)
    spec = make_group_spec(top)
    com, geo, contacts = spec.descriptors
    assert com["atom_identities"][1][0] == atom_identity(top, 15)
    assert [len(g) for g in com["atom_identities"]] == [4, 3]
    # element masses from mdtraj's element table (N, C, C, O; O, H, H), in dalton
    expected = [[top.atom(a).element.mass for a in group] for group in com["groups"]]
    assert com["masses"] == expected
    assert com["masses"][1][0] == pytest.approx(15.999, abs=1e-2)  # oxygen, from memory
    assert "masses" not in geo and geo["weighting"] == "geometric"
    assert (contacts["r0"], contacts["n"], contacts["m"]) == (0.35, 6.0, 12.0)
    assert all(d["periodic"] is False for d in spec.descriptors)
    again = Spec.from_dict(json.loads(spec.to_json()))
    assert again == spec and again.to_json() == spec.to_json()
    jsonschema.Draft202012Validator(spec_schema()).validate(spec.to_dict())


def test_group_spec_evaluates_from_stored_masses_without_the_topology():
    spec = make_group_spec()
    xyz = random_coordinates(6, spec.n_atoms, 11)
    doc = spec.to_dict()
    masses = doc["descriptors"][0]["masses"]
    com_a = np.einsum("fak,a->fk", xyz[:, [0, 1, 2, 3]], masses[0]) / sum(masses[0])
    com_b = np.einsum("fak,a->fk", xyz[:, [15, 16, 17]], masses[1]) / sum(masses[1])
    geo = np.linalg.norm(xyz[:, [18, 19, 20]].mean(axis=1) - xyz[:, [5, 6, 7]].mean(axis=1), axis=-1)
    r = np.linalg.norm(xyz[:, [15, 18]][:, None, :, :] - xyz[:, [3, 8, 13]][:, :, None, :], axis=-1)
    x = r / 0.35
    contacts = ((1 - x**6) / (1 - x**12)).sum(axis=(1, 2))
    expected = (np.linalg.norm(com_b - com_a, axis=-1) - 0.9) / 0.2 - 0.5 * (geo - 0.7) / 0.3 + 2.0 * (contacts - 1.5) / 0.5
    np.testing.assert_allclose(Spec.from_dict(doc).evaluate(xyz), expected, rtol=0, atol=1e-10)
    # the stored masses are what counts: change them and the value follows
    doc["descriptors"][0]["masses"] = [[1.0, 1.0, 1.0, 1.0], [1.0, 1.0, 1.0]]
    flat = np.linalg.norm(xyz[:, [15, 16, 17]].mean(axis=1) - xyz[:, [0, 1, 2, 3]].mean(axis=1), axis=-1)
    values = Spec.from_dict(doc).descriptor_values(xyz)
    np.testing.assert_allclose(values[:, 0], flat, atol=1e-12)


def test_a_topology_change_in_a_group_atom_is_named_with_its_nested_path():
    spec = make_group_spec(peptide_topology(waters=2))
    renamed = peptide_topology(waters=2, rename={7: "CX"})
    with pytest.raises(TopologyMismatchError, match=r"^\$\.descriptors\[1\]\.atom_identities\[0\]\[2\]: atom 7 \(used by descriptor 'geo', geo\) is ALA11:C "):
        spec.check_topology(renamed)


def test_mass_weighting_needs_element_masses():
    top = peptide_topology(waters=2)
    top.atom(2).element = None
    with pytest.raises(SpecError, match=r"^\$\.descriptors\[0\]\.groups\[0\]\[2\]: atom 2 \(ALA10:C .*\) has no element mass in the topology; give masses"):
        make_group_spec(top)


def _group_doc():
    return make_group_spec().to_dict()


GROUP_REJECTIONS = [
    ("group atom out of range", _set(["descriptors", 0, "groups", 1, 2], 21),
     r"^\$\.descriptors\[0\]\.groups\[1\]\[2\]: atom index 21 is out of range for a topology of 21 atoms"),
    ("negative group atom", _set(["descriptors", 2, "groups", 0, 0], -3),
     r"^\$\.descriptors\[2\]\.groups\[0\]\[0\]: must be at least 0; got -3"),
    ("empty group", _set(["descriptors", 1, "groups", 1], []),
     r"^\$\.descriptors\[1\]\.groups\[1\]: needs at least 1 item; has 0"),
    ("one group", _set(["descriptors", 1, "groups"], [[5, 6, 7]]),
     r"^\$\.descriptors\[1\]\.groups: needs at least 2 items; has 1"),
    ("three groups", _set(["descriptors", 2, "groups"], [[3], [15], [18]]),
     r"^\$\.descriptors\[2\]\.groups: takes at most 2 items; has 3"),
    ("repeated atom in a group", _set(["descriptors", 2, "groups", 0], [3, 8, 3]),
     r"^\$\.descriptors\[2\]\.groups\[0\]\[2\]: atom 3 appears twice in this group \(at \[0\] and \[2\]\)"),
    ("no pair", lambda doc: doc["descriptors"][2].update(groups=[[4], [4]], atom_identities=[[doc["descriptors"][2]["atom_identities"][0][0]]] * 2),
     r"^\$\.descriptors\[2\]\.groups: both groups are the single atom 4, which gives no pair"),
    ("zero r0", _set(["descriptors", 2, "r0"], 0.0),
     r"^\$\.descriptors\[2\]\.r0: must be greater than 0; got 0\.0"),
    ("negative r0", _set(["descriptors", 2, "r0"], -0.3),
     r"^\$\.descriptors\[2\]\.r0: must be greater than 0; got -0\.3"),
    ("r0 as text", _set(["descriptors", 2, "r0"], "0.3 nm"),
     r"^\$\.descriptors\[2\]\.r0: must be of type number; got string"),
    ("NaN r0", _set(["descriptors", 2, "r0"], float("nan")),
     r"^\$\.descriptors\[2\]\.r0: nan is not allowed in a spec"),
    ("zero n", _set(["descriptors", 2, "n"], 0),
     r"^\$\.descriptors\[2\]\.n: must be greater than 0; got 0"),
    ("m not above n", _set(["descriptors", 2, "m"], 6.0),
     r"^\$\.descriptors\[2\]\.m: must be greater than n \(6\.0\); got 6\.0: the rational switching function needs 0 < n < m"),
    ("huge m", _set(["descriptors", 2, "m"], 1e6),
     r"^\$\.descriptors\[2\]\.m: must be at most 1000; got 1000000\.0"),
    ("missing r0", _delete(["descriptors", 2, "r0"]),
     r"^\$\.descriptors\[2\]: missing key 'r0'"),
    ("missing masses", _delete(["descriptors", 0, "masses"]),
     r"^\$\.descriptors\[0\]: missing key 'masses'"),
    ("masses with geometric weighting", _set(["descriptors", 1, "masses"], [[12.0, 12.0, 12.0], [16.0, 1.0, 1.0]]),
     r"^\$\.descriptors\[1\]\.masses: masses are used only with weighting 'mass'"),
    ("mass count", _set(["descriptors", 0, "masses", 1], [16.0, 1.0]),
     r"^\$\.descriptors\[0\]\.masses\[1\]: has 2 masses for the 3 atoms of groups\[1\]"),
    ("zero mass", _set(["descriptors", 0, "masses", 0, 1], 0.0),
     r"^\$\.descriptors\[0\]\.masses\[0\]\[1\]: must be greater than 0; got 0\.0"),
    ("infinite mass", _set(["descriptors", 0, "masses", 0, 1], float("inf")),
     r"^\$\.descriptors\[0\]\.masses\[0\]\[1\]: inf is not allowed in a spec"),
    ("unknown weighting", _set(["descriptors", 0, "weighting"], "charge"),
     r"^\$\.descriptors\[0\]\.weighting: \"charge\" is not one of 'mass', 'geometric'"),
    ("atoms on a group kind", _set(["descriptors", 1, "atoms"], [5, 18]),
     r"^\$\.descriptors\[1\]\.atoms: key 'atoms' is not used by a center_distance descriptor \(a center_distance takes: groups, weighting, masses\)"),
    ("r0 on a center distance", _set(["descriptors", 0, "r0"], 0.3),
     r"^\$\.descriptors\[0\]\.r0: key 'r0' is not used by a center_distance descriptor"),
    ("weighting on a coordination", _set(["descriptors", 2, "weighting"], "mass"),
     r"^\$\.descriptors\[2\]\.weighting: key 'weighting' is not used by a coordination descriptor \(a coordination takes: groups, r0, n, m\)"),
    ("groups instead of atoms", lambda doc: doc["descriptors"][2].update(kind="distance"),
     r"^\$\.descriptors\[2\]: missing key 'atoms'"),
    ("flat identities", lambda doc: doc["descriptors"][1].update(atom_identities=doc["descriptors"][1]["atom_identities"][0]),
     r"^\$\.descriptors\[1\]\.atom_identities: takes at most 2 items; has 3"),
    ("identity count in a group", lambda doc: doc["descriptors"][1]["atom_identities"][1].pop(),
     r"^\$\.descriptors\[1\]\.atom_identities\[1\]: has 2 atom identities for the 3 atoms of groups\[1\]"),
    ("periodic group kind", _set(["descriptors", 2, "periodic"], True),
     r"^\$\.descriptors\[2\]\.periodic: periodic must be false for a coordination"),
    ("cos of a coordination", _set(["terms", 2, "transform"], "cos"),
     r"^\$\.terms\[2\]\.transform: transform 'cos' applies to dihedrals only; descriptor 'contacts' is a coordination"),
    ("duplicate group id", _set(["descriptors", 2, "id"], "com"),
     r"^\$\.descriptors\[2\]\.id: descriptor id 'com' is used twice \(first at \$\.descriptors\[0\]\)"),
    ("unknown group kind", _set(["descriptors", 0, "kind"], "center_of_charge"),
     r"^\$\.descriptors\[0\]\.kind: \"center_of_charge\" is not one of"),
]


@pytest.mark.parametrize(("mutate", "message"), [r[1:] for r in GROUP_REJECTIONS], ids=[r[0] for r in GROUP_REJECTIONS])
def test_invalid_group_descriptors_are_rejected_with_their_json_path(mutate, message):
    doc = _group_doc()
    mutate(doc)
    with pytest.raises(SpecError, match=message):
        Spec.from_dict(doc)


def test_a_periodic_cv_stores_its_period():
    spec = make_spec(
        descriptors=[{"id": "psi", "kind": "dihedral", "atoms": [0, 1, 2, 5]}],
        terms=[{"descriptor": "psi", "transform": "identity", "center": 0.0, "scale": 1.0, "weight": 1.0}],
        periodic=True,
    )
    assert spec.period == 6.283185307179586 and spec.to_dict()["period"] == 2 * math.pi
    assert make_spec().period is None and "period" not in make_spec().to_dict()
    scaled = make_spec(
        descriptors=[{"id": "psi", "kind": "dihedral", "atoms": [0, 1, 2, 5]}],
        terms=[{"descriptor": "psi", "transform": "identity", "center": 0.5, "scale": 0.5, "weight": -2.0}],
        periodic=True,
    )
    assert scaled.period == pytest.approx(8 * math.pi, rel=1e-15)
    assert Spec.from_json(scaled.to_json()) == scaled
    doc = spec.to_dict()
    doc["period"] = 360.0
    with pytest.raises(SpecError, match=r"^\$\.period: must be 2 pi \|weight\| / scale = 6\.283185307179586 for this CV \(weight 1\.0, scale 1\.0 of its dihedral term\), .*; got 360\.0"):
        Spec.from_dict(doc)
    doc["period"] = -1.0
    with pytest.raises(SpecError, match=r"^\$\.period: must be greater than 0; got -1\.0"):
        Spec.from_dict(doc)


def test_a_document_in_the_form_the_pipeline_writes_still_loads():
    # the keys cvdesign.pipeline.suggest._spec_dict writes today: no period, periodic false,
    # descriptors with atoms, residue hashes, provenance with parameters and segments
    top = peptide_topology()
    doc = make_spec(top).to_dict()
    doc["topology"]["residues"] = residue_hashes(top)
    doc["provenance"].update(topology={"file": "top.pdb"}, segments=[{"file": "a.xtc", "frames": [0, 10]}])
    spec = Spec.from_dict(json.loads(json.dumps(doc)))
    spec.check_topology(top)
    assert spec.to_dict() == doc


@pytest.mark.parametrize(("weight", "scale", "message"), [
    (0.0, 1.0, r"^\$\.terms\[0\]\.weight: the term of a periodic CV needs a weight with 0 < 2 pi "
               r"\|weight\| / scale < infinity"),
    (1e308, 1e-308, r"^\$\.terms\[0\]\.scale: weight / scale is not a finite number"),
])
def test_a_periodic_cv_needs_a_finite_nonzero_period(weight, scale, message):
    doc = make_spec(
        descriptors=[{"id": "psi", "kind": "dihedral", "atoms": [0, 1, 2, 5]}],
        terms=[{"descriptor": "psi", "transform": "identity", "center": 0.0, "scale": 1.0, "weight": 1.0}],
        periodic=True,
    ).to_dict()
    doc["terms"][0].update(weight=weight, scale=scale)
    with pytest.raises(SpecError, match=message):
        Spec.from_dict(doc)


@pytest.mark.parametrize(("relative", "accepted"), [(1e-12, True), (1e-6, False)])
def test_a_period_is_checked_to_relative_1e_9(relative, accepted):
    # the documented rule (docs/spec-v1.md, period: "checked to relative 1e-9")
    doc = make_spec(
        descriptors=[{"id": "psi", "kind": "dihedral", "atoms": [0, 1, 2, 5]}],
        terms=[{"descriptor": "psi", "transform": "identity", "center": 0.0, "scale": 0.5,
                "weight": 1.5}],
        periodic=True,
    ).to_dict()
    exact = 2 * math.pi * 1.5 / 0.5
    assert doc["period"] == pytest.approx(exact, rel=1e-15)
    doc["period"] = exact * (1 + relative)
    if accepted:
        assert Spec.from_dict(doc).period == doc["period"]
    else:
        with pytest.raises(SpecError, match=r"^\$\.period: must be 2 pi \|weight\| / scale"):
            Spec.from_dict(doc)


@pytest.mark.parametrize(("relative", "accepted"), [(1e-12, True), (1e-6, False)])
def test_a_stored_reachable_end_is_checked_to_relative_1e_9(relative, accepted):
    doc = make_spec(states={}).to_dict()
    lower = doc["reachable_range"]["lower"]
    doc["reachable_range"]["lower"] = lower - relative * abs(lower)
    if accepted:
        Spec.from_dict(doc)
    else:
        with pytest.raises(SpecError, match=r"^\$\.reachable_range\.lower: must be "):
            Spec.from_dict(doc)


def _schema_field_names(schema):
    names = set()

    def walk(node):
        if isinstance(node, dict):
            for key, value in node.get("properties", {}).items():
                names.add(key)
                walk(value)
            for value in node.values():
                walk(value)
        elif isinstance(node, list):
            for value in node:
                walk(value)

    walk(schema)
    return names


def test_docs_describe_every_schema_field_and_their_example_loads():
    text = (Path(__file__).resolve().parents[1] / "docs" / "spec-v1.md").read_text(encoding="utf-8")
    undocumented = sorted(name for name in _schema_field_names(spec_schema()) if f"`{name}`" not in text)
    assert undocumented == []
    example = json.loads(re.search(r"```json\n(.*?)```", text, re.S).group(1))
    spec = Spec.from_dict(example)
    xyz = np.array([[[0.0, 0, 0], [0.3, 0, 0], [0.4, 0, 0]]])
    # 2 (0.4 - 0.3) / 0.1 - 0.5 (s(0.3) + s(0.4) - 1) / 0.5 with s(0.3) = 1/2
    x = 0.4 / 0.3
    expected = 2.0 - (0.5 + (1 - x**6) / (1 - x**12) - 1.0)
    np.testing.assert_allclose(spec.evaluate(xyz), [expected], rtol=1e-13)


def test_the_evaluator_warns_about_a_group_wider_than_half_the_box_naming_it():
    spec = make_group_spec()
    rng = np.random.default_rng(5)
    xyz = 1.0 + 0.03 * rng.standard_normal((2, spec.n_atoms, 3))
    xyz[:, [0, 1, 2, 3], 0] = [0.1, 0.5, 0.9, 1.3]  # group a spans 1.2 nm of a 2 nm box
    box = [2.0, 2.0, 2.0]
    with pytest.warns(GeometryWarning, match=r"^group_a \(atoms 0, 1, 2, 3\): made whole about "
                      r"its first atom, the group comes back cut in some frames"):
        spec.evaluate(xyz, box=box)
    xyz[:, [0, 1, 2, 3], 0] = [0.1, 0.3, 0.5, 0.7]  # 0.6 nm: no warning
    with warnings.catch_warnings():
        warnings.simplefilter("error", GeometryWarning)
        spec.evaluate(xyz, box=box)
