"""A :class:`Pool`: an ordered set of descriptors and the features they contribute.

A distance or a bond angle contributes its value (nm, rad); a dihedral
contributes the pair ``(cos phi, sin phi)``, never the cut angle, so that a
linear combination stays smooth across the +-pi boundary. Features of the atom
kinds come from mdtraj's geometry (a dihedral's cos and sin are formed from
mdtraj's bond vectors without forming the angle, see :func:`_dihedral_cos_sin`),
those of the group kinds from :mod:`cvdesign.geometry` (the code the spec
evaluator runs; the tests check that the two agree).
"""

import warnings

import mdtraj as md
import numpy as np

from ..constants import COORDINATION_EXPONENTS
from ..errors import InputError
from ..geometry import coordination_pairs, distances as _pair_distances, group_centers
from ..geometry import GeometryWarning, minimum_image, switching_function
from ..kinds import GROUP_KINDS, KINDS
from .descriptors import _residue_labels, _runs

__all__ = ["Pool"]


# Numbers (frames x atom pairs) formed at once for coordination numbers (bounds memory).
_NUMBERS_PER_BLOCK = 2_000_000
# (frame, dihedral) values formed at once by _dihedral_cos_sin: its float32 temporaries
# (about 40 arrays of this many values) stay within a core's cache.
_DIHEDRALS_PER_BLOCK = 16_384
_TINY32 = float(np.finfo(np.float32).tiny)
_HUGE32 = float(np.finfo(np.float32).max)


def _dihedral_cos_sin(trajectory, quads, periodic, out_cos, out_sin, names=None):
    """Cosine and sine of dihedrals, written into `out_cos` and `out_sin`.

    The angle itself is never formed. With mdtraj's bond vectors
    ``b1 = x1 - x0``, ``b2 = x2 - x1``, ``b3 = x3 - x2`` (float32, from
    ``mdtraj.compute_displacements``: with ``periodic`` and a unit cell each
    is its own minimum image, as in ``mdtraj.compute_dihedrals``),
    ``A = b1 x b2`` and ``B = b2 x b3``, the dihedral is
    ``atan2(y, x)`` with ``x = A . B`` and ``y = |b2| b1 . B`` (the
    well-conditioned form of A. Blondel and M. Karplus, J. Comput. Chem. 17,
    1132-1141, 1996; mdtraj's numpy reference code uses it too), and
    ``x^2 + y^2 = |A|^2 |B|^2``,
    so ``cos = x / r`` and ``sin = y / r`` with ``r = sqrt(x^2 + y^2)``.
    The arithmetic is float32, as mdtraj's, and elementwise: blocks of
    frames and dihedrals only bound the memory of the temporaries (``hypot``
    replaces ``sqrt(x^2 + y^2)`` only for the values whose squares leave
    float32's range).
    An undefined dihedral (``r = 0`` exactly: collinear or coincident atoms) gives
    ``(1, 0)``, the angle 0 that ``mdtraj.compute_dihedrals`` and the spec's evaluator
    return there, with a :class:`~cvdesign.geometry.GeometryWarning` (the evaluator also
    warns for nearly collinear atoms, whose value here is defined but noisy).

    Parameters
    ----------
    trajectory : mdtraj.Trajectory
        Coordinates in nm.
    quads : ndarray of shape (n_dihedrals, 4), int
        Atom indices (rows of the trajectory) of each dihedral.
    periodic : bool
        Minimum-image bond vectors when the trajectory has a unit cell.
    out_cos, out_sin : ndarray of shape (n_frames, n_dihedrals), float64
        Written in place (views of the feature matrix are fine).
    names : ndarray of shape (n_dihedrals, 4), int, default=None
        The atoms the warning names (the topology's indices; default `quads`).
    """
    n_frames, m = trajectory.n_frames, len(quads)
    width = max(1, min(m, _DIHEDRALS_PER_BLOCK))  # dihedrals per block
    step = max(1, _DIHEDRALS_PER_BLOCK // width)  # frames per block
    box = trajectory.unitcell_lengths is not None and trajectory.unitcell_angles is not None
    for c0 in range(0, m, width):
        c1 = min(m, c0 + width)
        q = quads[c0:c1]
        k = c1 - c0
        # the three bonds of every dihedral, bond by bond: rows j*k .. (j+1)*k - 1
        bonds = np.concatenate([q[:, 0:2], q[:, 1:3], q[:, 2:4]]).astype(np.int32)
        for a in range(0, n_frames, step):
            b = min(n_frames, a + step)
            part = md.Trajectory(
                trajectory.xyz[a:b], None,
                unitcell_lengths=trajectory.unitcell_lengths[a:b] if box else None,
                unitcell_angles=trajectory.unitcell_angles[a:b] if box else None)
            d = md.compute_displacements(part, bonds, periodic=periodic)
            # components of each bond as contiguous (frames, dihedrals) arrays
            d = np.ascontiguousarray(d.reshape(b - a, 3, k, 3).transpose(1, 3, 0, 2))
            (b1x, b1y, b1z), (b2x, b2y, b2z), (b3x, b3y, b3z) = d
            ax, ay, az = b1y * b2z - b1z * b2y, b1z * b2x - b1x * b2z, b1x * b2y - b1y * b2x
            bx, by, bz = b2y * b3z - b2z * b3y, b2z * b3x - b2x * b3z, b2x * b3y - b2y * b3x
            x = ax * bx + ay * by + az * bz
            y = (b1x * bx + b1y * by + b1z * bz) * np.sqrt(b2x * b2x + b2y * b2y + b2z * b2z)
            with np.errstate(over="ignore", under="ignore"):
                r2 = x * x + y * y
            r = np.sqrt(r2)
            # squares out of float32's range: hypot for those values alone, so that a
            # frame's bytes never depend on the other values of its block
            out_of_range = (r2 < _TINY32) | (r2 > _HUGE32)
            if out_of_range.any():
                r[out_of_range] = np.hypot(x[out_of_range], y[out_of_range])
            undefined = r == 0
            if undefined.any():
                x[undefined] = 1.0
                r[undefined] = 1.0
                first = c0 + int(np.flatnonzero(undefined.any(axis=0))[0])
                _warn_undefined("dihedral", (quads if names is None else names)[first],
                                "collinear or coincident atoms", "0 rad (cos 1, sin 0)")
            np.divide(x, r, out=out_cos[a:b, c0:c1])
            np.divide(y, r, out=out_sin[a:b, c0:c1])


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
    _warn_undefined("angle", triples[int(np.flatnonzero(bad.any(axis=0))[0])],
                    "an arm has zero length: two atoms coincide", "pi/2 rad")


def _warn_undefined(kind, atoms, why, value):
    """Warn (:class:`~cvdesign.geometry.GeometryWarning`) that a descriptor of the pool is
    undefined in some frames and was given `value` there, as the spec's evaluator does.

    One text per descriptor (no counts): Python shows a repeated warning once, so a long
    run with two atoms on top of each other gives one line, not one per chunk.
    """
    warnings.warn(
        f"{kind} descriptor of atoms {[int(a) for a in atoms]} (and any other named in a "
        f"warning like this): undefined in some frames ({why}); set to {value} there, as "
        "the spec's evaluator does. Check the trajectory and the topology", GeometryWarning,
        stacklevel=4)


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

        Distances, angles and the bonds of dihedrals use the minimum image
        when the trajectory has a unit cell. mdtraj computes in float32; a
        dihedral's cos and sin are formed in float32 from mdtraj's bond
        vectors, without the angle (:func:`_dihedral_cos_sin`).

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
            elif isinstance(cols, slice) and isinstance(second, slice):
                _dihedral_cos_sin(trajectory, atoms, periodic, out[:, cols], out[:, second],
                                  self._atoms[kind])
            else:
                cos_sin = np.empty((2, n, len(atoms)))
                _dihedral_cos_sin(trajectory, atoms, periodic, cos_sin[0], cos_sin[1],
                                  self._atoms[kind])
                out[:, cols] = cos_sin[0]
                out[:, second] = cos_sin[1]
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

    def _group_label(self, group):
        """How a warning names a group: its residues' labels and its atoms (0-based)."""
        cache = self.__dict__.setdefault("_group_label_cache", {})
        if group not in cache:
            cache[group] = self._describe_group(group)
        return cache[group]

    def _describe_group(self, group):
        names = {}
        for a in group:
            r = self.topology.atom(int(a)).residue
            names.setdefault(r.index, r)
        res = ", ".join(_residue_labels(self.topology, list(names.values())[:3]))
        more = ", ..." if len(names) > 3 else ""
        return f"the group of {res}{more} (atoms {_runs(group)})"

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
                                            for g, w in unique],
                                    names=[self._group_label(g) for g, _ in unique])
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
