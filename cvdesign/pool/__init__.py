"""Candidate descriptors: definitions, enumeration from a topology, features."""

from .candidates import (Descriptor, Pool, atom_label, atom_labels, build_pool, candidate_pairs,
                         candidate_pool, prefilter_group_pairs, prefilter_pairs, residue_groups)

__all__ = ["Descriptor", "Pool", "atom_label", "atom_labels", "candidate_pool",
           "candidate_pairs", "prefilter_pairs", "prefilter_group_pairs", "residue_groups",
           "build_pool"]
