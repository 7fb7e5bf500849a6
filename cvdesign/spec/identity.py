"""Who the atoms of a spec are: atom identities, the topology fingerprint, residue hashes.

An atom's identity is its chain, residue name and number, atom name and
element; the fingerprint hashes the identities of every atom of a topology,
so that a spec can tell whether it is applied to the topology it was made for,
and the per-residue hashes say where two topologies differ.
"""

import hashlib
import json

import mdtraj as md
import numpy as np

from ..errors import InputError

__all__ = ["atom_identity", "topology_fingerprint", "residue_hashes"]


_FINGERPRINT_HEADER = "cvdesign topology fingerprint, version 1\n"


def _check_topology_arg(topology, name="topology"):
    if isinstance(topology, md.Trajectory):
        return topology.topology
    if not isinstance(topology, md.Topology):
        raise InputError(
            f"{name} must be an mdtraj.Topology (or an mdtraj.Trajectory); got {type(topology).__name__}"
        )
    return topology


def _identity_of(atom):
    element = atom.element
    symbol = "" if element is None or element.symbol is None else str(element.symbol)
    residue = atom.residue
    return {
        "chain": int(residue.chain.index),
        "residue": str(residue.name),
        "resid": int(residue.resSeq),
        "name": str(atom.name),
        "element": symbol,
    }


def atom_identity(topology, i):
    """Who atom `i` is: chain, residue name and number, atom name, element.

    Parameters
    ----------
    topology : mdtraj.Topology
        The topology (an ``mdtraj.Trajectory`` is accepted for its topology).
    i : int
        0-based atom index.

    Returns
    -------
    dict
        ``{"chain": int, "residue": str, "resid": int, "name": str,
        "element": str}``: the 0-based chain index, the residue name, the
        residue number as in the topology file (``resSeq``), the atom name,
        and the element symbol (``""`` when the atom has no element).

    Raises
    ------
    InputError
        `topology` is not a topology, or `i` is not a valid atom index.

    Examples
    --------
    >>> top = md.Topology()
    >>> res = top.add_residue("ALA", top.add_chain(), resSeq=12)
    >>> _ = top.add_atom("CA", md.element.carbon, res)
    >>> atom_identity(top, 0)
    {'chain': 0, 'residue': 'ALA', 'resid': 12, 'name': 'CA', 'element': 'C'}
    """
    topology = _check_topology_arg(topology)
    if isinstance(i, (bool, np.bool_)) or not isinstance(i, (int, np.integer)):
        raise InputError(f"i must be an integer atom index; got {i!r}")
    if not 0 <= int(i) < topology.n_atoms:
        raise InputError(
            f"i={int(i)} is not an atom of this topology ({topology.n_atoms} atoms, "
            f"valid indices 0..{topology.n_atoms - 1})"
        )
    return _identity_of(topology.atom(int(i)))


def _identity_line(identity):
    row = [identity["chain"], identity["residue"], identity["resid"], identity["name"], identity["element"]]
    return json.dumps(row, ensure_ascii=True, separators=(",", ":")) + "\n"


def topology_fingerprint(topology):
    """A checksum of the identities of all atoms of a topology, in order.

    Parameters
    ----------
    topology : mdtraj.Topology
        The topology (an ``mdtraj.Trajectory`` is accepted for its topology).

    Returns
    -------
    str
        ``"sha256:"`` followed by 64 hex digits: the SHA-256 of a fixed header
        line and then one line per atom, the JSON list ``[chain, residue,
        resid, name, element]`` of :func:`atom_identity` (compact separators,
        ASCII). Coordinates, bonds and box play no part.

    Examples
    --------
    >>> top = md.Topology()
    >>> res = top.add_residue("HOH", top.add_chain())
    >>> for name, el in [("O", md.element.oxygen), ("H1", md.element.hydrogen)]:
    ...     _ = top.add_atom(name, el, res)
    >>> fp = topology_fingerprint(top)
    >>> fp.startswith("sha256:"), len(fp)
    (True, 71)
    """
    topology = _check_topology_arg(topology)
    digest = hashlib.sha256(_FINGERPRINT_HEADER.encode("ascii"))
    digest.update("".join(_identity_line(_identity_of(a)) for a in topology.atoms).encode("ascii"))
    return "sha256:" + digest.hexdigest()


def residue_hashes(topology):
    """Short per-residue checksums, so a mismatch can be traced to one residue.

    Parameters
    ----------
    topology : mdtraj.Topology

    Returns
    -------
    str
        8 hex digits per residue, in residue order: the start of the SHA-256
        of the identity lines (see :func:`topology_fingerprint`) of the
        residue's atoms.

    Examples
    --------
    >>> top = md.Topology()
    >>> res = top.add_residue("HOH", top.add_chain())
    >>> _ = top.add_atom("O", md.element.oxygen, res)
    >>> len(residue_hashes(top))
    8
    """
    topology = _check_topology_arg(topology)
    out = []
    for res in topology.residues:
        text = "".join(_identity_line(_identity_of(a)) for a in res.atoms)
        out.append(hashlib.sha256(text.encode("ascii")).hexdigest()[:8])
    return "".join(out)


def _describe_residue(residue):
    names = " ".join(a.name for a in list(residue.atoms)[:12])
    more = " ..." if residue.n_atoms > 12 else ""
    return (f"residue {residue.index} ({residue.name}{residue.resSeq}, chain "
            f"{residue.chain.index}, {residue.n_atoms} atoms: {names}{more})")


def _describe(identity):
    element = identity["element"] or "none"
    return (
        f"{identity['residue']}{identity['resid']}:{identity['name']} "
        f"(chain {identity['chain']}, element {element})"
    )
