"""A :class:`Pool`: an ordered set of descriptors and the features they contribute.

A distance or a bond angle contributes its value (nm, rad); a dihedral
contributes the pair ``(cos phi, sin phi)``, never the cut angle, so that a
linear combination stays smooth across the +-pi boundary. Features of the atom
kinds come from mdtraj's geometry, those of the group kinds from
:mod:`cvdesign.geometry` (the code the spec evaluator runs; the tests check
that the two agree).
"""

import warnings

import mdtraj as md
import numpy as np

from ..constants import COORDINATION_EXPONENTS
from ..errors import InputError
from ..geometry import coordination_pairs, distances as _pair_distances, group_centers
from ..geometry import GeometryWarning, minimum_image, switching_function
from ..kinds import GROUP_KINDS, KINDS

__all__ = ["Pool"]


# Numbers (frames x atom pairs) formed at once for coordination numbers (bounds memory).
_NUMBERS_PER_BLOCK = 2_000_000


def _columns(cols):
    """Column indices as a slice when they are evenly spaced and increasing (a strided
    write instead of a scatter), else the index array."""
    cols = np.asarray(cols, dtype=np.intp)
    if cols.size == 1:
        return slice(int(cols[0]), int(cols[0]) + 1)
    step = int(cols[1] - cols[0]) if cols.size > 1 else 0
    if step > 0 and np.all(np.diff(cols) == step):
        return slice(int(cols[0]), int(cols[-1]) + 1, step)
    return cols


def _undefined_angles(values, triples):
    """Set the undefined angles of `values` (NaN from mdtraj: an arm of zero length, two
    atoms coincide) to pi/2 rad in place, as :func:`cvdesign.geometry.angles` and so the
    spec's evaluator do, and warn (:class:`~cvdesign.geometry.GeometryWarning`).

    `triples` are the original atom indices of the columns, for the message.
    """
    bad = np.isnan(values)
    if not bad.any():
        return
    values[bad] = np.pi / 2
    # one text per descriptor (no counts): Python shows a repeated warning once, so a long
    # run with two atoms on top of each other gives one line, not one per chunk
    row = int(np.flatnonzero(bad.any(axis=0))[0])
    warnings.warn(
        f"angle descriptor of atoms {[int(a) for a in triples[row]]} (and any other "
        "named in a warning like this): undefined in some frames (an arm has zero length: "
        "two atoms coincide); set to pi/2 rad there, as the spec's evaluator does. Check "
        "the trajectory and the topology", GeometryWarning, stacklevel=3)


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
    >>> from cvdesign.pool import Descriptor
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
        # columns of each kind's features (first and, for dihedrals, second of each
        # descriptor), as slices where they are evenly spaced
        self._cols = {kind: (_columns(self._first[idx]), _columns(self._first[idx] + 1))
                      for kind, idx in self._index.items() if idx}
        self._local = None  # (atom_indices bytes, {kind: atoms as rows of the chunk})

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
        remap = None
        if atom_indices is not None:
            atom_indices = np.asarray(atom_indices, dtype=np.intp)
            remap = np.full(int(np.max(atom_indices)) + 1, -1, dtype=np.intp)
            remap[atom_indices] = np.arange(len(atom_indices))
        local_atoms = self._local_atoms(atom_indices, remap)
        periodic = trajectory.unitcell_vectors is not None
        for kind, idx in self._index.items():
            if not idx:
                continue
            cols, second = self._cols[kind]
            if kind in GROUP_KINDS:
                local = (lambda a: a) if remap is None else (lambda a: remap[a])
                out[:, cols] = self._group_features(kind, idx, trajectory, local)
                continue
            atoms = local_atoms[kind]
            if kind == "distance":
                out[:, cols] = md.compute_distances(trajectory, atoms, periodic=periodic)
            elif kind == "angle":
                vals = md.compute_angles(trajectory, atoms, periodic=periodic)
                _undefined_angles(vals, self._atoms[kind])
                out[:, cols] = vals
            else:
                vals = md.compute_dihedrals(trajectory, atoms, periodic=periodic)
                vals = vals.astype(np.float64)
                out[:, cols] = np.cos(vals)
                out[:, second] = np.sin(vals)
        return out

    def _local_atoms(self, atom_indices, remap):
        """Atoms of each atom kind as rows of a chunk holding `atom_indices` (cached for
        the last `atom_indices`: a featurizer asks with the same ones every chunk)."""
        key = None if atom_indices is None else atom_indices.tobytes()
        cached = self._local
        if cached is not None and cached[0] == key:
            return cached[1]
        out = {}
        for kind, atoms in self._atoms.items():
            if remap is not None and atoms.size:
                atoms = remap[atoms]
                if np.any(atoms < 0):
                    raise InputError("the trajectory chunk lacks atoms that the pool uses")
            out[kind] = atoms
        self._local = (key, out)
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
