"""Reading and checking a spec document: JSON parsing with limits, schema, semantics.

Parsing refuses what JSON allows but a spec must not hold (NaN and infinity
literals, duplicate keys, nesting deeper than :data:`MAX_DEPTH`, integers
beyond 64 bits), naming the JSON path. Validation then checks the document
against the JSON Schema shipped in ``cvdesign/spec/schema/spec-v1.json``
(:func:`spec_schema`), then the cross-references and rules the schema cannot
express (atom indices, one identity per atom, periodic CVs, restraints), and
normalizes it.
"""

import functools
import hashlib
import json
import math
import re
from importlib import resources

import jsonschema
import numpy as np

from .. import geometry
from ..bias.funnel import SHAPE_KEYS
from ..constants import FLOAT32_SLACK, TWO_PI
from ..errors import SpecError
from ..kinds import ATOM_KINDS, KINDS
from .ranges import FOLD_SPREADS, reachable_range, states_at_bounds

__all__ = ["SPEC_FORMAT", "SPEC_VERSION", "MAX_DEPTH", "cv_digest", "spec_schema"]


SPEC_FORMAT = "cvdesign-spec"
SPEC_VERSION = 1
# Relative tolerance of the check period == 2 pi |weight| / scale, and of the check of a
# stored reachable range against the one computed from the terms (relative to the size of
# the terms, sum |weight / scale| (|center| + 1) + |offset|).
_PERIOD_RTOL = 1e-9
# Relative slack of the checks of stored values in CV units against each other (a state's mean
# within its min and max and within the reachable range, the observed range within the
# reachable range): see cvdesign.constants.FLOAT32_SLACK.
_STORED_RTOL = FLOAT32_SLACK
# Integers in a spec must fit in 64 bits (many JSON readers hold no more).
_MAX_INT = 2**63 - 1


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


#: Deepest nesting of lists and objects accepted in a spec (written specs nest about 6 deep).
MAX_DEPTH = 100


def _too_deep():
    return SpecError(f"the document nests lists or objects more than {MAX_DEPTH} levels deep "
                     "(a spec nests about 6); this is not a spec. Give a spec file written by "
                     "cvdesign", "$")


def _check_depth(value):
    """Raise SpecError when lists/dicts in `value` nest deeper than MAX_DEPTH (no recursion,
    so self-containing or very deep documents cannot exhaust the stack)."""
    stack = [(value, 1)]
    while stack:
        item, depth = stack.pop()
        if isinstance(item, dict):
            children = item.values()
        elif isinstance(item, (list, tuple)):
            children = item
        else:
            continue
        if depth > MAX_DEPTH:
            raise _too_deep()
        stack.extend((child, depth + 1) for child in children
                     if isinstance(child, (dict, list, tuple)))


def _parse_json(text):
    """Parse spec text; NaN/Infinity and repeated keys survive as markers."""
    try:
        document = json.loads(text, parse_constant=_NonFinite, object_pairs_hook=_object_pairs)
    except RecursionError:
        raise _too_deep() from None
    _check_depth(document)
    return document


def _short_int(value):
    text = str(value) if value.bit_length() < 200 else f"{str(value)[:20]}... ({len(str(abs(value)))} digits)"
    return text


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
    if isinstance(value, int) and not isinstance(value, bool) and abs(value) > _MAX_INT:
        raise SpecError(
            f"the integer {_short_int(value)} is too large for a spec (at most 2**63 - 1 in size); "
            "write a smaller number",
            _json_path(parts),
        )
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
    return (resources.files("cvdesign.spec") / "schema" / "spec-v1.json").read_text(encoding="utf-8")


@functools.lru_cache(maxsize=1)
def _validator():
    schema = json.loads(_schema_text())
    return jsonschema.Draft202012Validator(schema)


def spec_schema():
    """The JSON Schema of spec version 1, as shipped in ``cvdesign/spec/schema/spec-v1.json``.

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


def _lookup(doc, parts):
    """The element of `doc` at the path `parts`, or None."""
    target = doc
    for part in parts:
        try:
            target = target[part]
        except (KeyError, IndexError, TypeError):
            return None
    return target


def _absent_message(doc, error):
    """Message for a key the object's kind does not use (the schema's ``absent``)."""
    parts = list(error.absolute_path)
    key = parts[-1] if parts else "?"
    parent = _lookup(doc, parts[:-1])
    if key == "period" and len(parts) == 1:
        return "only a periodic CV (periodic: true) has a period; remove it or set periodic to true"
    if isinstance(parent, dict) and parent.get("kind") in KINDS:
        kind = parent["kind"]
        if key == "masses" and kind == "center_distance":
            return ("masses are used only with weighting 'mass'; remove them or set weighting to 'mass'")
        takes = ", ".join(KINDS[kind].spec_keys)
        return f"key {key!r} is not used by {_a(kind)} descriptor (a {kind} takes: {takes})"
    return f"key {key!r} is not allowed here"


def _schema_message(error, doc=None):
    """A readable message for one jsonschema error."""
    v, inst = error.validator, error.instance
    if v == "not" and error.validator_value == {}:
        return _absent_message(doc, error)
    if v == "required":
        missing = [k for k in error.validator_value if k not in inst]
        if missing == ["period"]:
            return ("missing key 'period': a periodic CV gives its period in its own units, "
                    "2 pi |weight| / scale (6.283185307179586 for weight 1, scale 1)")
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
    if v == "maximum":
        return f"must be at most {error.validator_value}; got {_short(inst)}"
    if v == "minItems":
        return f"needs at least {_items(error.validator_value)}; has {len(inst)}"
    if v == "maxItems":
        return f"takes at most {_items(error.validator_value)}; has {len(inst)}"
    if v == "minLength" and "propertyNames" in error.schema_path:
        return f"a name in this object must not be empty (got the key {_short(inst)}); name each entry"
    if v == "minLength":
        return "must not be empty"
    if v == "pattern":
        return f"{_short(inst)} does not have the expected form (regular expression {error.validator_value})"
    if v == "anyOf" and error.schema.get("anyOf", [{}])[0].get("type") == "number":
        return f"a score must be a number, a list of numbers or an object of those; got {_short(inst)}"
    return error.message


def _items(n):
    return f"{n} item" if n == 1 else f"{n} items"


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
            _schema_message(error, doc) + " (spec version 1 schema: cvdesign/spec/schema/spec-v1.json)",
            _json_path(error.absolute_path),
        )


def _a(kind):
    return f"an {kind}" if kind[0] in "aeiou" else f"a {kind}"


def _check_index(atom, n_atoms, path):
    if atom >= n_atoms:
        raise SpecError(
            f"atom index {atom} is out of range for a topology of {n_atoms} atoms "
            f"(0-based indices 0..{n_atoms - 1})",
            path,
        )


def _check_tuple_descriptor(desc, here, n_atoms):
    kind, atoms = desc["kind"], desc["atoms"]
    need = KINDS[kind].n_atoms
    if len(atoms) != need:
        raise SpecError(f"{_a(kind)} takes {need} atoms; got {len(atoms)}: {atoms}", f"{here}.atoms")
    for j, a in enumerate(atoms):
        _check_index(a, n_atoms, f"{here}.atoms[{j}]")
    if len(set(atoms)) != len(atoms):
        raise SpecError(f"the atoms of one descriptor must be distinct; got {atoms}", f"{here}.atoms")
    if len(desc["atom_identities"]) != len(atoms):
        raise SpecError(
            f"has {len(desc['atom_identities'])} atom identities for {len(atoms)} atoms; "
            "give one identity per atom, in the order of atoms",
            f"{here}.atom_identities",
        )


def _check_group_descriptor(desc, here, n_atoms):
    kind, groups = desc["kind"], desc["groups"]
    for g, group in enumerate(groups):
        first = {}
        for j, a in enumerate(group):
            _check_index(a, n_atoms, f"{here}.groups[{g}][{j}]")
            if a in first:
                raise SpecError(
                    f"atom {a} appears twice in this group (at [{first[a]}] and [{j}]); list each atom once",
                    f"{here}.groups[{g}][{j}]",
                )
            first[a] = j
    for g, (group, identities) in enumerate(zip(groups, desc["atom_identities"])):
        if len(identities) != len(group):
            raise SpecError(
                f"has {len(identities)} atom identities for the {len(group)} atoms of groups[{g}]; "
                "give one identity per atom, in the order of the group",
                f"{here}.atom_identities[{g}]",
            )
    if kind == "center_distance" and desc["weighting"] == "mass":
        for g, (group, masses) in enumerate(zip(groups, desc["masses"])):
            if len(masses) != len(group):
                raise SpecError(
                    f"has {len(masses)} masses for the {len(group)} atoms of groups[{g}]; "
                    "give one mass (dalton) per atom, in the order of the group",
                    f"{here}.masses[{g}]",
                )
    if kind == "center_distance" and set(groups[0]) == set(groups[1]):
        raise SpecError(
            "the two groups hold the same atoms, so their centres coincide and the distance "
            "is always 0; give two different groups",
            f"{here}.groups",
        )
    if kind == "coordination":
        if not desc["m"] > desc["n"]:
            raise SpecError(
                f"must be greater than n ({_short(desc['n'])}); got {_short(desc['m'])}: the rational "
                "switching function needs 0 < n < m (e.g. n = 6, m = 12)",
                f"{here}.m",
            )
        if len(groups[0]) == 1 and groups[0] == groups[1]:
            raise SpecError(
                f"both groups are the single atom {groups[0][0]}, which gives no pair of distinct "
                "atoms to count; a coordination number needs at least one pair",
                f"{here}.groups",
            )


def _check_coefficient(term, here):
    """Refuse a term whose coefficient weight / scale, or weight * center / scale, is not
    finite: finite numbers whose quotient overflows would give an infinite CV."""
    weight, scale, center = (float(term[k]) for k in ("weight", "scale", "center"))
    with np.errstate(over="ignore", invalid="ignore"):
        factor = np.float64(weight) / np.float64(scale)
        shift = factor * np.float64(center)
    if math.isfinite(factor) and math.isfinite(shift):
        return
    where = "scale" if abs(scale) < 1.0 else "weight"
    what = "weight / scale" if not math.isfinite(factor) else "weight * center / scale"
    raise SpecError(
        f"{what} is not a finite number (weight {weight!r}, scale {scale!r}, center "
        f"{center!r}): the CV would be infinite. Give a scale and weight of ordinary size "
        "(the pipeline writes the descriptor's spread as scale and a weight of order 1)",
        f"{here}.{where}",
    )


def _semantic_check(doc):
    n_atoms = doc["topology"]["n_atoms"]
    kinds, first_at = {}, {}
    for k, desc in enumerate(doc["descriptors"]):
        here = f"$.descriptors[{k}]"
        did, kind = desc["id"], desc["kind"]
        if did in first_at:
            raise SpecError(
                f"descriptor id {did!r} is used twice (first at {first_at[did]}); ids must be unique",
                f"{here}.id",
            )
        first_at[did] = here
        kinds[did] = kind
        if kind in ATOM_KINDS:
            _check_tuple_descriptor(desc, here, n_atoms)
        else:
            _check_group_descriptor(desc, here, n_atoms)
        if desc["periodic"] != KINDS[kind].periodic:
            raise SpecError(
                f"periodic must be {str(KINDS[kind].periodic).lower()} for {_a(kind)} "
                "(only dihedrals are periodic, with period 2 pi rad)",
                f"{here}.periodic",
            )
    terms = doc["terms"]
    first_term = {}
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
        if transform not in KINDS[kind].transforms:
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
        _check_coefficient(term, here)
        key = (did, transform)
        if key in first_term:
            raise SpecError(
                f"repeats the {transform} term of descriptor {did!r} (first at "
                f"{first_term[key]}), which would count it twice; merge the two into one term",
                here,
            )
        first_term[key] = here
    decayed = doc["scores"].get("integrated_time_decayed")
    if decayed is not None and (isinstance(decayed, bool) or decayed not in (0, 1)):
        raise SpecError(
            f"must be 1 or 0: 1 when the CV's autocorrelation decayed within the runs "
            f"(integrated_time_ps is a measurement), 0 when it did not (a lower bound); got "
            f"{_short(decayed)}",
            "$.scores.integrated_time_decayed",
        )
    interval = doc["scores"].get("integrated_time_ci_ps")
    if interval is not None and not (
            isinstance(interval, list) and len(interval) == 2
            and all(isinstance(v, (int, float)) and not isinstance(v, bool) for v in interval)
            and 0 < interval[0] <= interval[1] < math.inf):
        raise SpecError(
            "must be a pair [lower, upper] of positive numbers of ps with lower <= upper, the "
            f"95 % interval of the CV's integrated time; got {_short(interval)}",
            "$.scores.integrated_time_ci_ps",
        )
    if doc["periodic"]:
        single = len(terms) == 1 and terms[0]["transform"] == "identity" and kinds[terms[0]["descriptor"]] == "dihedral"
        if not single:
            raise SpecError(
                "a periodic CV must have exactly one term: a dihedral with the identity "
                "transform; set periodic to false for other CVs",
                "$.periodic",
            )
        weight, scale, period = terms[0]["weight"], terms[0]["scale"], doc["period"]
        expected = TWO_PI * abs(weight) / scale
        if not (math.isfinite(expected) and expected > 0):
            raise SpecError(
                f"the term of a periodic CV needs a weight with 0 < 2 pi |weight| / scale < infinity; "
                f"got weight {weight!r}, scale {scale!r}",
                "$.terms[0].weight",
            )
        if not abs(period - expected) <= _PERIOD_RTOL * expected:
            raise SpecError(
                f"must be 2 pi |weight| / scale = {expected!r} for this CV (weight {weight!r}, "
                f"scale {scale!r} of its dihedral term), the period of the CV in its own units; "
                f"got {period!r}",
                "$.period",
            )


#: The keys of a descriptor that decide its values (the others name or describe it).
_VALUE_KEYS = ("kind", "atoms", "groups", "weighting", "masses", "r0", "n", "m")


#: Significant digits of the numbers a digest covers: the pipeline writes numbers to 12
#: (``cvdesign.pipeline.output.dumps``), so a spec in memory and its file agree.
_DIGEST_DIGITS = 12


def _canonical(value):
    """Numbers as text of `_DIGEST_DIGITS` significant digits, so that a digest does not
    depend on whether a number was written as 1 or 1.0, nor on digits beyond those."""
    if isinstance(value, (list, tuple)):
        return [_canonical(v) for v in value]
    if isinstance(value, str):
        return value
    value = float(value)
    return "0" if value == 0 else f"{value:.{_DIGEST_DIGITS}g}"


def cv_digest(doc):
    """The digest of what a spec's CV is: its terms, the values-deciding keys of their
    descriptors (kind, atoms or groups, weighting, masses, switching parameters) and the
    offset, numbers to 12 significant digits; not ids, labels or atom identities.

    A spec stores it as ``cv_digest`` beside ``states`` and ``observed_range``, which are in
    the CV's units and hold only for the CV they were computed for; on load, a digest that
    differs from the one of the file's terms marks them stale
    (:attr:`cvdesign.Spec.states_stale`).

    Parameters
    ----------
    doc : dict
        A spec document (its ``descriptors``, ``terms`` and ``offset``; the terms' descriptors
        must exist).

    Returns
    -------
    str
        ``"sha256:"`` and 64 hex digits.

    Examples
    --------
    >>> doc = {"descriptors": [{"id": "d", "kind": "distance", "atoms": [0, 2], "label": "x"}],
    ...        "terms": [{"descriptor": "d", "transform": "identity", "center": 0.3,
    ...                   "scale": 0.1, "weight": 2}], "offset": 0}
    >>> same = json.loads(json.dumps(doc))
    >>> same["offset"], same["descriptors"][0]["label"] = 0.0, "another label"
    >>> cv_digest(doc) == cv_digest(same)
    True
    >>> doc["terms"][0]["weight"] = 20.0
    >>> cv_digest(doc) == cv_digest(same)
    False
    """
    descriptors = {d["id"]: d for d in doc["descriptors"]}
    terms = []
    for term in doc["terms"]:
        desc = descriptors[term["descriptor"]]
        what = {}
        for key in _VALUE_KEYS:
            if key in desc:
                value = desc[key]
                what[key] = ([[int(a) for a in g] for g in value] if key == "groups"
                             else [int(a) for a in value] if key == "atoms"
                             else _canonical(value))
        terms.append({"descriptor": what, "transform": term["transform"],
                      **{k: _canonical(term[k]) for k in ("center", "scale", "weight")}})
    text = json.dumps({"offset": _canonical(doc["offset"]), "terms": terms}, sort_keys=True,
                      separators=(",", ":"), allow_nan=False)
    return "sha256:" + hashlib.sha256(text.encode("utf-8")).hexdigest()


def states_stale(doc):
    """Whether the document's ``states`` and ``observed_range`` were computed for another CV:
    it records a ``cv_digest`` that is not that of its terms (a spec without one cannot
    tell, and is taken as it is)."""
    stored = doc.get("cv_digest")
    return (stored is not None and bool(doc["states"] or "observed_range" in doc)
            and stored != cv_digest(doc))


def _terms_size(doc):
    """The size of the CV's numbers: |offset| + sum |weight / scale| (|center| + 1)."""
    return abs(doc["offset"]) + sum(abs(t["weight"] / t["scale"]) * (abs(t["center"]) + 1.0)
                                    for t in doc["terms"])


def _check_ranges(doc):
    """A stored reachable range equals the one computed from the terms; observed ranges
    have lower <= upper; the states (unless stale) agree with the ranges and with their own
    extremes, and a stored ``at_bound`` with its recomputation."""
    computed = reachable_range(doc["descriptors"], doc["terms"], doc["offset"])
    for side, value in zip(("lower", "upper"), computed):
        if value is not None and not math.isfinite(value):
            raise SpecError(
                f"the {side} end of the values the CV can reach overflows ({value!r}): the "
                "terms' coefficients weight / scale are too large for numbers; give a scale "
                "and weight of ordinary size", "$.terms")
    size = _terms_size(doc)
    stored = doc.get("reachable_range")
    has_states = bool(doc["states"]) or "observed_range" in doc
    stale = states_stale(doc)
    if stored is not None and not stale:  # (stale: the stored range was of the old CV too)
        for side, value in zip(("lower", "upper"), computed):
            given = stored[side]
            same = (given is None and value is None) or (
                given is not None and value is not None
                and abs(given - value) <= _PERIOD_RTOL * max(size, abs(value)))
            if not same:
                what = ("null (the CV is unbounded on this side)" if value is None
                        else repr(value))
                redo = ("recompute the range. The states and observed_range are in the CV's "
                        "units too: after an edit of the terms recompute them all from the "
                        "trajectories (cvdesign suggest), or remove reachable_range, "
                        "observed_range, hints and the states' entries (states: {}) to keep "
                        "only the CV" if has_states else
                        "recompute the range, or remove reachable_range")
                raise SpecError(
                    f"must be {what} for these terms, the {side} end of the values the CV can "
                    f"reach (see cvdesign.spec.ranges.reachable_range); got {given!r}. The "
                    f"terms or the range were edited: {redo}",
                    f"$.reachable_range.{side}",
                )
    observed = doc.get("observed_range")
    if observed is not None and not observed["lower"] <= observed["upper"]:
        raise SpecError(f"lower ({observed['lower']!r}) must not exceed upper "
                        f"({observed['upper']!r})", "$.observed_range")
    for name, state in doc["states"].items():
        if "min" in state and "max" in state and not state["min"] <= state["max"]:
            raise SpecError(f"min ({state['min']!r}) must not exceed max ({state['max']!r})",
                            _json_path(("states", name)))
    if not stale:
        _check_states(doc, computed, size)


def _end(value):
    return "null (unbounded)" if value is None else repr(value)


def _check_states(doc, reach, size):
    """The states' means within their extremes and the reachable range, the observed range
    within the reachable range, and stored at_bound flags as recomputed (not for a periodic
    CV, whose values are taken modulo its period)."""
    def slack(*values):
        return _STORED_RTOL * max([size] + [abs(v) for v in values if v is not None])

    fix = ("the states, observed_range and reachable_range do not belong together (edited, "
           "or computed for other terms); recompute them from the trajectories (cvdesign "
           "suggest), or remove the ones that are wrong")
    lower, upper = reach
    if doc["periodic"]:
        for name, state in doc["states"].items():
            if "at_bound" in state:
                raise SpecError("a periodic CV has no bound to sit at (its values are taken "
                                "modulo its period); remove at_bound",
                                _json_path(("states", name, "at_bound")))
        return
    observed = doc.get("observed_range")
    if observed is not None:
        for side, value, bound in (("lower", observed["lower"], lower),
                                   ("upper", observed["upper"], upper)):
            beyond = bound is not None and (value < bound - slack(value, bound) if side == "lower"
                                            else value > bound + slack(value, bound))
            if beyond:
                raise SpecError(f"{value!r} lies beyond the {side} end {bound!r} of the values "
                                f"the CV can reach (reachable_range); {fix}",
                                f"$.observed_range.{side}")
    for name, state in doc["states"].items():
        mean = state["mean"]
        if lower is not None and mean < lower - slack(mean, lower) or \
                upper is not None and mean > upper + slack(mean, upper):
            raise SpecError(f"{mean!r} lies outside the values the CV can reach "
                            f"[{_end(lower)}, {_end(upper)}] (reachable_range); {fix}",
                            _json_path(("states", name, "mean")))
        for key, beyond in (("min", lambda v: v > mean + slack(v, mean)),
                            ("max", lambda v: v < mean - slack(v, mean))):
            if key in state and beyond(state[key]):
                raise SpecError(f"{state[key]!r} is on the wrong side of the state's mean "
                                f"{mean!r} (min <= mean <= max); {fix}",
                                _json_path(("states", name, key)))
    computed = states_at_bounds(doc["states"], reach)
    for name, state in doc["states"].items():
        given = state.get("at_bound")
        bound = lower if given == "lower" else upper
        gap = None if given is None or bound is None else abs(state["mean"] - bound)
        # a flag within rounding of the threshold stands (files hold 12 digits)
        if given is not None and given != computed.get(name) and not (
                gap is not None and gap <= FOLD_SPREADS * state["std"] * (1 + _STORED_RTOL)
                + slack(state["mean"], bound)):
            now = (f"at the {computed[name]} bound" if name in computed
                   else "at no bound")
            raise SpecError(
                f"says the state sits at the {given} bound of the reachable range, but its mean "
                f"{state['mean']!r} and std {state['std']!r} put it {now} (a mean within "
                f"{FOLD_SPREADS:g} std of a reachable end; reachable_range [{_end(lower)}, "
                f"{_end(upper)}]); remove at_bound (it is recomputed from the states and the range)",
                _json_path(("states", name, "at_bound")))


#: Relative tolerance on the length of a funnel axis (a unit vector).
_AXIS_RTOL = 1e-6
#: The numbers of a funnel restraint entry besides its axis and reference pocket.
_FUNNEL_NUMBERS = SHAPE_KEYS + ("wall_force_constant_kj_mol_nm2",)


def _check_restraints(doc):
    n_atoms = doc["topology"]["n_atoms"]
    first_at = {}
    for k, res in enumerate(doc.get("restraints", [])):
        here = f"$.restraints[{k}]"
        if res["id"] in first_at:
            raise SpecError(
                f"restraint id {res['id']!r} is used twice (first at {first_at[res['id']]}); ids "
                "must be unique",
                f"{here}.id",
            )
        first_at[res["id"]] = here
        _check_group_descriptor(res, here, n_atoms)
        shared = sorted(set(res["groups"][0]) & set(res["groups"][1]))
        if shared:
            raise SpecError(
                f"atoms {shared[:5]} are in both the ligand (groups[0]) and the pocket "
                "(groups[1]); the two groups of a funnel must not share atoms",
                f"{here}.groups",
            )
        norm = math.sqrt(sum(float(v) ** 2 for v in res["axis"]))
        if not abs(norm - 1.0) <= _AXIS_RTOL:
            raise SpecError(f"the funnel axis must be a unit vector; its length is {norm!r}",
                            f"{here}.axis")
        lower, end, upper = (res[k] for k in ("lower_wall_z_nm", "cone_end_z_nm",
                                               "upper_wall_z_nm"))
        if not lower < end < upper:
            raise SpecError(
                "needs lower_wall_z_nm < cone_end_z_nm < upper_wall_z_nm (nm along the axis); "
                f"got {lower!r}, {end!r}, {upper!r}",
                f"{here}.cone_end_z_nm",
            )
        if not res["cone_half_angle_rad"] < math.pi / 2:
            raise SpecError("the cone half-angle must be below pi/2 rad; got "
                            f"{res['cone_half_angle_rad']!r}", f"{here}.cone_half_angle_rad")
        _check_reference_pocket(res, here)


#: Largest accepted |mean| of a funnel's reference pocket coordinates (they are centred), nm.
_CENTRED_TOL = 1e-4


def _check_reference_pocket(res, here):
    ref = res["reference_pocket_nm"]
    n_pocket = len(res["groups"][1])
    if len(ref) != n_pocket:
        raise SpecError(
            f"has {len(ref)} rows but the pocket (groups[1]) has {n_pocket} atoms; give one "
            "row of coordinates (nm) per pocket atom, in the order of groups[1]",
            f"{here}.reference_pocket_nm",
        )
    arr = np.asarray(ref, dtype=np.float64)
    with np.errstate(over="ignore", invalid="ignore"):
        mean = arr.mean(axis=0)
    if not np.all(np.abs(mean) <= _CENTRED_TOL):
        raise SpecError(
            f"the reference pocket must be centred on its geometric centre; its mean is "
            f"{mean.tolist()} nm. Subtract the mean from every row",
            f"{here}.reference_pocket_nm",
        )
    if not geometry.defines_orientation(arr):
        raise SpecError(
            "the reference pocket does not fix an orientation (fewer than 3 atoms, or all "
            "(nearly) on one line), so the frame of the funnel axis is undefined; use a pocket "
            "of at least 3 atoms spread in two directions",
            f"{here}.reference_pocket_nm",
        )


def _normalize(doc):
    """Fix the numeric types of the structured fields (ints stay ints, numbers become floats)."""
    doc["version"] = int(doc["version"])
    doc["topology"]["n_atoms"] = int(doc["topology"]["n_atoms"])
    doc["offset"] = float(doc["offset"])
    if "period" in doc:
        doc["period"] = float(doc["period"])
    for desc in doc["descriptors"]:
        if "atoms" in desc:
            desc["atoms"] = [int(a) for a in desc["atoms"]]
            identities = desc["atom_identities"]
        else:
            desc["groups"] = [[int(a) for a in group] for group in desc["groups"]]
            identities = [ident for group in desc["atom_identities"] for ident in group]
        for ident in identities:
            ident["chain"] = int(ident["chain"])
            ident["resid"] = int(ident["resid"])
        if "masses" in desc:
            desc["masses"] = [[float(v) for v in group] for group in desc["masses"]]
        for key in ("r0", "n", "m"):
            if key in desc:
                desc[key] = float(desc[key])
    for term in doc["terms"]:
        for key in ("center", "scale", "weight"):
            term[key] = float(term[key])
    for res in doc.get("restraints", []):
        res["groups"] = [[int(a) for a in group] for group in res["groups"]]
        for ident in (i for group in res["atom_identities"] for i in group):
            ident["chain"] = int(ident["chain"])
            ident["resid"] = int(ident["resid"])
        res["axis"] = [float(v) for v in res["axis"]]
        res["reference_pocket_nm"] = [[float(v) for v in row] for row in res["reference_pocket_nm"]]
        for key in _FUNNEL_NUMBERS:
            res[key] = float(res[key])
    for state in doc["states"].values():
        state["mean"] = float(state["mean"])
        state["std"] = float(state["std"])
        state["n_frames"] = int(state["n_frames"])
        for key in ("min", "max"):
            if key in state:
                state[key] = float(state[key])
    for key in ("reachable_range", "observed_range"):
        if key in doc:
            doc[key] = {side: None if v is None else float(v) for side, v in doc[key].items()}
    return doc


def _validated(document):
    """Check a spec document and return a normalized plain copy of it."""
    if not isinstance(document, dict):
        raise SpecError(f"a spec is a JSON object; got {_type_name(document)}", "$")
    _check_depth(document)
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
    _check_restraints(doc)
    doc = _normalize(doc)
    _check_ranges(doc)
    return doc
