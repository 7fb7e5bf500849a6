"""Candidate descriptors: definitions, enumeration from a topology, features."""

from .candidates import (COORDINATION_EXPONENTS, COORDINATION_R0_NM, DEFAULT_KINDS, GROUP_KINDS, KINDS,
                         Descriptor, Pool, atom_label, atom_labels, build_pool, candidate_pairs,
                         candidate_pool, prefilter_group_pairs, prefilter_pairs, residue_groups)

__all__ = ["Descriptor", "Pool", "KINDS", "DEFAULT_KINDS", "GROUP_KINDS", "COORDINATION_R0_NM",
           "COORDINATION_EXPONENTS", "atom_label", "atom_labels", "candidate_pool",
           "candidate_pairs", "prefilter_pairs", "prefilter_group_pairs", "residue_groups",
           "build_pool"]
