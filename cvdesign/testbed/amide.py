"""Two small amides in a real force field, built from internal coordinates, simulated in OpenMM.

* N-methylacetamide (``CH3-CO-NH-CH3``, 12 atoms; residues ``ACE`` and ``NME``,
  the two caps of a peptide chain joined by their amide bond), the smallest
  molecule with a peptide bond (:func:`methylacetamide`);
* the capped proline Ac-Pro-NHMe (``ACE-PRO-NME``, 26 atoms), whose prolyl
  amide bond (ACE C to the ring nitrogen, which carries no hydrogen) is the
  one whose cis/trans isomerization is a classic slow step of protein folding
  (:func:`capped_proline`).

In both, the slow motion is the rotation about the (first) amide bond, the
dihedral omega = CH3-C-N-X (X the next heavy atom: the methyl carbon, or the
proline's CA): ``trans`` near pi rad and ``cis`` near 0, separated by barriers
of about 70 kJ/mol in Amber ff14SB (Maier et al., J. Chem. Theory Comput. 11,
3696, 2015), the force field OpenMM ships as ``amber14-all.xml`` (Eastman et
al., PLoS Comput. Biol. 13, e1005659, 2017), so plain MD at 300 K never crosses.
In N-methylacetamide the amide hydrogen's own torsion terms resist the rotation
too, so a CV of heavy atoms alone (cvdesign's default selection) misses part of
the motion; the prolyl nitrogen has no hydrogen.

The heavy atoms are placed from standard bond lengths, angles and the chosen
omega by :func:`place_atom` (the proline ring closes approximately; the force
field relaxes it); OpenMM's ``Modeller`` adds the hydrogens from the force
field's templates (with Python's ``random`` seeded for that call and the new
hydrogens relaxed on the deterministic Reference platform, so the same omega
always gives the same structure, byte for byte). OpenMM (``pip install
'cvdesign[openmm]'``) is imported only when a molecule is built. Units: nm, rad,
kJ/mol, K.

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

__all__ = ["AmideMolecule", "capped_proline", "methylacetamide", "place_atom"]

#: Standard geometry of the amide unit (nm, degrees), common values for peptide
#: groups (Engh and Huber, Acta Cryst. A47, 392, 1991, from memory); the force field
#: relaxes them.
_CH3_C, _C_O, _C_N, _N_CH3 = 0.1522, 0.1229, 0.1335, 0.1449
_CH3_C_O, _CH3_C_N, _C_N_CH3 = 120.5, 116.6, 121.9
_N_CA, _CA_C, _CA_CB, _CB_CG, _N_CD = 0.1458, 0.1525, 0.1530, 0.1495, 0.1473
_N_CA_C, _N_CA_CB, _CA_CB_CG, _C_N_CD, _CA_C_N = 111.2, 103.0, 104.5, 125.0, 116.2


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
        With hydrogens and bonds.
    positions : ndarray of shape (n_atoms, 3)
        nm, as built (not minimized).
    system : openmm.System
        Amber ff14SB in vacuum: no cutoff, bonds to hydrogen constrained.
    omega_atoms : tuple of 4 int
        0-based atoms of omega: CH3 and C of ``ACE``, then N and the next heavy
        atom of the following residue.
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
        """The topology as an ``mdtraj.Topology`` (for a :class:`~cvdesign.Spec`, a trajectory)."""
        import mdtraj as md

        return md.Topology.from_openmm(self.topology)

    def omega(self, x):
        """Omega of positions `x` (``(..., n_atoms, 3)``, nm), rad in ``[-pi, pi]``."""
        return dihedral_angles(x, [self.omega_atoms])[..., 0]


def _ace(omega):
    """Heavy atoms of the ACE cap and the next N and its heavy neighbour X (omega = CH3-C-N-X)."""
    d = np.deg2rad
    ch3 = np.zeros(3)
    c = np.array([_CH3_C, 0.0, 0.0])
    o = place_atom([0.0, 1.0, 0.0], ch3, c, _C_O, d(_CH3_C_O), 0.0)
    n = place_atom(o, ch3, c, _C_N, d(_CH3_C_N), np.pi)
    return ch3, c, o, n


def _assemble(residues, omega_keys, forcefield):
    """Topology from ``[(residue, [(atom, position), ...]), ...]``, hydrogens, System."""
    import openmm
    from openmm import app, unit

    top = app.Topology()
    chain = top.addChain()
    heavy = []
    for residue, atoms in residues:
        res = top.addResidue(residue, chain)
        for name, x in atoms:
            top.addAtom(name, app.Element.getBySymbol(name[0]), res)
            heavy.append(x)
    top.createStandardBonds()
    ff = app.ForceField(forcefield)
    modeller = app.Modeller(top, np.array(heavy) * unit.nanometer)
    # Modeller puts the new hydrogens at random positions from Python's random module,
    # then relaxes them in a Context: seed the module for this call (and restore it),
    # and relax on the Reference platform (the multithreaded CPU platform sums forces
    # in a varying order), so that the same omega gives the same structure, byte for byte.
    saved = random.getstate()
    random.seed(0)
    try:
        modeller.addHydrogens(ff, platform=openmm.Platform.getPlatformByName("Reference"))
    finally:
        random.setstate(saved)
    system = ff.createSystem(modeller.topology, nonbondedMethod=app.NoCutoff,
                             constraints=app.HBonds)
    index = {(a.residue.name, a.name): a.index for a in modeller.topology.atoms()}
    half = np.pi / 2
    return AmideMolecule(topology=modeller.topology,
                         positions=np.array(modeller.positions.value_in_unit(unit.nanometer)),
                         system=system, omega_atoms=tuple(index[k] for k in omega_keys),
                         wells={"cis": (-half, half), "trans": (half, -half)})


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
        12 atoms; Amber ff14SB in vacuum (no cutoff, bonds to hydrogen
        constrained).

    Examples
    --------
    >>> cis = methylacetamide(0.0)
    >>> round(abs(float(cis.omega(cis.positions))), 4), sorted(cis.wells)
    (0.0, ['cis', 'trans'])
    """
    ch3, c, o, n = _ace(omega)
    cn = place_atom(ch3, c, n, _N_CH3, np.deg2rad(_C_N_CH3), float(omega))
    return _assemble([("ACE", [("CH3", ch3), ("C", c), ("O", o)]),
                      ("NME", [("N", n), ("C", cn)])],
                     (("ACE", "CH3"), ("ACE", "C"), ("NME", "N"), ("NME", "C")), forcefield)


def capped_proline(omega=np.pi, *, phi=-65.0, psi=150.0, forcefield="amber14-all.xml"):
    """Ac-Pro-NHMe with the prolyl amide dihedral set to `omega`, and its OpenMM System.

    Parameters
    ----------
    omega : float, default=pi
        Dihedral CH3(ACE)-C(ACE)-N(PRO)-CA(PRO) of the built structure, rad
        (pi: trans, 0: cis).
    phi, psi : float, default=-65.0, 150.0
        Backbone dihedrals of the built structure, degrees (the ring holds phi
        near -65).
    forcefield : str, default="amber14-all.xml"
        A force-field file that OpenMM ships with templates for ``ACE``, ``PRO``
        and ``NME``.

    Returns
    -------
    AmideMolecule
        26 atoms, L-proline; Amber ff14SB in vacuum (no cutoff, bonds to
        hydrogen constrained).

    Examples
    --------
    >>> trans = capped_proline(np.pi)
    >>> trans.system.getNumParticles(), round(abs(float(trans.omega(trans.positions))), 4)
    (26, 3.1416)
    """
    d = np.deg2rad
    ch3, c, o, n = _ace(omega)
    ca = place_atom(ch3, c, n, _N_CA, d(_C_N_CH3), float(omega))
    cd = place_atom(ch3, c, n, _N_CD, d(_C_N_CD), float(omega) + np.pi)
    c2 = place_atom(c, n, ca, _CA_C, d(_N_CA_C), d(phi))
    cb = place_atom(c, n, ca, _CA_CB, d(_N_CA_CB), d(phi - 120.0))  # L: CB at phi - 120
    cg = place_atom(n, ca, cb, _CB_CG, d(_CA_CB_CG), d(30.0))
    n2 = place_atom(n, ca, c2, _C_N, d(_CA_C_N), d(psi))
    o2 = place_atom(n, ca, c2, _C_O, d(_CH3_C_O), d(psi + 180.0))
    cn = place_atom(ca, c2, n2, _N_CH3, d(_C_N_CH3), np.pi)
    return _assemble([("ACE", [("CH3", ch3), ("C", c), ("O", o)]),
                      ("PRO", [("N", n), ("CA", ca), ("C", c2), ("O", o2), ("CB", cb),
                               ("CG", cg), ("CD", cd)]),
                      ("NME", [("N", n2), ("C", cn)])],
                     (("ACE", "CH3"), ("ACE", "C"), ("PRO", "N"), ("PRO", "CA")), forcefield)
