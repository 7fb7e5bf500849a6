"""The spec: an engine-neutral, versioned JSON file that hands one CV over.

A spec names its descriptors by 0-based atom indices, records who those atoms
are (chain, residue, atom name, element) and a fingerprint of the whole
topology, and defines

    CV = offset + sum over terms of weight * (transform(d) - center) / scale

with descriptor values ``d`` in nm (distance, center_distance), rad (angle,
dihedral) or dimensionless (coordination), and transforms identity, cos or
sin (cos and sin for dihedrals only). Everything the evaluator needs is in
the file (atom indices, masses, switching parameters): :meth:`Spec.evaluate`
gives values and analytic gradients from coordinates alone, without the
topology. Nothing in a spec is executed: loading validates the document
against the JSON Schema shipped in ``cvdesign/spec/schema/spec-v1.json``, then
checks cross-references, and, when a topology is given, that the topology is
the one the spec was made for. Every field is described, with its unit, in
``docs/spec-v1.md``.

Modules: :mod:`.document` (the :class:`Spec` class, :func:`load_spec`, the
evaluator), :mod:`.validate` (JSON parsing with limits, schema and semantic
checks, the digest of the CV that the states were computed for), :mod:`.identity`
(atom identities, topology fingerprint, residue hashes), :mod:`.ranges` (the values
the CV can reach, from its terms, and the states that sit at a bound of it).
"""

from .document import Spec, load_spec
from .identity import atom_identity, residue_hashes, topology_fingerprint
from .validate import SPEC_FORMAT, SPEC_VERSION, cv_digest, spec_schema

__all__ = ["SPEC_FORMAT", "SPEC_VERSION", "Spec", "atom_identity", "cv_digest", "load_spec",
           "residue_hashes", "spec_schema", "topology_fingerprint"]
