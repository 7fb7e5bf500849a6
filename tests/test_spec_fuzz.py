"""Fuzzing Spec.from_dict: any mutation of a valid spec loads or raises SpecError, nothing else.

Valid documents of every descriptor kind (and a periodic CV) are mutated at
random JSON paths (a document that still loads must evaluate to finite values, gradients
and restraint energies, or refuse): keys dropped or added, values replaced by other types,
NaN, infinities, huge and tiny numbers, huge integers, random strings, nested
garbage, lists shortened, lengthened or emptied, and values JSON cannot hold
(tuples, sets, bytes, numpy scalars and arrays, non-string keys). Runs are
derandomized (fixed seed, no example database) so CI is reproducible.
"""

import copy
import json
import warnings

import mdtraj as md
import numpy as np
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from cvdesign.errors import CVDesignError, SpecError
from cvdesign.geometry import GeometryWarning
from cvdesign.spec import Spec


def _topology():
    top = md.Topology()
    chain = top.add_chain()
    for r in range(3):
        residue = top.add_residue("ALA", chain, resSeq=r + 1)
        for name, symbol in [("N", "N"), ("CA", "C"), ("C", "C"), ("O", "O")]:
            top.add_atom(name, md.element.get_by_symbol(symbol), residue)
    return top


def _base_documents():
    top = _topology()
    combination = Spec(
        name="cv-01", topology=top,
        descriptors=[
            {"id": "d", "kind": "distance", "atoms": [1, 9]},
            {"id": "a", "kind": "angle", "atoms": [0, 1, 2]},
            {"id": "phi", "kind": "dihedral", "atoms": [2, 4, 5, 6]},
            {"id": "com", "kind": "center_distance", "groups": [[0, 1, 2, 3], [8, 9, 10, 11]], "weighting": "mass"},
            {"id": "geo", "kind": "center_distance", "groups": [[4, 5], [6, 7]], "weighting": "geometric"},
            {"id": "c", "kind": "coordination", "groups": [[0, 4, 8], [3, 7, 11]], "r0": 0.35, "n": 6, "m": 12},
        ],
        terms=[
            {"descriptor": "d", "transform": "identity", "center": 0.8, "scale": 0.2, "weight": 1.5},
            {"descriptor": "a", "transform": "identity", "center": 1.9, "scale": 0.1, "weight": -0.5},
            {"descriptor": "phi", "transform": "cos", "center": 0.1, "scale": 0.7, "weight": 0.3},
            {"descriptor": "phi", "transform": "sin", "center": -0.2, "scale": 0.6, "weight": 0.8},
            {"descriptor": "com", "transform": "identity", "center": 1.0, "scale": 0.3, "weight": 0.2},
            {"descriptor": "geo", "transform": "identity", "center": 0.5, "scale": 0.3, "weight": 0.1},
            {"descriptor": "c", "transform": "identity", "center": 2.0, "scale": 0.5, "weight": -1.0},
        ],
        states={"closed": {"mean": -1.0, "std": 0.3, "n_frames": 500}},
        scores={"heldout_fisher_ratio": 3.25, "folds": [2.5, 4.0], "per_state": {"open": 0.5}},
        provenance={"method": "hlda", "inputs": [{"file": "a.xtc", "sha256": "ab" * 32, "state": "closed"}],
                    "seed": 7, "parameters": {"lag": 10.0}},
        hints={"kernel_width": 0.1},
    )
    periodic = Spec(
        name="cv-02", topology=top,
        descriptors=[{"id": "psi", "kind": "dihedral", "atoms": [0, 1, 2, 4]}],
        terms=[{"descriptor": "psi", "transform": "identity", "center": 0.0, "scale": 1.0, "weight": 1.0}],
        periodic=True,
        restraints=[{"id": "funnel", "kind": "funnel", "groups": [[8, 9, 10, 11], [0, 1, 2, 3]],
                     "axis": [0.0, 0.6, 0.8],
                     "reference_pocket_nm": [[0.2, 0, 0], [-0.2, 0, 0], [0, 0.2, 0], [0, -0.2, 0]],
                     "lower_wall_z_nm": -0.2, "upper_wall_z_nm": 2.0, "cone_end_z_nm": 0.8,
                     "cone_half_angle_rad": 0.6, "cylinder_radius_nm": 0.25,
                     "blend_half_width_nm": 0.1, "wall_force_constant_kj_mol_nm2": 1500.0}],
    )
    return [combination.to_dict(), periodic.to_dict()]


BASES = _base_documents()

_NUMBERS = st.one_of(
    st.sampled_from([float("nan"), float("inf"), -float("inf"), 1e308, -1e308, 5e-324, 0.0, -0.0, 1e-300]),
    st.sampled_from([0, -1, 1, 2, 10**6, 2**63, -(2**63), 10**30, 10**400]),
    st.floats(allow_nan=True, allow_infinity=True),
    st.integers(),
)
_SCALARS = st.one_of(st.none(), st.booleans(), _NUMBERS, st.text(max_size=12))
_JSONISH = st.recursive(
    _SCALARS,
    lambda inner: st.one_of(st.lists(inner, max_size=4), st.dictionaries(st.text(max_size=6), inner, max_size=4)),
    max_leaves=8,
)
_ODD = st.sampled_from([
    (1, 2), {1, 2}, b"bytes", np.float32(1.5), np.int64(3), np.array([1.0, 2.0]), np.array([[0, 1]]),
    np.float64("nan"), object(), {1: "non-string key"}, {"a": (1, {"b": {2, 3}})}, np.bool_(True),
])
VALUES = st.one_of(_JSONISH, _ODD)


def _containers(doc):
    """Every (container, key) pair of a document: dict keys and list positions."""
    out = []

    def walk(node):
        if isinstance(node, dict):
            for key in list(node):
                out.append((node, key))
                walk(node[key])
        elif isinstance(node, list):
            for k in range(len(node)):
                out.append((node, k))
                walk(node[k])

    walk(doc)
    return out


def _mutate(doc, data):
    containers = _containers(doc)
    if not containers:
        return data.draw(VALUES)
    node, key = containers[data.draw(st.integers(0, len(containers) - 1))]
    operation = data.draw(st.sampled_from(
        ["replace", "replace", "replace", "drop", "add_key", "empty", "duplicate", "wrap", "grow_list"]))
    if operation == "replace":
        node[key] = data.draw(VALUES)
    elif operation == "drop":
        del node[key]
    elif operation == "add_key" and isinstance(node, dict):
        node[data.draw(st.sampled_from(["extra", "atoms", "groups", "masses", "r0", "n", "m", "weighting",
                                        "period", "kind", "id", "axis", "reference_pocket_nm",
                                        "wall_force_constant_kj_mol_nm2", "restraints", ""]))] = data.draw(VALUES)
    elif operation == "empty":
        value = node[key]
        node[key] = type(value)() if isinstance(value, (list, dict, str)) else None
    elif operation == "duplicate" and isinstance(node, list):
        node.insert(key, copy.deepcopy(node[key]))
    elif operation == "wrap":
        node[key] = [node[key]]
    elif operation == "grow_list" and isinstance(node[key], list):
        node[key].append(data.draw(VALUES))
    else:
        node[key] = data.draw(VALUES)
    return doc


@settings(max_examples=200, deadline=None, derandomize=True, database=None,
          suppress_health_check=[HealthCheck.too_slow])
@given(st.data())
def test_mutated_specs_load_or_raise_spec_error_and_nothing_else(data):
    doc = copy.deepcopy(BASES[data.draw(st.integers(0, len(BASES) - 1))])
    for _ in range(data.draw(st.integers(1, 3))):
        doc = _mutate(doc, data)
    try:
        spec = Spec.from_dict(doc)
    except SpecError as exc:
        assert str(exc).startswith(exc.path) and exc.path.startswith("$")
        return
    # a document that loads survives a JSON round trip unchanged
    again = Spec.from_json(spec.to_json())
    assert again == spec
    assert json.loads(spec.to_json()) == spec.to_dict()
    # and gives finite values, gradients and restraint energies, or refuses to
    _evaluates_finite_or_refuses(spec)


#: Coordinates (nm) of the fuzzed documents' 12 atoms: a few random frames.
_XYZ = np.random.default_rng(11).normal(scale=0.4, size=(4, 12, 3))


def _evaluates_finite_or_refuses(spec):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", GeometryWarning)  # random atoms may line up
        try:
            values, grad = spec.evaluate(_XYZ, gradient=True)
        except CVDesignError as exc:
            assert "$.terms" in str(exc) or "coordinates" in str(exc), str(exc)
            return
        assert np.all(np.isfinite(values)) and np.all(np.isfinite(grad))
        if spec.restraints:
            energy, force = spec.restraint_energy(_XYZ, gradient=True)
            assert np.all(np.isfinite(energy)) and np.all(np.isfinite(force))


def test_the_base_documents_are_valid():
    for doc in BASES:
        assert Spec.from_dict(copy.deepcopy(doc)).to_dict() == doc


_FINITE = st.one_of(
    st.sampled_from([1e308, -1e308, 1e300, 1e-300, 1e-320, 5e-324, 0.0, -0.0, 1.0, -2.5]),
    st.floats(allow_nan=False, allow_infinity=False),
)


@settings(max_examples=200, deadline=None, derandomize=True, database=None,
          suppress_health_check=[HealthCheck.too_slow])
@given(st.data())
def test_finite_numbers_edited_into_a_spec_evaluate_finite_or_are_refused(data):
    # the mutations above rarely leave a document that loads; these edits of the numbers
    # that make the CV (as a hand edit would, the reachable range removed) mostly do
    doc = copy.deepcopy(BASES[0])
    del doc["reachable_range"]
    for _ in range(data.draw(st.integers(1, 4))):
        where = data.draw(st.sampled_from(["term", "term", "offset", "r0"]))
        if where == "term":
            term = doc["terms"][data.draw(st.integers(0, len(doc["terms"]) - 1))]
            term[data.draw(st.sampled_from(["center", "scale", "weight"]))] = data.draw(_FINITE)
        elif where == "offset":
            doc["offset"] = data.draw(_FINITE)
        else:
            next(d for d in doc["descriptors"] if d["kind"] == "coordination")["r0"] = \
                data.draw(_FINITE)
    try:
        spec = Spec.from_dict(doc)
    except SpecError as exc:
        assert str(exc).startswith(exc.path) and exc.path.startswith("$")
        return
    _evaluates_finite_or_refuses(spec)
