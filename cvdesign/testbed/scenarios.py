"""Small, fast data sets with known answers, written to disk for tests.

:func:`write_two_wells` simulates the two-wells toy (:func:`~cvdesign.testbed.two_wells`)
and writes a PDB topology and one XTC file per run, the runs started in each of
the two wells of the slow dihedral. In every run the slow dihedral stays in its
starting well while the fast dihedral hops between its two wells dozens of
times: a collective variable that separates the runs by state must follow the
slow dihedral and ignore the fast one, although both are clearly bimodal.

All runs of one call are independent walkers of one
:class:`~cvdesign.testbed.LangevinBAOAB` seeded with `seed`, so the same
arguments give the same bytes (on the same platform and library versions).
"""

from dataclasses import dataclass
from pathlib import Path

import mdtraj as md
import numpy as np

from ..io.atomic import atomic_path
from .demo_data import write_pdb
from .langevin import LangevinBAOAB
from .toys import two_wells

__all__ = ["TwoWellsData", "count_transitions", "write_two_wells"]

#: Checks of :func:`write_two_wells` with ``check=True``, per run.
MIN_FAST_FRACTION = 0.2
MIN_FAST_TRANSITIONS = 10


@dataclass(frozen=True)
class TwoWellsData:
    """What :func:`write_two_wells` wrote, with per-frame labels read back from the files.

    Attributes
    ----------
    out_dir : str
        Output folder.
    topology : str
        Path of the PDB topology (with CONECT bond records).
    files : dict of str to list of str
        Per slow state (``'slowA'``, ``'slowB'``), the paths of its XTC runs.
    fast_labels : dict of str to ndarray of str
        Per XTC path, the fast well (``'fastA'`` or ``'fastB'``) of every
        frame, shape ``(n_frames,)``, computed from the coordinates read back
        from the file.
    fast_transitions : dict of str to int
        Per XTC path, the number of transitions of the fast dihedral between
        the cores of its wells (see :func:`count_transitions`).
    fast_fractions : dict of str to dict of str to float
        Per XTC path, the fraction of frames in each fast well.
    slow_dihedral : tuple of int
        0-based atoms of the slow dihedral, ``(0, 1, 2, 3)``.
    fast_dihedral : tuple of int
        0-based atoms of the fast dihedral, ``(6, 7, 8, 9)``.
    frame_step_ps : float
        Time between frames, ps.
    n_frames : int
        Frames per run.
    """

    out_dir: str
    topology: str
    files: dict
    fast_labels: dict
    fast_transitions: dict
    fast_fractions: dict
    slow_dihedral: tuple
    fast_dihedral: tuple
    frame_step_ps: float
    n_frames: int

    @property
    def paths(self):
        """All XTC paths, state by state (list of str)."""
        return [p for paths in self.files.values() for p in paths]


def count_transitions(phi, *, centers=(0.0, np.pi), core=np.pi / 3):
    """Number of transitions of a dihedral between the cores of its wells.

    A frame is in the core of a well when it is within `core` rad (on the
    circle) of that well's centre; frames outside every core are skipped, and
    a transition is counted each time the dihedral reaches a core other than
    the last one it visited. Quick recrossings of a barrier top are therefore
    not counted.

    Parameters
    ----------
    phi : array-like of shape (n_frames,)
        Dihedral angle per frame, rad.
    centers : sequence of float, default=(0, pi)
        Centres of the wells, rad.
    core : float, default=pi/3
        Half width of each core, rad (should be below half the distance
        between neighbouring centres).

    Returns
    -------
    int
        Number of core-to-core transitions.

    Examples
    --------
    >>> count_transitions([0.1, 1.5, 3.1, 1.6, 3.0, -0.2, -3.1])
    3
    """
    phi = np.asarray(phi, dtype=np.float64)
    dist = np.abs(np.angle(np.exp(1j * (phi[:, None] - np.asarray(centers)[None, :]))))
    inside = dist < core
    visited = np.argmax(inside, axis=1)[inside.any(axis=1)]
    return int(np.count_nonzero(np.diff(visited)))


def _save_xtc(path, topology, xyz, times):
    """Write an XTC atomically (through a temporary file beside `path`)."""
    with atomic_path(path) as tmp:
        md.Trajectory(np.asarray(xyz, dtype=np.float32), topology, time=times).save_xtc(
            tmp, force_overwrite=True)


def write_two_wells(out_dir, *, seed=7, n_runs_per_state=2, n_frames=1500, report_interval=12,
                    md_step_ps=0.005, temperature=300.0, friction=1.0, equilibration_steps=2000,
                    check=True):
    """Simulate the two-wells toy from both slow wells and write topology and runs.

    Writes ``two_wells.pdb`` (topology with CONECT records, slowA minimum)
    and ``slowA-1.xtc`` .. ``slowA-<n>.xtc``, ``slowB-1.xtc`` ..
    ``slowB-<n>.xtc`` into `out_dir`. Each run starts at the minimum of its
    slow well, is equilibrated there for `equilibration_steps` steps, then
    recorded; its first frame is the equilibrated start, at time 0. With the
    defaults each run has 1500 frames 0.06 ps apart (89.94 ps), and the whole
    call takes about 5 s on one core.

    Parameters
    ----------
    out_dir : str or path-like
        Output folder (created if missing); files of the same names are
        replaced.
    seed : int, default=7
        Seed of the one random generator of all runs.
    n_runs_per_state : int, default=2
        Runs started in each slow well.
    n_frames : int, default=1500
        Frames per run.
    report_interval : int, default=12
        Steps between frames (12 steps of 0.005 ps = 0.06 ps).
    md_step_ps : float, default=0.005
        Integration time step, ps.
    temperature : float, default=300.0
        K.
    friction : float, default=1.0
        Langevin friction, 1/ps.
    equilibration_steps : int, default=2000
        Steps run inside the starting well before recording (10 ps).
    check : bool, default=True
        Also require, in every run, at least ``MIN_FAST_TRANSITIONS`` (10)
        transitions of the fast dihedral and at least ``MIN_FAST_FRACTION``
        (20 %) of the frames in each fast well. Turn off for runs too short
        to meet them.

    Returns
    -------
    TwoWellsData
        Paths, per-frame fast-well labels, transition counts and fractions,
        dihedral atoms and the time between frames.

    Raises
    ------
    RuntimeError
        If any frame read back from a run has left the slow well it started
        in (the files would be mislabelled), if a file does not read back with
        the expected frames, or, with `check`, if the fast dihedral fails its
        checks; try another seed.

    Examples
    --------
    >>> import os, tempfile
    >>> with tempfile.TemporaryDirectory() as d:
    ...     data = write_two_wells(d, n_runs_per_state=1, n_frames=5,
    ...                            equilibration_steps=10, check=False)
    ...     [os.path.basename(p) for p in data.paths], data.frame_step_ps
    ...     data.fast_labels[data.files['slowA'][0]].shape
    (['slowA-1.xtc', 'slowB-1.xtc'], 0.06)
    (5,)
    """
    for name, value in (("n_runs_per_state", n_runs_per_state), ("n_frames", n_frames),
                        ("report_interval", report_interval)):
        if int(value) != value or int(value) < 1:
            raise ValueError(f"{name}={value!r} must be a positive integer")
    if int(equilibration_steps) != equilibration_steps or int(equilibration_steps) < 0:
        raise ValueError(f"equilibration_steps={equilibration_steps!r} must be an integer >= 0")
    n_runs, n_frames = int(n_runs_per_state), int(n_frames)
    report_interval = int(report_interval)
    out_dir = Path(out_dir)
    out_dir.mkdir(parents=True, exist_ok=True)

    system = two_wells()
    top = system.topology
    state_names = list(system.wells)                      # ['slowA', 'slowB']
    labels = [s for s in state_names for _ in range(n_runs)]
    names = [f"{s}-{r + 1}.xtc" for s in state_names for r in range(n_runs)]

    integ = LangevinBAOAB(system.force_field, system.masses, temperature=temperature,
                          friction=friction, md_step_ps=md_step_ps, seed=seed)
    x0 = np.stack([system.states[s] for s in labels])
    integ.run(x0, equilibration_steps, max(1, equilibration_steps))
    x_eq, v_eq = integ.positions_, integ.velocities_
    xyz, _ = integ.run(x_eq, (n_frames - 1) * report_interval, report_interval, v0=v_eq)
    xyz = np.concatenate([x_eq[None], xyz])               # (n_frames, n_walkers, n_atoms, 3)
    frame_dt = report_interval * float(md_step_ps)
    times = np.arange(n_frames) * frame_dt

    pdb = out_dir / "two_wells.pdb"
    write_pdb(pdb, top, system.states["slowA"],
              title="two-wells toy (cvdesign testbed), slowA minimum")
    files = {s: [] for s in state_names}
    fast_labels, fast_transitions, fast_fractions, problems = {}, {}, {}, []
    for w, (fname, state) in enumerate(zip(names, labels)):
        path = out_dir / fname
        _save_xtc(path, top, xyz[:, w], times)
        # Label what a user will read back, not what we meant to write.
        traj = md.load(str(path), top=str(pdb))
        x = traj.xyz.astype(np.float64)
        slow, fast = system.assign_wells(x)
        key = str(path)
        files[state].append(key)
        fast_labels[key] = fast
        fast_transitions[key] = count_transitions(system.fast_angle(x))
        fast_fractions[key] = {well: float(np.mean(fast == well)) for well in system.fast_wells}
        outside = int(np.count_nonzero(slow != state))
        if outside:
            problems.append(f"{fname}: {outside} of {traj.n_frames} frames outside the "
                            f"{state} well of the slow dihedral")
        if traj.n_frames != n_frames or (
                n_frames > 1 and not np.isclose(traj.timestep, frame_dt, rtol=1e-5)):
            problems.append(f"{fname}: read back {traj.n_frames} frames every "
                            f"{traj.timestep} ps, expected {n_frames} every {frame_dt} ps")
        if check:
            if fast_transitions[key] < MIN_FAST_TRANSITIONS:
                problems.append(f"{fname}: only {fast_transitions[key]} transitions of the "
                                f"fast dihedral (need {MIN_FAST_TRANSITIONS})")
            for well, frac in fast_fractions[key].items():
                if frac < MIN_FAST_FRACTION:
                    problems.append(f"{fname}: only {frac:.0%} of frames in fast well {well} "
                                    f"(need {MIN_FAST_FRACTION:.0%})")
    if problems:
        raise RuntimeError("two-wells data failed its checks (seed=%r): %s; try another seed"
                           % (seed, "; ".join(problems)))
    return TwoWellsData(
        out_dir=str(out_dir),
        topology=str(pdb),
        files=files,
        fast_labels=fast_labels,
        fast_transitions=fast_transitions,
        fast_fractions=fast_fractions,
        slow_dihedral=system.slow_dihedral,
        fast_dihedral=system.fast_dihedral,
        frame_step_ps=round(frame_dt, 12),
        n_frames=n_frames,
    )
