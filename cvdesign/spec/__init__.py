"""The spec: an engine-neutral, versioned JSON file that hands one CV over."""

from .document import (SPEC_FORMAT, SPEC_VERSION, Spec, atom_identity, load_spec,
                       residue_hashes, spec_schema, topology_fingerprint)

__all__ = ["SPEC_FORMAT", "SPEC_VERSION", "Spec", "atom_identity", "load_spec",
           "residue_hashes", "spec_schema", "topology_fingerprint"]
