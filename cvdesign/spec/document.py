"""The :class:`Spec` document: construction, validation, JSON, evaluation; :func:`load_spec`.

A written spec is ``json.dumps(doc, indent=2, sort_keys=True,
allow_nan=False)`` plus a newline: the same spec always gives the same bytes.
"""

import copy
import json
import math
import os
from pathlib import Path

import mdtraj as md
import numpy as np

from .. import geometry
from ..geometry.internal import _angles, _dihedrals
from .._version import __version__
from ..constants import COORDINATION_EXPONENTS, TWO_PI, UNITS
from ..errors import InputError, SpecError, TopologyMismatchError
from ..io.atomic import atomic_write_text
from ..kinds import ATOM_KINDS, GROUP_KINDS
from .identity import (_check_topology_arg, _describe, _describe_residue, _identity_of,
                       residue_hashes, topology_fingerprint)
from .ranges import reachable_range, states_at_bounds
from .validate import SPEC_FORMAT, SPEC_VERSION, _parse_json, _validated, cv_digest, states_stale

__all__ = ["Spec", "load_spec"]


# --------------------------------------------------------------------------
# the defaults the Spec constructor fills in


def _atoms_and_identities(desc):
    """(atom index, stored identity, JSON path suffix) for every atom of a descriptor."""
    if "atoms" in desc:
        for j, (atom, ident) in enumerate(zip(desc["atoms"], desc["atom_identities"])):
            yield atom, ident, f".atom_identities[{j}]"
    else:
        for g, (group, identities) in enumerate(zip(desc["groups"], desc["atom_identities"])):
            for j, (atom, ident) in enumerate(zip(group, identities)):
                yield atom, ident, f".atom_identities[{g}][{j}]"


def _valid_index_list(value, n_atoms):
    """Whether `value` is a flat list of valid atom indices (for filling in defaults)."""
    return (isinstance(value, (list, tuple, np.ndarray)) and len(value) > 0
            and all(isinstance(a, (int, np.integer)) and not isinstance(a, (bool, np.bool_))
                    and 0 <= int(a) < n_atoms for a in value))


def _filled_descriptor(desc, mdtop, here):
    """A descriptor dict with the defaults of the Spec constructor filled in."""
    desc.setdefault("label", desc.get("id", ""))
    desc.setdefault("periodic", desc.get("kind") == "dihedral")
    kind = desc.get("kind")
    if kind == "coordination":
        desc.setdefault("n", COORDINATION_EXPONENTS[0])
        desc.setdefault("m", COORDINATION_EXPONENTS[1])
    if mdtop is None:
        return desc
    if kind in ATOM_KINDS:
        atoms = desc.get("atoms", [])
        if "atom_identities" not in desc and _valid_index_list(atoms, mdtop.n_atoms):
            desc["atom_identities"] = [_identity_of(mdtop.atom(int(a))) for a in atoms]
        return desc
    groups = desc.get("groups")
    if not (isinstance(groups, (list, tuple)) and len(groups) == 2
            and all(_valid_index_list(g, mdtop.n_atoms) for g in groups)):
        return desc
    if "atom_identities" not in desc:
        desc["atom_identities"] = [[_identity_of(mdtop.atom(int(a))) for a in g] for g in groups]
    if kind == "center_distance" and desc.get("weighting") == "mass" and "masses" not in desc:
        masses = []
        for g, group in enumerate(groups):
            masses.append([])
            for j, a in enumerate(group):
                element = mdtop.atom(int(a)).element
                mass = None if element is None else element.mass
                if mass is None or not mass > 0:
                    raise SpecError(
                        f"atom {int(a)} ({_describe(_identity_of(mdtop.atom(int(a))))}) has no element "
                        "mass in the topology; give masses (dalton) or use weighting 'geometric'",
                        f"{here}.groups[{g}][{j}]",
                    )
                masses[-1].append(float(mass))
        desc["masses"] = masses
    return desc


def _filled_restraint(res, mdtop, here):
    """A restraint dict with its label and, from a topology, atom identities filled in."""
    if not isinstance(res, dict):
        raise SpecError(f"a restraint is a dict; got {type(res).__name__}", here)
    res = dict(res)
    res.setdefault("label", res.get("id", ""))
    had_periodic = "periodic" in res
    res = _filled_descriptor(res, mdtop, here)
    if not had_periodic:
        res.pop("periodic", None)
    return res


def _default_period(terms):
    """2 pi |weight| / scale of the single term of a periodic CV, or None if not computable."""
    try:
        (term,) = terms
        period = TWO_PI * abs(float(term["weight"])) / float(term["scale"])
    except (TypeError, ValueError, KeyError, ZeroDivisionError, OverflowError):
        return None
    return period if math.isfinite(period) else None


# --------------------------------------------------------------------------
# the spec


class Spec:
    """One collective variable: descriptors, a linear combination, and where it came from.

    ``CV = offset + sum_t weight_t * (transform_t(d_t) - center_t) / scale_t``
    with descriptor values ``d`` in nm (distances, distances between group
    centers), rad (angles in [0, pi], dihedrals in (-pi, pi], IUPAC sign) or
    dimensionless (coordination numbers).

    Parameters
    ----------
    name : str
        Short name, e.g. ``"cv-01"``.
    topology : mdtraj.Topology or dict
        The topology the CV is made for, or its record ``{"n_atoms": int,
        "fingerprint": "sha256:..."}``. With an mdtraj topology the record
        and any missing ``atom_identities`` of the descriptors are computed.
    descriptors : list of dict
        Each ``{"id": str, "kind": str, "label": str, "atom_identities":
        list, "periodic": bool}`` plus the keys of its kind (all atom
        indices 0-based; see ``docs/spec-v1.md``):

        - ``"distance"``, ``"angle"``, ``"dihedral"``: ``"atoms": [int,
          ...]`` (2, 3 or 4 atoms);
        - ``"center_distance"``: ``"groups": [[int, ...], [int, ...]]``,
          ``"weighting": "mass"|"geometric"`` and, for ``"mass"``,
          ``"masses": [[float, ...], [float, ...]]`` in dalton;
        - ``"coordination"``: ``"groups"``, ``"r0"`` (nm, > 0), ``"n"``,
          ``"m"`` (0 < n < m <= 1000; default 6 and 12).

        ``label`` defaults to the id, ``periodic`` to ``kind ==
        "dihedral"``. When `topology` is an mdtraj topology,
        ``atom_identities`` (see :func:`atom_identity`; for group kinds two
        lists parallel to ``groups``) and, for mass weighting, ``masses``
        (the element masses of mdtraj's element table) may be left out:
        they are taken from it and stored, so the evaluator never needs the
        topology.
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
    period : float or None, default=None
        The period of a periodic CV in its units; None computes
        ``2 pi |weight| / scale`` (6.283185307179586 for weight 1 and scale
        1). Must be None when `periodic` is False.
    states : dict, optional
        ``{state name: {"mean": float, "std": float, "n_frames": int}}``, the
        CV's distribution per state in the input data, optionally with
        ``"min"`` and ``"max"`` (the CV's extremes over the state's frames).
        A state of a non-periodic CV whose mean lies within
        :data:`~cvdesign.spec.ranges.FOLD_SPREADS` standard deviations of a
        bound of :attr:`reachable_range` gets ``"at_bound": "lower"`` or
        ``"upper"`` (unless given).
    observed_range : (float, float), optional
        Smallest and largest value of the CV over the input frames of all
        states, CV units; stored as ``observed_range`` when given. With
        `states` or `observed_range`, the digest of the CV they were computed
        for is stored as ``cv_digest`` (see :attr:`states_stale`).
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
    restraints : list of dict, optional
        Restraints to apply together with the bias on the CV; stored only
        when given. Version 1 knows ``{"id": str, "kind": "funnel", ...}``
        with the funnel's ``groups`` ([ligand, pocket] atom indices), axis,
        reference pocket (nm), walls (nm), cone half-angle (rad) and wall
        force constant (kJ/mol/nm²); every key is listed in
        ``docs/spec-v1.md`` ("restraints"). ``cvdesign funnel`` writes one
        (:func:`cvdesign.bias.funnel.size_funnel`). Labels and atom identities
        are filled in as for the descriptors.

    Raises
    ------
    SpecError
        The parts do not form a valid spec; the message starts with the JSON
        path of the offending element, e.g. ``$.terms[1].descriptor``.

    See Also
    --------
    load_spec : read and check a spec file.

    Notes
    -----
    The reachable range of the CV (``reachable_range``: the values it can
    take, from its terms; :func:`cvdesign.spec.ranges.reachable_range`) is
    computed and stored; ``docs/spec-v1.md`` says what "reachable" means.

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
        period=None,
        states=None,
        scores=None,
        provenance=None,
        caution="",
        hints=None,
        restraints=None,
        observed_range=None,
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
            filled.append(_filled_descriptor(dict(desc), mdtop, f"$.descriptors[{k}]"))
        if periodic is True and period is None:
            period = _default_period(terms)
        prov = {} if provenance is None else dict(provenance)
        prov.setdefault("cvdesign_version", __version__)
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
        if restraints is not None:
            if not isinstance(restraints, (list, tuple)):
                raise SpecError(f"restraints must be a list of dicts; got {type(restraints).__name__}",
                                "$.restraints")
            doc["restraints"] = [_filled_restraint(r, mdtop, f"$.restraints[{k}]")
                                 for k, r in enumerate(restraints)]
        if period is not None:
            doc["period"] = period
        if observed_range is not None:
            try:
                low, high = observed_range
            except (TypeError, ValueError):
                raise SpecError(f"observed_range must be a pair (lower, upper) in CV units; got "
                                f"{observed_range!r}", "$.observed_range") from None
            doc["observed_range"] = {"lower": low, "upper": high}
        doc = _validated(doc)  # checked first, so that the range is computed on valid terms
        low, high = reachable_range(doc["descriptors"], doc["terms"], doc["offset"])
        doc["reachable_range"] = {"lower": low, "upper": high}
        if doc["states"] or "observed_range" in doc:  # the CV they were computed for
            doc["cv_digest"] = cv_digest(doc)
        if not doc["periodic"]:
            for name, side in states_at_bounds(doc["states"], (low, high)).items():
                doc["states"][name].setdefault("at_bound", side)
        self._doc = _validated(doc)
        if mdtop is not None:
            for k, desc, section in self._atom_users():
                for atom, given, where in _atoms_and_identities(desc):
                    actual = _identity_of(mdtop.atom(atom))
                    if given != actual:
                        raise SpecError(
                            f"the identity given for atom {atom} ({_describe(given)}) does not match "
                            f"the topology ({_describe(actual)}); leave atom_identities out to have "
                            "them taken from the topology",
                            f"$.{section}[{k}]{where}",
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
            why = "is a file, not a directory" if path.parent.exists() else "does not exist"
            raise InputError(f"cannot write spec {str(path)!r}: directory {str(path.parent)!r} {why}")
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
    def period(self):
        """float or None : the period of a periodic CV in its units, None for others."""
        return self._doc.get("period")

    @property
    def states_stale(self):
        """bool : whether the spec's ``states`` and ``observed_range`` were computed for
        another CV: its ``cv_digest`` is not that of its terms (a weight, centre, scale,
        offset or descriptor was edited since). :attr:`states`, :attr:`observed_range` and
        :attr:`states_at_bound` then raise :class:`~cvdesign.errors.SpecError`. False for a
        spec without ``cv_digest`` (written before it), which cannot tell.

        Examples
        --------
        >>> doc = Spec.from_json(_EXAMPLE).to_dict()
        >>> doc["states"] = {"a": {"mean": 1.0, "std": 0.5, "n_frames": 10}}
        >>> spec = Spec.from_dict(doc)  # no cv_digest: cannot tell
        >>> spec.states_stale
        False
        >>> doc = Spec(**{k: doc[k] for k in ("name", "topology", "descriptors", "terms",
        ...                                   "states")}).to_dict()  # digest stored
        >>> doc["terms"][0]["weight"] = 20.0
        >>> del doc["reachable_range"]
        >>> Spec.from_dict(doc).states_stale
        True
        """
        if getattr(self, "_stale", None) is None:
            self._stale = states_stale(self._doc)
        return self._stale

    def _fresh(self, key):
        """Raise SpecError when the states and observed range (`key` is read) are stale."""
        if not self.states_stale:
            return
        where = f"spec file {str(self._file)!r}" if getattr(self, "_file", None) else \
            f"spec {self.name!r}"
        raise SpecError(
            f"{where}: its states and observed_range (read here: {key}) are in the units of "
            "the CV they were computed for, and the CV was edited since (its terms, their "
            "descriptors or the offset no longer give cv_digest), so they do not describe this "
            "CV and nothing sized from them (walls, kernel width, grid, observed-range checks) "
            "would hold. Recompute them from the trajectories (run 'cvdesign suggest' again, or "
            "'cvdesign funnel' for a funnel spec), or remove states (write {}), observed_range, "
            "hints and cv_digest from the file to keep only the CV (the hints then need the "
            "states given to cvdesign.bias.hints.suggest_hints)",
            "$.cv_digest",
        )

    @property
    def states(self):
        """dict : per-state ``{"mean", "std", "n_frames"}`` of the CV, with ``"min"``,
        ``"max"`` and ``"at_bound"`` when recorded (a copy). Raises
        :class:`~cvdesign.errors.SpecError` when they are stale (:attr:`states_stale`)."""
        self._fresh("states")
        return copy.deepcopy(self._doc["states"])

    @property
    def reachable_range(self):
        """(float or None, float or None) : the values the CV can reach, CV units.

        ``(lower, upper)``, None on a side where the CV is unbounded: the
        stored ``reachable_range``, or for a spec written without one (or whose
        terms were edited since, :attr:`states_stale`), the same computed from the terms (:func:`cvdesign.spec.ranges.reachable_range`:
        a sound interval, exact when the descriptors can take their extreme
        values together). A periodic CV gets the interval of length
        :attr:`period` its values run over.

        Examples
        --------
        >>> Spec.from_json(_EXAMPLE).reachable_range  # 2 (d - 0.3) / 0.1 for d >= 0 nm
        (-6.0, None)
        """
        stored = self._doc.get("reachable_range")
        if stored is not None and not self.states_stale:  # (stale: of the CV before an edit)
            return stored["lower"], stored["upper"]
        return reachable_range(self._doc["descriptors"], self._doc["terms"], self._doc["offset"])

    @property
    def states_at_bound(self):
        """dict : ``{state: "lower" | "upper"}`` for the states at a bound of
        :attr:`reachable_range` (a folded coordinate; see
        :func:`cvdesign.spec.ranges.states_at_bounds`), in state order,
        computed from the range and the states as the hints compute it (a
        stored ``at_bound`` flag must agree: checked on load); empty for a
        periodic CV.

        Examples
        --------
        >>> Spec.from_json(_EXAMPLE).states_at_bound  # a distance CV, far from its bound
        {}
        """
        self._fresh("states_at_bound")
        if self._doc["periodic"]:
            return {}
        # computed, as the hints compute it (a stored flag is checked on load to agree)
        return states_at_bounds(self._doc["states"], self.reachable_range)

    @property
    def observed_range(self):
        """(float, float) or None : smallest and largest CV value over the input frames
        of all states (CV units), None when the spec does not record it. Raises
        :class:`~cvdesign.errors.SpecError` when it is stale (:attr:`states_stale`)."""
        self._fresh("observed_range")
        stored = self._doc.get("observed_range")
        return None if stored is None else (stored["lower"], stored["upper"])

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
        """dict or None : bias-parameter suggestions, when the spec has them (a copy). Raises
        :class:`~cvdesign.errors.SpecError` when they are stale (sized from
        :attr:`states` that are, :attr:`states_stale`)."""
        if self._doc.get("hints") is not None:
            self._fresh("hints")
        return copy.deepcopy(self._doc.get("hints"))

    @property
    def restraints(self):
        """list of dict : the restraints (a copy); empty when the spec has none."""
        return copy.deepcopy(self._doc.get("restraints", []))

    def _atom_users(self):
        """(index, entry, section) for every descriptor and restraint that names atoms."""
        for k, desc in enumerate(self._doc["descriptors"]):
            yield k, desc, "descriptors"
        for k, res in enumerate(self._doc.get("restraints", [])):
            yield k, res, "restraints"

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

    def _coordinates(self, xyz, box):
        """(coordinates as a float64 array, box) from an array and a box, or from an
        mdtraj.Trajectory (its ``xyz`` and ``unitcell_vectors``; its topology is checked)."""
        if isinstance(xyz, md.Trajectory):
            if box is not None:
                raise InputError(
                    "box= was given together with an mdtraj.Trajectory, which brings its own unit "
                    "cell (unitcell_vectors); leave box out, or pass traj.xyz with the box you mean")
            if xyz.topology is not None and getattr(self, "_checked_topology", None) is not xyz.topology:
                self.check_topology(xyz.topology)
                self._checked_topology = xyz.topology
            xyz, box = xyz.xyz, xyz.unitcell_vectors
        return self._check_xyz(xyz), box

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

    def _descriptor_blocks(self, arr, box, gradient):
        """Descriptor values (n_frames, n_descriptors) and, with `gradient`, their gradients.

        The gradients come as a list of blocks ``(columns, atoms, grad)``:
        for the tuple kinds one block per kind with ``atoms`` of shape
        (n, width) and ``grad`` (n_frames, n, width, 3); for the group kinds
        one block per descriptor with ``atoms`` (n_a + n_b,) and ``grad``
        (n_frames, n_a + n_b, 3). The third item, ``undefined`` (n_frames,
        n_descriptors), is True where a descriptor's value is undefined and a
        fixed one was substituted (angles, dihedrals; see :meth:`evaluate`).
        """
        descs = self._doc["descriptors"]
        values = np.empty((arr.shape[0], len(descs)), dtype=np.float64)
        undefined = np.zeros(values.shape, dtype=bool)
        blocks = []
        functions = {"distance": geometry.distances, "angle": _angles, "dihedral": _dihedrals}
        for kind, function in functions.items():
            cols = [k for k, d in enumerate(descs) if d["kind"] == kind]
            if not cols:
                continue
            atoms = np.array([descs[k]["atoms"] for k in cols], dtype=np.int64)
            if kind != "distance":  # (a distance is always defined)
                values[:, cols], grad, undefined[:, cols] = function(arr, atoms, box, gradient)
            elif gradient:
                values[:, cols], grad = function(arr, atoms, box=box, gradient=True)
            else:
                values[:, cols] = function(arr, atoms, box=box)
            if gradient:
                blocks.append((cols, atoms, grad))
        for k, desc in enumerate(descs):
            if desc["kind"] not in GROUP_KINDS:
                continue
            group_a, group_b = desc["groups"]
            if desc["kind"] == "center_distance":
                masses_a, masses_b = desc["masses"] if desc["weighting"] == "mass" else (None, None)
                out = geometry.center_distance(arr, group_a, group_b, box=box, masses_a=masses_a,
                                               masses_b=masses_b, gradient=gradient)
            else:
                out = geometry.coordination(arr, group_a, group_b, desc["r0"], box=box, n=desc["n"],
                                            m=desc["m"], gradient=gradient)
            if gradient:
                values[:, k], grad = out
                blocks.append(([k], np.array(group_a + group_b, dtype=np.int64)[None, :], grad[:, None]))
            else:
                values[:, k] = out
        return values, blocks, undefined

    def descriptor_values(self, xyz, box=None):
        """Values of every descriptor of the spec, frame by frame.

        Parameters
        ----------
        xyz : array-like of shape (n_frames, n_atoms, 3), or mdtraj.Trajectory
            Coordinates in nm of all atoms of the spec's topology, in order;
            or a trajectory, whose ``xyz`` and unit cell (``unitcell_vectors``,
            none when it has no box) are used and whose topology must be the
            spec's.
        box : array-like or None, default=None
            Periodic box in nm: lengths (3,) or (n_frames, 3), or box vectors
            as rows (3, 3) or (n_frames, 3, 3); see
            :func:`cvdesign.geometry.minimum_image`. Not with a trajectory.

        Returns
        -------
        ndarray of shape (n_frames, n_descriptors), float64
            Columns in the order of :attr:`descriptors`: distances and
            center distances in nm, angles in rad in [0, pi], dihedrals in
            rad in (-pi, pi], coordination numbers (dimensionless).

        Raises
        ------
        InputError
            `xyz` has the wrong shape or atom count, `box` is bad, or `box` is
            given with a trajectory.
        TopologyMismatchError
            The trajectory's topology is not the spec's.

        Examples
        --------
        >>> spec = Spec.from_json(_EXAMPLE)
        >>> spec.descriptor_values(np.zeros((2, 3, 3)) + [[0, 0, 0], [0.1, 0, 0], [0.4, 0, 0]])
        array([[0.4],
               [0.4]])
        """
        arr, box = self._coordinates(xyz, box)
        return self._descriptor_blocks(arr, box, gradient=False)[0]

    def evaluate(self, xyz, box=None, gradient=False, undefined=False):
        """The CV value of every frame, and optionally its gradient, from coordinates alone.

        Parameters
        ----------
        xyz : array-like of shape (n_frames, n_atoms, 3), or mdtraj.Trajectory
            Coordinates in nm of all atoms of the spec's topology, in order;
            or a trajectory, whose ``xyz`` and unit cell are used (see
            :meth:`descriptor_values`).
        box : array-like or None, default=None
            Periodic box in nm (see :meth:`descriptor_values`); None means
            no periodicity (or, for a trajectory, its own unit cell).
        gradient : bool, default=False
            Also return the analytic gradient of the CV.
        undefined : bool, default=False
            Also return where a descriptor's value is undefined and a fixed
            value stands in for it (see Warns), so that such frames can be
            marked: their CV value is not a measurement.

        Returns
        -------
        values : ndarray of shape (n_frames,), float64
            ``offset + sum_t weight_t * (transform_t(d_t) - center_t) / scale_t``,
            in the CV's units (those of ``offset``). A periodic CV is not
            wrapped: its values lie in an interval of length :attr:`period`.
        gradient : ndarray of shape (n_frames, n_atoms, 3), float64
            Only with ``gradient=True``: the derivative of the CV with
            respect to every atom position, in CV units per nm (zero for atoms
            the CV does not use). With a box it is the gradient with respect
            to the minimum images the descriptors use, which is what an engine
            applies. Analytic (see :mod:`cvdesign.geometry`), chained through
            the transforms: ``d cos(d) = -sin(d) dd``, ``d sin(d) = cos(d) dd``.
        undefined : ndarray of shape (n_frames, n_descriptors), bool
            Only with ``undefined=True`` (last): True where the value of the
            descriptor (columns in the order of :attr:`descriptors`) is
            undefined and was substituted: an angle with an arm of zero
            length (pi/2), a dihedral with three consecutive atoms collinear
            or two coincident (0). Distances, center distances and
            coordination numbers are always defined.

        Warns
        -----
        GeometryWarning
            Where a descriptor or its gradient is undefined (coincident atoms,
            collinear angle or dihedral atoms; see :mod:`cvdesign.geometry`):
            the value is finite and that descriptor's gradient is 0. Its frame
            numbers count from the first frame of `xyz`.

        Raises
        ------
        InputError
            `xyz` has the wrong shape or atom count, `box` is bad, or `box` is
            given with a trajectory; a coordinate the CV uses is not finite.
        SpecError
            The CV or its gradient is not finite at a frame of finite
            coordinates (coefficients too large for float64; path ``$.terms``).
        TopologyMismatchError
            The trajectory's topology is not the spec's.

        Examples
        --------
        >>> spec = Spec.from_json(_EXAMPLE)
        >>> xyz = np.array([[[0.0, 0, 0], [0.1, 0, 0], [0.4, 0, 0]]])
        >>> spec.evaluate(xyz).round(6)  # 2.0 * (0.4 - 0.3) / 0.1
        array([2.])
        >>> value, grad = spec.evaluate(xyz, gradient=True)
        >>> grad[0, :, 0].round(6) + 0.0  # weight / scale = 20 per nm along the distance
        array([-20.,   0.,  20.])

        An mdtraj trajectory brings its coordinates and its box (here a cubic
        box of 0.5 nm: atoms 0 and 2 are 0.1 nm apart through the boundary):

        >>> top = md.Topology()
        >>> res = top.add_residue("GLY", top.add_chain(), resSeq=1)
        >>> for name in ["N", "CA", "C"]:
        ...     _ = top.add_atom(name, md.element.get_by_symbol(name[0]), res)
        >>> spec = Spec(name="cv", topology=top,
        ...             descriptors=[{"id": "d0", "kind": "distance", "atoms": [0, 2]}],
        ...             terms=[{"descriptor": "d0", "transform": "identity",
        ...                     "center": 0.0, "scale": 1.0, "weight": 1.0}])
        >>> traj = md.Trajectory(xyz, top, unitcell_lengths=[[0.5, 0.5, 0.5]],
        ...                      unitcell_angles=[[90.0, 90.0, 90.0]])
        >>> spec.evaluate(traj).round(6)
        array([0.1])

        An angle whose arm has zero length is undefined; pi/2 stands in for it,
        and ``undefined=True`` says where:

        >>> spec = Spec(name="a", topology=top,
        ...             descriptors=[{"id": "a0", "kind": "angle", "atoms": [0, 1, 2]}],
        ...             terms=[{"descriptor": "a0", "transform": "identity",
        ...                     "center": 0.0, "scale": 1.0, "weight": 1.0}])
        >>> xyz = np.array([[[0.1, 0, 0], [0, 0, 0], [0, 0.1, 0]],
        ...                 [[0.1, 0, 0], [0, 0, 0], [0, 0, 0]]])
        >>> import warnings
        >>> with warnings.catch_warnings():
        ...     warnings.simplefilter("ignore", geometry.GeometryWarning)
        ...     value, undefined = spec.evaluate(xyz, undefined=True)
        >>> (value / np.pi).round(6), undefined[:, 0]
        (array([0.5, 0.5]), array([False,  True]))
        """
        arr, box = self._coordinates(xyz, box)
        values, blocks, missing = self._descriptor_blocks(arr, box, gradient=bool(gradient))
        column = {d["id"]: k for k, d in enumerate(self._doc["descriptors"])}
        n_frames = values.shape[0]
        # overflow is refused below (_check_finite), not warned about
        with np.errstate(over="ignore", invalid="ignore"):
            cv = np.full(n_frames, self._doc["offset"], dtype=np.float64)
            slope = np.zeros_like(values)  # d CV / d descriptor, per frame
            for term in self._doc["terms"]:
                k = column[term["descriptor"]]
                d = values[:, k]
                factor = term["weight"] / term["scale"]
                if term["transform"] == "cos":
                    cv += factor * (np.cos(d) - term["center"])
                    slope[:, k] -= factor * np.sin(d)
                elif term["transform"] == "sin":
                    cv += factor * (np.sin(d) - term["center"])
                    slope[:, k] += factor * np.cos(d)
                else:
                    cv += factor * (d - term["center"])
                    slope[:, k] += factor
            out = (cv,)
            if gradient:
                grad = np.zeros((n_frames, self.n_atoms, 3), dtype=np.float64)
                for cols, atoms, block in blocks:
                    contribution = slope[:, cols, None, None] * block  # (n_frames, n, width, 3)
                    np.add.at(grad, (slice(None), atoms.ravel()), contribution.reshape(n_frames, -1, 3))
                out += (grad,)
        self._check_finite(arr, cv, out[1] if gradient else None)
        if undefined:
            out += (missing,)
        return out if len(out) > 1 else cv

    def _check_finite(self, arr, cv, grad=None):
        """Refuse a CV value (or gradient) that is not finite, naming the first such frame:
        from coordinates that are not finite, or from terms too large for float64."""
        bad = ~np.isfinite(cv)
        if grad is not None:
            bad |= ~np.isfinite(grad).all(axis=(1, 2))
        if not bad.any():
            return
        frame = int(np.flatnonzero(bad)[0])
        used = sorted({atom for desc in self._doc["descriptors"]
                       for atom, *_ in _atoms_and_identities(desc)})
        what = f"the CV is {float(cv[frame])!r}" if not math.isfinite(cv[frame]) else \
            "the CV's gradient is not finite"
        if not np.isfinite(arr[frame][used]).all():
            raise InputError(f"{what} at frame {frame}: the coordinates of an atom it uses are "
                             "NaN or infinite there; give finite coordinates in nm")
        raise SpecError(f"{what} at frame {frame} of finite coordinates: spec {self.name!r} has "
                        "terms whose coefficients (weight / scale) are too large for float64 "
                        "numbers; give a scale and weight of ordinary size", "$.terms")

    def restraint_energy(self, xyz, box=None, gradient=False):
        """Energy of the spec's restraints, and optionally its gradient.

        A ``funnel`` restraint acts on ``d``, the vector (minimum image with
        a box) from the geometric center of the pocket (``groups[1]``) to that
        of the ligand (``groups[0]``), each group made whole
        (:func:`cvdesign.geometry.center_displacement`): with ``z = d . axis``
        and ``r`` the distance of ``d`` from the axis, ``E = k/2 (r - R(z))^2``
        where ``r > R(z)``, plus ``k/2 (lower_wall_z_nm - z)^2`` below the lower
        wall and ``k/2 (z - upper_wall_z_nm)^2`` above the upper wall, with
        ``k = wall_force_constant_kj_mol_nm2``; ``R(z)`` is the
        cone-plus-cylinder radius of :func:`cvdesign.bias.funnel.funnel_radius`
        (smooth at the junction). The axis is fixed in the box frame and is
        expressed in the frame of the restraint's reference pocket
        (``reference_pocket_nm``): the pocket must be held in that orientation
        (restrained or aligned; see
        :func:`cvdesign.bias.funnel.align_to_reference_pocket`), otherwise the
        energy, while computed as defined, no longer describes the funnel
        that was sized.

        Parameters
        ----------
        xyz : array-like of shape (n_frames, n_atoms, 3), or mdtraj.Trajectory
            nm, all atoms of the topology in order; or a trajectory, whose
            ``xyz`` and unit cell are used (see :meth:`descriptor_values`).
        box : array-like or None, default=None
            Periodic box in nm (see :meth:`descriptor_values`); not with a
            trajectory.
        gradient : bool, default=False
            Also return the analytic gradient.

        Returns
        -------
        energy : ndarray of shape (n_frames,)
            kJ/mol, summed over the restraints (0 without restraints).
        gradient : ndarray of shape (n_frames, n_atoms, 3)
            Only with ``gradient=True``: dE/dx in kJ/mol/nm, on ligand and
            pocket atoms alike.

        Examples
        --------
        >>> import numpy as np
        >>> top = md.Topology()
        >>> res = top.add_residue("HST", top.add_chain(), resSeq=1)
        >>> for name in ["C1", "C2", "C3", "C4"]:
        ...     _ = top.add_atom(name, md.element.carbon, res)
        >>> funnel = {"id": "funnel", "kind": "funnel", "groups": [[3], [0, 1, 2]],
        ...           "axis": [0.0, 0.0, 1.0], "lower_wall_z_nm": -0.2,
        ...           "upper_wall_z_nm": 2.0, "cone_end_z_nm": 1.0, "cone_half_angle_rad": 0.5,
        ...           "cylinder_radius_nm": 0.2, "blend_half_width_nm": 0.1,
        ...           "wall_force_constant_kj_mol_nm2": 1000.0,
        ...           "reference_pocket_nm": [[-0.1, -0.05, 0], [0.1, -0.05, 0], [0, 0.1, 0]]}
        >>> spec = Spec(name="f", topology=top,
        ...             descriptors=[{"id": "d", "kind": "distance", "atoms": [0, 3]}],
        ...             terms=[{"descriptor": "d", "transform": "identity", "center": 0.0,
        ...                     "scale": 1.0, "weight": 1.0}], restraints=[funnel])
        >>> xyz = np.array([[[-0.1, -0.05, 0], [0.1, -0.05, 0], [0, 0.1, 0],
        ...                  [0, 0, -0.3]]])  # ligand 0.1 nm below the lower wall
        >>> energy, grad = spec.restraint_energy(xyz, gradient=True)
        >>> energy.round(6).tolist(), grad[0, :, 2].round(6).tolist()  # k/2 (0.1 nm)^2
        ([5.0], [33.333333, 33.333333, 33.333333, -100.0])
        """
        from ..bias.funnel import funnel_energy

        arr, box = self._coordinates(xyz, box)
        n_frames = arr.shape[0]
        energy = np.zeros(n_frames)
        grad = np.zeros((n_frames, self.n_atoms, 3)) if gradient else None
        for res in self._doc.get("restraints", []):
            ligand, pocket = res["groups"]
            d, w_pocket, w_ligand = geometry.center_displacement(arr, pocket, ligand, box=box)
            e, g = funnel_energy(d, res, res["wall_force_constant_kj_mol_nm2"])
            energy += e
            if gradient:
                np.add.at(grad, (slice(None), ligand), w_ligand[None, :, None] * g[:, None, :])
                np.add.at(grad, (slice(None), pocket), -w_pocket[None, :, None] * g[:, None, :])
        return (energy, grad) if gradient else energy

    # -- export to OpenMM --------------------------------------------------

    def to_openmm(self, periodic=None, *, system=None):
        """The CV as an ``openmm.CustomCVForce`` whose energy is the CV value.

        This is OpenMM's convention for a collective variable: add the force
        as a collective variable of your own bias force (a ``CustomCVForce``
        whose expression is the bias as a function of it), not to the System
        by itself. Its "energy", reported in kJ/mol, is the CV in the CV's
        units; on the Reference platform it equals :meth:`evaluate`, and its
        forces the negative gradient (``tests/test_export_openmm.py``). Each
        descriptor is one of OpenMM's custom forces (the mapping is in
        ``docs/spec-v1.md``, "OpenMM export", and :mod:`cvdesign.export.openmm`).
        Restraints are not part of the CV: see :meth:`restraint_to_openmm`.

        A periodic CV (``periodic`` true: a single identity term on a
        dihedral) is ``offset + weight (theta - center) / scale`` with
        OpenMM's torsion angle theta in [-pi, pi]: its values fill an
        interval of length :attr:`period` and jump by one period where theta
        crosses +-pi (the forces stay continuous). OpenMM knows nothing of
        that period: the bias built on it must be periodic with period
        :attr:`period`, e.g. an expression of the wrapped difference ``dv -
        period*floor(dv/period + 0.5)`` of the CV from each kernel centre, or
        a tabulated function made periodic over one period; used as an
        ordinary variable, the bias would see the jump.

        Parameters
        ----------
        periodic : bool or None, default=None
            True for a System with a periodic box: every bond vector, and the
            vector between two group centres, is taken at its periodic image
            in the Context's box (orthorhombic or triclinic): the spec's
            minimum image for vectors shorter than half the smallest box
            height. False for a System without a box. Required unless
            `system` is given: a wrong choice would give wrong values silently.
            With True the System must carry the simulation's box
            (``setDefaultPeriodicBoxVectors``, or the Context's
            ``setPeriodicBoxVectors``): a System whose box was never set runs
            the force in OpenMM's default 2 nm cube, where distances longer
            than 1 nm are wrapped without an error. Giving `system` instead
            has that checked.
        system : openmm.System or None, default=None
            The System the CV is for: its particle count must be
            :attr:`n_atoms` (topology order), and `periodic` follows whether
            it uses periodic boundary conditions; a periodic System whose box
            is OpenMM's default 2 nm cube is warned about (``UserWarning``,
            :func:`cvdesign.export.openmm.default_box_message`).

        Returns
        -------
        openmm.CustomCVForce

        Raises
        ------
        InputError
            openmm is not installed (``pip install 'cvdesign[openmm]'``),
            `periodic` is missing, or the System does not fit.

        Notes
        -----
        Group centres (``center_distance``) are the weighted means of the
        positions the Context holds; the spec makes each group whole first.
        They agree when every group is whole in the Context's positions (as
        OpenMM keeps whole molecules given to it whole).

        Examples
        --------
        >>> import openmm
        >>> spec = Spec.from_json(_EXAMPLE)
        >>> cv = spec.to_openmm(periodic=False)
        >>> bias = openmm.CustomCVForce("0.5*kappa*(s - 1.5)^2")  # a bias of your own
        >>> _ = bias.addGlobalParameter("kappa", 100.0)  # kJ/mol per CV unit squared
        >>> _ = bias.addCollectiveVariable("s", cv)
        >>> system = openmm.System()
        >>> for _ in range(spec.n_atoms):
        ...     _ = system.addParticle(12.0)
        >>> _ = system.addForce(bias)
        >>> context = openmm.Context(system, openmm.VerletIntegrator(0.001),
        ...                          openmm.Platform.getPlatformByName("Reference"))
        >>> context.setPositions([[0.0, 0, 0], [0.1, 0, 0], [0.4, 0, 0]])
        >>> round(bias.getCollectiveVariableValues(context)[0], 9)  # = evaluate
        2.0
        """
        from ..export.openmm import cv_force

        return cv_force(self._doc, periodic, system=system)

    def restraint_to_openmm(self, periodic=None, *, system=None):
        """The spec's restraints as an OpenMM force to add to the System, energy in kJ/mol.

        One ``openmm.CustomCentroidBondForce`` holds every restraint (version
        1: funnels), each a bond between the ligand and the pocket group,
        with the energy of :meth:`restraint_energy`: ``k/2 (r - R(z))^2``
        outside the cone-cylinder radius ``R(z)`` (smooth blend at the
        junction) and ``k/2`` times the squared distance beyond either wall,
        with ``z`` and ``r`` the pocket-to-ligand vector's distances along and
        from the axis. The axis is fixed in the box frame, in the frame of
        the restraint's reference pocket (``reference_pocket_nm``): hold the
        pocket in that orientation during the run (restrain or align it).

        Parameters
        ----------
        periodic : bool or None, default=None
            As in :meth:`to_openmm`.
        system : openmm.System or None, default=None
            As in :meth:`to_openmm`.

        Returns
        -------
        openmm.CustomCentroidBondForce

        Raises
        ------
        InputError
            The spec has no restraints, or as in :meth:`to_openmm`.

        Examples
        --------
        >>> Spec.from_json(_EXAMPLE).restraint_to_openmm(periodic=False)  # doctest: +ELLIPSIS
        Traceback (most recent call last):
        ...
        cvdesign.errors.InputError: spec 'cv-01' has no restraints; ...
        """
        from ..export.openmm import restraint_force

        return restraint_force(self._doc, periodic, system=system)

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
        for k, desc, section in self._atom_users():
            for atom, expected, where in _atoms_and_identities(desc):
                actual = _identity_of(topology.atom(atom))
                if actual != expected:
                    only_element = {k for k in actual if actual[k] != expected[k]} == {"element"}
                    hint = (" (only the element differs: some readers guess elements from atom "
                            "names, e.g. a PDB 'CA' as calcium, so the two topology files may "
                            "have been read differently)") if only_element else ""
                    raise TopologyMismatchError(
                        f"atom {atom} (used by {section[:-1]} {desc['id']!r}, {desc['label']}) is "
                        f"{_describe(expected)} in the spec but {_describe(actual)} in this "
                        f"topology{hint}. Use the topology the spec was made for, or make a new "
                        "spec for this one",
                        f"$.{section}[{k}]{where}",
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
    except SpecError as exc:
        raise _with_file(exc, path) from None
    try:
        spec = Spec.from_dict(document)
    except SpecError as exc:
        raise _with_file(exc, path) from None
    spec._file = path  # named by the refusal of stale states
    if topology is not None:
        if isinstance(topology, (str, os.PathLike)):
            from ..io.source import load_topology

            topology = load_topology(topology)
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
