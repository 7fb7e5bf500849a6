"""BAOAB Langevin dynamics for the testbed.

One step of length ``dt`` is split as B (half kick), A (half drift), O (exact
Ornstein-Uhlenbeck velocity update), A, B, after Leimkuhler and Matthews
(2013). For a harmonic potential this splitting samples the configurational
Boltzmann distribution exactly at any stable time step.

Units: positions nm, velocities nm/ps, masses amu (g/mol), time ps,
temperature K, friction 1/ps, energies kJ/mol; 1 kJ/mol = 1 amu nm**2/ps**2.
"""

import numpy as np

from ..constants import BOLTZMANN_KJ_MOL_K

__all__ = ["LangevinBAOAB"]


class LangevinBAOAB:
    """Langevin integrator with the BAOAB splitting.

    Parameters
    ----------
    force_field : object or callable
        Either an object with ``energy_forces(x) -> (energy, forces)`` (such as
        :class:`~cvdesign.testbed.ToyForceField`) or such a callable itself;
        `x` in nm, energy in kJ/mol, forces in kJ/mol/nm with the shape of `x`.
    masses : array-like of shape (n_atoms,)
        Atomic masses, amu.
    temperature : float
        Bath temperature, K.
    friction : float
        Friction coefficient gamma, 1/ps. Zero gives (velocity Verlet) energy-
        conserving dynamics.
    md_step_ps : float
        Time step, ps.
    seed : int, numpy.random.SeedSequence, numpy.random.Generator or None, default=None
        Passed to :func:`numpy.random.default_rng`; the same seed gives the
        same trajectory bit for bit.

    Attributes
    ----------
    rng : numpy.random.Generator
        Source of all random numbers (initial velocities and the O step).
    positions_ : ndarray of shape (..., n_atoms, 3)
        Positions after the last :meth:`run`, nm.
    velocities_ : ndarray of shape (..., n_atoms, 3)
        Velocities after the last :meth:`run`, nm/ps; pass them as `v0` to
        continue a run seamlessly.
    reported_velocities_ : ndarray of shape (n_reports, ..., n_atoms, 3)
        Velocities at the reported frames of the last run, nm/ps.
    reported_energies_ : ndarray of shape (n_reports, ...)
        Potential energies at the reported frames of the last run, kJ/mol.

    Notes
    -----
    Positions may also be a stack of independent walkers of shape
    ``(n_walkers, n_atoms, 3)``, integrated in lockstep with one force call
    per step (if the force field accepts stacks, as ``ToyForceField`` does).
    Their noise comes from the one generator, so a walker's trajectory depends
    on the seed and on the whole stack.

    Nothing is removed from the dynamics: no constraints, no removal of the
    centre-of-mass motion.

    References
    ----------
    B. Leimkuhler and C. Matthews, "Rational construction of stochastic
    numerical methods for molecular sampling", Appl. Math. Res. Express
    2013, 34-56 (2013).

    Examples
    --------
    One particle in a harmonic well, k = 100 kJ/mol/nm**2:

    >>> def well(x):
    ...     return 50.0 * float((x ** 2).sum()), -100.0 * x
    >>> integ = LangevinBAOAB(well, [12.0], temperature=300.0, friction=5.0,
    ...                       md_step_ps=0.01, seed=1)
    >>> xyz, t = integ.run(np.zeros((1, 3)), 1000, report_interval=10)
    >>> xyz.shape, round(float(t[-1]), 6)
    ((100, 1, 3), 10.0)
    """

    def __init__(self, force_field, masses, *, temperature, friction, md_step_ps, seed=None):
        if hasattr(force_field, "energy_forces"):
            self._energy_forces = force_field.energy_forces
        elif callable(force_field):
            self._energy_forces = force_field
        else:
            raise TypeError(
                "force_field must have an energy_forces(x) method or be a callable "
                f"x -> (energy, forces); got {force_field!r}"
            )
        self.force_field = force_field
        self.masses = np.asarray(masses, dtype=np.float64)
        if self.masses.ndim != 1 or not np.all(self.masses > 0):
            raise ValueError(f"masses must be a 1-D array of positive amu; got {masses!r}")
        for name, value in (("temperature", temperature), ("md_step_ps", md_step_ps)):
            if not float(value) > 0:
                raise ValueError(f"{name}={value!r} must be positive")
        if not float(friction) >= 0:
            raise ValueError(f"friction={friction!r} must be zero or positive (1/ps)")
        self.temperature = float(temperature)
        self.friction = float(friction)
        self.md_step_ps = float(md_step_ps)
        self.rng = np.random.default_rng(seed)

    @property
    def kT(self):
        """Thermal energy ``BOLTZMANN_KJ_MOL_K * temperature``, kJ/mol."""
        return BOLTZMANN_KJ_MOL_K * self.temperature

    def maxwell_boltzmann(self, shape):
        """Draw velocities from the Maxwell-Boltzmann distribution.

        Parameters
        ----------
        shape : tuple of int
            ``(..., n_atoms, 3)``.

        Returns
        -------
        ndarray of shape `shape`
            Velocities, nm/ps.

        Examples
        --------
        >>> integ = LangevinBAOAB(lambda x: (0.0, 0 * x), [1.0, 4.0],
        ...                       temperature=300.0, friction=1.0,
        ...                       md_step_ps=0.002, seed=0)
        >>> integ.maxwell_boltzmann((2, 3)).shape
        (2, 3)
        """
        sigma = np.sqrt(self.kT / self.masses)[:, None]
        return sigma * self.rng.standard_normal(shape)

    def run(self, x0, n_steps, report_interval=1, *, v0=None):
        """Integrate `n_steps` steps from `x0` and report every `report_interval` steps.

        Parameters
        ----------
        x0 : array-like of shape (n_atoms, 3) or (n_walkers, n_atoms, 3)
            Initial positions, nm.
        n_steps : int
            Number of steps; should be a multiple of `report_interval` (a
            remainder is integrated but not reported).
        report_interval : int, default=1
            Steps between reported frames.
        v0 : array-like of the shape of `x0`, optional
            Initial velocities, nm/ps; drawn from the Maxwell-Boltzmann
            distribution when omitted.

        Returns
        -------
        positions : ndarray of shape (n_reports, ..., n_atoms, 3)
            Positions after steps ``report_interval, 2 report_interval, ...``,
            nm; ``n_reports = n_steps // report_interval``. The start is not
            included.
        times : ndarray of shape (n_reports,)
            Time of each reported frame since the start of this run, ps.

        Examples
        --------
        >>> integ = LangevinBAOAB(lambda x: (0.0, 0 * x), [1.0],
        ...                       temperature=300.0, friction=1.0,
        ...                       md_step_ps=0.002, seed=0)
        >>> xyz, t = integ.run(np.zeros((1, 3)), 10, report_interval=5)
        >>> t.tolist()
        [0.01, 0.02]
        """
        x = np.array(x0, dtype=np.float64)
        n_atoms = len(self.masses)
        if x.ndim not in (2, 3) or x.shape[-2] != n_atoms:
            raise ValueError(
                f"x0 must have shape ({n_atoms}, 3) or (n_walkers, {n_atoms}, 3) "
                f"to match {n_atoms} masses; got shape {x.shape}"
            )
        n_steps = int(n_steps)
        report_interval = int(report_interval)
        if n_steps < 0 or report_interval < 1:
            raise ValueError(
                f"need n_steps >= 0 and report_interval >= 1; got n_steps={n_steps}, "
                f"report_interval={report_interval}"
            )
        if v0 is None:
            v = self.maxwell_boltzmann(x.shape)
        else:
            v = np.array(v0, dtype=np.float64)
            if v.shape != x.shape:
                raise ValueError(f"v0 must have the shape of x0 {x.shape}; got {v.shape}")

        dt = self.md_step_ps
        inv_m = (1.0 / self.masses)[:, None]
        c1 = np.exp(-self.friction * dt)
        noise = np.sqrt((1.0 - c1 * c1) * self.kT / self.masses)[:, None]
        half_dt_inv_m = 0.5 * dt * inv_m
        half_dt = 0.5 * dt
        normal = self.rng.standard_normal
        shape = x.shape

        n_reports = n_steps // report_interval
        out_x = np.empty((n_reports,) + shape)
        out_v = np.empty((n_reports,) + shape)
        out_e = np.empty((n_reports,) + shape[:-2])
        energy, forces = self._energy_forces(x)
        forces = np.asarray(forces, dtype=np.float64)
        for step in range(1, n_steps + 1):
            v += half_dt_inv_m * forces          # B
            x += half_dt * v                     # A
            v *= c1                              # O
            v += noise * normal(shape)
            x += half_dt * v                     # A
            energy, forces = self._energy_forces(x)
            v += half_dt_inv_m * forces          # B
            if step % report_interval == 0:
                k = step // report_interval - 1
                out_x[k] = x
                out_v[k] = v
                out_e[k] = energy
        if not np.all(np.isfinite(x)):
            raise FloatingPointError(
                f"positions became non-finite; md_step_ps={dt} ps is probably too long "
                "for the stiffest term of the force field"
            )
        self.positions_ = x
        self.velocities_ = v
        self.reported_velocities_ = out_v
        self.reported_energies_ = out_e
        times = np.arange(1, n_reports + 1) * (report_interval * dt)
        return out_x, times
