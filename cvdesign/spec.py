"""The spec: an engine-neutral, versioned JSON file that hands one CV over.

A spec names its descriptors by 0-based atom indices, records who those atoms
are (chain, residue, atom name, element) and a fingerprint of the whole
topology, and defines

    CV = offset + sum over terms of weight * (transform(d) - center) / scale

with descriptor values ``d`` in nm (distances) or rad (angles, dihedrals) and
transforms identity, cos or sin (cos and sin for dihedrals only). Nothing in a
spec is executed: loading validates the document against the JSON Schema
shipped in ``cvdesign/schema/spec-v1.json``, then checks cross-references,
and, when a topology is given, that the topology is the one the spec was made
for.

A written spec is ``json.dumps(doc, indent=2, sort_keys=True,
allow_nan=False)`` plus a newline: the same spec always gives the same bytes.
"""

import copy
import functools
import hashlib
import json
import math
import os
import re
from importlib import resources
from pathlib import Path

import jsonschema
import mdtraj as md
import numpy as np

from . import geometry
from ._io import atomic_write_text
from .errors import InputError, SpecError, TopologyMismatchError

__all__ = [
    "SPEC_FORMAT",
    "SPEC_VERSION",
    "UNITS",
    "Spec",
    "atom_identity",
    "load_spec",
    "spec_schema",
    "topology_fingerprint",
]

SPEC_FORMAT = "cvdesign-spec"
SPEC_VERSION = 1
UNITS = {"length": "nm", "angle": "rad", "time": "ps", "energy": "kJ/mol"}

_ATOMS_PER_KIND = {"distance": 2, "angle": 3, "dihedral": 4}
_TRANSFORMS_PER_KIND = {
    "distance": ("identity",),
    "angle": ("identity",),
    "dihedral": ("identity", "cos", "sin"),
}
_FINGERPRINT_HEADER = "cvdesign topology fingerprint, version 1\n"


# --------------------------------------------------------------------------
# topology identities


def _check_topology_arg(topology, name="topology"):
    if isinstance(topology, md.Trajectory):
        return topology.topology
    if not isinstance(topology, md.Topology):
        raise InputError(
            f"{name} must be an mdtraj.Topology (or an mdtraj.Trajectory); got {type(topology).__name__}"
        )
    return topology


def _identity_of(atom):
    element = atom.element
    symbol = "" if element is None or element.symbol is None else str(element.symbol)
    residue = atom.residue
    return {
        "chain": int(residue.chain.index),
        "residue": str(residue.name),
        "resid": int(residue.resSeq),
        "name": str(atom.name),
        "element": symbol,
    }


def atom_identity(topology, i):
    """Who atom `i` is: chain, residue name and number, atom name, element.

    Parameters
    ----------
    topology : mdtraj.Topology
        The topology (an ``mdtraj.Trajectory`` is accepted for its topology).
    i : int
        0-based atom index.

    Returns
    -------
    dict
        ``{"chain": int, "residue": str, "resid": int, "name": str,
        "element": str}``: the 0-based chain index, the residue name, the
        residue number as in the topology file (``resSeq``), the atom name,
        and the element symbol (``""`` when the atom has no element).

    Raises
    ------
    InputError
        `topology` is not a topology, or `i` is not a valid atom index.

    Examples
    --------
    >>> top = md.Topology()
    >>> res = top.add_residue("ALA", top.add_chain(), resSeq=12)
    >>> _ = top.add_atom("CA", md.element.carbon, res)
    >>> atom_identity(top, 0)
    {'chain': 0, 'residue': 'ALA', 'resid': 12, 'name': 'CA', 'element': 'C'}
    """
    topology = _check_topology_arg(topology)
    if isinstance(i, (bool, np.bool_)) or not isinstance(i, (int, np.integer)):
        raise InputError(f"i must be an integer atom index; got {i!r}")
    if not 0 <= int(i) < topology.n_atoms:
        raise InputError(
            f"i={int(i)} is not an atom of this topology ({topology.n_atoms} atoms, "
            f"valid indices 0..{topology.n_atoms - 1})"
        )
    return _identity_of(topology.atom(int(i)))


def _identity_line(identity):
    row = [identity["chain"], identity["residue"], identity["resid"], identity["name"], identity["element"]]
    return json.dumps(row, ensure_ascii=True, separators=(",", ":")) + "\n"


def topology_fingerprint(topology):
    """A checksum of the identities of all atoms of a topology, in order.

    Parameters
    ----------
    topology : mdtraj.Topology
        The topology (an ``mdtraj.Trajectory`` is accepted for its topology).

    Returns
    -------
    str
        ``"sha256:"`` followed by 64 hex digits: the SHA-256 of a fixed header
        line and then one line per atom, the JSON list ``[chain, residue,
        resid, name, element]`` of :func:`atom_identity` (compact separators,
        ASCII). Coordinates, bonds and box play no part.

    Examples
    --------
    >>> top = md.Topology()
    >>> res = top.add_residue("HOH", top.add_chain())
    >>> for name, el in [("O", md.element.oxygen), ("H1", md.element.hydrogen)]:
    ...     _ = top.add_atom(name, el, res)
    >>> fp = topology_fingerprint(top)
    >>> fp.startswith("sha256:"), len(fp)
    (True, 71)
    """
    topology = _check_topology_arg(topology)
    digest = hashlib.sha256(_FINGERPRINT_HEADER.encode("ascii"))
    digest.update("".join(_identity_line(_identity_of(a)) for a in topology.atoms).encode("ascii"))
    return "sha256:" + digest.hexdigest()


def residue_hashes(topology):
    """Short per-residue checksums, so a mismatch can be traced to one residue.

    Parameters
    ----------
    topology : mdtraj.Topology

    Returns
    -------
    str
        8 hex digits per residue, in residue order: the start of the SHA-256
        of the identity lines (see :func:`topology_fingerprint`) of the
        residue's atoms.

    Examples
    --------
    >>> top = md.Topology()
    >>> res = top.add_residue("HOH", top.add_chain())
    >>> _ = top.add_atom("O", md.element.oxygen, res)
    >>> len(residue_hashes(top))
    8
    """
    topology = _check_topology_arg(topology)
    out = []
    for res in topology.residues:
        text = "".join(_identity_line(_identity_of(a)) for a in res.atoms)
        out.append(hashlib.sha256(text.encode("ascii")).hexdigest()[:8])
    return "".join(out)


def _describe_residue(residue):
    names = " ".join(a.name for a in list(residue.atoms)[:12])
    more = " ..." if residue.n_atoms > 12 else ""
    return (f"residue {residue.index} ({residue.name}{residue.resSeq}, chain "
            f"{residue.chain.index}, {residue.n_atoms} atoms: {names}{more})")


def _describe(identity):
    element = identity["element"] or "none"
    return (
        f"{identity['residue']}{identity['resid']}:{identity['name']} "
        f"(chain {identity['chain']}, element {element})"
    )


# --------------------------------------------------------------------------
# JSON paths, parsing, and plain data


def _json_path(parts):
    out = "$"
    for part in parts:
        if isinstance(part, int):
            out += f"[{part}]"
        elif re.fullmatch(r"[A-Za-z_][A-Za-z0-9_]*", str(part)):
            out += f".{part}"
        else:
            out += f"[{json.dumps(str(part))}]"
    return out


class _NonFinite:
    """Stands in for a NaN/Infinity literal while parsing, so its path can be reported."""

    def __init__(self, text):
        self.text = text


class _DuplicateKeys(dict):
    """A parsed JSON object in which some key appeared more than once."""

    def __init__(self, pairs, duplicates):
        super().__init__(pairs)
        self.duplicates = duplicates


def _object_pairs(pairs):
    seen, duplicates = set(), []
    for key, _ in pairs:
        if key in seen and key not in duplicates:
            duplicates.append(key)
        seen.add(key)
    return _DuplicateKeys(pairs, duplicates) if duplicates else dict(pairs)


def _parse_json(text):
    """Parse spec text; NaN/Infinity and repeated keys survive as markers."""
    return json.loads(text, parse_constant=_NonFinite, object_pairs_hook=_object_pairs)


def _plain(value, parts=()):
    """Deep copy of `value` as plain JSON types, with errors naming the JSON path.

    numpy scalars and arrays become Python numbers and lists, tuples become
    lists; NaN, infinities, repeated keys and other types are rejected.
    """
    if isinstance(value, _NonFinite):
        raise SpecError(
            f"{value.text} is not allowed in a spec (JSON has no NaN or Infinity); "
            "write a finite number",
            _json_path(parts),
        )
    if isinstance(value, dict):
        if isinstance(value, _DuplicateKeys):
            raise SpecError(
                f"key {value.duplicates[0]!r} appears more than once in this object; keep one",
                _json_path(parts),
            )
        out = {}
        for key, item in value.items():
            if not isinstance(key, str):
                raise SpecError(f"object keys must be strings; got {key!r}", _json_path(parts))
            out[key] = _plain(item, parts + (key,))
        return out
    if isinstance(value, np.ndarray):
        value = value.tolist()
    if isinstance(value, (list, tuple)):
        return [_plain(item, parts + (k,)) for k, item in enumerate(value)]
    if isinstance(value, np.generic):
        value = value.item()
    if value is None or isinstance(value, (str, bool, int)):
        return value
    if isinstance(value, float):
        if not math.isfinite(value):
            raise SpecError(
                f"{value!r} is not allowed in a spec (JSON has no NaN or Infinity); write a finite number",
                _json_path(parts),
            )
        return value
    raise SpecError(
        f"a value of type {type(value).__name__} cannot be stored in a spec; use numbers, "
        "strings, booleans, null, lists and objects",
        _json_path(parts),
    )


# --------------------------------------------------------------------------
# validation


@functools.lru_cache(maxsize=1)
def _schema_text():
    return (resources.files("cvdesign.schema") / "spec-v1.json").read_text(encoding="utf-8")


@functools.lru_cache(maxsize=1)
def _validator():
    schema = json.loads(_schema_text())
    return jsonschema.Draft202012Validator(schema)


def spec_schema():
    """The JSON Schema of spec version 1, as shipped in ``cvdesign/schema/spec-v1.json``.

    Returns
    -------
    dict
        A fresh copy of the schema (JSON Schema draft 2020-12).

    Examples
    --------
    >>> spec_schema()["properties"]["version"]
    {'description': 'Spec format version.', 'const': 1}
    """
    return json.loads(_schema_text())


def _type_name(value):
    if value is None:
        return "null"
    return {bool: "boolean", int: "integer", float: "number", str: "string", list: "array", dict: "object"}.get(
        type(value), type(value).__name__
    )


def _short(value):
    text = json.dumps(value, sort_keys=True)
    return text if len(text) <= 60 else text[:57] + "..."


def _schema_message(error):
    """A readable message for one jsonschema error."""
    v, inst = error.validator, error.instance
    if v == "required":
        missing = [k for k in error.validator_value if k not in inst]
        return f"missing key {missing[0]!r}" if missing else error.message
    if v == "additionalProperties":
        allowed = sorted(error.schema.get("properties", {}))
        extra = sorted(k for k in inst if k not in allowed)
        where = f"; allowed keys: {', '.join(allowed)}" if allowed else ""
        return f"unknown key {extra[0]!r}{where}" if extra else error.message
    if v == "const":
        return f"must be {_short(error.validator_value)}; got {_short(inst)}"
    if v == "enum":
        options = ", ".join(repr(o) for o in error.validator_value)
        return f"{_short(inst)} is not one of {options}"
    if v == "type":
        want = error.validator_value
        want = " or ".join(want) if isinstance(want, list) else want
        return f"must be of type {want}; got {_type_name(inst)} {_short(inst)}"
    if v == "exclusiveMinimum":
        return f"must be greater than {error.validator_value}; got {_short(inst)}"
    if v == "minimum":
        return f"must be at least {error.validator_value}; got {_short(inst)}"
    if v == "minItems":
        return f"needs at least {error.validator_value} items; has {len(inst)}"
    if v == "maxItems":
        return f"takes at most {error.validator_value} items; has {len(inst)}"
    if v == "minLength":
        return "must not be empty"
    if v == "pattern":
        return f"{_short(inst)} does not have the expected form (regular expression {error.validator_value})"
    if v == "anyOf" and error.schema.get("anyOf", [{}])[0].get("type") == "number":
        return f"a score must be a number, a list of numbers or an object of those; got {_short(inst)}"
    return error.message


def _path_key(error):
    return tuple((0, part) if isinstance(part, int) else (1, str(part)) for part in error.absolute_path)


def _schema_check(doc):
    errors = list(_validator().iter_errors(doc))
    if errors:
        # Report the error that comes first in the document (array order, then
        # key order), so the message does not depend on the validator's order.
        first = min(_path_key(e) for e in errors)
        error = jsonschema.exceptions.best_match(e for e in errors if _path_key(e) == first)
        raise SpecError(
            _schema_message(error) + " (spec version 1 schema: cvdesign/schema/spec-v1.json)",
            _json_path(error.absolute_path),
        )


def _a(kind):
    return f"an {kind}" if kind[0] in "aeiou" else f"a {kind}"


def _semantic_check(doc):
    n_atoms = doc["topology"]["n_atoms"]
    kinds, first_at = {}, {}
    for k, desc in enumerate(doc["descriptors"]):
        here = f"$.descriptors[{k}]"
        did, kind, atoms = desc["id"], desc["kind"], desc["atoms"]
        if did in first_at:
            raise SpecError(
                f"descriptor id {did!r} is used twice (first at {first_at[did]}); ids must be unique",
                f"{here}.id",
            )
        first_at[did] = here
        kinds[did] = kind
        need = _ATOMS_PER_KIND[kind]
        if len(atoms) != need:
            raise SpecError(f"{_a(kind)} takes {need} atoms; got {len(atoms)}: {atoms}", f"{here}.atoms")
        for j, a in enumerate(atoms):
            if a >= n_atoms:
                raise SpecError(
                    f"atom index {a} is out of range for a topology of {n_atoms} atoms "
                    f"(0-based indices 0..{n_atoms - 1})",
                    f"{here}.atoms[{j}]",
                )
        if len(set(atoms)) != len(atoms):
            raise SpecError(f"the atoms of one descriptor must be distinct; got {atoms}", f"{here}.atoms")
        if len(desc["atom_identities"]) != len(atoms):
            raise SpecError(
                f"has {len(desc['atom_identities'])} atom identities for {len(atoms)} atoms; "
                "give one identity per atom, in the order of atoms",
                f"{here}.atom_identities",
            )
        if desc["periodic"] != (kind == "dihedral"):
            raise SpecError(
                f"periodic must be {str(kind == 'dihedral').lower()} for {_a(kind)} "
                "(only dihedrals are periodic, with period 2 pi rad)",
                f"{here}.periodic",
            )
    terms = doc["terms"]
    for i, term in enumerate(terms):
        here = f"$.terms[{i}]"
        did, transform = term["descriptor"], term["transform"]
        if did not in kinds:
            known = ", ".join(repr(d) for d in kinds)
            raise SpecError(
                f"refers to descriptor {did!r}, which this spec does not define (descriptors: {known})",
                f"{here}.descriptor",
            )
        kind = kinds[did]
        if transform not in _TRANSFORMS_PER_KIND[kind]:
            raise SpecError(
                f"transform {transform!r} applies to dihedrals only; descriptor {did!r} is {_a(kind)}, "
                "use 'identity'",
                f"{here}.transform",
            )
        if kind == "dihedral" and transform == "identity" and not (doc["periodic"] and len(terms) == 1):
            raise SpecError(
                f"an identity term on dihedral {did!r} is allowed only as the single term of a "
                "periodic CV (periodic: true); in a combination use its cos and sin, since a raw "
                "angle jumps by 2 pi at +-pi",
                f"{here}.transform",
            )
        if not term["scale"] > 0:
            raise SpecError(f"scale must be > 0; got {term['scale']!r}", f"{here}.scale")
    if doc["periodic"]:
        single = len(terms) == 1 and terms[0]["transform"] == "identity" and kinds[terms[0]["descriptor"]] == "dihedral"
        if not single:
            raise SpecError(
                "a periodic CV must have exactly one term: a dihedral with the identity "
                "transform; set periodic to false for other CVs",
                "$.periodic",
            )


def _normalize(doc):
    """Fix the numeric types of the structured fields (ints stay ints, numbers become floats)."""
    doc["version"] = int(doc["version"])
    doc["topology"]["n_atoms"] = int(doc["topology"]["n_atoms"])
    doc["offset"] = float(doc["offset"])
    for desc in doc["descriptors"]:
        desc["atoms"] = [int(a) for a in desc["atoms"]]
        for ident in desc["atom_identities"]:
            ident["chain"] = int(ident["chain"])
            ident["resid"] = int(ident["resid"])
    for term in doc["terms"]:
        for key in ("center", "scale", "weight"):
            term[key] = float(term[key])
    for state in doc["states"].values():
        state["mean"] = float(state["mean"])
        state["std"] = float(state["std"])
        state["n_frames"] = int(state["n_frames"])
    return doc


def _validated(document):
    """Check a spec document and return a normalized plain copy of it."""
    if not isinstance(document, dict):
        raise SpecError(f"a spec is a JSON object; got {_type_name(document)}", "$")
    doc = _plain(document)
    if doc.get("format") != SPEC_FORMAT:
        if "format" not in doc:
            raise SpecError(f"missing key 'format'; a spec starts with \"format\": \"{SPEC_FORMAT}\"", "$")
        raise SpecError(
            f"this is not a cvdesign spec: format is {_short(doc['format'])}, expected {SPEC_FORMAT!r}",
            "$.format",
        )
    version = doc.get("version")
    if "version" not in doc:
        raise SpecError("missing key 'version'", "$")
    if isinstance(version, bool) or version != SPEC_VERSION:
        raise SpecError(
            f"this cvdesign reads spec version {SPEC_VERSION}; the file says version {_short(version)}. "
            "Use the cvdesign release that wrote it, or re-create the spec with this one",
            "$.version",
        )
    _schema_check(doc)
    _semantic_check(doc)
    return _normalize(doc)


def _cvdesign_version():
    import cvdesign

    return str(getattr(cvdesign, "__version__", "unknown"))


# --------------------------------------------------------------------------
# the spec


class Spec:
    """One collective variable: descriptors, a linear combination, and where it came from.

    ``CV = offset + sum_t weight_t * (transform_t(d_t) - center_t) / scale_t``
    with descriptor values ``d`` in nm (distances) or rad (angles in [0, pi],
    dihedrals in (-pi, pi], IUPAC sign).

    Parameters
    ----------
    name : str
        Short name, e.g. ``"cv-01"``.
    topology : mdtraj.Topology or dict
        The topology the CV is made for, or its record ``{"n_atoms": int,
        "fingerprint": "sha256:..."}``. With an mdtraj topology the record
        and any missing ``atom_identities`` of the descriptors are computed.
    descriptors : list of dict
        Each ``{"id": str, "kind": "distance"|"angle"|"dihedral", "atoms":
        [int, ...], "label": str, "atom_identities": [dict, ...],
        "periodic": bool}`` with 0-based atoms (2, 3 or 4). ``label``
        defaults to the id, ``periodic`` to ``kind == "dihedral"``;
        ``atom_identities`` (see :func:`atom_identity`) may be left out when
        `topology` is an mdtraj topology.
    terms : list of dict
        Each ``{"descriptor": id, "transform": "identity"|"cos"|"sin",
        "center": float, "scale": float > 0, "weight": float}``; cos and sin
        for dihedrals only. center and scale are in the units of the
        transformed value (nm, rad, or 1 for cos/sin).
    offset : float, default=0.0
        Constant added to the CV.
    periodic : bool, default=False
        True for a CV that is one dihedral with the identity transform; it is
        then periodic with period ``2 pi |weight| / scale``.
    states : dict, optional
        ``{state name: {"mean": float, "std": float, "n_frames": int}}``, the
        CV's distribution per state in the input data.
    scores : dict, optional
        Free-form quality scores: numbers, lists of numbers, or objects of those.
    provenance : dict, optional
        ``{"cvdesign_version": str, "method": str, "inputs": [{"file":
        basename, "sha256": hex, "state": str or None}], "seed": int or None}``
        plus any other JSON. Missing required keys get defaults (this
        cvdesign's version, ``""``, ``[]``, None).
    caution : str, default=""
        What to check before relying on the CV.
    hints : dict, optional
        Free-form bias-parameter suggestions; stored only when given.

    Raises
    ------
    SpecError
        The parts do not form a valid spec; the message starts with the JSON
        path of the offending element, e.g. ``$.terms[1].descriptor``.

    See Also
    --------
    load_spec : read and check a spec file.

    Examples
    --------
    A distance between two atoms of a small topology:

    >>> top = md.Topology()
    >>> res = top.add_residue("GLY", top.add_chain(), resSeq=1)
    >>> for name in ["N", "CA", "C"]:
    ...     _ = top.add_atom(name, md.element.get_by_symbol(name[0]), res)
    >>> spec = Spec(name="cv-01", topology=top,
    ...             descriptors=[{"id": "d0", "kind": "distance", "atoms": [0, 2]}],
    ...             terms=[{"descriptor": "d0", "transform": "identity",
    ...                     "center": 0.25, "scale": 0.05, "weight": 1.0}])
    >>> xyz = np.array([[[0.0, 0.0, 0.0], [0.15, 0.0, 0.0], [0.3, 0.0, 0.0]]])
    >>> spec.evaluate(xyz).round(6)
    array([1.])
    >>> Spec.from_dict(spec.to_dict()) == spec
    True
    """

    def __init__(
        self,
        *,
        name,
        topology,
        descriptors,
        terms,
        offset=0.0,
        periodic=False,
        states=None,
        scores=None,
        provenance=None,
        caution="",
        hints=None,
    ):
        mdtop = None
        if isinstance(topology, (md.Topology, md.Trajectory)):
            mdtop = _check_topology_arg(topology)
            topology = {"n_atoms": mdtop.n_atoms, "fingerprint": topology_fingerprint(mdtop)}
        if not isinstance(descriptors, (list, tuple)):
            raise SpecError(f"descriptors must be a list of dicts; got {type(descriptors).__name__}", "$.descriptors")
        filled = []
        for k, desc in enumerate(descriptors):
            if not isinstance(desc, dict):
                raise SpecError(f"a descriptor is a dict; got {type(desc).__name__}", f"$.descriptors[{k}]")
            desc = dict(desc)
            desc.setdefault("label", desc.get("id", ""))
            desc.setdefault("periodic", desc.get("kind") == "dihedral")
            if "atom_identities" not in desc and mdtop is not None:
                atoms = np.asarray(desc.get("atoms", []))
                if atoms.ndim == 1 and np.issubdtype(atoms.dtype, np.integer) and np.all(
                    (atoms >= 0) & (atoms < mdtop.n_atoms)
                ):
                    desc["atom_identities"] = [_identity_of(mdtop.atom(int(a))) for a in atoms]
            filled.append(desc)
        prov = {} if provenance is None else dict(provenance)
        prov.setdefault("cvdesign_version", _cvdesign_version())
        prov.setdefault("method", "")
        prov.setdefault("inputs", [])
        prov.setdefault("seed", None)
        doc = {
            "format": SPEC_FORMAT,
            "version": SPEC_VERSION,
            "name": name,
            "units": dict(UNITS),
            "topology": topology,
            "descriptors": filled,
            "terms": list(terms) if isinstance(terms, (list, tuple)) else terms,
            "offset": offset,
            "periodic": periodic,
            "states": {} if states is None else states,
            "scores": {} if scores is None else scores,
            "provenance": prov,
            "caution": caution,
        }
        if hints is not None:
            doc["hints"] = hints
        self._doc = _validated(doc)
        if mdtop is not None:
            for k, desc in enumerate(self._doc["descriptors"]):
                for j, (atom, given) in enumerate(zip(desc["atoms"], desc["atom_identities"])):
                    actual = _identity_of(mdtop.atom(atom))
                    if given != actual:
                        raise SpecError(
                            f"the identity given for atom {atom} ({_describe(given)}) does not match "
                            f"the topology ({_describe(actual)}); leave atom_identities out to have "
                            "them taken from the topology",
                            f"$.descriptors[{k}].atom_identities[{j}]",
                        )

    # -- construction and serialization ---------------------------------

    @classmethod
    def from_dict(cls, document):
        """Build a spec from a plain dict (e.g. ``json.loads`` of a spec file), validating it.

        Parameters
        ----------
        document : dict
            A spec document, version 1.

        Returns
        -------
        Spec

        Raises
        ------
        SpecError
            The document is not a valid version-1 spec. The message starts
            with the JSON path of the problem, e.g. ``$.terms[1].descriptor:
            refers to descriptor 'd9', which this spec does not define``.

        Examples
        --------
        >>> doc = Spec.from_json(_EXAMPLE).to_dict()
        >>> doc["terms"][0]["transform"] = "cos"
        >>> Spec.from_dict(doc)  # doctest: +ELLIPSIS
        Traceback (most recent call last):
        ...
        cvdesign.errors.SpecError: $.terms[0].transform: transform 'cos' applies to dihedrals only; ...
        """
        self = cls.__new__(cls)
        self._doc = _validated(document)
        return self

    @classmethod
    def from_json(cls, text):
        """Build a spec from JSON text, validating it.

        NaN and Infinity literals and repeated keys are rejected with the JSON
        path where they occur.

        Parameters
        ----------
        text : str or bytes
            The JSON document.

        Returns
        -------
        Spec

        Raises
        ------
        SpecError
            The text is not JSON, or not a valid version-1 spec.

        Examples
        --------
        >>> Spec.from_json(_EXAMPLE).name
        'cv-01'
        """
        try:
            document = _parse_json(text)
        except json.JSONDecodeError as exc:
            raise SpecError(f"not valid JSON: {exc.msg} at line {exc.lineno}, column {exc.colno}", "$") from None
        return cls.from_dict(document)

    def to_dict(self):
        """The spec as a plain, JSON-ready dict (a deep copy).

        Returns
        -------
        dict

        Examples
        --------
        >>> sorted(Spec.from_json(_EXAMPLE).to_dict())[:4]
        ['caution', 'descriptors', 'format', 'name']
        """
        return copy.deepcopy(self._doc)

    def to_json(self):
        """The spec as JSON text: sorted keys, indent 2, no NaN, final newline.

        Returns
        -------
        str
            The exact text :meth:`save` writes; equal specs give equal text.

        Examples
        --------
        >>> Spec.from_json(_EXAMPLE).to_json().splitlines()[0]
        '{'
        """
        return json.dumps(self._doc, indent=2, sort_keys=True, allow_nan=False) + "\n"

    def save(self, path):
        """Write the spec to `path` atomically (a temporary file renamed into place).

        Parameters
        ----------
        path : str or os.PathLike
            Output file, conventionally ``<name>.json``. Its directory must exist.

        Returns
        -------
        pathlib.Path
            The path written.

        Raises
        ------
        InputError
            The directory does not exist or cannot be written.

        Examples
        --------
        >>> import tempfile
        >>> with tempfile.TemporaryDirectory() as tmp:
        ...     out = Spec.from_json(_EXAMPLE).save(os.path.join(tmp, "cv-01.json"))
        ...     load_spec(out).name
        'cv-01'
        """
        path = Path(path)
        if not path.parent.is_dir():
            raise InputError(f"cannot write spec {str(path)!r}: directory {str(path.parent)!r} does not exist")
        try:
            atomic_write_text(path, self.to_json())
        except OSError as exc:
            raise InputError(f"cannot write spec {str(path)!r}: {exc.strerror or exc}") from None
        return path

    # -- read-only views --------------------------------------------------

    @property
    def name(self):
        """str : the CV's name."""
        return self._doc["name"]

    @property
    def n_atoms(self):
        """int : atom count of the topology the spec was made for."""
        return self._doc["topology"]["n_atoms"]

    @property
    def fingerprint(self):
        """str : ``"sha256:..."`` fingerprint of that topology (see :func:`topology_fingerprint`)."""
        return self._doc["topology"]["fingerprint"]

    @property
    def descriptors(self):
        """list of dict : copies of the descriptor records, in file order."""
        return copy.deepcopy(self._doc["descriptors"])

    @property
    def terms(self):
        """list of dict : copies of the term records, in file order."""
        return copy.deepcopy(self._doc["terms"])

    @property
    def offset(self):
        """float : constant added to the CV."""
        return self._doc["offset"]

    @property
    def periodic(self):
        """bool : whether the CV is periodic (a single identity dihedral term)."""
        return self._doc["periodic"]

    @property
    def states(self):
        """dict : per-state ``{"mean", "std", "n_frames"}`` of the CV (a copy)."""
        return copy.deepcopy(self._doc["states"])

    @property
    def scores(self):
        """dict : quality scores (a copy)."""
        return copy.deepcopy(self._doc["scores"])

    @property
    def provenance(self):
        """dict : how the spec was made (a copy)."""
        return copy.deepcopy(self._doc["provenance"])

    @property
    def caution(self):
        """str : what to check before relying on the CV."""
        return self._doc["caution"]

    @property
    def hints(self):
        """dict or None : bias-parameter suggestions, when the spec has them (a copy)."""
        return copy.deepcopy(self._doc.get("hints"))

    def __eq__(self, other):
        if not isinstance(other, Spec):
            return NotImplemented
        return self._doc == other._doc

    __hash__ = None

    def __repr__(self):
        return (
            f"Spec(name={self.name!r}, n_descriptors={len(self._doc['descriptors'])}, "
            f"n_terms={len(self._doc['terms'])}, n_atoms={self.n_atoms})"
        )

    # -- evaluation -------------------------------------------------------

    def _check_xyz(self, xyz):
        try:
            arr = np.asarray(xyz, dtype=np.float64)
        except (TypeError, ValueError) as exc:
            raise InputError(f"xyz must be a numeric array of shape (n_frames, n_atoms, 3) in nm ({exc})") from None
        if arr.ndim != 3 or arr.shape[2] != 3:
            raise InputError(f"xyz has shape {arr.shape}; expected (n_frames, {self.n_atoms}, 3) in nm")
        if arr.shape[1] != self.n_atoms:
            raise InputError(
                f"xyz has {arr.shape[1]} atoms per frame; this spec ({self.name!r}) was made for a "
                f"topology of {self.n_atoms} atoms. Use coordinates of that topology (all atoms, in order)"
            )
        return arr

    def descriptor_values(self, xyz, box=None):
        """Values of every descriptor of the spec, frame by frame.

        Parameters
        ----------
        xyz : array-like of shape (n_frames, n_atoms, 3)
            Coordinates in nm of all atoms of the spec's topology, in order.
        box : array-like or None, default=None
            Periodic box in nm: lengths (3,) or (n_frames, 3), or box vectors
            as rows (3, 3) or (n_frames, 3, 3); see
            :func:`cvdesign.geometry.minimum_image`.

        Returns
        -------
        ndarray of shape (n_frames, n_descriptors), float64
            Columns in the order of :attr:`descriptors`: distances in nm,
            angles in rad in [0, pi], dihedrals in rad in (-pi, pi].

        Raises
        ------
        InputError
            `xyz` has the wrong shape or atom count, or `box` is bad.

        Examples
        --------
        >>> spec = Spec.from_json(_EXAMPLE)
        >>> spec.descriptor_values(np.zeros((2, 3, 3)) + [[0, 0, 0], [0.1, 0, 0], [0.4, 0, 0]])
        array([[0.4],
               [0.4]])
        """
        arr = self._check_xyz(xyz)
        descs = self._doc["descriptors"]
        out = np.empty((arr.shape[0], len(descs)), dtype=np.float64)
        functions = {"distance": geometry.distances, "angle": geometry.angles, "dihedral": geometry.dihedrals}
        for kind, function in functions.items():
            cols = [k for k, d in enumerate(descs) if d["kind"] == kind]
            if cols:
                atoms = np.array([descs[k]["atoms"] for k in cols], dtype=np.int64)
                out[:, cols] = function(arr, atoms, box=box)
        return out

    def evaluate(self, xyz, box=None):
        """The CV value of every frame, from coordinates alone.

        Parameters
        ----------
        xyz : array-like of shape (n_frames, n_atoms, 3)
            Coordinates in nm of all atoms of the spec's topology, in order.
        box : array-like or None, default=None
            Periodic box in nm (see :meth:`descriptor_values`); None means
            no periodicity.

        Returns
        -------
        ndarray of shape (n_frames,), float64
            ``offset + sum_t weight_t * (transform_t(d_t) - center_t) / scale_t``,
            in the CV's units (those of ``offset``).

        Raises
        ------
        InputError
            `xyz` has the wrong shape or atom count, or `box` is bad.

        Examples
        --------
        >>> spec = Spec.from_json(_EXAMPLE)
        >>> xyz = np.array([[[0.0, 0, 0], [0.1, 0, 0], [0.4, 0, 0]]])
        >>> spec.evaluate(xyz).round(6)  # 2.0 * (0.4 - 0.3) / 0.1
        array([2.])
        """
        values = self.descriptor_values(xyz, box=box)
        column = {d["id"]: k for k, d in enumerate(self._doc["descriptors"])}
        cv = np.full(values.shape[0], self._doc["offset"], dtype=np.float64)
        for term in self._doc["terms"]:
            d = values[:, column[term["descriptor"]]]
            if term["transform"] == "cos":
                d = np.cos(d)
            elif term["transform"] == "sin":
                d = np.sin(d)
            cv += term["weight"] * (d - term["center"]) / term["scale"]
        return cv

    # -- topology check ---------------------------------------------------

    def check_topology(self, topology):
        """Refuse a topology the spec was not made for.

        Checks, in this order: the atom count; the identity (chain, residue
        name and number, atom name, element) of every atom a descriptor uses;
        the fingerprint of the whole topology.

        Parameters
        ----------
        topology : mdtraj.Topology
            The topology to check (an ``mdtraj.Trajectory`` is accepted for
            its topology).

        Returns
        -------
        None

        Raises
        ------
        TopologyMismatchError
            The topology differs; the message says how, naming the first
            differing atom the CV uses when there is one.
        InputError
            `topology` is not a topology.

        Examples
        --------
        >>> top = md.Topology()
        >>> res = top.add_residue("ALA", top.add_chain(), resSeq=1)
        >>> for name in ["N", "CA", "C"]:
        ...     _ = top.add_atom(name, md.element.get_by_symbol(name[0]), res)
        >>> Spec.from_json(_EXAMPLE).check_topology(top)  # doctest: +ELLIPSIS
        Traceback (most recent call last):
        ...
        cvdesign.errors.TopologyMismatchError: $.topology.fingerprint: the atoms the CV uses match, ...
        """
        topology = _check_topology_arg(topology)
        if topology.n_atoms != self.n_atoms:
            raise TopologyMismatchError(
                f"the spec was made for a topology of {self.n_atoms} atoms; this topology has "
                f"{topology.n_atoms} atoms. Use the topology the spec was made for, or make a "
                "new spec for this one",
                "$.topology.n_atoms",
            )
        for k, desc in enumerate(self._doc["descriptors"]):
            for j, (atom, expected) in enumerate(zip(desc["atoms"], desc["atom_identities"])):
                actual = _identity_of(topology.atom(atom))
                if actual != expected:
                    only_element = {k for k in actual if actual[k] != expected[k]} == {"element"}
                    hint = (" (only the element differs: some readers guess elements from atom "
                            "names, e.g. a PDB 'CA' as calcium, so the two topology files may "
                            "have been read differently)") if only_element else ""
                    raise TopologyMismatchError(
                        f"atom {atom} (used by descriptor {desc['id']!r}, {desc['label']}) is "
                        f"{_describe(expected)} in the spec but {_describe(actual)} in this "
                        f"topology{hint}. Use the topology the spec was made for, or make a new "
                        "spec for this one",
                        f"$.descriptors[{k}].atom_identities[{j}]",
                    )
        found = topology_fingerprint(topology)
        if found != self.fingerprint:
            where = ""
            stored = self._doc["topology"].get("residues")
            if stored is not None:
                mine = residue_hashes(topology)
                n_spec, n_mine = len(stored) // 8, len(mine) // 8
                first = next((k for k in range(min(n_spec, n_mine))
                              if stored[8 * k:8 * k + 8] != mine[8 * k:8 * k + 8]), None)
                if first is not None:
                    where = (f"; the first difference is at "
                             f"{_describe_residue(topology.residue(first))} in this topology")
                elif n_spec != n_mine:
                    where = (f"; the spec's topology has {n_spec} residues, this one {n_mine}")
            raise TopologyMismatchError(
                "the atoms the CV uses match, but the topology differs elsewhere"
                f"{where} (fingerprint {found}, the spec's is {self.fingerprint}); refusing to "
                "use the spec with a topology it was not made for. Use the original topology, "
                "or make a new spec for this one",
                "$.topology.fingerprint",
            )


# --------------------------------------------------------------------------
# loading files


def _with_file(error, path):
    """The same error type and JSON path, with the file name added to the message."""
    text = str(error)
    prefix = f"{error.path}: " if error.path else ""
    message = text[len(prefix):] if text.startswith(prefix) else text
    return type(error)(f"{message} [spec file {str(path)!r}]", error.path)


def load_spec(path, topology=None):
    """Read a spec file, validate it, and check it against a topology if given.

    Parameters
    ----------
    path : str or os.PathLike
        The spec file (JSON, UTF-8).
    topology : mdtraj.Topology, mdtraj.Trajectory, str, os.PathLike or None, default=None
        The topology the CV will be used with, or a topology file mdtraj
        can read (PDB, GRO, PSF, ...). None skips the topology check.

    Returns
    -------
    Spec

    Raises
    ------
    InputError
        The spec file or topology file is missing or unreadable, or not JSON.
    SpecError
        The file is not a valid version-1 spec; the message starts with the
        JSON path of the problem and ends with the file name.
    TopologyMismatchError
        `topology` is not the topology the spec was made for
        (see :meth:`Spec.check_topology`).

    Examples
    --------
    >>> import tempfile
    >>> with tempfile.TemporaryDirectory() as tmp:
    ...     path = os.path.join(tmp, "cv-01.json")
    ...     _ = Spec.from_json(_EXAMPLE).save(path)
    ...     spec = load_spec(path)
    >>> spec.evaluate([[[0.0, 0, 0], [0.1, 0, 0], [0.4, 0, 0]]]).round(6)
    array([2.])
    """
    path = Path(path)
    if not path.exists():
        raise InputError(f"spec file {str(path)!r} does not exist")
    if not path.is_file():
        raise InputError(f"spec file {str(path)!r} is not a regular file")
    try:
        raw = path.read_bytes()
        text = raw.decode("utf-8")
    except OSError as exc:
        raise InputError(f"cannot read spec file {str(path)!r}: {exc.strerror or exc}") from None
    except UnicodeDecodeError as exc:
        raise InputError(f"spec file {str(path)!r} is not UTF-8 text ({exc.reason} at byte {exc.start})") from None
    try:
        document = _parse_json(text)
    except json.JSONDecodeError as exc:
        raise InputError(
            f"spec file {str(path)!r} is not valid JSON: {exc.msg} at line {exc.lineno}, "
            f"column {exc.colno}; a spec is the JSON document written by Spec.save"
        ) from None
    try:
        spec = Spec.from_dict(document)
    except SpecError as exc:
        raise _with_file(exc, path) from None
    if topology is not None:
        if isinstance(topology, (str, os.PathLike)):
            top_path = Path(topology)
            if not top_path.is_file():
                raise InputError(f"topology file {str(top_path)!r} does not exist")
            try:
                topology = md.load_topology(str(top_path))
            except Exception as exc:  # mdtraj raises many types for unreadable files
                raise InputError(
                    f"cannot read topology file {str(top_path)!r} with mdtraj "
                    f"({type(exc).__name__}: {exc}); give a topology file mdtraj reads (PDB, GRO, PSF, ...)"
                ) from None
            if topology.n_atoms == 0:
                raise InputError(f"topology file {str(top_path)!r} has no atoms; is it a topology file?")
        try:
            spec.check_topology(topology)
        except TopologyMismatchError as exc:
            raise _with_file(exc, path) from None
    return spec


# A small spec used by the doctests above: one distance between atoms 0 and 2
# of a three-atom topology (N, CA, C of ALA1), CV = 2 * (d - 0.3) / 0.1.
_EXAMPLE = json.dumps(
    {
        "format": SPEC_FORMAT,
        "version": SPEC_VERSION,
        "name": "cv-01",
        "units": UNITS,
        "topology": {"n_atoms": 3, "fingerprint": "sha256:" + "0" * 64},
        "descriptors": [
            {
                "id": "d0",
                "kind": "distance",
                "atoms": [0, 2],
                "label": "dist ALA1:N-ALA1:C",
                "atom_identities": [
                    {"chain": 0, "residue": "ALA", "resid": 1, "name": "N", "element": "N"},
                    {"chain": 0, "residue": "ALA", "resid": 1, "name": "C", "element": "C"},
                ],
                "periodic": False,
            }
        ],
        "terms": [{"descriptor": "d0", "transform": "identity", "center": 0.3, "scale": 0.1, "weight": 2.0}],
        "offset": 0.0,
        "periodic": False,
        "states": {},
        "scores": {},
        "provenance": {"cvdesign_version": "0.0", "method": "hand", "inputs": [], "seed": None},
        "caution": "",
    }
)
