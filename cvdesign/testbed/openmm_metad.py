"""A well-tempered bias along an exported CV in OpenMM, and a reference to check it against.

This is testbed code: it checks that a spec handed to OpenMM (``Spec.to_openmm``)
can be biased there and gives the right answer. It is **not a production
sampler** (no restarts, no multiple-time-step tricks, no checkpointing, one
Python round trip per deposition); use your engine's own tools for real work.

How the bias reaches OpenMM: the bias ``V(s)`` lives on the grid of a
:class:`~cvdesign.testbed.metad.WellTemperedBias` (the testbed's own kernels,
well-tempered heights and time average). OpenMM sees it as an
``openmm.CustomCVForce`` whose one collective variable ``s`` is the exported CV
force and whose energy is ``table(s)``, a ``Continuous1DFunction`` holding the
grid values (:func:`bias_force`). After every deposition interval the kernels
deposited by the walkers are added to the grid and the table is copied into
each Context (:func:`update_bias_force`), so the force between depositions is
exactly minus the gradient of the tabulated bias. OpenMM interpolates the table
with a natural cubic spline through the node values; the testbed's own
interpolant (cubic Hermite with analytic derivatives) differs from it by much
less than a kernel height at a spacing of a fifth of the kernel width. A
non-periodic table is zero outside its range in OpenMM, so its argument is
clamped to the grid: beyond the grid the bias is held at its edge value and
exerts no force (the fraction of depositions out there is reported).

The reference (:func:`torsion_cycle_delta_f`) needs neither the CV nor the
bias: the force field's own torsion terms about the slow bond are scaled down
(to 0.3 by default, not off: see there why), so that plain MD crosses between
the wells often and their populations give the free-energy difference; scaling
the terms back up within each well is computed by MBAR over a ladder of scale
factors, and the whole cycle is repeated independently for its error bar. That
thermodynamic cycle is exact up to sampling error, and motions that are slow
only at the barrier do not matter to it; slow motions within a well still have
to be sampled, and they set its error (mostly the population ratio at the lowest
scale, for the capped proline). (An
umbrella-sampling profile along the dihedral alone was tried first and is not
used: for N-methylacetamide its two sweep directions disagreed by 1 to 5
kJ/mol, most likely because the amide hydrogen, whose own torsion terms also
resist the rotation, lags behind the heavy atoms at the barrier.)

OpenMM is imported only when a force is built or a run starts. Units: nm, ps,
kJ/mol, rad, K.

Examples
--------
>>> from cvdesign import Spec
>>> from cvdesign.testbed.amide import methylacetamide
>>> from cvdesign.testbed.metad import WellTemperedBias
>>> mol = methylacetamide(np.pi)
>>> spec = Spec(name="omega", topology=mol.mdtraj_topology,
...             descriptors=[{"id": "w", "kind": "dihedral", "atoms": list(mol.omega_atoms)}],
...             terms=[{"descriptor": "w", "transform": "cos", "center": 0.0,
...                     "scale": 1.0, "weight": 1.0}])
>>> bias = WellTemperedBias(None, sigma=0.05, height=1.0, interval_steps=50,
...                         bias_factor=8.0, temperature=300.0, grid=(-1.2, 1.2, 120))
>>> run = run_openmm_biased(mol.system, spec.to_openmm(periodic=False), mol.positions,
...                         200, bias=bias, friction=1.0, md_step_ps=0.002, seed=1)
>>> run.cv.shape, bias.n_kernels, bool(run.cv[-1] < -0.9)  # still trans
((4,), 4, True)
"""

from dataclasses import dataclass

import numpy as np

from ..constants import BOLTZMANN_KJ_MOL_K
from .metad import BiasedRun, well_centers

__all__ = ["CYCLE_SCALES", "OpenMMBiasedRun", "TorsionCycleReference", "bias_force",
           "make_context", "mbar_free_energies", "reweighting_offset", "run_openmm_biased",
           "run_unbiased", "torsion_cycle_delta_f", "torsion_energy", "torsion_terms",
           "update_bias_force", "weighted_delta_f"]


#: Fraction of the grid's range by which a non-periodic CV is clamped inside the grid.
_EDGE_INSET = 1e-9


def _num(value):
    """A float for an OpenMM expression, in parentheses when negative."""
    text = repr(float(value))
    return f"({text})" if text.startswith("-") else text


def _table(bias):
    """``(values, lo, hi)`` of the table of `bias` (periodic: the first node repeated at hi)."""
    values = bias.values.tolist()
    if bias.periodic:
        values.append(values[0])
    return values, bias.lo, bias.hi


def bias_force(cv_force, bias):
    """An ``openmm.CustomCVForce`` whose energy is the tabulated bias of the CV, kJ/mol.

    Parameters
    ----------
    cv_force : openmm.Force
        A force whose energy is the CV value, e.g. ``spec.to_openmm(...)``.
    bias : cvdesign.testbed.metad.WellTemperedBias
        The grid (``lo``, ``hi``, nodes) and its current values.

    Returns
    -------
    openmm.CustomCVForce
        Energy ``table(s)`` (periodic grid) or ``table(s clamped to [lo, hi])``
        (a hair inside: ``1e-9`` of the range), written with ``select`` and
        ``step`` so that a non-finite CV reads the table at its edge instead of
        stopping OpenMM; named ``cvdesign testbed bias``. Add it to the System before making
        Contexts; :func:`update_bias_force` refreshes its table.

    Examples
    --------
    >>> import openmm
    >>> from cvdesign.testbed.metad import WellTemperedBias
    >>> bias = WellTemperedBias(None, sigma=0.1, height=1.0, interval_steps=10,
    ...                         bias_factor=5.0, temperature=300.0, grid=(-1.0, 1.0, 20))
    >>> force = bias_force(openmm.CustomBondForce("r"), bias)
    >>> force.getEnergyFunction()[:35]
    'table(select(step(s - (-0.999999998'
    """
    import openmm

    values, lo, hi = _table(bias)
    # The argument is clamped a hair inside [lo, hi]: OpenMM's spline refuses (and
    # aborts the process) a point even a rounding error beyond its last node. select
    # and step rather than min and max: a NaN CV (a run that blew up) then reads the
    # table at its edge instead, and run_openmm_biased reports the NaN.
    inset = _EDGE_INSET * (hi - lo)
    lo_, hi_ = _num(lo + inset), _num(hi - inset)
    expression = (f"table(select(step(s - {lo_}) + step({lo_} - s), s, {lo_}))" if bias.periodic
                  else f"table(select(step(s - {lo_})*step({hi_} - s), s, "
                       f"select(step(s - {lo_}), {hi_}, {lo_})))")
    force = openmm.CustomCVForce(expression)
    force.addCollectiveVariable("s", cv_force)
    force.addTabulatedFunction("table", openmm.Continuous1DFunction(values, lo, hi,
                                                                    bias.periodic))
    force.setName("cvdesign testbed bias")
    return force


def update_bias_force(force, bias, contexts):
    """Copy the bias's current grid into `force` and into every Context made with it.

    Parameters
    ----------
    force : openmm.CustomCVForce
        Made by :func:`bias_force` for this `bias`.
    bias : cvdesign.testbed.metad.WellTemperedBias
    contexts : iterable of openmm.Context
    """
    force.getTabulatedFunction(0).setFunctionParameters(*_table(bias))
    for context in contexts:
        force.updateParametersInContext(context)


def reweighting_offset(bias, lo, hi):
    """``c(t)`` of well-tempered reweighting, kJ/mol, over the grid nodes in ``[lo, hi]``.

    ``c(t) = kT ln( sum exp(gamma V / ((gamma - 1) kT)) / sum exp(V / ((gamma - 1) kT)) )``
    over the nodes (Tiwary and Parrinello, J. Phys. Chem. B 119, 736, 2015, from
    memory); a frame sampled under ``V(s, t)`` then has the weight
    ``exp((V(s, t) - c(t)) / kT)``. Only the CV range the walkers have reached
    is summed: for a bounded CV the grid also covers values no structure can
    take.

    Parameters
    ----------
    bias : cvdesign.testbed.metad.WellTemperedBias
    lo, hi : float
        CV range, units of the CV.

    Returns
    -------
    float
        kJ/mol; 0 while no node lies in the range.

    Examples
    --------
    >>> from cvdesign.testbed.metad import WellTemperedBias
    >>> bias = WellTemperedBias(None, sigma=0.1, height=1.0, interval_steps=10,
    ...                         bias_factor=5.0, temperature=300.0, grid=(-1.0, 1.0, 20))
    >>> reweighting_offset(bias, -1.0, 1.0)  # no bias yet
    0.0
    """
    inside = (bias.nodes >= lo) & (bias.nodes <= hi)
    if not inside.any():
        return 0.0
    v = bias.values[inside] / (bias.kT * (bias.bias_factor - 1.0))
    g = bias.bias_factor
    top = v.max()
    return float(bias.kT * (g * top + np.log(np.exp(g * (v - top)).sum())
                            - top - np.log(np.exp(v - top).sum())))


def weighted_delta_f(log_weights, in_a, in_b, temperature):
    """``F_A - F_B = -kT ln(sum_A w / sum_B w)`` over weighted frames, kJ/mol.

    Parameters
    ----------
    log_weights : array-like
        ``ln w`` of every frame.
    in_a, in_b : array-like of bool, same shape
        Frames in state A and in state B.
    temperature : float
        K.

    Returns
    -------
    float
        kJ/mol.

    Raises
    ------
    ValueError
        No frame in one of the states.

    Examples
    --------
    Two frames of weight 1 in A, one of weight 4 in B: ``F_A - F_B = kT ln 2``.

    >>> dF = weighted_delta_f([0.0, 0.0, np.log(4.0)], [True, True, False], [False, False, True],
    ...                       300.0)
    >>> round(dF, 4)
    1.7289
    """
    lw = np.asarray(log_weights, dtype=np.float64)
    a, b = np.asarray(in_a, dtype=bool), np.asarray(in_b, dtype=bool)
    if not (a.any() and b.any()):
        raise ValueError("no frame in one of the two states: the run never visited it; "
                         "run longer")
    kT = BOLTZMANN_KJ_MOL_K * float(temperature)
    top = lw.max()
    return float(-kT * np.log(np.exp(lw[a] - top).sum() / np.exp(lw[b] - top).sum()))


def _seed(seed, k):
    """A positive OpenMM random seed for the `k`-th stream of `seed` (OpenMM's 0 means random)."""
    return 1 + (int(seed) * 7919 + int(k)) % 2_000_000_000


def make_context(system, positions, *, temperature, friction, md_step_ps, seed, stream=0,
                 platform="Reference"):
    """A Context with a seeded Langevin integrator and Maxwell-Boltzmann velocities.

    Parameters
    ----------
    system : openmm.System
    positions : array-like of shape (n_atoms, 3)
        nm.
    temperature : float
        K.
    friction : float
        1/ps.
    md_step_ps : float
        ps.
    seed : int
        Same seed, same trajectory (OpenMM's Reference platform is
        deterministic); `stream` picks an independent stream of it.
    stream : int, default=0
    platform : str, default="Reference"
        OpenMM platform name. The Reference platform is deterministic and, for
        a molecule of a dozen atoms in vacuum, as fast as the others.

    Returns
    -------
    (openmm.Context, openmm.LangevinMiddleIntegrator)
    """
    import openmm

    integrator = openmm.LangevinMiddleIntegrator(float(temperature), float(friction),
                                                 float(md_step_ps))
    integrator.setRandomNumberSeed(_seed(seed, 2 * stream))
    context = openmm.Context(system, integrator, openmm.Platform.getPlatformByName(platform))
    context.setPositions(np.asarray(positions, dtype=np.float64))
    context.setVelocitiesToTemperature(float(temperature), _seed(seed, 2 * stream + 1))
    return context, integrator


def _positions(context):
    """The Context's positions as an array of shape (n_atoms, 3), nm."""
    state = context.getState(getPositions=True)
    return np.asarray(state.getPositions(asNumpy=True)._value, dtype=np.float64)


def run_unbiased(system, positions, n_frames, *, report_interval, temperature, friction,
                 md_step_ps, seed, equilibration_steps=0, minimize=True, platform="Reference"):
    """Plain Langevin dynamics in OpenMM; the frames every `report_interval` steps.

    Parameters
    ----------
    system : openmm.System
    positions : array-like of shape (n_atoms, 3)
        Start, nm.
    n_frames : int
    report_interval : int
        Steps between frames.
    temperature, friction, md_step_ps, seed, platform
        As for :func:`make_context`.
    equilibration_steps : int, default=0
        Steps run (and not reported) before the first frame.
    minimize : bool, default=True
        Minimize the energy first (OpenMM's ``LocalEnergyMinimizer``).

    Returns
    -------
    ndarray of shape (n_frames, n_atoms, 3)
        nm.

    Examples
    --------
    >>> from cvdesign.testbed.amide import methylacetamide
    >>> mol = methylacetamide(0.0)
    >>> xyz = run_unbiased(mol.system, mol.positions, 3, report_interval=50, temperature=300.0,
    ...                    friction=1.0, md_step_ps=0.002, seed=3)
    >>> xyz.shape, bool(np.all(np.abs(mol.omega(xyz)) < 1.0))  # stays cis
    ((3, 12, 3), True)
    """
    import openmm

    context, integrator = make_context(system, positions, temperature=temperature,
                                       friction=friction, md_step_ps=md_step_ps, seed=seed,
                                       platform=platform)
    if minimize:
        openmm.LocalEnergyMinimizer.minimize(context, 1.0, 500)
        context.setVelocitiesToTemperature(float(temperature), _seed(seed, 1))
    if equilibration_steps:
        integrator.step(int(equilibration_steps))
    frames = []
    for _ in range(int(n_frames)):
        integrator.step(int(report_interval))
        frames.append(_positions(context))
    return np.array(frames).reshape((int(n_frames), system.getNumParticles(), 3))


@dataclass
class OpenMMBiasedRun(BiasedRun):
    """Result of :func:`run_openmm_biased`: a :class:`~cvdesign.testbed.metad.BiasedRun` plus

    Attributes
    ----------
    log_weights : ndarray of the shape of ``cv``
        ``(V(s, t) - c(t)) / kT`` of every reported frame, with the bias and
        :func:`reweighting_offset` of the interval the frame was sampled in:
        ``exp`` of it reweights the frames to the unbiased ensemble.
    felt_bias : ndarray of the shape of ``cv``
        ``V(s, t)`` of every reported frame, kJ/mol: the bias it felt, the energy
        of the rescaled clock (a bias-energy file's ``clock_bias`` column).
    cv_deviation : float or None
        Largest ``|s_OpenMM - reference_cv(x)|`` over the deposited frames,
        units of the CV, when a `reference_cv` was given.
    outside_grid : float
        Fraction of depositions at CV values beyond a non-periodic grid (where
        the bias exerts no force).
    """

    log_weights: np.ndarray = None
    felt_bias: np.ndarray = None
    cv_deviation: float = None
    outside_grid: float = 0.0


def run_openmm_biased(system, cv_force, x0, n_steps, *, bias, friction, md_step_ps, seed,
                      report_interval=None, average_from=0.5, observe=None, reference_cv=None,
                      platform="Reference"):
    """Well-tempered metadynamics in OpenMM along an exported CV (testbed; not a production tool).

    Parameters
    ----------
    system : openmm.System
        The unbiased System; it is copied (``XmlSerializer.clone``) and the
        bias force added to the copy.
    cv_force : openmm.Force
        Energy = CV value, e.g. ``spec.to_openmm(periodic=False)``.
    x0 : array-like of shape (n_atoms, 3) or (n_walkers, n_atoms, 3)
        Start positions, nm. Walkers run one after the other over each
        deposition interval and share the bias: each deposits one kernel per
        interval, in walker order.
    n_steps : int
        Steps per walker (rounded down to a multiple of ``bias.interval_steps``).
    bias : cvdesign.testbed.metad.WellTemperedBias
        Updated in place; its `temperature` is the bath temperature. It needs
        no CV callable (OpenMM evaluates the CV).
    friction : float
        1/ps.
    md_step_ps : float
        ps.
    seed : int
        Same seed, same run (on the deterministic Reference platform).
    report_interval : int, optional
        Steps between reported frames; must divide ``bias.interval_steps``;
        default ``bias.interval_steps``.
    average_from : float, default=0.5
        Fraction of the depositions after which the grid bias is averaged into
        ``mean_values``.
    observe : callable, optional
        ``observe(x)`` of each reported frame's positions (``(n_atoms, 3)``,
        nm), e.g. a dihedral, collected into ``observed``.
    reference_cv : callable, optional
        ``reference_cv(x) -> float``, e.g. ``lambda x: spec.evaluate(x[None])[0]``:
        compared with OpenMM's CV value at every deposition (``cv_deviation``).
    platform : str, default="Reference"

    Returns
    -------
    OpenMMBiasedRun
        ``cv``, ``observed`` and ``log_weights`` have shape ``(n_reports,)`` for
        one walker, ``(n_reports, n_walkers)`` for several.

    Raises
    ------
    RuntimeError
        The CV became non-finite (the simulation blew up): smaller kernels'
        heights, a wider kernel or a shorter step are needed.
    ValueError
        `report_interval` does not divide the deposition interval.
    """
    import openmm

    interval = bias.interval_steps
    report = interval if report_interval is None else int(report_interval)
    if report < 1 or interval % report:
        raise ValueError(f"report_interval={report_interval!r} must divide "
                         f"interval_steps={interval}")
    x0 = np.asarray(x0, dtype=np.float64)
    walkers = x0.ndim == 3
    starts = x0 if walkers else x0[None]
    biased = openmm.XmlSerializer.clone(system)
    force = bias_force(cv_force, bias)
    biased.addForce(force)
    runs = [make_context(biased, x, temperature=bias.temperature, friction=friction,
                         md_step_ps=md_step_ps, seed=seed, stream=w, platform=platform)
            for w, x in enumerate(starts)]
    contexts = [context for context, _ in runs]
    n_chunks = int(n_steps) // interval
    first = min(int(float(average_from) * n_chunks), max(n_chunks - 1, 0))
    total = np.zeros_like(bias.values)
    cvs, observed, log_w, felt = [], [], [], []
    deviation, outside = None, 0
    lo_seen, hi_seen = np.inf, -np.inf
    offset = 0.0
    for chunk in range(n_chunks):
        frame_cv = np.empty((interval // report, len(runs)))
        frame_obs = []
        for w, (context, integrator) in enumerate(runs):
            for r in range(interval // report):
                integrator.step(report)
                s = float(force.getCollectiveVariableValues(context)[0])
                if not np.isfinite(s):
                    raise RuntimeError(
                        f"the CV became {s} at step {chunk * interval + (r + 1) * report} of "
                        f"walker {w}: the simulation blew up; use lower kernel heights, wider "
                        "kernels or a shorter MD step")
                frame_cv[r, w] = s
                if observe is not None or (reference_cv is not None and r == len(frame_cv) - 1):
                    x = _positions(context)
                    if observe is not None:
                        frame_obs.append(observe(x))
                    if reference_cv is not None and r == len(frame_cv) - 1:
                        d = abs(float(reference_cv(x)) - s)
                        deviation = d if deviation is None else max(deviation, d)
        lo_seen = min(lo_seen, frame_cv.min())
        hi_seen = max(hi_seen, frame_cv.max())
        felt.append(bias.bias_at(frame_cv))
        log_w.append((felt[-1] - offset) / bias.kT)
        cvs.append(frame_cv)
        if observe is not None:
            observed.append(np.asarray(frame_obs).reshape((len(runs), -1) + np.shape(
                frame_obs[0])).swapaxes(0, 1))
        for s in frame_cv[-1]:
            if not bias.periodic and not bias.lo <= s <= bias.hi:
                outside += 1
            bias.deposit(s)
        update_bias_force(force, bias, contexts)
        offset = reweighting_offset(bias, lo_seen, hi_seen)
        if chunk >= first:
            total += bias.values
    mean = total / max(n_chunks - first, 1) if n_chunks else bias.values.copy()

    def stack(parts):
        arr = np.concatenate(parts) if parts else np.empty((0, len(runs)))
        return arr if walkers else arr[:, 0]

    last = [context.getState(getPositions=True, getVelocities=True) for context in contexts]
    positions = np.array([s.getPositions(asNumpy=True)._value for s in last])
    velocities = np.array([s.getVelocities(asNumpy=True)._value for s in last])
    cv = stack(cvs)
    return OpenMMBiasedRun(
        cv=cv, times=np.arange(1, cv.shape[0] + 1) * (report * float(md_step_ps)), bias=bias,
        positions=positions if walkers else positions[0],
        velocities=velocities if walkers else velocities[0], mean_values=mean,
        observed=stack(observed) if observe is not None else None,
        log_weights=stack(log_w), felt_bias=stack(felt), cv_deviation=deviation,
        outside_grid=outside / max(n_chunks * len(runs), 1))


# --------------------------------------------------------------------------
# The reference: the torsion's own terms switched off and on again (MBAR).


def _bonded_pairs(system):
    """Atom pairs bonded in `system`: harmonic bonds and constraints."""
    import openmm

    pairs = {frozenset(system.getConstraintParameters(i)[:2])
             for i in range(system.getNumConstraints())}
    for force in system.getForces():
        if isinstance(force, openmm.HarmonicBondForce):
            pairs |= {frozenset(force.getBondParameters(i)[:2])
                      for i in range(force.getNumBonds())}
    return pairs


def torsion_terms(system, bond):
    """The proper-torsion terms about one bond, as ``[(i, j, k, l, n, phase, k_kj_mol), ...]``.

    Parameters
    ----------
    system : openmm.System
    bond : tuple of 2 int
        The central bond ``(j, k)``, 0-based.

    Returns
    -------
    list of tuple
        Every ``PeriodicTorsionForce`` term ``k (1 + cos(n theta - phase))``
        whose middle atoms are the bond and whose outer atoms are bonded to
        them (impropers, which keep atoms planar rather than turn a bond, are
        left out): atoms, periodicity, phase (rad), amplitude (kJ/mol).
    """
    import openmm

    bonded = _bonded_pairs(system)
    middle = frozenset(int(a) for a in bond)
    terms = []
    for force in system.getForces():
        if isinstance(force, openmm.PeriodicTorsionForce):
            for t in range(force.getNumTorsions()):
                i, j, k, l, n, phase, amp = force.getTorsionParameters(t)
                if ({j, k} == middle and frozenset((i, j)) in bonded
                        and frozenset((k, l)) in bonded):
                    terms.append((i, j, k, l, int(n), phase._value, amp._value))
    return terms


def torsion_energy(x, terms):
    """Energy of torsion terms (:func:`torsion_terms`) at positions `x` (``(..., n_atoms, 3)``).

    Returns kJ/mol, of shape ``x.shape[:-2]``.
    """
    from .forcefield import dihedral_angles

    if not terms:
        return np.zeros(np.shape(x)[:-2])
    theta = dihedral_angles(x, [t[:4] for t in terms])
    n = np.array([t[4] for t in terms], dtype=np.float64)
    phase = np.array([t[5] for t in terms])
    amp = np.array([t[6] for t in terms])
    return (amp * (1.0 + np.cos(n * theta - phase))).sum(axis=-1)


def mbar_free_energies(reduced, counts, tol=1e-10, max_iter=100_000):
    """Dimensionless free energies of K ensembles from pooled samples (MBAR).

    Parameters
    ----------
    reduced : array-like of shape (K, N)
        ``u_k(x_n)``: reduced potential (energy / kT) of every pooled sample in
        every ensemble.
    counts : array-like of shape (K,)
        Samples drawn from each ensemble (summing to N).
    tol : float, default=1e-10
    max_iter : int, default=100000

    Returns
    -------
    f : ndarray of shape (K,)
        ``-ln Z_k``, relative to the first ensemble (Shirts and Chodera, J.
        Chem. Phys. 129, 124105, 2008, from memory).
    log_denominator : ndarray of shape (N,)
        ``ln sum_k N_k exp(f_k - u_k(x_n))``, for expectations in any state.

    Examples
    --------
    Two ensembles that differ by a constant energy c (in kT): ``f_1 - f_0 = c``.

    >>> u = np.array([[0.0, 0.5, 1.0], [2.0, 2.5, 3.0]])
    >>> f, _ = mbar_free_energies(u, [2, 1])
    >>> round(float(f[1]), 6)
    2.0
    """
    u = np.asarray(reduced, dtype=np.float64)
    n = np.asarray(counts, dtype=np.float64)
    f = np.zeros(u.shape[0])
    log_n = np.log(n, out=np.full(n.shape, -np.inf), where=n > 0)

    def log_denominator(f):
        a = (log_n + f)[:, None] - u
        top = a.max(axis=0)
        return top + np.log(np.exp(a - top).sum(axis=0))

    for _ in range(int(max_iter)):
        log_d = log_denominator(f)
        a = -u - log_d[None, :]
        top = a.max(axis=1)
        new = -(top + np.log(np.exp(a - top[:, None]).sum(axis=1)))
        new -= new[0]
        done = np.max(np.abs(new - f)) < tol
        f = new
        if done:
            break
    return f, log_denominator(f)


@dataclass
class TorsionCycleReference:
    """Result of :func:`torsion_cycle_delta_f`.

    Attributes
    ----------
    delta_f : float
        ``F_A - F_B`` with the full force field, kJ/mol, from the frames of
        every repeat pooled.
    error : float
        Standard error of `delta_f`, kJ/mol: the standard deviation of the
        repeats' estimates over the square root of their number (the repeats
        are independent runs, so correlated noise within a run is in it).
    repeats : tuple of float
        ``F_A - F_B`` of each repeat alone, kJ/mol.
    delta_f_low : float
        ``F_A - F_B`` at the lowest scale of the torsion's terms, kJ/mol.
    switch_on : dict
        ``{A: G, B: G}``: free energy of scaling the terms from the lowest
        scale up to 1 within each state, kJ/mol.
    n_transitions_low : int
        Crossings between the wells at the lowest scale, every repeat (many
        are needed).
    states : tuple of str
    scales : tuple of float
    """

    delta_f: float
    error: float
    repeats: tuple
    delta_f_low: float
    switch_on: dict
    n_transitions_low: int
    states: tuple
    scales: tuple


#: Default scales of the torsion's terms for :func:`torsion_cycle_delta_f`.
CYCLE_SCALES = (0.3, 0.35, 0.4, 0.5, 0.6, 0.7, 0.85, 1.0)


def torsion_cycle_delta_f(system, starts, bond, dihedral, wells, *, temperature,
                          scales=CYCLE_SCALES, n_frames=500, n_frames_low=3000, n_repeats=4,
                          report_interval=50, equilibration_steps=2500, friction=1.0,
                          md_step_ps=0.002, seed=1, platform="Reference"):
    """Reference ``F_A - F_B`` between two wells of a torsion, by a thermodynamic cycle.

    The torsion terms about `bond` (:func:`torsion_terms`), which make the
    barrier, are scaled by ``lambda`` in `scales`. At the lowest scale
    ``lambda_0`` the dihedral crosses often and ``F_A - F_B`` is read from the
    populations; scaling the terms up to 1 again within each state costs
    ``G_A`` and ``G_B``, from runs at every ``lambda`` started in each state and
    pooled by MBAR (:func:`mbar_free_energies`) over the frames in that state.
    Then ``F_A - F_B = (F_A - F_B)_lambda_0 + G_A - G_B``: exact up to sampling
    error (motions slow only at the barrier do not matter; slow motions within
    a state must still be sampled), and it uses no CV and no bias
    (free-energy perturbation, Zwanzig, J. Chem. Phys. 22, 1420, 1954, from
    memory; MBAR, Shirts and Chodera, J. Chem. Phys. 129, 124105, 2008, from
    memory). The whole cycle is run `n_repeats` times with independent
    streams (and the starts taken in turn); the error is the spread of the
    repeats.

    Why not ``lambda_0 = 0`` (measured on the capped proline, Amber ff14SB,
    300 K, tutorial 04): with an amide's own terms fully off the dihedral has
    no wells at all, it sits twisted near 90 degrees, the dividing line between
    the states; switching the terms on then costs 17 to 26 kJ/mol per state
    and passes a twisted-to-planar change near ``lambda = 0.25`` that the runs
    sample poorly. Across five seeds that reference scattered by 2.1 kJ/mol
    (standard deviation) while the difference of its halves often claimed far
    less. At ``lambda = 0.3`` the amide is planar in both states and still
    crosses about 6 times per 100 ps; scaling up from there costs 5 to 6 (cis)
    and 3.5 to 3.7 (trans) kJ/mol, and in the tutorial's quick configuration
    (500 frames per run, 6000 at ``lambda = 0.3``, four repeats: 4 million MD
    steps, done before the biased runs beside it) the reference scattered by
    0.33 kJ/mol across seven seeds (2026 to 2032), its error bar 0.13 to 0.59
    kJ/mol. Most of that error is the population ratio at ``lambda_0`` (about
    60 crossings per repeat): more frames there reduce it.

    Parameters
    ----------
    system : openmm.System
        Unbiased; copied, with the terms moved to a scalable custom force.
    starts : dict
        ``{A: positions, B: positions}``, nm, each of shape ``(n_atoms, 3)`` or
        several starts ``(n_starts, n_atoms, 3)``, used in turn by the repeats;
        the first two keys are A and B.
    bond : tuple of 2 int
        The torsion's central bond.
    dihedral : sequence of 4 int
        The dihedral that tells the wells apart.
    wells : dict
        ``{A: (low, high), B: (low, high)}`` of `dihedral`, rad; ``low > high`` wraps.
    temperature : float
        K.
    scales : sequence of float, default=CYCLE_SCALES (0.3, 0.35, ..., 0.85, 1)
        The ``lambda`` values, increasing, from ``lambda_0 >= 0`` to 1. The
        dihedral must cross freely at ``lambda_0``.
    n_frames : int, default=500
        Frames per run at each ``lambda > lambda_0`` (two runs, one per
        state, per repeat).
    n_frames_low : int, default=3000
        Frames per run at ``lambda_0``.
    n_repeats : int, default=4
        Independent repeats of the cycle (at least 2, for the error).
    report_interval : int, default=50
        Steps between frames.
    equilibration_steps : int, default=2500
    friction, md_step_ps, seed, platform
        As for :func:`make_context`.

    Returns
    -------
    TorsionCycleReference

    Raises
    ------
    ValueError
        `scales` do not increase to 1 from a value in [0, 1), fewer than 2
        repeats, the bond has no torsion terms, or a state was never visited
        at the lowest scale.
    """
    import openmm

    from .forcefield import dihedral_angles
    from .metad import _in_interval

    scales = tuple(float(s) for s in scales)
    if (not 0.0 <= scales[0] < 1.0 or scales[-1] != 1.0
            or any(x >= y for x, y in zip(scales, scales[1:]))):
        raise ValueError(f"scales={scales!r} must increase from a value in [0, 1) to 1")
    if int(n_repeats) < 2:
        raise ValueError(f"n_repeats={n_repeats!r}: at least 2 repeats are needed for the error")
    terms = torsion_terms(system, bond)
    if not terms:
        raise ValueError(f"no proper torsion terms about the bond {tuple(bond)!r}")
    a, b = tuple(starts)[:2]
    first = {state: np.asarray(starts[state], dtype=np.float64) for state in (a, b)}
    first = {state: x.reshape((-1,) + x.shape[-2:]) for state, x in first.items()}
    scaled = openmm.XmlSerializer.clone(system)
    for force in scaled.getForces():
        if isinstance(force, openmm.PeriodicTorsionForce):
            for t in range(force.getNumTorsions()):
                i, j, k, l, n, phase, amp = force.getTorsionParameters(t)
                if (i, j, k, l, int(n), phase._value, amp._value) in terms:
                    force.setTorsionParameters(t, i, j, k, l, n, phase, 0.0)
    custom = openmm.CustomTorsionForce(
        "cvdesign_lambda*amp*(1 + cos(per*theta - phase))")
    custom.addGlobalParameter("cvdesign_lambda", 1.0)
    for name in ("per", "phase", "amp"):
        custom.addPerTorsionParameter(name)
    for i, j, k, l, n, phase, amp in terms:
        custom.addTorsion(i, j, k, l, [float(n), phase, amp])
    scaled.addForce(custom)
    kT = BOLTZMANN_KJ_MOL_K * float(temperature)
    frames = []  # (repeat, scale index, energy of the terms, state label, dihedral) per run
    stream = 0
    for repeat in range(int(n_repeats)):
        for index, lam in enumerate(scales):
            for state in (a, b):
                x0 = first[state][repeat % len(first[state])]
                context, integrator = make_context(scaled, x0, temperature=temperature,
                                                   friction=friction, md_step_ps=md_step_ps,
                                                   seed=seed, stream=stream, platform=platform)
                stream += 1
                context.setParameter("cvdesign_lambda", lam)
                integrator.step(int(equilibration_steps))
                xyz = []
                for _ in range(int(n_frames_low if index == 0 else n_frames)):
                    integrator.step(int(report_interval))
                    xyz.append(_positions(context))
                xyz = np.array(xyz)
                phi = dihedral_angles(xyz, [dihedral])[:, 0]
                label = np.where(_in_interval(phi, wells[a]), 0,
                                 np.where(_in_interval(phi, wells[b]), 1, -1))
                frames.append((repeat, index, torsion_energy(xyz, terms), label, phi))

    def estimate(runs):
        low = [f for f in runs if f[1] == 0]
        labels = np.concatenate([f[3] for f in low])
        n_a, n_b = np.count_nonzero(labels == 0), np.count_nonzero(labels == 1)
        if not (n_a and n_b):
            raise ValueError(f"at the lowest scale of the torsion terms ({scales[0]:g}) the "
                             f"runs never visited state {a if not n_a else b!r}; run longer "
                             "or start the scales lower")
        delta_low = -kT * np.log(n_a / n_b)
        switch = {}
        for code, state in ((0, a), (1, b)):
            energy = np.concatenate([f[2][f[3] == code] for f in runs])
            counts = np.array([sum(np.count_nonzero(f[3] == code) for f in runs
                                   if f[1] == k) for k in range(len(scales))])
            reduced = np.array(scales)[:, None] * energy[None, :] / kT
            g, _ = mbar_free_energies(reduced, counts)
            switch[state] = float(kT * (g[-1] - g[0]))
        return delta_low + switch[a] - switch[b], delta_low, switch

    delta, delta_low, switch = estimate(frames)
    repeats = tuple(float(estimate([f for f in frames if f[0] == r])[0])
                    for r in range(int(n_repeats)))
    from .scenarios import count_transitions

    centers = well_centers(wells[a], wells[b])
    crossings = sum(count_transitions(f[4], centers=centers) for f in frames if f[1] == 0)
    return TorsionCycleReference(
        delta_f=float(delta), error=float(np.std(repeats, ddof=1) / np.sqrt(len(repeats))),
        repeats=repeats, delta_f_low=float(delta_low), switch_on=switch,
        n_transitions_low=int(crossings), states=(a, b), scales=scales)
