"""The descriptor kinds: one registry that the pool, the spec and the command read.

A :class:`Kind` says what a descriptor of that kind is defined on (an index tuple
of ``n_atoms`` atoms, or two atom groups), the transforms it enters linear
combinations with, the transforms a spec term may apply to it, whether its
values wrap, its unit, how a pool label starts and which keys its spec entry
carries. :data:`KINDS` maps each kind's name to its :class:`Kind`, in the
order pools list them.

Examples
--------
>>> from cvdesign.kinds import KINDS, GROUP_KINDS
>>> KINDS["dihedral"].n_atoms, KINDS["dihedral"].features, KINDS["dihedral"].unit
(4, ('cos', 'sin'), 'rad')
>>> GROUP_KINDS
('center_distance', 'coordination')
"""

from dataclasses import dataclass

__all__ = ["Kind", "KINDS", "ATOM_KINDS", "GROUP_KINDS", "DEFAULT_KINDS"]


@dataclass(frozen=True)
class Kind:
    """One descriptor kind.

    Parameters
    ----------
    name : str
        The kind's name, as in a spec's ``"kind"`` and the ``--kinds`` option.
    n_atoms : int or None
        Atoms per index tuple; None for a kind defined on two atom groups.
    features : tuple of str
        The transforms the kind enters combinations with in a pool (a dihedral
        contributes ``cos`` and ``sin``, never the cut angle).
    transforms : tuple of str
        The transforms a spec term may apply to it.
    periodic : bool
        Whether values wrap (period 2 pi rad).
    unit : str
        Unit of the value (``'1'``: dimensionless).
    label_prefix : str
        How a pool label of this kind starts (``'dist LCH1:C2-C3'``).
    spec_keys : tuple of str
        Keys of its spec entry besides ``id``, ``kind``, ``label``,
        ``atom_identities`` and ``periodic``.
    """

    name: str
    n_atoms: int | None
    features: tuple
    transforms: tuple
    periodic: bool
    unit: str
    label_prefix: str
    spec_keys: tuple

    @property
    def on_groups(self):
        """bool : True for a kind defined on two atom groups."""
        return self.n_atoms is None


_IDENTITY = ("identity",)

#: Every descriptor kind by name, in the order pools list them.
KINDS = {k.name: k for k in (
    Kind("distance", 2, _IDENTITY, _IDENTITY, False, "nm", "dist", ("atoms",)),
    Kind("angle", 3, _IDENTITY, _IDENTITY, False, "rad", "angle", ("atoms",)),
    Kind("dihedral", 4, ("cos", "sin"), ("identity", "cos", "sin"), True, "rad", "dihedral",
         ("atoms",)),
    Kind("center_distance", None, _IDENTITY, _IDENTITY, False, "nm", "center dist",
         ("groups", "weighting", "masses")),
    Kind("coordination", None, _IDENTITY, _IDENTITY, False, "1", "coord",
         ("groups", "r0", "n", "m")),
)}
#: Kinds defined on an index tuple of atoms.
ATOM_KINDS = tuple(name for name, k in KINDS.items() if not k.on_groups)
#: Kinds defined on two atom groups.
GROUP_KINDS = tuple(name for name, k in KINDS.items() if k.on_groups)
#: The kinds of a default pool.
DEFAULT_KINDS = ("distance", "angle", "dihedral")
