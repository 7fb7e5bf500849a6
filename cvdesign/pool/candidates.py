"""Candidate descriptors from an atom selection: enumeration, prefilters, :func:`build_pool`.

Candidates come from an atom selection:

* distances between every pair of selected atoms that are more than two bonds
  apart (1-2 and 1-3 pairs are nearly rigid, or an angle in disguise), kept
  when the pair's mean distance is below a cutoff in at least one state
  (:func:`prefilter_pairs`; with a single state, runs whose states are not known
  yet, when it comes below the cutoff in at least 2 % of the frames);
* bond angles over every bonded triple of selected atoms;
* one dihedral per rotatable bond: a bond between selected atoms that both
  have another selected neighbour and that is not in a small ring (of up to
  eight bonds; larger cycles such as a loop closed by a disulfide keep their
  torsions), with, on each side, the neighbour that leads to the larger part
  of the molecule (so a protein's phi is C-N-CA-C, not C-N-CA-CB);
* on request (kinds ``center_distance`` and ``coordination``), residue-level
  descriptors: the selected atoms of each residue form a group, and for every
  pair of residues whose centers are, on average, closer than the cutoff in at
  least one state, the distance between their mass centers (nm) and the
  coordination number of their atoms (rational switching function,
  ``r0 = 0.45 nm``, exponents 6 and 12). A residue-level pool is far smaller
  than an atom-pair one for a protein, and it is what a contact or a domain
  motion looks like.
"""

import copy
import numbers

import mdtraj as md
import numpy as np

from .. import progress
from ..constants import COORDINATION_R0_NM
from ..errors import InputError
from ..geometry import group_centers, minimum_image
from ..kinds import DEFAULT_KINDS, GROUP_KINDS, KINDS
from ..stats.separation import fisher_ratio
from .descriptors import Descriptor, _make, _residue_labels, atom_labels
from .features import Pool

__all__ = ["check_kinds", "check_length", "check_pair_count", "MAX_PAIRS", "candidate_pool",
           "candidate_pairs", "prefilter_pairs", "prefilter_group_pairs",
           "residue_groups", "build_pool", "prefilter_stride_for", "state_frames",
           "check_prefilter_stride", "needs_prefilter", "PREFILTER_FRAMES",
           "MIN_PREFILTER_STRIDE"]


def _bond_graph(topology, atoms):
    import networkx as nx  # here, not at import: worker processes do not need it

    graph = nx.Graph()
    graph.add_nodes_from(int(a) for a in atoms)
    sel = set(int(a) for a in atoms)
    for bond in topology.bonds:
        a, b = bond[0].index, bond[1].index
        if a in sel and b in sel and a != b:
            graph.add_edge(a, b)
    return graph


#: Largest ring (in bonds) whose bonds are not counted as rotatable. Larger cycles,
#: such as a protein loop closed by a disulfide bond, keep their torsions.
SMALL_RING = 8


def _in_small_ring(graph, b, c, max_ring=SMALL_RING):
    """True when the bond b-c closes a ring of at most `max_ring` bonds."""
    import networkx as nx

    graph.remove_edge(b, c)
    try:
        reach = nx.single_source_shortest_path_length(graph, b, cutoff=max_ring - 1)
        return c in reach
    finally:
        graph.add_edge(b, c)


def _outer_atom(graph, centre, candidates):
    """The neighbour of `centre` that leads to the larger part of the molecule.

    Counts the atoms reachable from each candidate without passing through
    `centre` (capped, for speed), so that backbone neighbours win over short
    side branches; ties go to the lowest index.
    """
    if len(candidates) == 1:
        return candidates[0]
    cap = 64

    def branch(x):
        seen = {centre, x}
        frontier = [x]
        while frontier and len(seen) < cap:
            nxt = []
            for y in frontier:
                for z in graph.neighbors(y):
                    if z not in seen:
                        seen.add(z)
                        nxt.append(z)
            frontier = nxt
        return min(len(seen), cap)

    return min(candidates, key=lambda x: (-branch(x), x))


def check_kinds(kinds, name="kinds"):
    """Descriptor kinds as a tuple of names of :data:`cvdesign.kinds.KINDS`, from a
    sequence or a comma-separated string; else an :class:`~cvdesign.errors.InputError`
    naming the argument.

    Examples
    --------
    >>> check_kinds("distance, angle")
    ('distance', 'angle')
    >>> check_kinds(["distance", "torsion"])
    Traceback (most recent call last):
    ...
    cvdesign.errors.InputError: kinds: unknown descriptor kinds ['torsion']; use a comma-separated subset of distance, angle, dihedral, center_distance, coordination
    """
    if isinstance(kinds, str):
        kinds = [k.strip() for k in kinds.split(",") if k.strip()]
    try:
        kinds = tuple(kinds)
    except TypeError:
        raise InputError(f"{name}={kinds!r} must be descriptor kind names, a sequence or a "
                         f"comma-separated string, from {', '.join(KINDS)}") from None
    bad = [k for k in kinds if not isinstance(k, str) or k not in KINDS]
    if bad or not kinds:
        raise InputError(
            f"{name}: unknown descriptor kinds {bad!r}; use a comma-separated subset of "
            f"{', '.join(KINDS)}"
        )
    return kinds


def check_length(value, name, *, allow_inf=False):
    """`value` as a positive float length in nm (``inf`` only with `allow_inf`); else an
    :class:`~cvdesign.errors.InputError` naming the argument (a string such as ``'1.0'``,
    a bool, NaN, zero or a negative number).

    Examples
    --------
    >>> check_length(np.float32(0.5), "cutoff"), check_length(float("inf"), "cutoff", allow_inf=True)
    (0.5, inf)
    >>> check_length("1.0", "cutoff")
    Traceback (most recent call last):
    ...
    cvdesign.errors.InputError: cutoff='1.0' must be a positive number in nm (a float such as 1.0, not a string)
    """
    ok = isinstance(value, numbers.Real) and not isinstance(value, bool)
    if ok:
        value = float(value)
        ok = value > 0 and (np.isfinite(value) or (allow_inf and value == np.inf))
    if not ok:
        hint = " (a float such as 1.0, not a string)" if isinstance(value, str) else \
            (" (or inf: no cutoff)" if allow_inf else "")
        raise InputError(f"{name}={value!r} must be a positive number in nm{hint}")
    return value


#: Most pairs (of atoms for distances, of residues for the group kinds) a pool is built
#: from. Measured: enumerating the atom pairs takes 48 bytes per pair before any frame is
#: read (index arrays and the bonded-pair mask), and every pair kept costs about 0.5 kB
#: and tens of microseconds as a descriptor, besides one value per pair and frame in the
#: prefilter. Two million pairs (a selection of 2,000 atoms) is about 0.1 GB up front and
#: at most 1 GB of descriptors; a 10,000-atom selection (50 million pairs, 2.4 GB before
#: any frame) is refused instead of exhausting memory or running for hours.
MAX_PAIRS = 2_000_000


def check_pair_count(n, what="atoms"):
    """Refuse (:class:`~cvdesign.errors.InputError`) `n` selected atoms (or residues, with
    ``what='residues'``) whose n (n - 1) / 2 pairs exceed :data:`MAX_PAIRS`.

    Examples
    --------
    >>> check_pair_count(2000)
    >>> check_pair_count(10_000)
    Traceback (most recent call last):
    ...
    cvdesign.errors.InputError: the atom selection holds 10000 atoms, which make 49,995,000 pairs for distances, more than the 2,000,000 a pool is built from (MAX_PAIRS); narrow it with --select (selection=), e.g. 'name CA' or 'backbone', or use the residue-level kinds (--kinds center_distance,coordination)
    """
    n_pairs = n * (n - 1) // 2
    if n_pairs <= MAX_PAIRS:
        return
    if what == "residues":
        raise InputError(
            f"the atom selection spans {n} residues, which make {n_pairs:,} residue pairs for "
            f"center distances and coordination numbers, more than the {MAX_PAIRS:,} a pool "
            "is built from (MAX_PAIRS); narrow it with --select (selection=) to the residues "
            "that matter (e.g. 'protein' or 'resid 10 to 80', leaving solvent out)")
    raise InputError(
        f"the atom selection holds {n} atoms, which make {n_pairs:,} pairs for distances, "
        f"more than the {MAX_PAIRS:,} a pool is built from (MAX_PAIRS); narrow it with "
        "--select (selection=), e.g. 'name CA' or 'backbone', or use the residue-level "
        "kinds (--kinds center_distance,coordination)")


def candidate_pairs(topology, atoms):
    """Pairs of selected atoms more than two bonds apart.

    Parameters
    ----------
    topology : mdtraj.Topology
    atoms : array-like of int
        Selected atom indices.

    Returns
    -------
    pairs : ndarray of shape (n_pairs, 2), dtype int
        Sorted pairs ``i < j``, in lexicographic order.
    note : str or None
        How many bonded (1-2) and 1-3 pairs were left out.

    Examples
    --------
    >>> import mdtraj as md
    >>> top = md.Topology(); ch = top.add_chain(); r = top.add_residue("X", ch, 1)
    >>> a = [top.add_atom(f"C{i}", md.element.carbon, r) for i in range(4)]
    >>> for i in range(3):
    ...     top.add_bond(a[i], a[i + 1])
    >>> candidate_pairs(top, range(4))[0].tolist()
    [[0, 3]]
    """
    atoms = np.unique(np.asarray(atoms, dtype=np.intp))
    n = atoms.size
    check_pair_count(n)
    ii, jj = np.triu_indices(n, k=1)
    pairs = np.stack([atoms[ii], atoms[jj]], axis=1)
    graph = _bond_graph(topology, atoms)
    if not graph.number_of_edges():
        return pairs, None
    import networkx as nx

    close = []
    for a in graph.nodes:
        for b in nx.single_source_shortest_path_length(graph, a, cutoff=2):
            if a < b:
                close.append((a, b))
    if not close:
        return pairs, None
    width = int(topology.n_atoms) + 1
    codes = pairs[:, 0].astype(np.int64) * width + pairs[:, 1]
    close = np.array(close, dtype=np.int64)
    drop = np.isin(codes, close[:, 0] * width + close[:, 1])
    note = (f"distances: {int(drop.sum())} pairs within two bonds left out "
            "(bonds and 1-3 pairs are nearly rigid)")
    return pairs[~drop], note


def candidate_pool(topology, atoms, kinds=DEFAULT_KINDS, *, pairs=None, group_pairs=None,
                   coordination_r0=COORDINATION_R0_NM):
    """Enumerate candidate descriptors over the selected atoms.

    Parameters
    ----------
    topology : mdtraj.Topology
    atoms : array-like of int
        Selected atom indices (see :func:`cvdesign.io.source.select_atoms`).
    kinds : sequence of str
        Kinds to enumerate, from :data:`cvdesign.kinds.KINDS`.
    pairs : ndarray of shape (n_pairs, 2), default=None
        Distance pairs to use (e.g. after :func:`prefilter_pairs`); None uses
        every pair from :func:`candidate_pairs`.
    group_pairs : ndarray of shape (n_group_pairs, 2), default=None
        For the group kinds: pairs of positions in :func:`residue_groups` (e.g.
        after :func:`prefilter_group_pairs`); None uses every pair of residues.
    coordination_r0 : float, default=COORDINATION_R0_NM
        Switching distance of the coordination numbers, nm.

    Returns
    -------
    Pool

    Examples
    --------
    >>> import mdtraj as md
    >>> top = md.Topology(); ch = top.add_chain(); r = top.add_residue("X", ch, 1)
    >>> a = [top.add_atom(f"C{i}", md.element.carbon, r) for i in range(5)]
    >>> for i in range(4):
    ...     top.add_bond(a[i], a[i + 1])
    >>> pool = candidate_pool(top, range(5))
    >>> [d.id for d in pool.descriptors if d.kind != "distance"]
    ['angle:0-1-2', 'angle:1-2-3', 'angle:2-3-4', 'dihedral:0-1-2-3', 'dihedral:1-2-3-4']
    >>> [d.id for d in pool.descriptors if d.kind == "distance"]
    ['distance:0-3', 'distance:0-4', 'distance:1-4']
    >>> pool.descriptors[-1].label
    'dihedral X1:C1-C2-C3-C4'
    """
    kinds = check_kinds(kinds)
    atoms = np.unique(np.asarray(atoms, dtype=np.intp))
    graph = _bond_graph(topology, atoms)
    every = atom_labels(topology)
    labels = {int(a): every[int(a)] for a in atoms}
    notes = []
    out = []
    if "distance" in kinds:
        if pairs is None:
            pairs, note = candidate_pairs(topology, atoms)
            if note:
                notes.append(note)
        out.extend(_make("distance", p, topology, labels) for p in np.asarray(pairs))
    if ("angle" in kinds or "dihedral" in kinds) and graph.number_of_edges() == 0:
        if topology.n_bonds == 0:
            notes.append(
                "angles and dihedrals: the topology has no bonds, so none were enumerated "
                "(give a topology with bonds: PDB with CONECT records, PSF, PRMTOP or HDF5)")
        else:
            notes.append(
                f"angles and dihedrals: none of the topology's {topology.n_bonds} bonds joins "
                "two selected atoms (e.g. 'name CA'), so none were enumerated; select bonded "
                "atoms (e.g. 'backbone' or 'not element H') for them")
    if "angle" in kinds:
        for b in sorted(graph.nodes):
            nbrs = sorted(graph.neighbors(b))
            for i, a in enumerate(nbrs):
                for c in nbrs[i + 1:]:
                    out.append(_make("angle", (a, b, c), topology, labels))
    if "dihedral" in kinds and graph.number_of_edges():
        for b, c in sorted(tuple(sorted(e)) for e in graph.edges):
            nb = [x for x in graph.neighbors(b) if x != c]
            nc = [x for x in graph.neighbors(c) if x != b]
            if not nb or not nc or _in_small_ring(graph, b, c):
                continue
            a = _outer_atom(graph, b, nb)
            d = _outer_atom(graph, c, nc)
            out.append(_make("dihedral", (a, b, c, d), topology, labels))
    if any(k in kinds for k in GROUP_KINDS):
        groups = residue_groups(topology, atoms)
        if len(groups) < 2:
            notes.append("center distances and coordination numbers: the selection has "
                         "atoms of fewer than two residues, so there are no residue pairs")
        else:
            if group_pairs is None:
                check_pair_count(len(groups), "residues")
                group_pairs = np.stack(np.triu_indices(len(groups), k=1), axis=1)
            names = _residue_labels(topology, [r for r, _ in groups])
            # two one-atom groups: the center distance is the atom distance (skipped when
            # that is in the pool; a coordination number is another quantity, kept)
            atom_pairs = set()
            if "distance" in kinds and "center_distance" in kinds:
                atom_pairs = {(int(a), int(b)) for a, b in np.asarray(pairs).reshape(-1, 2)}
            same = 0
            for i, j in np.asarray(group_pairs, dtype=np.intp).reshape(-1, 2):
                pair = (groups[i][1], groups[j][1])
                what = f"{names[i]}-{names[j]}"
                single = len(pair[0]) == 1 and len(pair[1]) == 1
                if single and tuple(sorted((pair[0][0], pair[1][0]))) in atom_pairs:
                    same += 1
                elif "center_distance" in kinds:
                    out.append(Descriptor("center_distance", (), f"{KINDS['center_distance'].label_prefix} {what}",
                                          groups=pair))
                if "coordination" in kinds:
                    out.append(Descriptor("coordination", (), f"{KINDS['coordination'].label_prefix} {what}", groups=pair,
                                          r0=float(coordination_r0)))
            if same:
                notes.append(f"center distances: {same} pairs of one-atom residues left out "
                             "(the same as the atom distances in the pool)")
    order = {k: i for i, k in enumerate(KINDS)}
    out.sort(key=lambda d: (order[d.kind], d.atoms))
    return Pool(out, topology, notes=notes)


def prefilter_pairs(pairs, source, *, cutoff, stride=10, max_numbers=5_000_000,
                    executor=None):
    """Keep a pair if its mean distance over some state is below `cutoff`, or if it
    separates the states better than every such pair (at most :data:`MAX_RESCUED_PAIRS`
    of those; see :func:`_separating_beyond_cutoff`). With a single state, a pair that
    comes below `cutoff` in at least :data:`MIN_FRACTION_BELOW` of the frames read
    (:func:`_within_cutoff`).

    The means are taken over every `stride`-th frame, which keeps this pass
    cheap; the stride counts each state's frames within each file.

    Parameters
    ----------
    pairs : ndarray of shape (n_pairs, 2), dtype int
    source : cvdesign.io.source.Source
    cutoff : float
        Distance cutoff, in nm. ``inf`` keeps every pair (and reads nothing).
    stride : int, default=10
        Use every `stride`-th frame of each state in each file (counted on
        that state's own frames, so frame ranges and labels are respected).
    max_numbers : int, default=5000000
        Distances (frames x pairs) evaluated at once, which bounds memory.
    executor : cvdesign.parallel.Executor, default=None
        Where the reads run, one task per segment (the means are the same
        bytes on every executor); None: in this process.

    Returns
    -------
    kept : ndarray of shape (n_kept, 2), dtype int
    note : str
        How many pairs were kept and dropped, and on how many frames.

    Raises
    ------
    InputError
        When a state has no frames.
    """
    cutoff = check_length(cutoff, "cutoff", allow_inf=True)
    pairs = np.asarray(pairs, dtype=np.intp).reshape(-1, 2)
    if pairs.shape[0] == 0 or not np.isfinite(cutoff):
        return pairs, f"distances: kept all {pairs.shape[0]} pairs (no cutoff)"
    atoms = np.unique(pairs)
    remap = np.full(int(atoms.max()) + 1, -1, dtype=np.intp)
    remap[atoms] = np.arange(atoms.size)
    local = remap[pairs]
    means, variances, below, n_frames = _strided_state_means(
        source, atoms, _PairDistances(local, max_numbers), len(local), stride,
        label="prefilter", executor=executor,
        cutoff=cutoff if source.n_states == 1 else None)  # (counted for one state only)
    keep = _within_cutoff(means, below, cutoff)
    n_below = int(keep.sum())
    rescued = _separating_beyond_cutoff(means, variances, keep)
    keep[rescued] = True
    rule = (f"with a mean below {cutoff:g} nm in at least one state" if means.shape[0] > 1
            else "that come " + _SINGLE_STATE_RULE.format(cutoff=cutoff,
                                                          fraction=MIN_FRACTION_BELOW))
    note = (
        f"distances: kept {n_below} of {pairs.shape[0]} pairs {rule}, dropped "
        f"{int((~keep).sum())} ({'means ' if means.shape[0] > 1 else ''}over every "
        f"{_ordinal(stride)} frame of each state in each file, {n_frames} frames)"
    ) + _rescue_note(rescued, means, variances, cutoff, source.states,
                     lambda k: "atoms {} and {} ({}, {})".format(
                         *pairs[k], *(source.topology.atom(int(a)) for a in pairs[k])))
    return pairs[keep], note


#: Most pairs kept beyond the cutoff because they separate the states better than every pair
#: below it (:func:`_separating_beyond_cutoff`): enough for the best separators, bounded
#: for a pool whose every pair is far apart (our choice).
MAX_RESCUED_PAIRS = 100


#: With a single state, the prefilter keeps a pair below the cutoff in at least this fraction
#: of the frames read (our choice: a contact of a state that holds a fiftieth of the frames
#: or more; one frame alone would make the pool depend on the stride and the runs' length).
MIN_FRACTION_BELOW = 0.02


def _within_cutoff(means, below, cutoff):
    """Which pairs the prefilter keeps for being near `cutoff` (nm).

    With labelled states: a mean below `cutoff` in at least one state. With a single state
    (runs whose states are not known yet, :func:`~cvdesign.pipeline.explore.propose_states`)
    a mean over it would mix the states the runs visit, and a contact formed in one of
    them only (a fifth of the frames at 0.4 nm, the rest at 2 nm: a mean of 1.7 nm) would be
    dropped with the slow process it marks: a pair is kept when it is below `cutoff` in at
    least :data:`MIN_FRACTION_BELOW` of the frames read (`below`: that fraction, per state;
    of frames, not weights: a contact sampled in biased runs is kept whatever its weight).

    Examples
    --------
    >>> means, below = np.array([[1.7, 0.5, 1.8]]), np.array([[0.2, 0.9, 0.01]])
    >>> _within_cutoff(means, below, 1.0)
    array([ True,  True, False])
    >>> _within_cutoff(np.vstack([means, means]), np.vstack([below, below]), 1.0)
    array([False,  True, False])
    """
    if means.shape[0] == 1:
        return below[0] >= MIN_FRACTION_BELOW
    return (means < cutoff).any(axis=0)


#: How the prefilter notes say the rule of a single state (:func:`_within_cutoff`).
_SINGLE_STATE_RULE = ("below {cutoff:g} nm in at least {fraction:.0%} of the frames (a single "
                      "state: a mean over it would mix the states the runs visit)")


def _separating_beyond_cutoff(means, variances, keep):
    """Pairs not in `keep` (mean at or above the cutoff in every state) whose Fisher ratio
    over the prefilter's frames (states weighted equally) is above that of every kept pair,
    the best first, at most :data:`MAX_RESCUED_PAIRS`: a distance that separates the states
    must not be dropped for being long (a ligand 1.3 nm from its pocket in one state and
    2.4 nm in the other). None with a single state (nothing to separate)."""
    if means.shape[0] < 2:
        return np.zeros(0, dtype=np.intp)
    f = fisher_ratio(means, variances)
    f = np.where(np.isfinite(f), f, 0.0)
    best_kept = float(f[keep].max()) if keep.any() else 0.0
    cand = np.flatnonzero(~keep & (f > best_kept))
    order = cand[np.lexsort((cand, -f[cand]))]  # best first, ties by index
    return np.sort(order[:MAX_RESCUED_PAIRS])


def _rescue_note(rescued, means, variances, cutoff, states, name):
    """The prefilter note's addition for pairs kept beyond the cutoff ('' for none)."""
    if rescued.size == 0:
        return ""
    f = fisher_ratio(means[:, rescued], variances[:, rescued])
    k = int(rescued[int(np.argmax(np.where(np.isfinite(f), f, 0.0)))])
    where = ", ".join(f"{means[s, k]:.3g} nm in {st!r}" for s, st in enumerate(states))
    return (f"; kept besides {rescued.size} pair(s) with a mean at or above {cutoff:g} nm in "
            f"every state that separate the states better than any pair below it (Fisher "
            f"ratio over the same frames; at most {MAX_RESCUED_PAIRS}), e.g. {name(k)}: "
            f"{where}")


def _ordinal(n):
    """``'1st'``, ``'2nd'``, ``'3rd'``, ``'10th'``, ``'22nd'``, ...

    Examples
    --------
    >>> [_ordinal(n) for n in (1, 2, 3, 4, 11, 12, 13, 21, 102)]
    ['1st', '2nd', '3rd', '4th', '11th', '12th', '13th', '21st', '102nd']
    """
    n = int(n)
    suffix = "th" if 10 <= n % 100 <= 20 else {1: "st", 2: "nd", 3: "rd"}.get(n % 10, "th")
    return f"{n}{suffix}"


#: Frames per state that the default prefilter stride aims at: means of distances over a few
#: thousand frames spread over the runs decide a cutoff as well as more would (common
#: practice); a run of 10^6 frames per state need not compute every pair on 10^5 of them.
PREFILTER_FRAMES = 2000
#: The default prefilter stride is never below this (every 10th frame).
MIN_PREFILTER_STRIDE = 10


def state_frames(source):
    """Frames of each state of a source (in the order of ``source.states``), counted in the
    files' headers (every frame with that state, within the segments' frame ranges).

    Examples
    --------
    >>> from cvdesign.io.demo import demo_inputs
    >>> from cvdesign.io.source import Source
    >>> top, files = demo_inputs()
    >>> state_frames(Source.from_states(top, files))
    [6000, 6000]
    """
    counts = dict.fromkeys(source.states, 0)
    for seg, n, frames in source.segment_frames():
        if seg.labels is not None:
            for x in seg.labels[:n]:
                if x is not None:
                    counts[x] += 1
        else:
            counts[seg.state] += len(frames)
    return [counts[s] for s in source.states]


def check_prefilter_stride(stride, name="prefilter_stride"):
    """`stride` as an int of at least 1, or None (the source's default); else an
    :class:`~cvdesign.errors.InputError` naming the argument.

    Examples
    --------
    >>> check_prefilter_stride(None), check_prefilter_stride(np.int64(3))
    (None, 3)
    >>> check_prefilter_stride(2.5)
    Traceback (most recent call last):
    ...
    cvdesign.errors.InputError: prefilter_stride=2.5 must be a whole number of frames of at least 1 (or None: every 10th frame, sparser for long runs)
    """
    if stride is None:
        return None
    if isinstance(stride, bool) or not isinstance(stride, (int, np.integer)) or stride < 1:
        raise InputError(f"{name}={stride!r} must be a whole number of frames of at least 1 "
                         "(or None: every 10th frame, sparser for long runs)")
    return int(stride)


def needs_prefilter(kinds):
    """Whether a pool of these kinds has a prefilter pass (distances, residue-group kinds).

    Examples
    --------
    >>> needs_prefilter(("angle", "dihedral")), needs_prefilter(("distance",))
    (False, True)
    """
    return any(k == "distance" or k in GROUP_KINDS for k in kinds)


def prefilter_stride_for(source):
    """The default prefilter stride of a source: every :data:`MIN_PREFILTER_STRIDE`-th frame,
    or sparser, so that the state with the fewest frames still gives about
    :data:`PREFILTER_FRAMES` of them (sparser than every 10th frame once the smallest
    state has 22,000 frames or more).

    Examples
    --------
    >>> from cvdesign.io.demo import demo_inputs
    >>> from cvdesign.io.source import Source
    >>> top, files = demo_inputs()
    >>> prefilter_stride_for(Source.from_states(top, files))  # 6000 frames per state
    10
    """
    counts = state_frames(source)
    return max(MIN_PREFILTER_STRIDE, (min(counts) if counts else 0) // PREFILTER_FRAMES)


def _accumulate(blocks, weights, sums, squares, below, cutoff):
    """Add the column sums and sums of squares (weighted by `weights`, one per frame, when
    given) of ``(first column, values)`` blocks into `sums` and `squares` (float64), and
    add to `below` the frames whose value is below `cutoff` (None: not counted), block by
    block: memory of one block,
    not of every value at once."""
    for lo, vals in blocks:
        v = vals.astype(np.float64)
        hi = lo + v.shape[1]
        if cutoff is not None:
            below[lo:hi] += np.count_nonzero(v < cutoff, axis=0)
        if weights is None:
            sums[lo:hi] += v.sum(axis=0)
            squares[lo:hi] += np.einsum("ij,ij->j", v, v)
        else:
            sums[lo:hi] += weights @ v
            squares[lo:hi] += weights @ (v * v)


class _PairDistances:
    """``blocks(sub, periodic)``: distances of atom pairs (local indices), in blocks of
    pairs within `max_numbers` numbers. Module level, so that worker processes load it."""

    def __init__(self, local, max_numbers):
        self.local, self.max_numbers = local, max_numbers

    def blocks(self, sub, periodic):
        block_pairs = max(1000, self.max_numbers // max(1, sub.n_frames))
        for lo in range(0, len(self.local), block_pairs):
            yield lo, md.compute_distances(sub, self.local[lo:lo + block_pairs],
                                           periodic=periodic)


class _CenterDistances:
    """``blocks(sub, periodic)``: distances of the centers of pairs of atom groups."""

    def __init__(self, local, pairs, masses, max_numbers):
        self.local, self.pairs, self.masses = local, pairs, masses
        self.max_numbers = max_numbers

    def blocks(self, sub, periodic):
        pairs = self.pairs
        box = sub.unitcell_vectors.astype(np.float64) if periodic else None
        centers = group_centers(sub.xyz.astype(np.float64), self.local, box, masses=self.masses)
        block = max(1000, self.max_numbers // max(1, sub.n_frames))
        for lo in range(0, len(pairs), block):
            a, b = pairs[lo:lo + block, 0], pairs[lo:lo + block, 1]
            delta = minimum_image(centers[:, b, :] - centers[:, a, :], box)
            yield lo, np.sqrt(np.einsum("fpk,fpk->fp", delta, delta))


class _MeansContext:
    """What every task of the prefilter shares (sent to each worker once)."""

    def __init__(self, source, atoms, values, n_values, stride, strided, weights, cutoff=None):
        self.source, self.atoms, self.values = source, atoms, values
        self.n_values, self.stride, self.strided = n_values, stride, strided
        self.weights, self.cutoff = weights, cutoff


class _SegmentTask:
    """One segment of the prefilter, as a worker gets it."""

    def __init__(self, number, segment, path):
        self.number, self.segment, self.path = number, segment, path

    def describe(self):
        return f"task {self.number + 1}: the prefilter's read of {self.path!r}"


def _segment_sums(ctx, task, tick=None):
    """Per-state sums of ``values`` (and of weights or frames, and frames used) over the
    strided frames of one segment: what :func:`_strided_state_means` merges, in segment
    order. The arithmetic is that of one segment alone, whichever process runs it."""
    source = copy.copy(ctx.source)
    source.segments = [ctx.source.segments[task.segment]]
    n_states = len(source.states)
    sums = np.zeros((n_states, ctx.n_values))
    squares = np.zeros((n_states, ctx.n_values))
    below = np.zeros((n_states, ctx.n_values), dtype=np.int64)
    counts = np.zeros(n_states)
    used = np.zeros(n_states, dtype=np.int64)
    weights = ctx.weights.get(task.segment)

    def add(traj, frames, rows, s):
        sub = md.Trajectory(traj.xyz[rows], None)  # coordinates only: no topology copy
        periodic = traj.unitcell_vectors is not None
        if periodic:  # lengths and angles, as traj[rows] keeps them
            sub.unitcell_lengths = traj.unitcell_lengths[rows]
            sub.unitcell_angles = traj.unitcell_angles[rows]
        used[s] += sub.n_frames
        w = None if weights is None else weights[frames[rows]]
        counts[s] += sub.n_frames if w is None else w.sum()
        _accumulate(ctx.values.blocks(sub, periodic), w, sums[s], squares[s], below[s],
                    ctx.cutoff)

    read = 0
    if ctx.strided:
        # every state's own frames are every stride-th frame of its files: read only
        # those, summed in the groups of a full read (file frames [k c, (k + 1) c), c the
        # chunk size), so the means are the same bytes as below
        for chunk in source.iter_chunks(atom_indices=ctx.atoms, stride=ctx.stride):
            group = chunk.frames // source.chunk_size
            for g in np.unique(group):
                add(chunk.trajectory, chunk.frames, np.flatnonzero(group == g),
                    int(chunk.states[0]))
            read += chunk.frames.size
            if tick is not None:
                tick(chunk.frames.size)
    else:
        seen = {}
        for chunk in source.iter_chunks(atom_indices=ctx.atoms):
            for s in np.unique(chunk.states):
                rows = np.flatnonzero(chunk.states == s)
                rank = seen.get(int(s), 0) + np.arange(rows.size)
                seen[int(s)] = seen.get(int(s), 0) + rows.size
                rows = rows[rank % ctx.stride == 0]
                if rows.size:
                    add(chunk.trajectory, chunk.frames, rows, int(s))
            read += chunk.frames.size
            if tick is not None:
                tick(chunk.frames.size)
    return sums, squares, below, counts, used, read


def _strided_state_means(source, atoms, values, n_values, stride, label="prefilter",
                         executor=None, cutoff=None):
    """Per-state means and variances of ``values.blocks(sub_trajectory, periodic)`` (blocks
    ``(first column, (n_frames, n_columns) values)`` of `n_values` columns) over
    every `stride`-th frame of each state in each file, reading only `atoms`.

    The stride counts each state's own frames within each file, so frame ranges
    and label arrays are subsampled on their own frames, not on the file's grid.
    Frames of biased runs are weighted (:meth:`cvdesign.io.source.Source.reweighting`).
    One task per segment (on `executor`, an object with ``run(fn, context, items)``
    as in :mod:`cvdesign.parallel`; None: in this process); the segments' sums are
    added in segment order, so the means are the same bytes on every executor.
    Returns (means, variances and the fraction of the frames used whose value is below
    `cutoff` (zeros without one), each of shape (n_states, n_values), and the number of
    frames used). The frames read advance a progress bar labelled `label`
    (:mod:`cvdesign.progress`).
    """
    reweighting = source.reweighting()
    strided = stride > 1 and all(seg.labels is None and (seg.start or 0) % stride == 0
                                 for seg in source.segments)
    ctx = _MeansContext(source, atoms, values, n_values, stride, strided,
                        {} if reweighting is None else dict(reweighting.weights), cutoff)
    tasks = [_SegmentTask(i, i, str(seg.path)) for i, seg in enumerate(source.segments)]
    sums = np.zeros((source.n_states, n_values))
    squares = np.zeros((source.n_states, n_values))
    below = np.zeros((source.n_states, n_values), dtype=np.int64)
    counts = np.zeros(source.n_states)
    frames_used = np.zeros(source.n_states, dtype=np.int64)
    with progress.bar(label, lambda: source.frames_to_read(stride if strided else 1)) as shown:
        if executor is None or getattr(executor, "in_process", False):
            def results():
                for task in tasks:
                    yield task.number, _segment_sums(ctx, task, tick=shown.update)
            ticked = True
        else:
            def results():
                return executor.run(_segment_sums, ctx, tasks)
            ticked = False
        pending, nxt = {}, 0
        for number, result in results():
            if not ticked:
                shown.update(result[-1])
            pending[number] = result
            while nxt in pending:  # added in segment order, whatever order they arrive in
                seg_sums, seg_squares, seg_below, seg_counts, seg_used, _ = pending.pop(nxt)
                sums += seg_sums
                squares += seg_squares
                below += seg_below
                counts += seg_counts
                frames_used += seg_used
                nxt += 1
    empty = [source.states[s] for s in range(source.n_states) if frames_used[s] == 0]
    if empty:
        raise InputError(
            f"state(s) {', '.join(map(repr, empty))} have no frames; "
            "check the files and frame ranges given for them"
        )
    means = sums / counts[:, None]
    variances = np.maximum(squares / counts[:, None] - means * means, 0.0)
    fraction = below / np.maximum(frames_used, 1)[:, None]
    return means, variances, fraction, int(frames_used.sum())


def residue_groups(topology, atoms):
    """The selected atoms of each residue, as groups for the group kinds.

    Parameters
    ----------
    topology : mdtraj.Topology
    atoms : array-like of int
        Selected atom indices.

    Returns
    -------
    list of (mdtraj.Residue, tuple of int)
        Residues with at least one selected atom, in topology order, with their
        selected atoms (sorted).

    Examples
    --------
    >>> import mdtraj as md
    >>> top = md.Topology(); ch = top.add_chain()
    >>> for name in ("ALA", "GLY"):
    ...     r = top.add_residue(name, ch)
    ...     _ = [top.add_atom(a, md.element.carbon, r) for a in ("CA", "C")]
    >>> [(str(r), g) for r, g in residue_groups(top, [0, 1, 3])]
    [('ALA0', (0, 1)), ('GLY1', (3,))]
    """
    chosen = np.zeros(topology.n_atoms, dtype=bool)
    chosen[np.asarray(atoms, dtype=np.intp)] = True
    out = []
    for residue in topology.residues:
        group = tuple(a.index for a in residue.atoms if chosen[a.index])
        if group:
            out.append((residue, group))
    return out


def prefilter_group_pairs(groups, source, *, cutoff, stride=10, masses=None,
                          max_numbers=5_000_000, executor=None):
    """Pairs of groups whose mean center distance is below `cutoff` in some state, and those
    farther apart that separate the states better than every such pair (as in
    :func:`prefilter_pairs`).

    Parameters
    ----------
    groups : sequence of tuple of int
        Atom groups (e.g. from :func:`residue_groups`).
    source : cvdesign.io.source.Source
    cutoff : float
        nm; ``inf`` keeps every pair (and reads nothing).
    stride : int, default=10
        As in :func:`prefilter_pairs`.
    masses : sequence of (list of float or None), optional
        Per group, atom masses (dalton) for mass centers; None: geometric.
    max_numbers : int, default=5000000
        Center distances (frames x pairs) formed at once, which bounds memory.
    executor : cvdesign.parallel.Executor, default=None
        As in :func:`prefilter_pairs`.

    Returns
    -------
    kept : ndarray of shape (n_kept, 2), dtype int
        Pairs ``(i, j)``, ``i < j``, of positions in `groups`.
    note : str
    """
    cutoff = check_length(cutoff, "cutoff", allow_inf=True)
    n = len(groups)
    ii, jj = np.triu_indices(n, k=1)
    pairs = np.stack([ii, jj], axis=1).astype(np.intp)
    if pairs.shape[0] == 0 or not np.isfinite(cutoff):
        return pairs, f"group pairs: kept all {pairs.shape[0]} (no cutoff)"
    atoms = np.unique(np.concatenate([np.asarray(g, dtype=np.intp) for g in groups]))
    remap = np.full(int(atoms.max()) + 1, -1, dtype=np.intp)
    remap[atoms] = np.arange(atoms.size)
    local = [remap[np.asarray(g, dtype=np.intp)] for g in groups]
    means, variances, below, n_frames = _strided_state_means(
        source, atoms, _CenterDistances(local, pairs, masses, max_numbers), len(pairs), stride,
        label="prefilter (residues)", executor=executor,
        cutoff=cutoff if source.n_states == 1 else None)
    keep = _within_cutoff(means, below, cutoff)
    n_below = int(keep.sum())
    rescued = _separating_beyond_cutoff(means, variances, keep)
    keep[rescued] = True
    rule = (f"with a mean center distance below {cutoff:g} nm in at least one state"
            if means.shape[0] > 1 else "whose centers come " +
            _SINGLE_STATE_RULE.format(cutoff=cutoff, fraction=MIN_FRACTION_BELOW))
    note = (f"group pairs: kept {n_below} of {len(pairs)} {rule} (every {_ordinal(stride)} "
            f"frame, {n_frames} frames)") + _rescue_note(
                rescued, means, variances, cutoff, source.states,
                lambda k: "the groups of {} and {}".format(
                    *(source.topology.atom(int(groups[g][0])).residue for g in pairs[k])))
    return pairs[keep], note


def build_pool(source, *, selection=None, kinds=DEFAULT_KINDS, cutoff=1.0, stride=None,
               coordination_r0=COORDINATION_R0_NM, executor=None):
    """Candidate pool for a source: select atoms, enumerate, prefilter distances.

    Distances are kept when their mean over some state is below `cutoff` (with
    a single state, runs whose states are not known yet: when they come below
    it in at least 2 % of the frames read), and beyond it up to :data:`MAX_RESCUED_PAIRS` (100)
    far pairs that separate the states better than every pair below it; the
    group kinds by the same rule on the residues' mass centers. A selection
    whose atom pairs (or, for the group kinds, residue pairs) exceed
    :data:`MAX_PAIRS` (2,000,000) is refused before anything is read.

    Parameters
    ----------
    source : cvdesign.io.source.Source
    selection : str, default=None
        mdtraj selection; None selects the solute's heavy atoms.
    kinds : sequence of str, default=('distance', 'angle', 'dihedral')
        Any of :data:`cvdesign.kinds.KINDS`; the group kinds ``center_distance`` and
        ``coordination`` pair the residues of the selection.
    cutoff : float, default=1.0
        Prefilter cutoff, in nm (``inf``: keep every pair): on the mean atom
        distance for distances, on the mean distance of the residues' mass
        centers for the group kinds.
    stride : int, default=None
        Frame stride of the prefilter pass; None: :func:`prefilter_stride_for` the
        source (every 10th frame, sparser once every state has 22,000 or more).
    coordination_r0 : float, default=COORDINATION_R0_NM
        Switching distance of the coordination numbers, nm.
    executor : cvdesign.parallel.Executor, default=None
        Where the prefilter's reads run (one task per segment; see
        :func:`cvdesign.parallel.as_executor` to make one from a number of
        processes or a Dask client); None: in this process. The pool is the
        same on every executor.

    Returns
    -------
    Pool
        With ``notes`` describing what was kept and dropped.

    Raises
    ------
    InputError
        When the selection makes more than :data:`MAX_PAIRS` pairs (the
        message says how to narrow it), for bad arguments, or when no
        descriptor of the requested kinds can be built.

    Examples
    --------
    The bundled demo (12 united atoms, two states), distances kept below 0.5 nm:

    >>> from cvdesign.io.demo import demo_inputs
    >>> from cvdesign.io.source import Source
    >>> top, files = demo_inputs()
    >>> pool = build_pool(Source.from_states(top, files), cutoff=0.5)
    >>> pool.notes[-1]
    'pool: 19 distances, 13 angles, 7 dihedrals'
    >>> pool.descriptors[0].id, pool.descriptors[0].label
    ('distance:0-3', 'dist LCH1:C1-C4')
    """
    from ..io.source import default_selection_warnings, select_atoms

    kinds = check_kinds(kinds)
    cutoff = check_length(cutoff, "cutoff", allow_inf=True)
    coordination_r0 = check_length(coordination_r0, "coordination_r0")
    atoms = select_atoms(source.topology, selection)
    # solvent or lipids the default keeps, named (in the notes, and in a refusal below)
    crowded = default_selection_warnings(source.topology) if selection is None else []
    try:  # refused before anything is enumerated or read
        if "distance" in kinds:
            check_pair_count(atoms.size)
        if any(k in kinds for k in GROUP_KINDS):
            check_pair_count(len(residue_groups(source.topology, atoms)), "residues")
    except InputError as exc:
        if not crowded:
            raise
        raise InputError(f"{exc}. Note: " + "; ".join(
            w[len("warning: "):] for w in crowded)) from None
    notes = [f"selection: {atoms.size} atoms"] + crowded
    stride = check_prefilter_stride(stride, "stride")
    if stride is None and needs_prefilter(kinds):
        stride = prefilter_stride_for(source)
    pairs = None
    if "distance" in kinds:
        pairs, note = candidate_pairs(source.topology, atoms)
        if note:
            notes.append(note)
        pairs, note = prefilter_pairs(pairs, source, cutoff=cutoff, stride=stride,
                                      executor=executor)
        notes.append(note)
    group_pairs = None
    if any(k in kinds for k in GROUP_KINDS):
        groups = residue_groups(source.topology, atoms)
        if len(groups) >= 2:
            probe = Pool([], source.topology)
            group_pairs, note = prefilter_group_pairs(
                [g for _, g in groups], source, cutoff=cutoff, stride=stride,
                masses=[probe.group_masses(g) for _, g in groups], executor=executor)
            notes.append(note)
    pool = candidate_pool(source.topology, atoms, kinds, pairs=pairs, group_pairs=group_pairs,
                          coordination_r0=coordination_r0)
    counts = {k: sum(d.kind == k for d in pool.descriptors) for k in kinds}
    notes += pool.notes
    notes.append("pool: " + ", ".join(f"{n} {k.replace('_', ' ')}s" for k, n in counts.items()))
    if not pool.descriptors:
        raise InputError(
            "the pool is empty: no descriptor of the requested kinds "
            f"({', '.join(kinds)}) could be built from the selection; widen --select, "
            "raise --cutoff or add kinds"
        )
    return Pool(pool.descriptors, pool.topology, notes=notes)
