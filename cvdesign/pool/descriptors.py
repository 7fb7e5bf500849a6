"""Descriptors as data: :class:`Descriptor` (a kind, 0-based atom indices, a stable id,
a readable label) and the readable labels of atoms and residues."""

import math
import numbers
from collections import Counter
from dataclasses import dataclass
from functools import cached_property

import numpy as np

from ..errors import InputError
from ..kinds import GROUP_KINDS, KINDS

__all__ = ["Descriptor", "atom_label", "atom_labels"]


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
            bad = [a for g in groups for a in g if not _is_index(a)]
            if bad or any(len(set(g)) != len(g) for g in groups):
                why = (f"{bad[0]!r} is not a non-negative whole number" if bad
                       else "an atom repeats within a group")
                raise InputError(f"{self.kind} descriptor {self.label!r}: groups {groups!r} must "
                                 f"hold distinct non-negative integer atom indices (0-based); "
                                 f"{why}")
            groups = tuple(tuple(sorted(int(a) for a in g)) for g in groups)
            object.__setattr__(self, "groups", groups)
            object.__setattr__(self, "atoms", tuple(sorted(set(groups[0]) | set(groups[1]))))
            if self.kind == "coordination" and not (
                    isinstance(self.r0, numbers.Real) and not isinstance(self.r0, bool)
                    and math.isfinite(self.r0) and self.r0 > 0):
                raise InputError(f"a coordination needs a switching distance r0 > 0 nm; "
                                 f"got {self.r0!r}")
            return
        n = KINDS[self.kind].n_atoms
        article = "an" if self.kind[0] in "aeiou" else "a"
        try:
            count = len(self.atoms)
        except TypeError:
            count = None
        if count != n:
            raise InputError(
                f"{article} {self.kind} takes {n} atoms; got "
                f"{count if count is not None else repr(self.atoms)}"
                f" ({self.label!r})")
        bad = [a for a in self.atoms if not _is_index(a)]
        if bad or len(set(int(a) for a in self.atoms)) != n:
            why = (f"{bad[0]!r} is not a non-negative whole number" if bad
                   else "an atom repeats")
            raise InputError(
                f"{self.kind} descriptor {self.label!r}: atoms {tuple(self.atoms)!r} must be "
                f"{n} distinct non-negative integer atom indices (0-based); {why}")
        object.__setattr__(self, "atoms", tuple(int(a) for a in self.atoms))

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


def _is_index(a):
    """Whether `a` is a 0-based atom index: a non-negative integer, not a bool."""
    return not isinstance(a, bool) and isinstance(a, (numbers.Integral, np.integer)) and a >= 0


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


def _residue_labels(topology, residues):
    """Labels ``RESNAME<resSeq>`` of `residues`, unique in the topology (the residue's
    0-based index in brackets where a name and number repeat)."""
    every = _unique([f"{_residue_prefix(topology, r)}{r.name}{r.resSeq}"
                     for r in topology.residues], range(topology.n_residues))
    return [every[r.index] for r in residues]
