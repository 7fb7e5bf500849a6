"""Candidate descriptors: definitions, enumeration from a topology, features.

A :class:`Descriptor` is data: a kind, 0-based atom indices, a stable id and a
readable label. A :class:`Pool` is an ordered set of descriptors with the
*features* they contribute to linear combinations: a distance or a bond angle
contributes its value (nm, rad); a dihedral contributes the pair
``(cos phi, sin phi)``, never the cut angle, so that a linear combination stays
smooth across the +-pi boundary.

Candidates come from an atom selection:

* distances between every pair of selected atoms that are more than two bonds
  apart (1-2 and 1-3 pairs are nearly rigid, or an angle in disguise), kept
  when the pair's mean distance is below a cutoff in at least one state
  (:func:`prefilter_distances`);
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

Every value is computed by the same code as the spec evaluator
(:mod:`cvdesign.geometry`) for the group kinds, and by mdtraj's geometry for
the others (the tests check that the two agree).
"""

from collections import Counter
from dataclasses import dataclass
from functools import cached_property

import mdtraj as md
import networkx as nx
import numpy as np

from ..constants import COORDINATION_EXPONENTS, COORDINATION_R0_NM
from ..errors import InputError
from ..geometry import coordination_pairs, distances as _pair_distances, group_centers
from ..geometry import minimum_image, switching_function
from ..kinds import DEFAULT_KINDS, GROUP_KINDS, KINDS

__all__ = [
    "Descriptor",
    "Pool",
    "atom_label",
    "atom_labels",
    "candidate_pool",
    "candidate_pairs",
    "prefilter_pairs",
    "prefilter_group_pairs",
    "residue_groups",
    "build_pool",
]

# Numbers (frames x atom pairs) formed at once for coordination numbers (bounds memory).
_NUMBERS_PER_BLOCK = 2_000_000


def _runs(group):
    """'3..6,9' for atoms 3, 4, 5, 6, 9: a compact, unambiguous id part."""
    g = np.asarray(group, dtype=np.int64)
    cuts = np.flatnonzero(np.diff(g) != 1) + 1
    parts = []
    for run in np.split(g, cuts):
        parts.append(str(run[0]) if run.size == 1 else f"{run[0]}..{run[-1]}")
    return ",".join(parts)


def _plain_atom_label(topology, atom):
    res = atom.residue
    return f"{_residue_prefix(topology, res)}{res.name}{res.resSeq}:{atom.name}"


def _residue_prefix(topology, residue):
    if topology.n_chains <= 1:
        return ""
    chain = residue.chain
    return f"{getattr(chain, 'chain_id', None) or chain.index}/"


def _unique(labels, indices):
    """`labels` with ``[index]`` appended to every label that occurs more than once."""
    counts = Counter(labels)
    return [lab if counts[lab] == 1 else f"{lab}[{i}]" for lab, i in zip(labels, indices)]


def atom_labels(topology):
    """Readable, unique labels of every atom: ``RESNAME<resSeq>:ATOMNAME``.

    The chain is prefixed (``A/``) when the topology has several. Where two
    atoms would get the same label (two atoms of a residue with one name, or
    two residues with the same name and number), each of them gets its
    0-based atom index in brackets, e.g. ``LIG1:C[12]``.

    Parameters
    ----------
    topology : mdtraj.Topology

    Returns
    -------
    list of str
        One label per atom, in atom order.

    Examples
    --------
    >>> import mdtraj as md
    >>> top = md.Topology(); r = top.add_residue("LIG", top.add_chain(), 1)
    >>> for name in ["C", "O", "C"]:
    ...     _ = top.add_atom(name, md.element.get_by_symbol(name), r)
    >>> atom_labels(top)
    ['LIG1:C[0]', 'LIG1:O', 'LIG1:C[2]']
    """
    return _unique([_plain_atom_label(topology, a) for a in topology.atoms],
                   range(topology.n_atoms))


def atom_label(topology, index, *, with_residue=True):
    """Readable atom label ``RESNAME<resSeq>:ATOMNAME`` (chain prefixed when several).

    The label is unique in the topology: see :func:`atom_labels` (which is
    faster for many atoms).

    Examples
    --------
    >>> import mdtraj as md
    >>> top = md.Topology(); ch = top.add_chain(); r = top.add_residue("LYS", ch, 12)
    >>> _ = top.add_atom("CA", md.element.carbon, r)
    >>> atom_label(top, 0)
    'LYS12:CA'
    """
    atom = topology.atom(int(index))
    if not with_residue:
        return atom.name
    return atom_labels(topology)[int(index)]


@dataclass(frozen=True)
class Descriptor:
    """One candidate descriptor.

    Attributes
    ----------
    kind : {'distance', 'angle', 'dihedral', 'center_distance', 'coordination'}
    atoms : tuple of int
        0-based atom indices: 2, 3 or 4 of them; for the group kinds, every
        atom of both groups, sorted (computed from `groups` when given as
        ``()``).
    label : str
        Readable label, e.g. ``'dist LYS12:CA-GLU150:CD'``.
    groups : tuple of two tuples of int, optional
        For the group kinds: the two atom groups (sorted, non-empty).
    r0 : float, optional
        For ``coordination``: the switching distance, nm (n = 6, m = 12).

    Examples
    --------
    >>> d = Descriptor("distance", (3, 10), "dist X1:A-X1:B")
    >>> d.id, d.periodic, d.transforms
    ('distance:3-10', False, ('identity',))
    >>> c = Descriptor("coordination", (), "coord X1-X2", groups=((0, 1, 2), (7, 9)), r0=0.45)
    >>> c.id, c.atoms, c.unit
    ('coordination:0..2/7,9@0.45', (0, 1, 2, 7, 9), '1')
    """

    kind: str
    atoms: tuple
    label: str
    groups: tuple = None
    r0: float = None

    def __post_init__(self):
        if self.kind not in KINDS:
            raise InputError(f"unknown descriptor kind {self.kind!r}; use one of {sorted(KINDS)}")
        if self.kind in GROUP_KINDS:
            groups = self.groups
            if (groups is None or len(groups) != 2 or not all(len(g) for g in groups)):
                raise InputError(f"a {self.kind} takes two non-empty atom groups; got {groups!r}")
            groups = tuple(tuple(sorted(int(a) for a in g)) for g in groups)
            object.__setattr__(self, "groups", groups)
            object.__setattr__(self, "atoms", tuple(sorted(set(groups[0]) | set(groups[1]))))
            if self.kind == "coordination" and not (self.r0 is not None and self.r0 > 0):
                raise InputError(f"a coordination needs a switching distance r0 > 0 nm; "
                                 f"got {self.r0!r}")
            return
        if len(self.atoms) != KINDS[self.kind].n_atoms:
            raise InputError(
                f"a {self.kind} takes {KINDS[self.kind].n_atoms} atoms; got {len(self.atoms)}"
            )

    @cached_property
    def id(self):
        """str : stable id: ``kind:i-j[-k[-l]]`` with 0-based atom indices; for the group
        kinds ``kind:A/B`` with each group as runs ``3..6,9``, and ``@r0`` (nm) for a
        coordination."""
        if self.kind in GROUP_KINDS:
            out = f"{self.kind}:{_runs(self.groups[0])}/{_runs(self.groups[1])}"
            return out + (f"@{self.r0:g}" if self.kind == "coordination" else "")
        return f"{self.kind}:" + "-".join(str(int(a)) for a in self.atoms)

    @property
    def periodic(self):
        """bool : True for dihedrals (period 2 pi rad)."""
        return KINDS[self.kind].periodic

    @property
    def transforms(self):
        """tuple of str : the features this descriptor contributes."""
        return KINDS[self.kind].features

    @property
    def unit(self):
        """str : unit of the descriptor's value (``'1'``: dimensionless)."""
        return KINDS[self.kind].unit


def _make(kind, atoms, topology, labels=None):
    if labels is None:
        names = [atom_label(topology, a) for a in atoms]
    else:
        names = [labels[int(a)] for a in atoms]
    # Shorten repeated residue prefixes: 'LCH1:C2-LCH1:C3' -> 'LCH1:C2-C3'.
    parts = [names[0]]
    for prev, cur in zip(names, names[1:]):
        rp, rc = prev.rsplit(":", 1)[0], cur.rsplit(":", 1)[0]
        parts.append(cur.rsplit(":", 1)[1] if rp == rc else cur)
    return Descriptor(kind, tuple(int(a) for a in atoms), f"{KINDS[kind].label_prefix} " + "-".join(parts))


class Pool:
    """An ordered set of descriptors and the features they contribute.

    Parameters
    ----------
    descriptors : sequence of Descriptor
    topology : mdtraj.Topology
        Topology the atom indices refer to.

    Attributes
    ----------
    descriptors : list of Descriptor
    feature_descriptor : ndarray of shape (n_features,), dtype int
        Index of the descriptor each feature comes from.
    feature_transform : list of str
        ``'identity'``, ``'cos'`` or ``'sin'`` for each feature.
    notes : list of str
        What was done while building the pool (counts kept and dropped).

    Examples
    --------
    >>> import mdtraj as md, numpy as np
    >>> top = md.Topology(); ch = top.add_chain(); r = top.add_residue("X", ch, 1)
    >>> for i in range(4):
    ...     _ = top.add_atom(f"C{i}", md.element.carbon, r)
    >>> pool = Pool([Descriptor("distance", (0, 3), "d"),
    ...              Descriptor("dihedral", (0, 1, 2, 3), "t")], top)
    >>> pool.n_features, pool.feature_transform
    (3, ['identity', 'cos', 'sin'])
    >>> xyz = np.array([[[1, 0, 0], [0, 0, 0], [0, 1, 0], [1, 1, 0]]], float)
    >>> np.round(pool.features(md.Trajectory(xyz, top)), 6).tolist()
    [[1.0, 1.0, 0.0]]
    """

    def __init__(self, descriptors, topology, *, notes=None):
        self.descriptors = list(descriptors)
        self.topology = topology
        self.notes = list(notes or [])
        ids = [d.id for d in self.descriptors]
        if len(set(ids)) != len(ids):
            raise InputError("a pool must not hold the same descriptor twice")
        fd, ft = [], []
        for i, d in enumerate(self.descriptors):
            for t in d.transforms:
                fd.append(i)
                ft.append(t)
        self.feature_descriptor = np.array(fd, dtype=np.intp)
        self.feature_transform = ft
        self._first = np.searchsorted(self.feature_descriptor,
                                      np.arange(len(self.descriptors) + 1)).astype(np.intp)
        self._index = {kind: [i for i, d in enumerate(self.descriptors) if d.kind == kind]
                       for kind in KINDS}
        self._atoms = {kind: np.array([self.descriptors[i].atoms for i in idx], dtype=np.intp)
                       .reshape(-1, KINDS[kind].n_atoms) for kind, idx in self._index.items()
                       if kind not in GROUP_KINDS}
        self._masses = {}  # atom index -> dalton, for mass centers

    def __len__(self):
        return len(self.descriptors)

    @property
    def n_features(self):
        """int : number of features."""
        return int(self.feature_descriptor.shape[0])

    def feature_labels(self):
        """Readable feature labels, e.g. ``'cos(dihedral X1:A-B-C-D)'``."""
        out = []
        for i, t in zip(self.feature_descriptor, self.feature_transform):
            lab = self.descriptors[i].label
            out.append(lab if t == "identity" else f"{t}({lab})")
        return out

    def features_of(self, descriptor_indices):
        """Feature indices belonging to the given descriptors, in pool order."""
        idx = np.unique(np.asarray(descriptor_indices, dtype=np.intp).ravel())
        if idx.size and (idx[0] < -len(self.descriptors) or idx[-1] >= len(self.descriptors)):
            raise IndexError(f"descriptor index out of range 0..{len(self.descriptors) - 1}")
        idx = np.unique(idx % max(len(self.descriptors), 1))
        # a descriptor's features are contiguous: [first[i], first[i + 1])
        start, stop = self._first[idx], self._first[idx + 1]
        counts = stop - start
        offsets = np.repeat(start - np.cumsum(counts) + counts, counts)
        return offsets + np.arange(int(counts.sum()), dtype=np.intp)

    def subset(self, descriptor_indices):
        """A new pool with the given descriptors, in the given order."""
        return Pool([self.descriptors[int(i)] for i in descriptor_indices], self.topology,
                    notes=self.notes)

    def atom_indices(self):
        """Sorted indices of every atom any descriptor uses."""
        if not self.descriptors:
            return np.zeros(0, dtype=np.intp)
        return np.unique(np.concatenate([np.asarray(d.atoms) for d in self.descriptors]))

    def features(self, trajectory, *, atom_indices=None):
        """Feature values of every frame, through mdtraj's geometry.

        Distances use the minimum image when the trajectory has a unit cell.

        Parameters
        ----------
        trajectory : mdtraj.Trajectory
        atom_indices : array-like of int, default=None
            When the trajectory holds only a subset of the atoms (as loaded
            with ``Source.iter_chunks(atom_indices=...)``), the original
            indices of its atoms, in order.

        Returns
        -------
        ndarray of shape (n_frames, n_features), float64
            Distances in nm, angles in rad, cos and sin of dihedrals,
            distances between mass centers in nm, coordination numbers
            (dimensionless).
        """
        n = trajectory.n_frames
        out = np.empty((n, self.n_features), dtype=np.float64)
        if atom_indices is not None:
            remap = np.full(int(np.max(atom_indices)) + 1, -1, dtype=np.intp)
            remap[np.asarray(atom_indices, dtype=np.intp)] = np.arange(len(atom_indices))
        periodic = trajectory.unitcell_vectors is not None
        col = np.zeros(len(self.descriptors), dtype=np.intp)
        first_feature = np.searchsorted(self.feature_descriptor, np.arange(len(self.descriptors)))
        col[:] = first_feature
        for kind, idx in self._index.items():
            if not idx:
                continue
            if kind in GROUP_KINDS:
                local = (lambda a: a) if atom_indices is None else (lambda a: remap[a])
                out[:, col[idx]] = self._group_features(kind, idx, trajectory, local)
                continue
            atoms = self._atoms[kind]
            if atom_indices is not None:
                atoms = remap[atoms]
                if np.any(atoms < 0):
                    raise InputError("the trajectory chunk lacks atoms that the pool uses")
            if kind == "distance":
                vals = md.compute_distances(trajectory, atoms, periodic=periodic)
                out[:, col[idx]] = vals
            elif kind == "angle":
                vals = md.compute_angles(trajectory, atoms, periodic=periodic)
                out[:, col[idx]] = vals
            else:
                vals = md.compute_dihedrals(trajectory, atoms, periodic=periodic)
                vals = vals.astype(np.float64)
                out[:, col[idx]] = np.cos(vals)
                out[:, col[idx] + 1] = np.sin(vals)
        return out


    def group_masses(self, group):
        """Masses of a group's atoms, dalton (mdtraj's element table), or None when an atom
        has no element or no positive mass (a geometric center is used then)."""
        out = []
        for a in group:
            if a not in self._masses:
                element = self.topology.atom(int(a)).element
                mass = getattr(element, "mass", None)
                self._masses[a] = float(mass) if mass is not None and mass > 0 else None
            out.append(self._masses[a])
        return None if any(m is None for m in out) else out

    def weighting(self, descriptor):
        """``'mass'`` when both groups of a center distance have masses, else
        ``'geometric'`` (the spec's ``weighting``)."""
        return ("mass" if all(self.group_masses(g) is not None for g in descriptor.groups)
                else "geometric")

    def _group_features(self, kind, idx, trajectory, local):
        """Values of group descriptors `idx` (pool indices) on a trajectory chunk, through
        cvdesign.geometry (the spec evaluator's code)."""
        xyz = trajectory.xyz.astype(np.float64)
        box = None if trajectory.unitcell_vectors is None else \
            trajectory.unitcell_vectors.astype(np.float64)
        descs = [self.descriptors[i] for i in idx]
        for d in descs:
            if np.any(local(np.asarray(d.atoms)) < 0):
                raise InputError("the trajectory chunk lacks atoms that the pool uses")
        if kind == "center_distance":
            # (group, mass-weighted?) for each side; mass centers only when both groups
            # have masses, as the spec's one `weighting` per descriptor.
            keys = [tuple((g, self.weighting(d) == "mass") for g in d.groups) for d in descs]
            unique = sorted({k for pair in keys for k in pair})
            where = {k: i for i, k in enumerate(unique)}
            centers = group_centers(xyz, [local(np.asarray(g)) for g, _ in unique], box,
                                    masses=[self.group_masses(g) if w else None
                                            for g, w in unique])
            a = np.array([where[k[0]] for k in keys], dtype=np.intp)
            b = np.array([where[k[1]] for k in keys], dtype=np.intp)
            delta = minimum_image(centers[:, b, :] - centers[:, a, :], box)
            return np.sqrt(np.einsum("fpk,fpk->fp", delta, delta))
        pairs = [self._coordination_pairs(i) for i in idx]
        n_frames = xyz.shape[0]
        values = np.empty((n_frames, len(descs)))
        n, m = COORDINATION_EXPONENTS
        budget = max(1, _NUMBERS_PER_BLOCK // max(1, n_frames))  # atom pairs per block
        k = 0
        while k < len(descs):  # blocks of descriptors: memory bounded by the budget
            j, total = k + 1, len(pairs[k])
            while j < len(descs) and total + len(pairs[j]) <= budget:
                total += len(pairs[j])
                j += 1
            block = pairs[k:j]
            starts = np.cumsum([0] + [len(p) for p in block[:-1]])
            r = _pair_distances(xyz, local(np.concatenate(block)), box)
            for r0 in sorted({d.r0 for d in descs[k:j]}):
                cols = np.array([c for c in range(k, j) if descs[c].r0 == r0], dtype=np.intp)
                s = switching_function(r, r0, n, m)
                values[:, cols] = np.add.reduceat(s, starts, axis=1)[:, cols - k]
            k = j
        return values

    def _coordination_pairs(self, i):
        """Atom pairs of coordination descriptor `i` (cached)."""
        cache = self.__dict__.setdefault("_pair_cache", {})
        if i not in cache:
            d = self.descriptors[i]
            cache[i] = coordination_pairs(d.groups[0], d.groups[1]).astype(np.intp)
        return cache[i]


def _bond_graph(topology, atoms):
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


def _check_kinds(kinds):
    if isinstance(kinds, str):
        kinds = [k.strip() for k in kinds.split(",") if k.strip()]
    kinds = tuple(kinds)
    bad = [k for k in kinds if k not in KINDS]
    if bad or not kinds:
        raise InputError(
            f"unknown descriptor kinds {bad!r}; use a comma-separated subset of "
            f"{', '.join(KINDS)}"
        )
    return kinds


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
    ii, jj = np.triu_indices(n, k=1)
    pairs = np.stack([atoms[ii], atoms[jj]], axis=1)
    graph = _bond_graph(topology, atoms)
    if not graph.number_of_edges():
        return pairs, None
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


def _residue_labels(topology, residues):
    """Labels ``RESNAME<resSeq>`` of `residues`, unique in the topology (the residue's
    0-based index in brackets where a name and number repeat)."""
    every = _unique([f"{_residue_prefix(topology, r)}{r.name}{r.resSeq}"
                     for r in topology.residues], range(topology.n_residues))
    return [every[r.index] for r in residues]


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
    kinds = _check_kinds(kinds)
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
        notes.append(
            "angles and dihedrals: the topology has no bonds between the selected atoms, "
            "so none were enumerated (give a topology with bonds: PDB with CONECT records, "
            "PSF, PRMTOP or HDF5)"
        )
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
                group_pairs = np.stack(np.triu_indices(len(groups), k=1), axis=1)
            names = _residue_labels(topology, [r for r, _ in groups])
            for i, j in np.asarray(group_pairs, dtype=np.intp).reshape(-1, 2):
                pair = (groups[i][1], groups[j][1])
                what = f"{names[i]}-{names[j]}"
                if "center_distance" in kinds:
                    out.append(Descriptor("center_distance", (), f"{KINDS['center_distance'].label_prefix} {what}",
                                          groups=pair))
                if "coordination" in kinds:
                    out.append(Descriptor("coordination", (), f"{KINDS['coordination'].label_prefix} {what}", groups=pair,
                                          r0=float(coordination_r0)))
    order = {k: i for i, k in enumerate(KINDS)}
    out.sort(key=lambda d: (order[d.kind], d.atoms))
    return Pool(out, topology, notes=notes)


def prefilter_pairs(pairs, source, *, cutoff, stride=10, max_numbers=5_000_000):
    """Keep a pair if its mean distance over some state is below `cutoff`.

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
    if not cutoff > 0:
        raise InputError(f"cutoff={cutoff!r} nm must be positive")
    pairs = np.asarray(pairs, dtype=np.intp).reshape(-1, 2)
    if pairs.shape[0] == 0 or not np.isfinite(cutoff):
        return pairs, f"distances: kept all {pairs.shape[0]} pairs (no cutoff)"
    atoms = np.unique(pairs)
    remap = np.full(int(atoms.max()) + 1, -1, dtype=np.intp)
    remap[atoms] = np.arange(atoms.size)
    local = remap[pairs]

    def values(sub, periodic):
        block_pairs = max(1000, max_numbers // max(1, sub.n_frames))
        return np.concatenate([
            md.compute_distances(sub, local[lo:lo + block_pairs], periodic=periodic)
            for lo in range(0, len(local), block_pairs)], axis=1)

    means, n_frames = _strided_state_means(source, atoms, values, len(local), stride)
    keep = (means < cutoff).any(axis=0)
    note = (
        f"distances: kept {int(keep.sum())} of {pairs.shape[0]} pairs with a mean below "
        f"{cutoff:g} nm in at least one state, dropped {int((~keep).sum())} "
        f"(means over every {stride}th frame of each state in each file, "
        f"{n_frames} frames)"
    )
    return pairs[keep], note


def _strided_state_means(source, atoms, values, n_values, stride):
    """Per-state means of ``values(sub_trajectory, periodic) -> (n_frames, n_values)`` over
    every `stride`-th frame of each state in each file, reading only `atoms`.

    The stride counts each state's own frames within each file, so frame ranges
    and label arrays are subsampled on their own frames, not on the file's grid.
    Returns (means of shape (n_states, n_values), number of frames used).
    """
    sums = np.zeros((source.n_states, n_values))
    counts = np.zeros(source.n_states)
    seen = {}
    for chunk in source.iter_chunks(atom_indices=atoms):
        traj = chunk.trajectory
        periodic = traj.unitcell_vectors is not None
        for s in np.unique(chunk.states):
            rows = np.flatnonzero(chunk.states == s)
            key = (chunk.segment_index, int(s))
            rank = seen.get(key, 0) + np.arange(rows.size)
            seen[key] = seen.get(key, 0) + rows.size
            rows = rows[rank % stride == 0]
            if rows.size == 0:
                continue
            sub = traj[rows]
            counts[s] += sub.n_frames
            sums[s] += values(sub, periodic).sum(axis=0, dtype=np.float64)
    empty = [source.states[s] for s in range(source.n_states) if counts[s] == 0]
    if empty:
        raise InputError(
            f"state(s) {', '.join(map(repr, empty))} have no frames; "
            "check the files and frame ranges given for them"
        )
    return sums / counts[:, None], int(counts.sum())


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
                          max_numbers=5_000_000):
    """Pairs of groups whose mean center distance is below `cutoff` in some state.

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

    Returns
    -------
    kept : ndarray of shape (n_kept, 2), dtype int
        Pairs ``(i, j)``, ``i < j``, of positions in `groups`.
    note : str
    """
    if not cutoff > 0:
        raise InputError(f"cutoff={cutoff!r} nm must be positive")
    n = len(groups)
    ii, jj = np.triu_indices(n, k=1)
    pairs = np.stack([ii, jj], axis=1).astype(np.intp)
    if pairs.shape[0] == 0 or not np.isfinite(cutoff):
        return pairs, f"group pairs: kept all {pairs.shape[0]} (no cutoff)"
    atoms = np.unique(np.concatenate([np.asarray(g, dtype=np.intp) for g in groups]))
    remap = np.full(int(atoms.max()) + 1, -1, dtype=np.intp)
    remap[atoms] = np.arange(atoms.size)
    local = [remap[np.asarray(g, dtype=np.intp)] for g in groups]

    def values(sub, periodic):
        box = sub.unitcell_vectors.astype(np.float64) if periodic else None
        centers = group_centers(sub.xyz.astype(np.float64), local, box, masses=masses)
        block = max(1000, max_numbers // max(1, sub.n_frames))
        out = np.empty((sub.n_frames, len(pairs)))
        for lo in range(0, len(pairs), block):
            a, b = pairs[lo:lo + block, 0], pairs[lo:lo + block, 1]
            delta = minimum_image(centers[:, b, :] - centers[:, a, :], box)
            out[:, lo:lo + block] = np.sqrt(np.einsum("fpk,fpk->fp", delta, delta))
        return out

    means, n_frames = _strided_state_means(source, atoms, values, len(pairs), stride)
    keep = (means < cutoff).any(axis=0)
    note = (f"group pairs: kept {int(keep.sum())} of {len(pairs)} with a mean center "
            f"distance below {cutoff:g} nm in at least one state (every {stride}th frame, "
            f"{n_frames} frames)")
    return pairs[keep], note


def build_pool(source, *, selection=None, kinds=DEFAULT_KINDS, cutoff=1.0, stride=10,
               coordination_r0=COORDINATION_R0_NM):
    """Candidate pool for a source: select atoms, enumerate, prefilter distances.

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
    stride : int, default=10
        Frame stride of the prefilter pass.
    coordination_r0 : float, default=COORDINATION_R0_NM
        Switching distance of the coordination numbers, nm.

    Returns
    -------
    Pool
        With ``notes`` describing what was kept and dropped.
    """
    from ..io.source import select_atoms

    kinds = _check_kinds(kinds)
    atoms = select_atoms(source.topology, selection)
    notes = [f"selection: {atoms.size} atoms"]
    pairs = None
    if "distance" in kinds:
        pairs, note = candidate_pairs(source.topology, atoms)
        if note:
            notes.append(note)
        pairs, note = prefilter_pairs(pairs, source, cutoff=cutoff, stride=stride)
        notes.append(note)
    group_pairs = None
    if any(k in kinds for k in GROUP_KINDS):
        groups = residue_groups(source.topology, atoms)
        if len(groups) >= 2:
            probe = Pool([], source.topology)
            group_pairs, note = prefilter_group_pairs(
                [g for _, g in groups], source, cutoff=cutoff, stride=stride,
                masses=[probe.group_masses(g) for _, g in groups])
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
