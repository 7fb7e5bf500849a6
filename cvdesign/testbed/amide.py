"""N-methylacetamide in a real force field: built from internal coordinates, simulated in OpenMM.

N-methylacetamide (``CH3-CO-NH-CH3``, 12 atoms; residues ``ACE`` and ``NME``,
the two caps of a peptide chain joined by their amide bond) is the smallest
molecule with a peptide bond. Its one slow motion is the rotation about that
bond, the dihedral omega = CH3-C-N-C: ``trans`` near pi rad and ``cis`` near 0,
separated by barriers of about 70 kJ/mol in Amber ff14SB (Maier et al., J. Chem.
Theory Comput. 11, 3696, 2015), the force field OpenMM ships as
``amber14-all.xml`` (Eastman et al., PLoS Comput. Biol. 13, e1005659, 2017). The
methyl rotations and the vibrations are fast, so omega is the only slow
coordinate and a free-energy profile along it is a trustworthy reference
(:func:`cvdesign.testbed.openmm_metad.umbrella_delta_f`).

The heavy atoms are placed from standard bond lengths, angles and the chosen
omega by :func:`place_atom`; OpenMM's ``Modeller`` adds the hydrogens from the
force field's templates (with Python's ``random`` seeded for that call, so the
same omega always gives the same structure). OpenMM (``pip install
'cvdesign[openmm]'``) is imported only when a molecule is built. Units: nm, rad, kJ/mol, K.

Examples
--------
>>> molecule = methylacetamide(np.pi)
>>> molecule.system.getNumParticles(), [a.name for a in molecule.topology.atoms()][:6]
(12, ['CH3', 'H1', 'H2', 'H3', 'C', 'O'])
>>> round(abs(float(molecule.omega(molecule.positions))), 4)
3.1416
"""

import random
from dataclasses import dataclass

import numpy as np

from .forcefield import dihedral_angles

__all__ = ["AmideMolecule", "methylacetamide", "place_atom"]

#: Standard geometry of the amide unit (nm, degrees), common values for peptide
#: groups (Engh and Huber, Acta Cryst. A47, 392, 1991, from memory); the force field
#: relaxes them.
_CH3_C, _C_O, _C_N, _N_CH3 = 0.1522, 0.1229, 0.1335, 0.1449
_CH3_C_O, _CH3_C_N, _C_N_CH3 = 120.5, 116.6, 121.9


def place_atom(a, b, c, bond, angle, dihedral):
    """Position of an atom ``d`` from three placed atoms and its internal coordinates.

    Parameters
    ----------
    a, b, c : array-like of shape (3,)
        Positions of three placed atoms, nm; ``d`` is bonded to ``c``.
    bond : float
        Distance c-d, nm.
    angle : float
        Angle b-c-d, rad.
    dihedral : float
        Dihedral a-b-c-d, rad (IUPAC sign, as :func:`dihedral_angles`).

    Returns
    -------
    ndarray of shape (3,)
        nm.

    Examples
    --------
    >>> a, b, c = np.array([0.0, 1, 0]), np.zeros(3), np.array([1.0, 0, 0])
    >>> d = place_atom(a, b, c, 1.0, np.pi / 2, -np.pi / 2)
    >>> phi = dihedral_angles(np.array([a, b, c, d]), [[0, 1, 2, 3]])[0]
    >>> d.round(6).tolist(), round(float(phi), 6)
    ([1.0, 0.0, -1.0], -1.570796)
    """
    a, b, c = (np.asarray(p, dtype=np.float64) for p in (a, b, c))
    bc = (c - b) / np.linalg.norm(c - b)
    n = np.cross(b - a, bc)
    n /= np.linalg.norm(n)
    m = np.cross(n, bc)
    local = bond * np.array([-np.cos(angle), np.sin(angle) * np.cos(dihedral),
                             np.sin(angle) * np.sin(dihedral)])
    return c + local[0] * bc + local[1] * m + local[2] * n


@dataclass
class AmideMolecule:
    """N-methylacetamide ready to simulate: see :func:`methylacetamide`.

    Attributes
    ----------
    topology : openmm.app.Topology
        12 atoms, residues ``ACE`` and ``NME``, with hydrogens and bonds.
    positions : ndarray of shape (12, 3)
        nm, as built (not minimized).
    system : openmm.System
        Amber ff14SB in vacuum: no cutoff, bonds to hydrogen constrained.
    omega_atoms : tuple of 4 int
        0-based atoms CH3(ACE), C(ACE), N(NME), C(NME) of omega.
    wells : dict
        ``{"cis": (-pi/2, pi/2), "trans": (pi/2, -pi/2)}``: intervals of omega,
        rad; ``low > high`` wraps around (as ``ToySystem.wells``).
    """

    topology: object
    positions: np.ndarray
    system: object
    omega_atoms: tuple
    wells: dict

    @property
    def mdtraj_topology(self):
        """The topology as an ``mdtraj.Topology`` (for a :class:`~cvdesign.Spec` or a trajectory)."""
        import mdtraj as md

        return md.Topology.from_openmm(self.topology)

    def omega(self, x):
        """Omega of positions `x` (``(..., 12, 3)``, nm), rad in ``[-pi, pi]``."""
        return dihedral_angles(x, [self.omega_atoms])[..., 0]


def methylacetamide(omega=np.pi, *, forcefield="amber14-all.xml"):
    """N-methylacetamide with the amide dihedral set to `omega`, and its OpenMM System.

    Parameters
    ----------
    omega : float, default=pi
        Dihedral CH3-C-N-C of the built structure, rad (pi: trans, 0: cis).
    forcefield : str, default="amber14-all.xml"
        A force-field file that OpenMM ships with templates for ``ACE`` and ``NME``.

    Returns
    -------
    AmideMolecule

    Examples
    --------
    >>> cis = methylacetamide(0.0)
    >>> round(abs(float(cis.omega(cis.positions))), 4), sorted(cis.wells)
    (0.0, ['cis', 'trans'])
    """
    from openmm import app, unit

    d = np.deg2rad
    ch3 = np.zeros(3)
    c = np.array([_CH3_C, 0.0, 0.0])
    o = place_atom([0.0, 1.0, 0.0], ch3, c, _C_O, d(_CH3_C_O), 0.0)
    n = place_atom(o, ch3, c, _C_N, d(_CH3_C_N), np.pi)
    cn = place_atom(ch3, c, n, _N_CH3, d(_C_N_CH3), float(omega))
    top = app.Topology()
    chain = top.addChain()
    heavy = []
    for residue, atoms in (("ACE", (("CH3", ch3), ("C", c), ("O", o))),
                           ("NME", (("N", n), ("C", cn)))):
        res = top.addResidue(residue, chain)
        for name, x in atoms:
            top.addAtom(name, app.Element.getBySymbol(name[0]), res)
            heavy.append(x)
    top.createStandardBonds()
    ff = app.ForceField(forcefield)
    modeller = app.Modeller(top, np.array(heavy) * unit.nanometer)
    # Modeller puts the new hydrogens at random positions from Python's random module,
    # then relaxes them: seed it for this call (and restore it) so that the same
    # omega gives the same structure, byte for byte.
    saved = random.getstate()
    random.seed(0)
    try:
        modeller.addHydrogens(ff)
    finally:
        random.setstate(saved)
    system = ff.createSystem(modeller.topology, nonbondedMethod=app.NoCutoff,
                             constraints=app.HBonds)
    index = {(a.residue.name, a.name): a.index for a in modeller.topology.atoms()}
    omega_atoms = tuple(index[k] for k in (("ACE", "CH3"), ("ACE", "C"), ("NME", "N"),
                                           ("NME", "C")))
    positions = np.array(modeller.positions.value_in_unit(unit.nanometer))
    half = np.pi / 2
    return AmideMolecule(topology=modeller.topology, positions=positions, system=system,
                         omega_atoms=omega_atoms,
                         wells={"cis": (-half, half), "trans": (half, -half)})
