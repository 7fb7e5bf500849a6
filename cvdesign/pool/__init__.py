"""Candidate descriptors: definitions, enumeration from a topology, features.

A :class:`Descriptor` is data: a kind (:data:`cvdesign.kinds.KINDS`), 0-based
atom indices, a stable id and a readable label (:mod:`.descriptors`). A
:class:`Pool` is an ordered set of descriptors with the *features* they
contribute to linear combinations (:mod:`.features`). Candidates are
enumerated from an atom selection and prefiltered on the data
(:mod:`.candidates`, :func:`build_pool`).
"""

from .candidates import (MIN_PREFILTER_STRIDE, PREFILTER_FRAMES, build_pool, candidate_pairs,
                         candidate_pool, check_kinds, check_length, check_pair_count,
                         check_prefilter_stride, MAX_PAIRS, needs_prefilter,
                         prefilter_group_pairs, prefilter_pairs, prefilter_stride_for,
                         residue_groups, state_frames)
from .descriptors import Descriptor, atom_label, atom_labels
from .features import Pool

__all__ = ["Descriptor", "Pool", "atom_label", "atom_labels", "candidate_pool",
           "candidate_pairs", "prefilter_pairs", "prefilter_group_pairs", "residue_groups",
           "build_pool", "prefilter_stride_for", "state_frames", "check_prefilter_stride",
           "needs_prefilter", "PREFILTER_FRAMES", "MIN_PREFILTER_STRIDE", "check_kinds",
           "check_length", "check_pair_count", "MAX_PAIRS"]
