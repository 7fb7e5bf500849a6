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

The reference (:func:`umbrella_delta_f`) needs neither the CV nor the bias:
umbrella sampling along a dihedral (Torrie and Valleau, J. Comput. Phys. 23,
187, 1977, from memory), windows swept once from each state around the circle,
combined by the weighted histogram analysis method (Kumar, Rosenberg, Bouzida,
Swendsen and Kollman, J. Comput. Chem. 13, 1011, 1992, from memory). It is
trustworthy when the dihedral is the only slow motion (as for
:func:`~cvdesign.testbed.amide.methylacetamide`); the two sweeps disagree when
it is not, and :attr:`UmbrellaReference.hysteresis` says by how much.

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

from ..constants import BOLTZMANN_KJ_MOL_K, TWO_PI
from .metad import BiasedRun, well_delta_f

__all__ = ["OpenMMBiasedRun", "UmbrellaReference", "bias_force", "make_context",
           "reweighting_offset", "run_openmm_biased", "run_unbiased", "umbrella_delta_f",
           "update_bias_force", "wham_periodic", "weighted_delta_f"]


def _num(value):
    """A float for an OpenMM expression, in parentheses when negative."""
    text = repr(float(value))
    return f"({text})" if text.startswith("-") else text


def _table(bias):
    """``(values, lo, hi)`` of the Continuous1DFunction holding `bias` (periodic: first node repeated)."""
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
        Energy ``table(s)`` (periodic grid) or ``table(min(max(s, lo), hi))``;
        named ``cvdesign testbed bias``. Add it to the System before making
        Contexts; :func:`update_bias_force` refreshes its table.

    Examples
    --------
    >>> import openmm
    >>> from cvdesign.testbed.metad import WellTemperedBias
    >>> bias = WellTemperedBias(None, sigma=0.1, height=1.0, interval_steps=10,
    ...                         bias_factor=5.0, temperature=300.0, grid=(-1.0, 1.0, 20))
    >>> force = bias_force(openmm.CustomBondForce("r"), bias)
    >>> force.getEnergyFunction()
    'table(min(max(s, (-1.0)), 1.0))'
    """
    import openmm

    values, lo, hi = _table(bias)
    expression = ("table(s)" if bias.periodic
                  else f"table(min(max(s, {_num(lo)}), {_num(hi)}))")
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
    cv_deviation : float or None
        Largest ``|s_OpenMM - reference_cv(x)|`` over the deposited frames,
        units of the CV, when a `reference_cv` was given.
    outside_grid : float
        Fraction of depositions at CV values beyond a non-periodic grid (where
        the bias exerts no force).
    """

    log_weights: np.ndarray = None
    cv_deviation: float = None
    outside_grid: float = 0.0


def run_openmm_biased(system, cv_force, x0, n_steps, *, bias, friction, md_step_ps, seed,
                      report_interval=None, average_from=0.5, observe=None, reference_cv=None,
                      platform="Reference"):
    """Well-tempered metadynamics in OpenMM along an exported CV (testbed, not a production sampler).

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
    cvs, observed, log_w = [], [], []
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
        log_w.append((bias.bias_at(frame_cv) - offset) / bias.kT)
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
        log_weights=stack(log_w), cv_deviation=deviation,
        outside_grid=outside / max(n_chunks * len(runs), 1))


# --------------------------------------------------------------------------
# The reference: umbrella sampling along a dihedral, WHAM.


def _wrap(d):
    return d - TWO_PI * np.round(d / TWO_PI)


def wham_periodic(samples, centers, force_constant, temperature, n_bins=120, tol=1e-10,
                  max_iter=100_000):
    """Free-energy profile along a dihedral from harmonic umbrella windows (WHAM).

    Parameters
    ----------
    samples : sequence of array-like
        Dihedral values sampled in each window, rad.
    centers : array-like of shape (n_windows,)
        Window centres, rad.
    force_constant : float
        ``k`` of the restraint ``0.5 k d**2`` (``d`` the wrapped difference from
        the centre), kJ/mol/rad**2.
    temperature : float
        K.
    n_bins : int, default=120
        Bins on ``[-pi, pi)``.
    tol : float, default=1e-10
        Convergence of the window free energies, in kT.
    max_iter : int, default=100000

    Returns
    -------
    mids : ndarray of shape (n_bins,)
        Bin centres, rad.
    f : ndarray of shape (n_bins,)
        Free energy, kJ/mol, minimum 0 (inf in empty bins).

    Examples
    --------
    Windows that sampled a flat profile exactly (each bin visited in proportion
    to its restraint's Boltzmann factor) give a flat profile:

    >>> mids = np.linspace(-np.pi, np.pi, 36, endpoint=False) + np.pi / 36
    >>> centers = np.linspace(-np.pi, np.pi, 12, endpoint=False)
    >>> kT = BOLTZMANN_KJ_MOL_K * 300.0
    >>> samples = [np.repeat(mids, np.round(1000 * np.exp(-0.5 * 20.0 * _wrap(mids - c) ** 2
    ...                                           / kT)).astype(int)) for c in centers]
    >>> _, f = wham_periodic(samples, centers, 20.0, 300.0, n_bins=36)
    >>> bool(np.ptp(f) < 0.05)
    True
    """
    kT = BOLTZMANN_KJ_MOL_K * float(temperature)
    edges = np.linspace(-np.pi, np.pi, int(n_bins) + 1)
    mids = 0.5 * (edges[1:] + edges[:-1])
    counts = np.array([np.histogram(_wrap(np.asarray(s, dtype=np.float64)), bins=edges)[0]
                       for s in samples], dtype=np.float64)
    n = counts.sum(axis=1)
    u = 0.5 * float(force_constant) * _wrap(mids[None, :] - np.asarray(centers)[:, None]) ** 2 / kT
    f = np.zeros(len(n))
    total = counts.sum(axis=0)
    for _ in range(int(max_iter)):
        denom = (n[:, None] * np.exp(f[:, None] - u)).sum(axis=0)
        p = np.divide(total, denom, out=np.zeros_like(total), where=denom > 0)
        new = -np.log((p[None, :] * np.exp(-u)).sum(axis=1))
        new -= new[0]
        done = np.max(np.abs(new - f)) < tol
        f = new
        if done:
            break
    with np.errstate(divide="ignore"):
        g = -kT * np.log(p / p.sum())
    return mids, g - g[np.isfinite(g)].min()


@dataclass
class UmbrellaReference:
    """Result of :func:`umbrella_delta_f`.

    Attributes
    ----------
    delta_f : float
        ``F_A - F_B``, kJ/mol, from WHAM on all windows of both sweeps.
    sweeps : tuple of float
        ``F_A - F_B`` from each sweep alone (from A upwards, from B downwards).
    hysteresis : float
        ``|sweeps[0] - sweeps[1]|``, kJ/mol: near zero when nothing else slow
        lags behind the dihedral; a rough error bar of `delta_f`.
    mids, profile : ndarray
        The combined profile: bin centres (rad) and free energy (kJ/mol).
    states : tuple of str
        ``(A, B)``.
    n_windows : int
        Windows per sweep.
    """

    delta_f: float
    sweeps: tuple
    hysteresis: float
    mids: np.ndarray
    profile: np.ndarray
    states: tuple
    n_windows: int


def umbrella_delta_f(system, starts, atoms, wells, *, temperature, n_windows=72,
                     force_constant=1000.0, equilibration_steps=2500, sample_steps=10_000,
                     report_interval=50, friction=1.0, md_step_ps=0.002, seed=1, n_bins=120,
                     platform="Reference"):
    """Reference ``F_A - F_B`` between two wells of a dihedral: umbrella sampling, both ways round.

    Two sweeps of `n_windows` harmonic windows each go once around the circle:
    the first starts from ``starts[A]`` at its dihedral and moves the window
    centre upwards, the second from ``starts[B]`` downwards; each window starts
    from the last structure of the one before. WHAM (:func:`wham_periodic`)
    turns the windows into a profile, and the wells' Boltzmann weights into
    ``F_A - F_B`` (:func:`~cvdesign.testbed.metad.well_delta_f`).

    Parameters
    ----------
    system : openmm.System
        Unbiased; copied, the restraint added to the copy.
    starts : dict
        ``{A: positions, B: positions}`` (nm), one structure in each well; the
        first two keys are A and B.
    atoms : sequence of 4 int
        The dihedral, 0-based.
    wells : dict
        ``{A: (low, high), B: (low, high)}``, rad; ``low > high`` wraps.
    temperature : float
        K.
    n_windows : int, default=72
    force_constant : float, default=1000.0
        kJ/mol/rad**2: stiff enough to hold a window on the side of a barrier.
    equilibration_steps : int, default=2500
        Steps per window before sampling.
    sample_steps : int, default=10000
        Sampled steps per window.
    report_interval : int, default=50
    friction, md_step_ps, seed, platform
        As for :func:`make_context`.
    n_bins : int, default=120

    Returns
    -------
    UmbrellaReference
    """
    import openmm

    from .forcefield import dihedral_angles

    a, b = tuple(starts)[:2]
    restrained = openmm.XmlSerializer.clone(system)
    restraint = openmm.CustomTorsionForce(
        "0.5*cvdesign_k*d^2; d = theta - cvdesign_center - 6.283185307179586*floor("
        "(theta - cvdesign_center + 3.141592653589793)/6.283185307179586)")
    restraint.addGlobalParameter("cvdesign_k", float(force_constant))
    restraint.addGlobalParameter("cvdesign_center", 0.0)
    restraint.addTorsion(*(int(i) for i in atoms), [])
    restrained.addForce(restraint)
    step = TWO_PI / int(n_windows)
    all_samples, all_centers, per_sweep = [], [], []
    for sweep, (state, sign) in enumerate(((a, 1.0), (b, -1.0))):
        x = np.asarray(starts[state], dtype=np.float64)
        start = float(dihedral_angles(x, [atoms])[0])
        centers = _wrap(start + sign * step * np.arange(int(n_windows)))
        context, integrator = make_context(restrained, x, temperature=temperature,
                                           friction=friction, md_step_ps=md_step_ps,
                                           seed=seed, stream=sweep, platform=platform)
        context.setParameter("cvdesign_center", float(centers[0]))
        openmm.LocalEnergyMinimizer.minimize(context, 1.0, 500)
        samples = []
        for center in centers:
            context.setParameter("cvdesign_center", float(center))
            integrator.step(int(equilibration_steps))
            values = []
            for _ in range(int(sample_steps) // int(report_interval)):
                integrator.step(int(report_interval))
                values.append(float(dihedral_angles(_positions(context), [atoms])[0]))
            samples.append(np.array(values))
        mids, f = wham_periodic(samples, centers, force_constant, temperature, n_bins)
        per_sweep.append(well_delta_f(mids, f, temperature, wells[a], wells[b]))
        all_samples += samples
        all_centers.append(centers)
    mids, f = wham_periodic(all_samples, np.concatenate(all_centers), force_constant,
                            temperature, n_bins)
    return UmbrellaReference(delta_f=well_delta_f(mids, f, temperature, wells[a], wells[b]),
                             sweeps=tuple(per_sweep),
                             hysteresis=abs(per_sweep[0] - per_sweep[1]), mids=mids,
                             profile=f, states=(a, b), n_windows=int(n_windows))
