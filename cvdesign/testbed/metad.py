"""Well-tempered metadynamics along one collective variable, for the testbed.

A :class:`WellTemperedBias` holds a history-dependent bias ``V(s)`` on one
collective variable (CV) ``s(x)``, stored on a grid: every `interval_steps` steps a
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
...                         height=1.0, interval_steps=50, bias_factor=6.0,
...                         temperature=300.0, grid=(-np.pi, np.pi, 90),
...                         periodic=True)
>>> run = run_biased(system, system.states["trans"], 500, bias=bias,
...                  friction=2.0, md_step_ps=0.004, seed=0)
>>> run.cv.shape, bias.n_kernels
((10,), 10)
"""

from dataclasses import dataclass

import mdtraj as md
import numpy as np

from ..constants import BOLTZMANN_KJ_MOL_K
from .forcefield import ToyForceField
from .langevin import LangevinBAOAB
from .toys import ToySystem

__all__ = [
    "BiasedRun",
    "SoftenedReference",
    "WellTemperedBias",
    "asymmetric_torsion",
    "asymmetric_torsion_delta_f",
    "asymmetric_torsion_potential",
    "dihedral_cv",
    "run_biased",
    "softened_delta_f",
    "spec_cv",
    "well_centers",
    "well_delta_f",
]


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


def spec_cv(spec):
    """A :class:`~cvdesign.Spec` as a CV callable ``cv(x) -> (value, gradient)``.

    The value and the analytic gradient come from ``spec.evaluate(...,
    gradient=True)``, so a biased testbed run applies exactly the forces an
    engine would apply from the spec. The callable accepts stacks of
    configurations (``accepts_stacks``), so all walkers of a run are evaluated
    in one call. No periodic box (the toys have none).

    Parameters
    ----------
    spec : cvdesign.Spec
        The CV; made for the toy's topology (same atom count).

    Returns
    -------
    callable
        ``cv(x)`` with `x` of shape ``(n_atoms, 3)`` in nm returns the CV (a
        float, CV units) and its gradient ``(n_atoms, 3)`` in CV units per nm;
        with `x` of shape ``(..., n_atoms, 3)`` it returns arrays of shapes
        ``(...)`` and ``(..., n_atoms, 3)``.

    Examples
    --------
    >>> from cvdesign import Spec
    >>> system = asymmetric_torsion()
    >>> spec = Spec(name="phi", topology=system.topology,
    ...             descriptors=[{"id": "phi", "kind": "dihedral", "atoms": [0, 1, 2, 3]}],
    ...             terms=[{"descriptor": "phi", "transform": "identity", "center": 0.0,
    ...                     "scale": 1.0, "weight": 1.0}], periodic=True)
    >>> value, grad = spec_cv(spec)(system.states["trans"])
    >>> round(abs(value), 4), grad.shape
    (3.1416, (4, 3))
    """
    def cv(x):
        x = np.asarray(x, dtype=np.float64)
        lead = x.shape[:-2]
        values, grad = spec.evaluate(x.reshape((-1,) + x.shape[-2:]), gradient=True)
        if not lead:
            return float(values[0]), grad[0]
        return values.reshape(lead), grad.reshape(x.shape)

    cv.accepts_stacks = True
    return cv


# --------------------------------------------------------------------------
# The bias.


class WellTemperedBias:
    """Well-tempered metadynamics bias on one CV, accumulated on a grid.

    Parameters
    ----------
    cv : callable or None
        ``cv(x) -> (value, gradient)`` for one configuration `x` of shape
        ``(n_atoms, 3)`` in nm; `gradient` has the shape of `x` (units of the
        CV per nm). None when an engine evaluates the CV and applies the
        forces itself (as :func:`cvdesign.testbed.openmm_metad.run_openmm_biased`
        does); the bias is then not callable as a force-field hook.
    sigma : float
        Width (standard deviation) of the Gaussian kernels, in units of the CV.
    height : float
        Initial kernel height ``h``, kJ/mol.
    interval_steps : int
        MD steps between depositions (used by :func:`run_biased`); the
        deposition interval of :func:`cvdesign.bias.hints.suggest_hints`.
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
    ...                         sigma=0.1, height=2.0, interval_steps=10, bias_factor=5.0,
    ...                         temperature=300.0, grid=(-1.0, 1.0, 200))
    >>> round(bias.deposit(0.0), 6)  # the first kernel has the full height
    2.0
    >>> round(float(bias.bias_at(0.1)), 4)  # 2 exp(-1/2)
    1.2131
    >>> energy, forces = bias(np.array([[0.1, 0.0, 0.0]]))
    >>> round(float(forces[0, 0]), 3)  # -dV/ds = 2 exp(-1/2) 0.1 / 0.01
    12.131
    """

    def __init__(self, cv, *, sigma, height, interval_steps, bias_factor, temperature, grid,
                 periodic=False):
        if cv is not None and not callable(cv):
            raise TypeError(f"cv must be a callable cv(x) -> (value, gradient) or None; got "
                            f"{cv!r}")
        self.cv = cv
        self.sigma = float(sigma)
        self.height = float(height)
        self.interval_steps = int(interval_steps)
        self.bias_factor = float(bias_factor)
        self.temperature = float(temperature)
        self.periodic = bool(periodic)
        if not self.sigma > 0:
            raise ValueError(f"sigma={sigma!r} must be positive")
        if not self.height >= 0:
            raise ValueError(f"height={height!r} must be zero or positive (kJ/mol)")
        if self.interval_steps < 1:
            raise ValueError(f"interval_steps={interval_steps!r} must be a positive number of "
                             "steps")
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
        """Thermal energy ``BOLTZMANN_KJ_MOL_K * temperature``, kJ/mol."""
        return BOLTZMANN_KJ_MOL_K * self.temperature

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
        h = self.height * np.exp(-float(self.bias_at(s))
                                 / (BOLTZMANN_KJ_MOL_K * self.delta_temperature))
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
        >>> bias = WellTemperedBias(lambda x: (0.0, 0 * x), sigma=0.2, height=1.0,
        ...                         interval_steps=1, bias_factor=10.0, temperature=300.0,
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
        ...                         interval_steps=1, bias_factor=4.0, temperature=300.0,
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

    @property
    def accepts_stacks(self):
        """True when the CV callable takes stacks of configurations (see :func:`spec_cv`);
        the force field then calls the bias once per step for all walkers."""
        return bool(getattr(self.cv, "accepts_stacks", False))

    def __call__(self, x):
        """Bias energy and forces: the force-field hook.

        Parameters
        ----------
        x : ndarray of shape (n_atoms, 3), or (..., n_atoms, 3) when
            :attr:`accepts_stacks`
            Positions, nm.

        Returns
        -------
        energy : float or ndarray of shape (...)
            ``V(s(x))``, kJ/mol.
        forces : ndarray of the shape of `x`
            ``-dV/ds grad s``, kJ/mol/nm.
        """
        if self.cv is None:
            raise TypeError("this bias has no CV callable (cv=None): the engine that "
                            "evaluates the CV applies its forces")
        s, grad = self.cv(x)
        value, deriv = self.bias_and_derivative(s)
        forces = -np.asarray(deriv, dtype=np.float64)[..., None, None] * np.asarray(
            grad, dtype=np.float64)
        if np.ndim(value) == 0:
            return float(value), forces
        return np.asarray(value, dtype=np.float64), forces


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
    observed : ndarray or None
        ``observe(frames)`` of the reported frames, stacked along the first
        axis (shape ``(n_reports, ...)``), when an `observe` callable was
        given; else None.
    """

    cv: np.ndarray
    times: np.ndarray
    bias: WellTemperedBias
    positions: np.ndarray
    velocities: np.ndarray
    mean_values: np.ndarray
    observed: np.ndarray = None


def run_biased(system, x0, n_steps, *, bias, friction, md_step_ps, seed=None, v0=None,
               report_interval=None, average_from=0.5, observe=None):
    """Langevin dynamics under a well-tempered bias that grows every ``bias.interval_steps`` steps.

    Parameters
    ----------
    system : object
        Has ``force_field`` (a :class:`~cvdesign.testbed.ToyForceField`, whose
        ``with_bias`` hook carries the bias) and ``masses`` (amu), e.g. a
        :class:`~cvdesign.testbed.ToySystem`.
    x0 : array-like of shape (n_atoms, 3) or (n_walkers, n_atoms, 3)
        Initial positions, nm. Several walkers are integrated in lockstep
        (one vectorized force-field call per step) and share the one bias:
        every ``interval_steps`` steps each walker deposits a kernel, in walker order.
    n_steps : int
        Number of steps (rounded down to a multiple of ``bias.interval_steps``).
    bias : WellTemperedBias
        Updated in place; its `temperature` is the bath temperature.
    friction : float
        1/ps.
    md_step_ps : float
        ps.
    seed : int or None, default=None
        Seed of the integrator; the same seed gives the same run.
    v0 : array-like of the shape of `x0`, optional
        Initial velocities, nm/ps (Maxwell-Boltzmann when omitted).
    report_interval : int, optional
        Steps between reported CV values; must divide
        ``bias.interval_steps``; default ``bias.interval_steps``. A kernel is
        deposited at the CV value of every ``interval_steps``-th step, after
        which forces are recomputed.
    average_from : float, default=0.5
        Fraction of the depositions after which the grid bias is averaged
        into :attr:`BiasedRun.mean_values`.
    observe : callable, optional
        ``observe(frames)`` for the reported frames of each deposition
        interval (shape ``(n, n_atoms, 3)`` or ``(n, n_walkers, n_atoms,
        3)``), returning an array with first axis ``n``, e.g.
        ``system.slow_angle``: a quantity other than the CV to follow
        (positions themselves are not kept). :attr:`BiasedRun.observed` is
        None when no deposition interval ran.

    Returns
    -------
    BiasedRun
    """
    interval = bias.interval_steps
    report = interval if report_interval is None else int(report_interval)
    if report < 1 or interval % report:
        raise ValueError(f"report_interval={report_interval!r} must divide "
                         f"interval_steps={interval}")
    ff = system.force_field.with_bias(bias)
    integ = LangevinBAOAB(ff, system.masses, temperature=bias.temperature,
                          friction=friction, md_step_ps=md_step_ps, seed=seed)
    x = np.array(x0, dtype=np.float64)
    v = integ.maxwell_boltzmann(x.shape) if v0 is None else np.array(v0, dtype=np.float64)
    n_chunks = int(n_steps) // interval
    walkers = x.ndim == 3
    cvs = []
    first = min(int(float(average_from) * n_chunks), max(n_chunks - 1, 0))
    total = np.zeros_like(bias.values)
    observed = []
    for chunk in range(n_chunks):
        frames, _ = integ.run(x, interval, report_interval=report, v0=v)
        x, v = integ.positions_, integ.velocities_
        if observe is not None:
            observed.append(np.asarray(observe(frames)))
        if walkers and bias.accepts_stacks:
            cvs.extend(np.asarray(bias.cv(frames)[0]).tolist())
            for s in cvs[-1]:
                bias.deposit(s)
        elif walkers:
            cvs.extend([bias.cv(w)[0] for w in f] for f in frames)
            for s in cvs[-1]:
                bias.deposit(s)
        else:
            cvs.extend(bias.cv(f)[0] for f in frames)
            bias.deposit(cvs[-1])
        if chunk >= first:
            total += bias.values
    mean = total / max(n_chunks - first, 1) if n_chunks else bias.values.copy()
    times = np.arange(1, len(cvs) + 1) * (report * float(md_step_ps))
    return BiasedRun(cv=np.array(cvs), times=times, bias=bias, positions=x, velocities=v,
                     mean_values=mean,
                     observed=np.concatenate(observed) if observed else None)


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
               "recommended_md_step_ps": 0.004},
    )


def asymmetric_torsion_delta_f(system, temperature=300.0):
    """Exact ``F_cis - F_trans`` of an :func:`asymmetric_torsion` system, kJ/mol.

    The dihedral is decoupled from the rest (see :func:`asymmetric_torsion`),
    so the answer is the one-dimensional quadrature :func:`well_delta_f` of
    :func:`asymmetric_torsion_potential` on 20000 points.

    Parameters
    ----------
    system : ToySystem
        Made by :func:`asymmetric_torsion` (its ``notes`` hold the amplitudes).
    temperature : float, default=300.0
        K.

    Returns
    -------
    float
        kJ/mol.

    Examples
    --------
    >>> round(asymmetric_torsion_delta_f(asymmetric_torsion()), 2)
    3.85
    """
    phi = np.linspace(-np.pi, np.pi, 20000, endpoint=False)
    v = asymmetric_torsion_potential(phi, system.notes["k_twofold"], system.notes["k_onefold"])
    return well_delta_f(phi, v, temperature, system.wells["cis"], system.wells["trans"])


def well_centers(*wells):
    """The middle of each ``(low, high)`` interval of a dihedral, rad (``low > high`` wraps).

    Examples
    --------
    >>> [round(c, 4) for c in well_centers((-1.0, 1.0), (2.0, -1.0))]
    [0.0, -2.6416]
    """
    return [float(np.angle(np.exp(0.5j * (lo + hi + (2 * np.pi if lo > hi else 0.0)))))
            for lo, hi in wells]


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
    kT = BOLTZMANN_KJ_MOL_K * float(temperature)
    w = np.exp(-(f - f.min()) / kT)
    za = w[_in_interval(s, well_a)].sum()
    zb = w[_in_interval(s, well_b)].sum()
    return float(-kT * np.log(za / zb))


@dataclass
class SoftenedReference:
    """Result of :func:`softened_delta_f`.

    Attributes
    ----------
    delta_f : float
        ``F_A - F_B`` between the two wells, kJ/mol.
    stderr : float
        Jackknife standard error over the walkers, kJ/mol.
    n_transitions : int
        Core-to-core transitions of the slow dihedral in the softened runs (all
        walkers): many mean the wells were sampled in equilibrium.
    effective_samples : float
        Kish's effective number of frames of the reweighted set,
        ``(sum w)**2 / sum w**2``; successive frames are correlated, so
        independent samples are fewer.
    states : tuple of str
        ``(A, B)``.
    """

    delta_f: float
    stderr: float
    n_transitions: int
    effective_samples: float
    states: tuple


def softened_delta_f(system, n_steps, *, temperature, friction, md_step_ps, factor=0.0,
                     n_walkers=8, report_interval=50, discard=0.1, states=None, seed=None):
    """Reference free-energy difference between the wells of a toy's slow dihedral.

    The torsion terms about ``system.slow_dihedral`` are scaled by `factor`
    (0: switched off), so that unbiased walkers cross between the wells
    often; every frame is then reweighted by ``exp(-(U - U_soft) / kT)``.
    Because the scaled terms depend on the dihedral only, this is exact up to
    sampling error (importance reweighting; Zwanzig, J. Chem. Phys. 22, 1420
    (1954), and Torrie and Valleau, J. Comput. Phys. 23, 187 (1977), from
    memory), and it uses no bias and no CV: an independent reference for a
    metadynamics estimate.

    Parameters
    ----------
    system : ToySystem
        Its ``wells`` define the states (intervals of the slow dihedral, rad).
    n_steps : int
        Steps per walker.
    temperature : float
        K.
    friction : float
        1/ps.
    md_step_ps : float
        ps.
    factor : float, default=0.0
        Scale of the slow torsion's own terms in the sampled force field.
    n_walkers : int, default=8
        Independent walkers, started alternately in the states' structures.
    report_interval : int, default=50
        Steps between the frames that are reweighted.
    discard : float, default=0.1
        Fraction of each walker's frames dropped at the start (relaxation).
    states : tuple of str, optional
        ``(A, B)``; the first two keys of ``system.wells`` by default.
    seed : int or None, default=None
        Seed of the integrator.

    Returns
    -------
    SoftenedReference

    Examples
    --------
    >>> system = asymmetric_torsion()
    >>> ref = softened_delta_f(system, 4000, temperature=300.0, friction=2.0,
    ...                        md_step_ps=0.005, n_walkers=4, seed=0)
    >>> ref.states, ref.n_transitions > 10
    (('cis', 'trans'), True)
    """
    a, b = tuple(system.wells)[:2] if states is None else tuple(states)
    if n_walkers < 2:
        raise ValueError(f"n_walkers={n_walkers!r}: need at least 2 walkers for an error bar")
    n_reports = int(n_steps) // int(report_interval)
    if n_reports - int(float(discard) * n_reports) < 2:
        raise ValueError(f"n_steps={n_steps!r} leaves fewer than 2 frames per walker after "
                         f"discarding {discard!r} of them; run longer")
    soft = system.force_field.with_torsion_scale(system.slow_dihedral, factor)
    integ = LangevinBAOAB(soft, system.masses, temperature=temperature, friction=friction,
                          md_step_ps=md_step_ps, seed=seed)
    x0 = np.stack([system.states[(a, b)[w % 2]] for w in range(int(n_walkers))])
    xyz, _ = integ.run(x0, n_steps, report_interval=report_interval)
    xyz = xyz[int(float(discard) * xyz.shape[0]):]
    kT = BOLTZMANN_KJ_MOL_K * float(temperature)
    log_w = -(system.force_field.energy(xyz) - soft.energy(xyz)) / kT  # (frames, walkers)
    w = np.exp(log_w - log_w.max())
    phi = system.slow_angle(xyz)
    za = np.where(_in_interval(phi, system.wells[a]), w, 0.0).sum(axis=0)
    zb = np.where(_in_interval(phi, system.wells[b]), w, 0.0).sum(axis=0)
    if not (za.sum() > 0 and zb.sum() > 0):
        raise ValueError(f"the walkers never visited state {a!r} or {b!r}; run longer")
    delta = -kT * np.log(za.sum() / zb.sum())
    n = za.size
    jack = -kT * np.log((za.sum() - za) / (zb.sum() - zb))
    stderr = float(np.sqrt((n - 1) / n * np.sum((jack - jack.mean()) ** 2)))
    from .scenarios import count_transitions  # scenarios imports the demo writer

    centers = well_centers(system.wells[a], system.wells[b])
    crossings = sum(count_transitions(p, centers=centers) for p in phi.T)
    return SoftenedReference(delta_f=float(delta), stderr=stderr, n_transitions=int(crossings),
                             effective_samples=float(w.sum() ** 2 / (w * w).sum()),
                             states=(a, b))
