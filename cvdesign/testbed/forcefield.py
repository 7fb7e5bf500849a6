"""A small classical force field with analytic forces, for toy molecules.

Terms (all energies in kJ/mol, lengths in nm, angles in rad):

* harmonic bonds, ``0.5 k (r - r0)**2`` with ``k`` in kJ/mol/nm**2;
* harmonic angles, ``0.5 k (theta - theta0)**2`` with ``k`` in kJ/mol/rad**2;
* periodic torsions, one cosine per row, ``k (1 + cos(n phi - delta))``; a
  torsion that is a sum of cosines is written as several rows with the same
  four atoms;
* a purely repulsive pair term (the Weeks-Chandler-Andersen form of the
  Lennard-Jones potential), ``4 eps ((s/r)**12 - (s/r)**6) + eps`` for
  ``r < 2**(1/6) s`` and zero beyond, usually for atom pairs more than three
  bonds apart (see :func:`pairs_beyond`);
* an optional bias, any callable ``bias(x) -> (energy, forces)``.

Dihedral angles follow the IUPAC sign convention, the one of
:func:`mdtraj.compute_dihedrals`: looking along the central bond from its first
atom, a clockwise turn of the front bond onto the back bond is positive.

Every term is vectorized over its rows, and :meth:`ToyForceField.energy_forces`
also accepts a stack of configurations of shape ``(..., n_atoms, 3)``.
"""

import networkx as nx
import numpy as np

__all__ = ["ToyForceField", "pairs_beyond", "dihedral_angles"]


def _as_index(value, width, name):
    arr = np.asarray(value, dtype=np.intp)
    if arr.size == 0:
        return np.zeros((0, width), dtype=np.intp)
    if arr.ndim != 2 or arr.shape[1] != width:
        raise ValueError(
            f"{name} must have shape (n, {width}); got an array of shape {arr.shape}"
        )
    return arr


def _as_param(value, n, name, dtype=np.float64):
    arr = np.asarray(value, dtype=dtype)
    if arr.ndim == 0:
        arr = np.full(n, arr, dtype=dtype)
    if arr.shape != (n,):
        raise ValueError(
            f"{name} must be a scalar or have shape ({n},); got shape {arr.shape}"
        )
    return arr


def pairs_beyond(n_atoms, bonds, *, min_bonds=4):
    """Atom pairs separated by at least `min_bonds` bonds (or not connected).

    Parameters
    ----------
    n_atoms : int
        Number of atoms.
    bonds : array-like of shape (n_bonds, 2)
        Bonded atom pairs, 0-based.
    min_bonds : int, default=4
        Smallest number of bonds on the shortest path between the two atoms of
        a returned pair. The default, 4, keeps pairs "more than three bonds
        apart", the usual exclusion of 1-2, 1-3 and 1-4 pairs.

    Returns
    -------
    pairs : ndarray of shape (n_pairs, 2), dtype=intp
        Pairs ``(i, j)`` with ``i < j``, sorted.

    Examples
    --------
    >>> pairs_beyond(6, [(0, 1), (1, 2), (2, 3), (3, 4), (4, 5)]).tolist()
    [[0, 4], [0, 5], [1, 5]]
    """
    graph = nx.Graph()
    graph.add_nodes_from(range(int(n_atoms)))
    graph.add_edges_from(map(tuple, _as_index(bonds, 2, "bonds").tolist()))
    dist = dict(nx.all_pairs_shortest_path_length(graph, cutoff=min_bonds - 1))
    out = [
        (i, j)
        for i in range(n_atoms)
        for j in range(i + 1, n_atoms)
        if j not in dist[i]
    ]
    return np.array(out, dtype=np.intp).reshape(-1, 2)


def dihedral_angles(x, indices):
    """Dihedral angles, IUPAC sign convention (as :func:`mdtraj.compute_dihedrals`).

    Parameters
    ----------
    x : array-like of shape (..., n_atoms, 3)
        Positions, nm.
    indices : array-like of shape (n_dihedrals, 4)
        Atom quadruplets, 0-based.

    Returns
    -------
    phi : ndarray of shape (..., n_dihedrals)
        Angles in rad, in ``[-pi, pi]``.

    Examples
    --------
    >>> x = [[1.0, 0, 0], [0, 0, 0], [0, 0, 1], [0, 1, 1]]
    >>> round(float(dihedral_angles(x, [[0, 1, 2, 3]])[0]), 6)  # +90 degrees
    1.570796
    """
    x = np.asarray(x, dtype=np.float64)
    idx = _as_index(indices, 4, "indices")
    return _dihedral_terms(x, idx)[0]


# --------------------------------------------------------------------------
# Small vector helpers (np.cross is slow on tiny arrays).

_I1 = [1, 2, 0]
_I2 = [2, 0, 1]


def _cross(a, b):
    return a[..., _I1] * b[..., _I2] - a[..., _I2] * b[..., _I1]


def _dot(a, b):
    return (a * b).sum(axis=-1)


# --------------------------------------------------------------------------
# Individual terms. Each returns the per-row energy of shape (..., n_rows) and
# a list with, for each atom slot of a row (2, 3 or 4 of them), the gradient of
# the row's energy with respect to that atom, shape (..., n_rows, 3).


def _bond_terms(x, idx, k, r0):
    d = x[..., idx[:, 1], :] - x[..., idx[:, 0], :]
    r = np.sqrt(_dot(d, d))
    dr = r - r0
    energy = 0.5 * k * dr * dr
    g = (k * dr / r)[..., None] * d  # dE/dx_j; dE/dx_i = -g
    return energy, [-g, g]


def _angle_terms(x, idx, k, theta0):
    u = x[..., idx[:, 0], :] - x[..., idx[:, 1], :]
    v = x[..., idx[:, 2], :] - x[..., idx[:, 1], :]
    uu = _dot(u, u)
    vv = _dot(v, v)
    uv = _dot(u, v)
    c = _cross(u, v)
    s = np.sqrt(_dot(c, c))  # |u| |v| sin(theta)
    theta = np.arctan2(s, uv)
    dth = theta - theta0
    energy = 0.5 * k * dth * dth
    # d theta / d u = (uv u / |u|^2 - v) / s ;  d theta / d v likewise.
    # An exactly straight angle has no defined force direction: zero force.
    de = (k * dth / np.where(s > 0.0, s, np.inf))[..., None]
    ga = de * ((uv / uu)[..., None] * u - v)
    gc = de * ((uv / vv)[..., None] * v - u)
    return energy, [ga, -ga - gc, gc]


def _dihedral_terms(x, idx):
    """Dihedral angle and its gradient with respect to the four atoms."""
    b1 = x[..., idx[:, 1], :] - x[..., idx[:, 0], :]
    b2 = x[..., idx[:, 2], :] - x[..., idx[:, 1], :]
    b3 = x[..., idx[:, 3], :] - x[..., idx[:, 2], :]
    m = _cross(b1, b2)
    n = _cross(b2, b3)
    b2b2 = _dot(b2, b2)
    lb2 = np.sqrt(b2b2)
    phi = np.arctan2(lb2 * _dot(b1, n),
                     _dot(m, n))
    # Three collinear atoms leave the dihedral undefined: zero gradient there.
    mm = _dot(m, m)
    nn = _dot(n, n)
    mm = np.where(mm > 0.0, mm, np.inf)
    nn = np.where(nn > 0.0, nn, np.inf)
    g0 = (-lb2 / mm)[..., None] * m
    g3 = (lb2 / nn)[..., None] * n
    p = (_dot(b1, b2) / b2b2)[..., None]
    q = (_dot(b3, b2) / b2b2)[..., None]
    g1 = q * g3 - (p + 1.0) * g0
    g2 = p * g0 - (q + 1.0) * g3
    return phi, [g0, g1, g2, g3]


def _torsion_terms(x, idx, k, n, delta):
    phi, dphi = _dihedral_terms(x, idx)
    arg = n * phi - delta
    energy = k * (1.0 + np.cos(arg))
    de = -k * n * np.sin(arg)
    de = de[..., None]
    return energy, [de * g for g in dphi]


def _pair_terms(x, idx, eps, sigma):
    d = x[..., idx[:, 1], :] - x[..., idx[:, 0], :]
    r2 = _dot(d, d)
    inside = r2 < (2.0 ** (1.0 / 3.0)) * sigma * sigma  # r < 2**(1/6) sigma
    inv_r2 = 1.0 / r2
    s6 = (sigma * sigma * inv_r2) ** 3
    energy = inside * (4.0 * eps * (s6 * s6 - s6) + eps)
    # (dE/dr) / r = -(24 eps / r^2) (2 (s/r)^12 - (s/r)^6)
    de_r = inside * (-24.0 * eps * (2.0 * s6 * s6 - s6) * inv_r2)
    g = de_r[..., None] * d
    return energy, [-g, g]


class ToyForceField:
    """Bonds, angles, periodic torsions and a repulsive pair term, with analytic forces.

    Parameters
    ----------
    n_atoms : int
        Number of atoms.
    bonds : array-like of shape (n_bonds, 2), default=()
        Bonded atom pairs, 0-based.
    bond_k : float or array-like of shape (n_bonds,), default=()
        Force constants, kJ/mol/nm**2; energy ``0.5 k (r - r0)**2``.
    bond_r0 : float or array-like of shape (n_bonds,), default=()
        Rest lengths, nm.
    angles : array-like of shape (n_angles, 3), default=()
        Atom triplets ``(i, j, k)`` with `j` the vertex.
    angle_k : float or array-like of shape (n_angles,), default=()
        Force constants, kJ/mol/rad**2; energy ``0.5 k (theta - theta0)**2``.
    angle_theta0 : float or array-like of shape (n_angles,), default=()
        Rest angles, rad.
    torsions : array-like of shape (n_terms, 4), default=()
        One row per cosine term; repeat the four atoms for a sum of cosines.
    torsion_k : float or array-like of shape (n_terms,), default=()
        Amplitudes, kJ/mol; energy ``k (1 + cos(n phi - delta))``.
    torsion_n : int or array-like of shape (n_terms,), default=()
        Multiplicities (positive integers).
    torsion_delta : float or array-like of shape (n_terms,), default=()
        Phases, rad.
    pairs : array-like of shape (n_pairs, 2), default=()
        Atom pairs that repel each other; see :func:`pairs_beyond`.
    pair_epsilon : float or array-like of shape (n_pairs,), default=1.0
        Well depth of the underlying Lennard-Jones potential, kJ/mol.
    pair_sigma : float or array-like of shape (n_pairs,), default=0.3
        Size, nm; the repulsion acts for ``r < 2**(1/6) sigma``.
    bias : callable or None, default=None
        Extra term ``bias(x) -> (energy, forces)`` with `x` of shape
        ``(n_atoms, 3)`` in nm, energy in kJ/mol and forces of shape
        ``(n_atoms, 3)`` in kJ/mol/nm, added to the force-field terms. For a
        stack of configurations it is called once per configuration, unless
        it has a true attribute ``accepts_stacks``: then it is called once
        with the stack ``(..., n_atoms, 3)`` and returns energies ``(...)``
        and forces ``(..., n_atoms, 3)``.

    Notes
    -----
    Cost is linear in the number of terms; each call is a few dozen numpy
    operations, so for a dozen atoms a call takes tens of microseconds, and a
    stack of a few configurations costs little more than one.

    Where an angle is exactly straight, or a dihedral has three collinear
    atoms, the direction of the force is undefined; that term then
    contributes its energy but no force.

    Examples
    --------
    A stretched diatomic:

    >>> ff = ToyForceField(2, bonds=[(0, 1)], bond_k=1000.0, bond_r0=0.1)
    >>> e, f = ff.energy_forces([[0.0, 0, 0], [0.12, 0, 0]])
    >>> round(e, 6), round(float(f[1, 0]), 6)
    (0.2, -20.0)
    """

    def __init__(self, n_atoms, *, bonds=(), bond_k=(), bond_r0=(), angles=(),
                 angle_k=(), angle_theta0=(), torsions=(), torsion_k=(),
                 torsion_n=(), torsion_delta=(), pairs=(), pair_epsilon=1.0,
                 pair_sigma=0.3, bias=None):
        self.n_atoms = int(n_atoms)
        self.bonds = _as_index(bonds, 2, "bonds")
        self.bond_k = _as_param(bond_k, len(self.bonds), "bond_k")
        self.bond_r0 = _as_param(bond_r0, len(self.bonds), "bond_r0")
        self.angles = _as_index(angles, 3, "angles")
        self.angle_k = _as_param(angle_k, len(self.angles), "angle_k")
        self.angle_theta0 = _as_param(angle_theta0, len(self.angles), "angle_theta0")
        self.torsions = _as_index(torsions, 4, "torsions")
        self.torsion_k = _as_param(torsion_k, len(self.torsions), "torsion_k")
        self.torsion_n = _as_param(torsion_n, len(self.torsions), "torsion_n")
        self.torsion_delta = _as_param(torsion_delta, len(self.torsions), "torsion_delta")
        self.pairs = _as_index(pairs, 2, "pairs")
        self.pair_epsilon = _as_param(pair_epsilon, len(self.pairs), "pair_epsilon")
        self.pair_sigma = _as_param(pair_sigma, len(self.pairs), "pair_sigma")
        if bias is not None and not callable(bias):
            raise TypeError(f"bias must be a callable bias(x) -> (energy, forces); got {bias!r}")
        self.bias = bias
        for name in ("bonds", "angles", "torsions", "pairs"):
            arr = getattr(self, name)
            if arr.size and (arr.min() < 0 or arr.max() >= self.n_atoms):
                raise ValueError(
                    f"{name} refer to atoms outside 0..{self.n_atoms - 1}: "
                    f"min {arr.min()}, max {arr.max()}"
                )
        if np.any(self.torsion_n <= 0) or np.any(self.torsion_n != np.round(self.torsion_n)):
            raise ValueError(f"torsion_n must be positive integers; got {self.torsion_n.tolist()}")
        # Scatter matrix: row a, column c is 1 when gradient column c belongs to atom a.
        columns = np.concatenate([self.bonds.T.ravel(), self.angles.T.ravel(),
                                  self.torsions.T.ravel(), self.pairs.T.ravel()])
        self._scatter = np.zeros((self.n_atoms, columns.size))
        self._scatter[columns, np.arange(columns.size)] = 1.0

    def with_bias(self, bias):
        """A copy of this force field with `bias` as its extra term.

        Parameters
        ----------
        bias : callable or None
            ``bias(x) -> (energy kJ/mol, forces (n_atoms, 3) kJ/mol/nm)``;
            None removes the bias.

        Returns
        -------
        ToyForceField
            A new force field; this one is unchanged.

        Examples
        --------
        >>> ff = ToyForceField(1)
        >>> pull = ff.with_bias(lambda x: (float(x[0, 0]), -np.eye(1, 3)))
        >>> pull.energy_forces([[0.5, 0, 0]])[0]
        0.5
        """
        new = object.__new__(type(self))
        new.__dict__.update(self.__dict__)
        if bias is not None and not callable(bias):
            raise TypeError(f"bias must be a callable bias(x) -> (energy, forces); got {bias!r}")
        new.bias = bias
        return new

    def with_torsion_scale(self, atoms, factor):
        """A copy with the torsion terms about `atoms` scaled by `factor`.

        Parameters
        ----------
        atoms : sequence of 4 int
            0-based atoms ``(i, j, k, l)`` of the dihedral; terms listed as
            ``(l, k, j, i)`` (the same dihedral) are scaled too.
        factor : float
            Multiplies the amplitudes ``torsion_k`` of those terms (0 switches
            them off).

        Returns
        -------
        ToyForceField
            A new force field (bias included); this one is unchanged.

        Raises
        ------
        ValueError
            No torsion term is about `atoms`.

        Examples
        --------
        >>> ff = ToyForceField(4, torsions=[(0, 1, 2, 3)], torsion_k=5.0, torsion_n=1,
        ...                    torsion_delta=0.0)
        >>> x = [[1.0, 0, 0], [0, 0, 0], [0, 0, 1], [1, 0, 1]]  # dihedral 0: k (1 + 1)
        >>> ff.energy(x), ff.with_torsion_scale((3, 2, 1, 0), 0.5).energy(x)
        (10.0, 5.0)
        """
        quad = np.asarray(atoms, dtype=np.intp)
        if quad.shape != (4,):
            raise ValueError(f"atoms must be 4 atom indices; got {atoms!r}")
        if not np.isfinite(factor):
            raise ValueError(f"factor={factor!r} must be a finite number")
        match = (np.all(self.torsions == quad, axis=1)
                 | np.all(self.torsions == quad[::-1], axis=1))
        if not match.any():
            raise ValueError(f"no torsion term is about atoms {tuple(quad.tolist())}")
        new = object.__new__(type(self))
        new.__dict__.update(self.__dict__)
        new.torsion_k = np.where(match, self.torsion_k * float(factor), self.torsion_k)
        return new

    def terms(self, x):
        """Energy of each kind of term, kJ/mol (for checks and reports).

        Parameters
        ----------
        x : array-like of shape (..., n_atoms, 3)
            Positions, nm.

        Returns
        -------
        dict
            ``{'bond', 'angle', 'torsion', 'pair', 'bias'}`` to energies of
            shape ``(...)`` in kJ/mol.

        Examples
        --------
        >>> ff = ToyForceField(2, bonds=[(0, 1)], bond_k=1000.0, bond_r0=0.1)
        >>> round(float(ff.terms([[0.0, 0, 0], [0.12, 0, 0]])['bond']), 6)
        0.2
        """
        x = self._check(x)
        return {name: e.sum(axis=-1) for name, (e, _) in self._parts(x).items()} | {
            "bias": self._bias(x)[0]
        }

    def energy_forces(self, x):
        """Potential energy and forces.

        Parameters
        ----------
        x : array-like of shape (n_atoms, 3) or (..., n_atoms, 3)
            Positions, nm.

        Returns
        -------
        energy : float or ndarray of shape (...)
            Potential energy, kJ/mol (a float for a single configuration).
        forces : ndarray of shape (..., n_atoms, 3)
            Minus the gradient of the energy, kJ/mol/nm.

        Examples
        --------
        A right angle held at 100 degrees:

        >>> ff = ToyForceField(3, angles=[(0, 1, 2)], angle_k=400.0,
        ...                    angle_theta0=np.deg2rad(100.0))
        >>> e, f = ff.energy_forces([[0.1, 0, 0], [0, 0, 0], [0, 0.1, 0]])
        >>> round(e, 4)  # 0.5 * 400 * (10 pi / 180)**2
        6.0923
        >>> f.shape, round(float(f.sum()), 12)
        ((3, 3), 0.0)
        """
        x = self._check(x)
        parts = self._parts(x)
        energy = sum(e.sum(axis=-1) for e, _ in parts.values())
        grads = np.concatenate([g for _, gs in parts.values() for g in gs], axis=-2)
        forces = -(self._scatter @ grads)
        if self.bias is not None:
            e_bias, f_bias = self._bias(x)
            energy = energy + e_bias
            forces = forces + f_bias
        if np.ndim(energy) == 0:
            energy = float(energy)
        return energy, forces

    def energy(self, x):
        """Potential energy, kJ/mol; see :meth:`energy_forces`.

        Examples
        --------
        >>> ToyForceField(2).energy(np.zeros((2, 3)))
        0.0
        """
        return self.energy_forces(x)[0]

    # ----------------------------------------------------------------------
    def _check(self, x):
        x = np.asarray(x, dtype=np.float64)
        if x.ndim < 2 or x.shape[-2:] != (self.n_atoms, 3):
            raise ValueError(
                f"x must have shape ({self.n_atoms}, 3) or (..., {self.n_atoms}, 3) "
                f"in nm; got shape {x.shape}"
            )
        return x

    def _parts(self, x):
        return {
            "bond": _bond_terms(x, self.bonds, self.bond_k, self.bond_r0),
            "angle": _angle_terms(x, self.angles, self.angle_k, self.angle_theta0),
            "torsion": _torsion_terms(x, self.torsions, self.torsion_k,
                                      self.torsion_n, self.torsion_delta),
            "pair": _pair_terms(x, self.pairs, self.pair_epsilon, self.pair_sigma),
        }

    def _bias(self, x):
        lead = x.shape[:-2]
        if self.bias is None:
            return np.zeros(lead), np.zeros(x.shape)
        if not lead:
            e, f = self.bias(x)
            return float(e), np.asarray(f, dtype=np.float64)
        if getattr(self.bias, "accepts_stacks", False):  # one call for the whole stack
            e, f = self.bias(x)
            e, f = np.asarray(e, dtype=np.float64), np.asarray(f, dtype=np.float64)
            if e.shape != lead or f.shape != x.shape:
                raise ValueError(
                    f"a bias with accepts_stacks must return energies of shape {lead} and "
                    f"forces of shape {x.shape}; got {e.shape} and {f.shape}")
            return e, f
        flat = x.reshape((-1,) + x.shape[-2:])
        out = [self.bias(xi) for xi in flat]
        energy = np.array([float(e) for e, _ in out]).reshape(lead)
        forces = np.stack([np.asarray(f, dtype=np.float64) for _, f in out]).reshape(x.shape)
        return energy, forces
