"""Well-tempered metadynamics along one collective variable, for the testbed.

A :class:`WellTemperedBias` holds a history-dependent bias ``V(s)`` on one
collective variable (CV) ``s(x)``, stored on a grid: every `pace` steps a
Gaussian kernel is added at the current value of the CV, with its height
scaled down by ``exp(-V(s) / (kB dT))``, ``dT = (gamma - 1) T`` (well-tempered
metadynamics, Barducci, Bussi and Parrinello, Phys. Rev. Lett. 100, 020603
(2008), from memory; metadynamics itself: Laio and Parrinello, PNAS 99, 12562
(2002), from memory). In the well-tempered limit the bias converges to
``V(s) = -(1 - 1/gamma) F(s)`` up to a constant, so ``F(s) = -gamma / (gamma - 1)
V(s)``. The bias acts on the atoms through the ``bias=`` hook of
:class:`~cvdesign.testbed.ToyForceField`, with forces ``-dV/ds grad s``.

The module also holds the pieces of a known-answer check: a four-atom toy with
one asymmetric two-well torsion (:func:`asymmetric_torsion`), whose free-energy
difference between the wells follows from a one-dimensional quadrature
(:func:`well_delta_f`), a dihedral CV with its analytic gradient
(:func:`dihedral_cv`) and a driver (:func:`run_biased`).

Units: nm, ps, kJ/mol, rad, K.

Examples
--------
>>> system = asymmetric_torsion()
>>> bias = WellTemperedBias(dihedral_cv(system.slow_dihedral), sigma=0.3,
...                         height=1.0, pace=50, bias_factor=6.0,
...                         temperature=300.0, grid=(-np.pi, np.pi, 90),
...                         periodic=True)
>>> run = run_biased(system, system.states["trans"], 500, bias=bias,
...                  friction=2.0, timestep=0.004, seed=0)
>>> run.cv.shape, bias.n_kernels
((10,), 10)
"""

from dataclasses import dataclass

import mdtraj as md
import numpy as np

from .forcefield import ToyForceField
from .langevin import BOLTZMANN, BAOABIntegrator
from .toys import ToySystem

__all__ = [
    "BiasedRun",
    "WellTemperedBias",
    "asymmetric_torsion",
    "asymmetric_torsion_potential",
    "dihedral_cv",
    "run_biased",
    "well_delta_f",
]

_TWO_PI = 2.0 * np.pi


# --------------------------------------------------------------------------
# A dihedral CV with its gradient.


def _cross(a, b):
    return np.array([a[1] * b[2] - a[2] * b[1],
                     a[2] * b[0] - a[0] * b[2],
                     a[0] * b[1] - a[1] * b[0]])


def dihedral_cv(atoms):
    """A dihedral angle as a CV callable ``cv(x) -> (value, gradient)``.

    Parameters
    ----------
    atoms : sequence of 4 int
        0-based atoms ``(i, j, k, l)``; IUPAC sign convention (that of
        :func:`~cvdesign.testbed.dihedral_angles`).

    Returns
    -------
    callable
        ``cv(x)`` for one configuration `x` of shape ``(n_atoms, 3)`` in nm,
        returning the angle in ``[-pi, pi]`` rad and its gradient, an array of
        shape ``(n_atoms, 3)`` in rad/nm (zero except on the four atoms).

    Examples
    --------
    >>> cv = dihedral_cv((0, 1, 2, 3))
    >>> x = np.array([[1.0, 0, 0], [0, 0, 0], [0, 0, 1], [0, 1, 1]])
    >>> value, grad = cv(x)
    >>> round(value, 6), grad.shape
    (1.570796, (4, 3))
    """
    i, j, k, l = (int(a) for a in atoms)

    def cv(x):
        x = np.asarray(x, dtype=np.float64)
        b1 = x[j] - x[i]
        b2 = x[k] - x[j]
        b3 = x[l] - x[k]
        m = _cross(b1, b2)
        n = _cross(b2, b3)
        b2b2 = b2 @ b2
        lb2 = np.sqrt(b2b2)
        phi = float(np.arctan2(lb2 * (b1 @ n), m @ n))
        mm = m @ m
        nn = n @ n
        grad = np.zeros(x.shape)
        if mm > 0.0 and nn > 0.0:  # undefined (zero) for three collinear atoms
            g0 = (-lb2 / mm) * m
            g3 = (lb2 / nn) * n
            p = (b1 @ b2) / b2b2
            q = (b3 @ b2) / b2b2
            grad[i] += g0
            grad[j] += q * g3 - (p + 1.0) * g0
            grad[k] += p * g0 - (q + 1.0) * g3
            grad[l] += g3
        return phi, grad

    return cv


# --------------------------------------------------------------------------
# The bias.


class WellTemperedBias:
    """Well-tempered metadynamics bias on one CV, accumulated on a grid.

    Parameters
    ----------
    cv : callable
        ``cv(x) -> (value, gradient)`` for one configuration `x` of shape
        ``(n_atoms, 3)`` in nm; `gradient` has the shape of `x` (units of the
        CV per nm).
    sigma : float
        Width (standard deviation) of the Gaussian kernels, in units of the CV.
    height : float
        Initial kernel height ``h``, kJ/mol.
    pace : int
        Steps between depositions (used by :func:`run_biased`).
    bias_factor : float
        ``gamma = (T + dT) / T > 1``; the CV is sampled as if at ``gamma T``.
    temperature : float
        Temperature ``T`` of the simulation, K.
    grid : tuple of (float, float, int)
        ``(lo, hi, n_bins)``: the grid covers ``[lo, hi]`` with `n_bins`
        intervals of width ``(hi - lo) / n_bins``.
    periodic : bool, default=False
        If True the CV is periodic with period ``hi - lo`` (e.g. a dihedral on
        ``(-pi, pi)``): there are `n_bins` nodes, kernels wrap around and CV
        values are wrapped into ``[lo, hi)``. If False there are ``n_bins + 1``
        nodes, and beyond the grid the bias is held at its edge value (no
        force there).

    Attributes
    ----------
    nodes : ndarray of shape (n_nodes,)
        Grid nodes, units of the CV.
    values : ndarray of shape (n_nodes,)
        Bias ``V`` at the nodes, kJ/mol.
    derivatives : ndarray of shape (n_nodes,)
        ``dV/ds`` at the nodes, kJ/mol per unit of the CV (accumulated
        analytically, not by differencing).
    centers, heights : ndarray of shape (n_kernels,)
        Centre and (well-tempered) height, kJ/mol, of every deposited kernel.

    Notes
    -----
    Between nodes, ``V`` is the cubic Hermite interpolant of the node values
    and derivatives, and the force uses the derivative of that same
    interpolant, so energy and forces are exactly consistent; the
    interpolation error is of order ``(bin width / sigma)**4`` relative.
    On a periodic grid kernels use the minimum-image distance, so `sigma`
    should be well below half the period.

    Examples
    --------
    >>> bias = WellTemperedBias(lambda x: (float(x[0, 0]), np.eye(1, 3)),
    ...                         sigma=0.1, height=2.0, pace=10, bias_factor=5.0,
    ...                         temperature=300.0, grid=(-1.0, 1.0, 200))
    >>> round(bias.deposit(0.0), 6)  # the first kernel has the full height
    2.0
    >>> round(float(bias.bias_at(0.1)), 4)  # 2 exp(-1/2)
    1.2131
    >>> energy, forces = bias(np.array([[0.1, 0.0, 0.0]]))
    >>> round(float(forces[0, 0]), 3)  # -dV/ds = 2 exp(-1/2) 0.1 / 0.01
    12.131
    """

    def __init__(self, cv, *, sigma, height, pace, bias_factor, temperature, grid,
                 periodic=False):
        if not callable(cv):
            raise TypeError(f"cv must be a callable cv(x) -> (value, gradient); got {cv!r}")
        self.cv = cv
        self.sigma = float(sigma)
        self.height = float(height)
        self.pace = int(pace)
        self.bias_factor = float(bias_factor)
        self.temperature = float(temperature)
        self.periodic = bool(periodic)
        if not self.sigma > 0:
            raise ValueError(f"sigma={sigma!r} must be positive")
        if not self.height >= 0:
            raise ValueError(f"height={height!r} must be zero or positive (kJ/mol)")
        if self.pace < 1:
            raise ValueError(f"pace={pace!r} must be a positive number of steps")
        if not (self.bias_factor > 1 and np.isfinite(self.bias_factor)):
            raise ValueError(f"bias_factor={bias_factor!r} must be finite and > 1")
        if not self.temperature > 0:
            raise ValueError(f"temperature={temperature!r} must be positive (K)")
        lo, hi, n_bins = grid
        self.lo, self.hi, self.n_bins = float(lo), float(hi), int(n_bins)
        if not (self.hi > self.lo and self.n_bins >= 2):
            raise ValueError(f"grid=(lo, hi, n_bins) needs hi > lo and n_bins >= 2; got {grid!r}")
        self.spacing = (self.hi - self.lo) / self.n_bins
        n_nodes = self.n_bins if self.periodic else self.n_bins + 1
        self.nodes = self.lo + self.spacing * np.arange(n_nodes)
        self.values = np.zeros(n_nodes)
        self.derivatives = np.zeros(n_nodes)
        self._centers = []
        self._heights = []

    # ------------------------------------------------------------------
    @property
    def kT(self):
        """Thermal energy ``BOLTZMANN * temperature``, kJ/mol."""
        return BOLTZMANN * self.temperature

    @property
    def delta_temperature(self):
        """``dT = (gamma - 1) T``, K."""
        return (self.bias_factor - 1.0) * self.temperature

    @property
    def n_kernels(self):
        """Number of kernels deposited so far."""
        return len(self._centers)

    @property
    def centers(self):
        return np.array(self._centers, dtype=np.float64)

    @property
    def heights(self):
        return np.array(self._heights, dtype=np.float64)

    def _displacement(self, s, c):
        d = np.subtract(s, c)
        if self.periodic:
            period = self.hi - self.lo
            d = d - period * np.round(d / period)
        return d

    def deposit(self, s):
        """Add one well-tempered kernel centred at `s`.

        Parameters
        ----------
        s : float
            CV value of the centre.

        Returns
        -------
        float
            Height used, ``height * exp(-V(s) / (kB dT))``, kJ/mol.
        """
        s = float(s)
        if self.periodic:
            s = self.lo + (s - self.lo) % (self.hi - self.lo)
        h = self.height * np.exp(-float(self.bias_at(s)) / (BOLTZMANN * self.delta_temperature))
        d = self._displacement(self.nodes, s)
        g = h * np.exp(-0.5 * (d / self.sigma) ** 2)
        self.values += g
        self.derivatives -= g * d / self.sigma ** 2
        self._centers.append(s)
        self._heights.append(float(h))
        return float(h)

    def _locate(self, s):
        s = np.asarray(s, dtype=np.float64)
        n = self.n_bins
        if self.periodic:
            u = ((s - self.lo) % (self.hi - self.lo)) / self.spacing
            i = np.minimum(np.floor(u).astype(np.intp), n - 1)
            t = u - i
            return i, (i + 1) % n, t, np.ones(s.shape, dtype=bool)
        inside = (s >= self.lo) & (s <= self.hi)
        u = (np.clip(s, self.lo, self.hi) - self.lo) / self.spacing
        i = np.minimum(np.floor(u).astype(np.intp), n - 1)
        return i, i + 1, u - i, inside

    def bias_and_derivative(self, s):
        """Bias ``V(s)`` and ``dV/ds`` from the grid (cubic Hermite interpolation).

        Parameters
        ----------
        s : float or array-like
            CV values.

        Returns
        -------
        value : ndarray of the shape of `s`
            kJ/mol.
        derivative : ndarray of the shape of `s`
            kJ/mol per unit of the CV (zero beyond a non-periodic grid).
        """
        i0, i1, t, inside = self._locate(s)
        h = self.spacing
        v0, v1 = self.values[i0], self.values[i1]
        d0, d1 = self.derivatives[i0] * h, self.derivatives[i1] * h
        t2 = t * t
        t3 = t2 * t
        value = ((2 * t3 - 3 * t2 + 1) * v0 + (t3 - 2 * t2 + t) * d0
                 + (3 * t2 - 2 * t3) * v1 + (t3 - t2) * d1)
        deriv = ((6 * t2 - 6 * t) * v0 + (3 * t2 - 4 * t + 1) * d0
                 + (6 * t - 6 * t2) * v1 + (3 * t2 - 2 * t) * d1) / h
        return value, np.where(inside, deriv, 0.0)

    def bias_at(self, s):
        """Bias ``V(s)``, kJ/mol, interpolated from the grid.

        Examples
        --------
        >>> bias = WellTemperedBias(lambda x: (0.0, 0 * x), sigma=0.2, height=1.0, pace=1,
        ...                         bias_factor=10.0, temperature=300.0,
        ...                         grid=(-np.pi, np.pi, 60), periodic=True)
        >>> _ = bias.deposit(np.pi - 0.05)  # wraps around
        >>> round(float(bias.bias_at(-np.pi + 0.05)), 2)  # exp(-0.1**2 / (2 0.2**2))
        0.88
        """
        return self.bias_and_derivative(s)[0]

    def kernel_sum(self, s):
        """Bias ``V(s)`` summed directly over the deposited kernels (no grid), kJ/mol."""
        s = np.asarray(s, dtype=np.float64)
        if not self._centers:
            return np.zeros(s.shape)
        d = self._displacement(s[..., None], self.centers)
        return (self.heights * np.exp(-0.5 * (d / self.sigma) ** 2)).sum(axis=-1)

    def free_energy(self, s=None, *, values=None):
        """Free-energy estimate ``F(s) = -gamma / (gamma - 1) V(s)``, minimum zero.

        Parameters
        ----------
        s : array-like, optional
            CV values; the grid nodes when omitted.
        values : array-like of shape (n_nodes,), optional
            A bias on the grid nodes to use instead of the current one (e.g.
            the time average :attr:`BiasedRun.mean_values`); only with ``s=None``.

        Returns
        -------
        ndarray
            kJ/mol, shifted so that its minimum over the returned points is 0.

        Examples
        --------
        >>> bias = WellTemperedBias(lambda x: (0.0, 0 * x), sigma=0.5, height=1.0,
        ...                         pace=1, bias_factor=4.0, temperature=300.0,
        ...                         grid=(-np.pi, np.pi, 40), periodic=True)
        >>> _ = bias.deposit(0.0)
        >>> f = bias.free_energy()
        >>> round(float(f.max() - f[20]), 6), round(float(f.max()), 4)  # 4/3 of the kernel
        (1.333333, 1.3333)
        """
        if values is not None:
            if s is not None:
                raise ValueError("give either s or values, not both")
            v = np.asarray(values, dtype=np.float64)
        else:
            v = self.values if s is None else self.bias_at(s)
        f = -self.bias_factor / (self.bias_factor - 1.0) * v
        return f - f.min()

    def __call__(self, x):
        """Bias energy and forces for one configuration: the force-field hook.

        Parameters
        ----------
        x : ndarray of shape (n_atoms, 3)
            Positions, nm.

        Returns
        -------
        energy : float
            ``V(s(x))``, kJ/mol.
        forces : ndarray of shape (n_atoms, 3)
            ``-dV/ds grad s``, kJ/mol/nm.
        """
        s, grad = self.cv(x)
        value, deriv = self.bias_and_derivative(s)
        return float(value), -float(deriv) * np.asarray(grad, dtype=np.float64)


# --------------------------------------------------------------------------
# Driver.


@dataclass
class BiasedRun:
    """Result of :func:`run_biased`.

    Attributes
    ----------
    cv : ndarray of shape (n_reports,) or (n_reports, n_walkers)
        CV at the reported frames (every `report_interval` steps).
    times : ndarray of shape (n_reports,)
        Time of each frame since the start, ps.
    bias : WellTemperedBias
        The bias after the run (the object passed in, updated in place).
    positions : ndarray of the shape of `x0`
        Final positions, nm.
    velocities : ndarray of the shape of `x0`
        Final velocities, nm/ps.
    mean_values : ndarray of shape (n_nodes,)
        Bias on the grid nodes averaged over the depositions after the first
        `average_from` fraction of the run, kJ/mol; a less noisy input to
        ``bias.free_energy(values=...)`` than the final bias.
    """

    cv: np.ndarray
    times: np.ndarray
    bias: WellTemperedBias
    positions: np.ndarray
    velocities: np.ndarray
    mean_values: np.ndarray


def run_biased(system, x0, n_steps, *, bias, friction, timestep, seed=None, v0=None,
               report_interval=None, average_from=0.5):
    """Langevin dynamics under a well-tempered bias that grows every ``bias.pace`` steps.

    Parameters
    ----------
    system : object
        Has ``force_field`` (a :class:`~cvdesign.testbed.ToyForceField`, whose
        ``with_bias`` hook carries the bias) and ``masses`` (amu), e.g. a
        :class:`~cvdesign.testbed.ToySystem`.
    x0 : array-like of shape (n_atoms, 3) or (n_walkers, n_atoms, 3)
        Initial positions, nm. Several walkers are integrated in lockstep
        (one vectorized force-field call per step) and share the one bias:
        every ``pace`` steps each walker deposits a kernel, in walker order.
    n_steps : int
        Number of steps (rounded down to a multiple of ``bias.pace``).
    bias : WellTemperedBias
        Updated in place; its `temperature` is the bath temperature.
    friction : float
        1/ps.
    timestep : float
        ps.
    seed : int or None, default=None
        Seed of the integrator; the same seed gives the same run.
    v0 : array-like of the shape of `x0`, optional
        Initial velocities, nm/ps (Maxwell-Boltzmann when omitted).
    report_interval : int, optional
        Steps between reported CV values; must divide ``bias.pace``; default
        ``bias.pace``. A kernel is deposited at the CV value of every
        ``pace``-th step, after which forces are recomputed.
    average_from : float, default=0.5
        Fraction of the depositions after which the grid bias is averaged
        into :attr:`BiasedRun.mean_values`.

    Returns
    -------
    BiasedRun
    """
    pace = bias.pace
    report = pace if report_interval is None else int(report_interval)
    if report < 1 or pace % report:
        raise ValueError(f"report_interval={report_interval!r} must divide pace={pace}")
    ff = system.force_field.with_bias(bias)
    integ = BAOABIntegrator(ff, system.masses, temperature=bias.temperature,
                            friction=friction, timestep=timestep, seed=seed)
    x = np.array(x0, dtype=np.float64)
    v = integ.maxwell_boltzmann(x.shape) if v0 is None else np.array(v0, dtype=np.float64)
    n_chunks = int(n_steps) // pace
    walkers = x.ndim == 3
    cvs = []
    first = min(int(float(average_from) * n_chunks), max(n_chunks - 1, 0))
    total = np.zeros_like(bias.values)
    for chunk in range(n_chunks):
        frames, _ = integ.run(x, pace, report_interval=report, v0=v)
        x, v = integ.positions_, integ.velocities_
        if walkers:
            cvs.extend([bias.cv(w)[0] for w in f] for f in frames)
            for s in cvs[-1]:
                bias.deposit(s)
        else:
            cvs.extend(bias.cv(f)[0] for f in frames)
            bias.deposit(cvs[-1])
        if chunk >= first:
            total += bias.values
    mean = total / max(n_chunks - first, 1) if n_chunks else bias.values.copy()
    times = np.arange(1, len(cvs) + 1) * (report * float(timestep))
    return BiasedRun(cv=np.array(cvs), times=times, bias=bias, positions=x, velocities=v,
                     mean_values=mean)


# --------------------------------------------------------------------------
# A known-answer system.

_AT_CC = 0.153            # nm
_AT_K_BOND = 2.0e4        # kJ/mol/nm**2
_AT_ANGLE = 110.0         # deg
_AT_K_ANGLE = 300.0       # kJ/mol/rad**2


def asymmetric_torsion_potential(phi, k_twofold=10.0, k_onefold=2.0):
    """The torsion energy of :func:`asymmetric_torsion`, kJ/mol.

    ``k2 (1 + cos(2 phi - pi)) + k1 (1 + cos phi)``: wells near 0 (``cis``,
    raised by ``2 k1``) and near pi (``trans``), barriers near ``+-pi/2``.

    Examples
    --------
    >>> [round(float(asymmetric_torsion_potential(p)), 6) for p in (0.0, np.pi)]
    [4.0, 0.0]
    """
    phi = np.asarray(phi, dtype=np.float64)
    return k_twofold * (1.0 + np.cos(2.0 * phi - np.pi)) + k_onefold * (1.0 + np.cos(phi))


def asymmetric_torsion(k_twofold=10.0, k_onefold=2.0):
    """A four-atom chain with one asymmetric two-well torsion and nothing else slow.

    Parameters
    ----------
    k_twofold : float, default=10.0
        Amplitude of the two-fold term, kJ/mol (barrier about ``2 k_twofold``).
    k_onefold : float, default=2.0
        Amplitude of the one-fold term, kJ/mol; raises the ``cis`` well (near 0)
        by ``2 k_onefold`` over the ``trans`` well (near pi).

    Returns
    -------
    ToySystem
        Four united carbons (residue ``ATR``); harmonic bonds (k = 2e4
        kJ/mol/nm**2, r0 = 0.153 nm) and angles (k = 300 kJ/mol/rad**2,
        theta0 = 110 deg), the torsion (0, 1, 2, 3) with energy
        :func:`asymmetric_torsion_potential`, no pair terms. ``wells``: cis
        ``(-pi/2, pi/2)``, trans ``(pi/2, -pi/2)`` (wrapping).

    Notes
    -----
    With no term coupling the dihedral to the bonds and angles, and since the
    Jacobian of bond-angle-torsion coordinates, ``prod r**2 sin(theta)``, does
    not depend on the dihedral, the marginal density of the dihedral is
    exactly ``exp(-V(phi) / kT)`` (as long as no angle reaches 180 deg, which
    the angle term makes vanishingly rare). The free-energy difference between
    the wells is then a one-dimensional integral (:func:`well_delta_f`).
    Lightest vibration period (stretch, reduced mass 6 amu) about 0.11 ps; a
    4 fs step is fine.

    Examples
    --------
    >>> system = asymmetric_torsion()
    >>> [round(abs(float(system.slow_angle(system.states[s]))), 3) for s in ("cis", "trans")]
    [0.0, 3.142]
    """
    top = md.Topology()
    residue = top.add_residue("ATR", top.add_chain(), resSeq=1)
    atoms = [top.add_atom(f"C{i + 1}", md.element.carbon, residue) for i in range(4)]
    bonds = [(0, 1), (1, 2), (2, 3)]
    for i, j in bonds:
        top.add_bond(atoms[i], atoms[j])
    ff = ToyForceField(
        4, bonds=bonds, bond_k=_AT_K_BOND, bond_r0=_AT_CC,
        angles=[(0, 1, 2), (1, 2, 3)], angle_k=_AT_K_ANGLE,
        angle_theta0=np.deg2rad(_AT_ANGLE),
        torsions=[(0, 1, 2, 3), (0, 1, 2, 3)], torsion_k=[k_twofold, k_onefold],
        torsion_n=[2, 1], torsion_delta=[np.pi, 0.0],
    )
    masses = np.array([a.element.mass for a in top.atoms])
    a = np.deg2rad(_AT_ANGLE)

    def build(phi):
        x0 = np.array([_AT_CC * np.cos(a), _AT_CC * np.sin(a), 0.0])
        x1, x2 = np.zeros(3), np.array([_AT_CC, 0.0, 0.0])
        # The fourth atom: angle a at x2, dihedral phi about x1-x2 (IUPAC sign).
        r = _AT_CC * np.sin(a)
        x3 = x2 + np.array([-_AT_CC * np.cos(a), r * np.cos(phi), -r * np.sin(phi)])
        return np.array([x0, x1, x2, x3])

    half = np.pi / 2
    return ToySystem(
        name="asymmetric_torsion",
        topology=top,
        force_field=ff,
        masses=masses,
        states={"cis": build(0.0), "trans": build(np.pi)},
        slow_dihedral=(0, 1, 2, 3),
        wells={"cis": (-half, half), "trans": (half, -half)},
        contact=(0, 3),
        description=("Asymmetric torsion: an invented four-atom chain whose one slow "
                     "motion is a two-well torsion with an uneven pair of wells."),
        notes={"k_twofold": k_twofold, "k_onefold": k_onefold,
               "recommended_timestep_ps": 0.004},
    )


def _in_interval(s, interval):
    lo, hi = interval
    return (s >= lo) & (s <= hi) if lo <= hi else (s >= lo) | (s <= hi)


def well_delta_f(s, f, temperature, well_a, well_b):
    """``F_A - F_B = -kT ln(sum_A exp(-f/kT) / sum_B exp(-f/kT))`` on a uniform grid.

    Parameters
    ----------
    s : array-like of shape (n,)
        Uniformly spaced CV values (e.g. a periodic grid, each point once).
    f : array-like of shape (n,)
        Free energy (or, for a decoupled CV, potential) at `s`, kJ/mol; any
        constant offset cancels.
    temperature : float
        K.
    well_a, well_b : tuple of float
        ``(low, high)`` intervals of the two states; ``low > high`` wraps
        around (as the ``wells`` of a :class:`~cvdesign.testbed.ToySystem`).

    Returns
    -------
    float
        ``F_A - F_B``, kJ/mol.

    Examples
    --------
    The reference for :func:`asymmetric_torsion` at 300 K:

    >>> phi = np.linspace(-np.pi, np.pi, 20000, endpoint=False)
    >>> dF = well_delta_f(phi, asymmetric_torsion_potential(phi), 300.0,
    ...                   (-np.pi / 2, np.pi / 2), (np.pi / 2, -np.pi / 2))
    >>> round(dF, 2)
    3.85
    """
    s = np.asarray(s, dtype=np.float64)
    f = np.asarray(f, dtype=np.float64)
    kT = BOLTZMANN * float(temperature)
    w = np.exp(-(f - f.min()) / kT)
    za = w[_in_interval(s, well_a)].sum()
    zb = w[_in_interval(s, well_b)].sum()
    return float(-kT * np.log(za / zb))
