"""Toy molecules whose slow, state-separating motion is known by construction.

The "latch" (residue ``LCH``, 12 united atoms) is a bent chain of eight carbons
C1..C8 with a trifluoromethyl-like rotor (C9, F1, F2, F3) on C8::

    C1-C2-C3-C4-C5-C6-C7-C8-C9(F1)(F2)F3
               ^^^ the latch bond (a single bond, all bonds are)

Its one slow motion is the torsion about the central bond C4-C5, dihedral
C3-C4-C5-C6 = atoms ``(2, 3, 4, 5)`` (0-based). A two-fold term gives two wells,
``closed`` near 0 rad and ``open`` near pi rad, separated by barriers of about
35 kJ/mol (14 kT at 300 K), so short runs at 300 K stay in their well. The two
bent arms are shaped so that the chain ends C1 and C8, atoms ``(0, 7)``, touch
in ``closed`` (0.47 nm at the minimum, 0.51 +- 0.08 nm at 300 K) and are far
apart in ``open`` (0.80 nm; 0.79 +- 0.04 nm at 300 K).

Everything else is fast and irrelevant to the states: bond and angle
vibrations, single-well arm torsions (librations of about 20 deg), a
low-barrier (about 3 kJ/mol) three-fold torsion C6-C7-C8-C9 and a freely
spinning rotor C7-C8-C9-F (about 1 kJ/mol).

The "two wells" toy (residue ``TWW``, 10 united atoms) is a zig-zag chain
C1..C10 with two independent two-fold torsions at its two ends, five bonds
apart::

    C1-C2-C3-C4-C5-C6-C7-C8-C9-C10
       ^^^^^ slow        ^^^^^ fast

The slow dihedral C1-C2-C3-C4, atoms ``(0, 1, 2, 3)``, has a barrier of
30 kJ/mol (12 kT at 300 K) and never crosses in short runs; the fast dihedral
C7-C8-C9-C10, atoms ``(6, 7, 8, 9)``, has a barrier of 5 kJ/mol (2 kT) and
hops between its wells every few ps. Both have minima at 0 and pi rad. See
:func:`two_wells`.

All parameters are invented for this testbed; they describe no real molecule.
"""

from dataclasses import dataclass, field

import mdtraj as md
import numpy as np
from scipy.optimize import minimize

from .forcefield import ToyForceField, dihedral_angles, pairs_beyond

__all__ = ["ToySystem", "TwoWellSystem", "latch", "two_wells"]


@dataclass(frozen=True)
class ToySystem:
    """A toy molecule with its force field, masses, topology and start structures.

    Attributes
    ----------
    name : str
        Short name, e.g. ``'latch'``.
    topology : mdtraj.Topology
        Atoms, residue, elements and bonds.
    force_field : ToyForceField
        Energies in kJ/mol, forces in kJ/mol/nm.
    masses : ndarray of shape (n_atoms,)
        Masses, amu (those of the topology's elements).
    states : dict of str to ndarray of shape (n_atoms, 3)
        A minimum-energy structure per metastable state, nm.
    slow_dihedral : tuple of int
        0-based atoms of the dihedral that is slow by construction.
    wells : dict of str to tuple of float
        Per state, the interval ``(low, high)`` in rad of the slow dihedral
        that defines the state (intervals may wrap around pi).
    contact : tuple of int
        0-based atoms whose distance is short in one state and long in the other.
    description : str
        One paragraph for humans.
    notes : dict
        Other facts of the construction (barrier, contact distances, ...).
    """

    name: str
    topology: md.Topology
    force_field: ToyForceField
    masses: np.ndarray
    states: dict
    slow_dihedral: tuple
    wells: dict
    contact: tuple
    description: str
    notes: dict = field(default_factory=dict)

    @property
    def n_atoms(self):
        """Number of atoms."""
        return self.topology.n_atoms

    def slow_angle(self, xyz):
        """Value of the slow dihedral, rad.

        Parameters
        ----------
        xyz : array-like of shape (..., n_atoms, 3)
            Positions, nm.

        Returns
        -------
        ndarray of shape (...)
            Dihedral in ``[-pi, pi]`` rad, IUPAC sign convention.

        Examples
        --------
        >>> system = latch()
        >>> round(abs(float(system.slow_angle(system.states['open']))), 2)  # at +-pi: abs
        3.14
        """
        return dihedral_angles(xyz, [self.slow_dihedral])[..., 0]

    def assign_state(self, xyz):
        """Name of the well of the slow dihedral for each configuration.

        Parameters
        ----------
        xyz : array-like of shape (..., n_atoms, 3)
            Positions, nm.

        Returns
        -------
        ndarray of str of shape (...)
            A key of :attr:`wells` per configuration ('' if in none).

        Examples
        --------
        >>> system = latch()
        >>> str(system.assign_state(system.states['closed']))
        'closed'
        """
        return _label_wells(self.slow_angle(xyz), self.wells)


def _label_wells(phi, wells):
    """Name of the interval of `wells` containing each angle ('' if none)."""
    out = np.full(np.shape(phi), "", dtype=object)
    for name, (lo, hi) in wells.items():
        inside = (phi >= lo) & (phi <= hi) if lo <= hi else (phi >= lo) | (phi <= hi)
        out[inside] = name
    return out.astype(str)


@dataclass(frozen=True)
class TwoWellSystem(ToySystem):
    """A toy molecule with a slow and a fast two-well dihedral.

    A :class:`ToySystem` (the slow dihedral, its wells and the states are
    those of the base class) with a second, fast dihedral whose wells are
    visited many times in every short run.

    Attributes
    ----------
    fast_dihedral : tuple of int
        0-based atoms of the dihedral that is fast by construction.
    fast_wells : dict of str to tuple of float
        Per fast well, the interval ``(low, high)`` in rad of the fast
        dihedral that defines it (intervals may wrap around pi).

    Examples
    --------
    >>> system = two_wells()
    >>> system.slow_dihedral, system.fast_dihedral
    ((0, 1, 2, 3), (6, 7, 8, 9))
    """

    fast_dihedral: tuple = ()
    fast_wells: dict = field(default_factory=dict)

    def fast_angle(self, xyz):
        """Value of the fast dihedral, rad.

        Parameters
        ----------
        xyz : array-like of shape (..., n_atoms, 3)
            Positions, nm.

        Returns
        -------
        ndarray of shape (...)
            Dihedral in ``[-pi, pi]`` rad, IUPAC sign convention.

        Examples
        --------
        >>> system = two_wells()
        >>> round(abs(float(system.fast_angle(system.states['slowA']))), 2)
        3.14
        """
        return dihedral_angles(xyz, [self.fast_dihedral])[..., 0]

    def assign_fast_state(self, xyz):
        """Name of the well of the fast dihedral for each configuration.

        Parameters
        ----------
        xyz : array-like of shape (..., n_atoms, 3)
            Positions, nm.

        Returns
        -------
        ndarray of str of shape (...)
            A key of :attr:`fast_wells` per configuration ('' if in none).

        Examples
        --------
        >>> system = two_wells()
        >>> str(system.assign_fast_state(system.states['slowA']))
        'fastB'
        """
        return _label_wells(self.fast_angle(xyz), self.fast_wells)

    def assign_wells(self, xyz):
        """Slow-well and fast-well names for each configuration.

        Parameters
        ----------
        xyz : array-like of shape (..., n_atoms, 3)
            Positions, nm.

        Returns
        -------
        slow : ndarray of str of shape (...)
            Keys of :attr:`wells` (see :meth:`assign_state`).
        fast : ndarray of str of shape (...)
            Keys of :attr:`fast_wells` (see :meth:`assign_fast_state`).

        Examples
        --------
        >>> system = two_wells()
        >>> slow, fast = system.assign_wells(np.stack([system.states['slowA'],
        ...                                            system.states['slowB']]))
        >>> slow.tolist(), fast.tolist()
        (['slowA', 'slowB'], ['fastB', 'fastB'])
        """
        return self.assign_state(xyz), self.assign_fast_state(xyz)


def _place(a, b, c, length, angle, torsion):
    """Position of d with |cd| = length, angle(b, c, d) = angle, dihedral(a, b, c, d) = torsion."""
    bc = (c - b) / np.linalg.norm(c - b)
    n = np.cross(b - a, bc)
    n /= np.linalg.norm(n)
    m = np.cross(n, bc)
    return c + length * (-np.cos(angle) * bc + np.sin(angle) * (np.cos(torsion) * m
                                                                + np.sin(torsion) * n))


# Latch parameters: (name, element) per atom; geometry in nm and degrees.
_LATCH_ATOMS = [("C1", "C"), ("C2", "C"), ("C3", "C"), ("C4", "C"), ("C5", "C"),
                ("C6", "C"), ("C7", "C"), ("C8", "C"), ("C9", "C"), ("F1", "F"),
                ("F2", "F"), ("F3", "F")]
_LATCH_BONDS = [(0, 1), (1, 2), (2, 3), (3, 4), (4, 5), (5, 6), (6, 7), (7, 8),
                (8, 9), (8, 10), (8, 11)]
_CC, _CF = 0.153, 0.136                    # rest lengths, nm
_K_BOND = 2.0e5                            # kJ/mol/nm^2
_K_ANGLE = 400.0                           # kJ/mol/rad^2
_BACKBONE_ANGLE, _TETRAHEDRAL = 112.0, 109.47  # degrees
# Preferred arm torsions (degrees) of C1-C2-C3-C4, C2-C3-C4-C5, C4-C5-C6-C7,
# C5-C6-C7-C8: chosen so the ends meet when the latch bond is cis.
_ARM_MINIMA = {(0, 1, 2, 3): 120.0, (1, 2, 3, 4): -140.0,
               (3, 4, 5, 6): 140.0, (4, 5, 6, 7): -120.0}
_K_ARM = 20.0                              # kJ/mol, single-well k (1 + cos(phi - delta))
_K_LATCH = 17.5                            # kJ/mol, two-fold: barrier 2 k = 35 kJ/mol
_K_PENDANT = 1.5                           # kJ/mol, three-fold C6-C7-C8-C9: barrier 3 kJ/mol
_K_ROTOR = 0.2                             # kJ/mol per C7-C8-C9-F term: barrier 1.2 kJ/mol
_PAIR_EPSILON, _PAIR_SIGMA = 2.0, 0.34     # kJ/mol, nm


def _latch_topology():
    top = md.Topology()
    chain = top.add_chain()
    residue = top.add_residue("LCH", chain, resSeq=1)
    atoms = [top.add_atom(name, md.element.get_by_symbol(sym), residue)
             for name, sym in _LATCH_ATOMS]
    for i, j in _LATCH_BONDS:
        top.add_bond(atoms[i], atoms[j])
    return top


def _latch_force_field(n_atoms):
    bonds = np.array(_LATCH_BONDS)
    r0 = np.where(bonds[:, 1] >= 9, _CF, _CC)
    angles = []
    neighbours = {i: sorted({b for a, b in _LATCH_BONDS if a == i}
                            | {a for a, b in _LATCH_BONDS if b == i}) for i in range(n_atoms)}
    for j in range(n_atoms):
        nb = neighbours[j]
        angles += [(nb[p], j, nb[q]) for p in range(len(nb)) for q in range(p + 1, len(nb))]
    angles = np.array(angles)
    theta0 = np.where(angles[:, 1] == 8, _TETRAHEDRAL, _BACKBONE_ANGLE)

    torsions, k, n, delta = [], [], [], []
    for quad, minimum in _ARM_MINIMA.items():   # single well at `minimum`
        torsions.append(quad); k.append(_K_ARM); n.append(1)
        delta.append(np.deg2rad(minimum) - np.pi)
    torsions.append((2, 3, 4, 5)); k.append(_K_LATCH); n.append(2); delta.append(np.pi)
    torsions.append((5, 6, 7, 8)); k.append(_K_PENDANT); n.append(3); delta.append(0.0)
    for f in (9, 10, 11):
        torsions.append((6, 7, 8, f)); k.append(_K_ROTOR); n.append(3); delta.append(0.0)

    return ToyForceField(
        n_atoms,
        bonds=bonds, bond_k=_K_BOND, bond_r0=r0,
        angles=angles, angle_k=_K_ANGLE, angle_theta0=np.deg2rad(theta0),
        torsions=torsions, torsion_k=k, torsion_n=n, torsion_delta=delta,
        pairs=pairs_beyond(n_atoms, bonds, min_bonds=4),
        pair_epsilon=_PAIR_EPSILON, pair_sigma=_PAIR_SIGMA,
    )


def _latch_build(latch_angle):
    """Coordinates from internal coordinates, latch torsion in degrees."""
    deg = np.deg2rad
    a = deg(_BACKBONE_ANGLE)
    x = [np.zeros(3), np.array([_CC, 0.0, 0.0])]
    x.append(x[1] + _CC * np.array([-np.cos(a), np.sin(a), 0.0]))
    backbone = [_ARM_MINIMA[(0, 1, 2, 3)], _ARM_MINIMA[(1, 2, 3, 4)], latch_angle,
                _ARM_MINIMA[(3, 4, 5, 6)], _ARM_MINIMA[(4, 5, 6, 7)], 180.0]
    for torsion in backbone:  # C4 .. C9
        x.append(_place(x[-3], x[-2], x[-1], _CC, a, deg(torsion)))
    for torsion in (180.0, 60.0, -60.0):  # F1, F2, F3 on C9
        x.append(_place(x[6], x[7], x[8], _CF, deg(_TETRAHEDRAL), deg(torsion)))
    return np.array(x)


def _minimize(force_field, x0):
    shape = x0.shape

    def fun(flat):
        e, f = force_field.energy_forces(flat.reshape(shape))
        return e, -f.ravel()

    res = minimize(fun, x0.ravel(), jac=True, method="L-BFGS-B",
                   options={"maxiter": 5000, "gtol": 1e-8, "ftol": 1e-15})
    x = res.x.reshape(shape)
    return x - x.mean(axis=0)  # centroid at the origin


def latch():
    """The latch toy: one slow two-state torsion that also makes or breaks an end contact.

    Returns
    -------
    ToySystem
        ``states`` has ``'closed'`` (latch dihedral near 0 rad, ends C1-C8
        in contact) and ``'open'`` (near pi rad, ends apart), each a
        minimized structure in nm; ``slow_dihedral == (2, 3, 4, 5)``
        (C3-C4-C5-C6); ``contact == (0, 7)`` (C1-C8); ``wells`` gives
        closed ``(-pi/2, pi/2)`` and open ``(pi/2, -pi/2)`` (wrapping); masses
        in amu from the elements (C, F).

    Notes
    -----
    Force field (energies kJ/mol): bonds ``0.5 k (r - r0)**2`` with
    k = 2e5 kJ/mol/nm**2, r0 = 0.153 nm (C-C), 0.136 nm (C-F); angles
    ``0.5 k (theta - theta0)**2`` with k = 400 kJ/mol/rad**2, theta0 = 112 deg
    (109.47 deg around C9); torsions: latch ``17.5 (1 + cos(2 phi - pi))``;
    arms single wells ``20 (1 + cos(phi - delta))`` at 120, -140, 140, -120 deg;
    C6-C7-C8-C9 ``1.5 (1 + cos 3 phi)``; rotor ``0.2 (1 + cos 3 phi)`` for each
    F; repulsion (WCA, epsilon 2 kJ/mol, sigma 0.34 nm) between atoms more
    than three bonds apart. The fastest vibration (C-F stretch) has a period
    of about 38 fs; a 2 fs time step is safe.

    Examples
    --------
    >>> system = latch()
    >>> system.n_atoms, system.slow_dihedral, system.contact
    (12, (2, 3, 4, 5), (0, 7))
    >>> [a.name for a in system.topology.atoms][:4]
    ['C1', 'C2', 'C3', 'C4']
    >>> sorted(system.states)
    ['closed', 'open']
    """
    top = _latch_topology()
    ff = _latch_force_field(top.n_atoms)
    masses = np.array([a.element.mass for a in top.atoms], dtype=np.float64)
    states = {
        "closed": _minimize(ff, _latch_build(0.0)),
        "open": _minimize(ff, _latch_build(180.0)),
    }
    contact = (0, 7)
    dist = {s: float(np.linalg.norm(x[contact[0]] - x[contact[1]])) for s, x in states.items()}
    notes = {
        "latch_barrier_kj_mol": 2 * _K_LATCH,
        "minimum_energy_kj_mol": {s: ff.energy(x) for s, x in states.items()},
        "contact_distance_at_minimum_nm": dist,
        "fast_torsions": [[5, 6, 7, 8], [6, 7, 8, 9], [6, 7, 8, 10], [6, 7, 8, 11]],
        "arm_torsions": [list(q) for q in _ARM_MINIMA],
    }
    description = (
        "Latch: an invented 12-atom united-atom chain C1..C8 with a CF3-like rotor "
        "(C9, F1-F3) on C8. The torsion C3-C4-C5-C6 about the central bond has two "
        "wells, closed (near 0 rad) and open (near pi rad), separated by about "
        "35 kJ/mol; in closed the chain ends C1 and C8 touch, in open they are far "
        "apart. All other motions are fast."
    )
    return ToySystem(
        name="latch",
        topology=top,
        force_field=ff,
        masses=masses,
        states=states,
        slow_dihedral=(2, 3, 4, 5),
        wells={"closed": (-np.pi / 2, np.pi / 2), "open": (np.pi / 2, -np.pi / 2)},
        contact=contact,
        description=description,
        notes=notes,
    )


# Two-wells parameters. Ten carbons in a zig-zag chain; geometry in nm and degrees.
_TWW_N = 10
_TWW_BONDS = [(i, i + 1) for i in range(_TWW_N - 1)]
_TWW_SLOW = (0, 1, 2, 3)                  # C1-C2-C3-C4, about C2-C3
_TWW_FAST = (6, 7, 8, 9)                  # C7-C8-C9-C10, about C8-C9
_TWW_K_BOND = 5.0e4                       # kJ/mol/nm^2, softer than the latch's: 5 fs steps
_TWW_K_SLOW = 15.0                        # kJ/mol, two-fold: barrier 2 k = 30 kJ/mol
_TWW_K_FAST = 2.5                         # kJ/mol, two-fold: barrier 2 k = 5 kJ/mol
_TWW_K_MIDDLE = 20.0                      # kJ/mol, single trans well k (1 + cos phi)


def _two_wells_topology():
    top = md.Topology()
    residue = top.add_residue("TWW", top.add_chain(), resSeq=1)
    atoms = [top.add_atom(f"C{i + 1}", md.element.carbon, residue) for i in range(_TWW_N)]
    for i, j in _TWW_BONDS:
        top.add_bond(atoms[i], atoms[j])
    return top


def _two_wells_force_field():
    n = _TWW_N
    bonds = np.array(_TWW_BONDS)
    angles = np.array([(i, i + 1, i + 2) for i in range(n - 2)])
    torsions = [_TWW_SLOW, _TWW_FAST] + [(i, i + 1, i + 2, i + 3) for i in range(1, n - 4)]
    # Two-fold k (1 + cos(2 phi - pi)) = k (1 - cos 2 phi): minima at 0 and pi,
    # barriers 2 k at +-pi/2. Middle torsions k (1 + cos phi): one well at pi.
    k = [_TWW_K_SLOW, _TWW_K_FAST] + [_TWW_K_MIDDLE] * (n - 5)
    mult = [2, 2] + [1] * (n - 5)
    delta = [np.pi, np.pi] + [0.0] * (n - 5)
    return ToyForceField(
        n,
        bonds=bonds, bond_k=_TWW_K_BOND, bond_r0=_CC,
        angles=angles, angle_k=_K_ANGLE, angle_theta0=np.deg2rad(_BACKBONE_ANGLE),
        torsions=torsions, torsion_k=k, torsion_n=mult, torsion_delta=delta,
        pairs=pairs_beyond(n, bonds, min_bonds=4),
        pair_epsilon=_PAIR_EPSILON, pair_sigma=_PAIR_SIGMA,
    )


def _two_wells_build(slow_angle, fast_angle):
    """Chain coordinates, slow and fast torsions in degrees, the others trans."""
    a = np.deg2rad(_BACKBONE_ANGLE)
    x = [np.zeros(3), np.array([_CC, 0.0, 0.0])]
    x.append(x[1] + _CC * np.array([-np.cos(a), np.sin(a), 0.0]))
    backbone = [slow_angle] + [180.0] * (_TWW_N - 5) + [fast_angle]  # C4 .. C10
    for torsion in backbone:
        x.append(_place(x[-3], x[-2], x[-1], _CC, a, np.deg2rad(torsion)))
    return np.array(x)


def two_wells():
    """The two-wells toy: a slow and a fast two-state torsion far apart in one chain.

    Returns
    -------
    TwoWellSystem
        Ten united carbons C1..C10 in one chain (residue ``TWW``), masses in
        amu from the element. ``slow_dihedral == (0, 1, 2, 3)``
        (C1-C2-C3-C4) with ``wells`` slowA ``(-pi/2, pi/2)`` (near 0 rad) and
        slowB ``(pi/2, -pi/2)`` (near pi rad, wrapping);
        ``fast_dihedral == (6, 7, 8, 9)`` (C7-C8-C9-C10) with ``fast_wells``
        fastA ``(-pi/2, pi/2)`` and fastB ``(pi/2, -pi/2)``. ``states`` has
        ``'slowA'`` and ``'slowB'``, minimized structures in nm, both with the
        fast dihedral in fastB (pi rad). ``contact == (0, 3)`` (C1-C4, the
        1-4 distance across the slow bond: 0.27 nm in slowA, 0.39 nm
        in slowB).

    Notes
    -----
    Force field (energies kJ/mol): bonds ``0.5 k (r - r0)**2`` with
    k = 5e4 kJ/mol/nm**2, r0 = 0.153 nm; angles ``0.5 k (theta - theta0)**2``
    with k = 400 kJ/mol/rad**2, theta0 = 112 deg; slow torsion
    ``15 (1 + cos(2 phi - pi))`` (barrier 30 kJ/mol at +-pi/2); fast torsion
    ``2.5 (1 + cos(2 phi - pi))`` (barrier 5 kJ/mol); the five middle
    torsions single trans wells ``20 (1 + cos phi)``; repulsion (WCA,
    epsilon 2 kJ/mol, sigma 0.34 nm) between atoms more than three bonds
    apart. The two two-fold torsions share no atom and are five bonds apart,
    so they couple only weakly, through the chain. The fastest vibration
    (C-C stretch, reduced mass 6 amu) has a period of about 69 fs; a 5 fs
    time step is safe.

    Examples
    --------
    >>> system = two_wells()
    >>> system.n_atoms, system.topology.n_bonds, system.topology.residue(0).name
    (10, 9, 'TWW')
    >>> sorted(system.states), sorted(system.fast_wells)
    (['slowA', 'slowB'], ['fastA', 'fastB'])
    >>> system.notes['slow_barrier_kj_mol'], system.notes['fast_barrier_kj_mol']
    (30.0, 5.0)
    """
    top = _two_wells_topology()
    ff = _two_wells_force_field()
    masses = np.array([a.element.mass for a in top.atoms], dtype=np.float64)
    states = {
        "slowA": _minimize(ff, _two_wells_build(0.0, 180.0)),
        "slowB": _minimize(ff, _two_wells_build(180.0, 180.0)),
    }
    contact = (0, 3)
    notes = {
        "slow_barrier_kj_mol": 2 * _TWW_K_SLOW,
        "fast_barrier_kj_mol": 2 * _TWW_K_FAST,
        "minimum_energy_kj_mol": {s: ff.energy(x) for s, x in states.items()},
        "contact_distance_at_minimum_nm": {
            s: float(np.linalg.norm(x[contact[0]] - x[contact[1]])) for s, x in states.items()
        },
        "middle_torsions": [[i, i + 1, i + 2, i + 3] for i in range(1, _TWW_N - 4)],
        "recommended_md_step_ps": 0.005,
    }
    description = (
        "Two wells: an invented 10-atom united-atom chain C1..C10. The torsion "
        "C1-C2-C3-C4 is slow (two wells, slowA near 0 rad and slowB near pi rad, "
        "barrier 30 kJ/mol); the torsion C7-C8-C9-C10 at the other end is fast "
        "(wells fastA near 0 and fastB near pi, barrier 5 kJ/mol) and hops between "
        "its wells many times in every run. All other motions are single-well."
    )
    half = np.pi / 2
    return TwoWellSystem(
        name="two_wells",
        topology=top,
        force_field=ff,
        masses=masses,
        states=states,
        slow_dihedral=_TWW_SLOW,
        wells={"slowA": (-half, half), "slowB": (half, -half)},
        contact=contact,
        description=description,
        notes=notes,
        fast_dihedral=_TWW_FAST,
        fast_wells={"fastA": (-half, half), "fastB": (half, -half)},
    )
