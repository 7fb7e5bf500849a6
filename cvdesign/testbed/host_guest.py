"""An invented host-guest scenario: a rigid-ish cup (residue ``HST``) with a guest inside.

The host is 13 united atoms: a base atom, a lower ring of six (radius 0.40 nm,
z = 0) and a wider upper rim of six (radius 0.60 nm, z = 0.40 nm), tied by a
triangulated net of harmonic bonds and held near its reference pose by a weak
position restraint, so the cavity axis stays the +z axis by construction (from
the cavity centre toward the open rim). The guest (residue ``GST``) is three
atoms, bonded and bent, attracted by a harmonic "binding" term between its
centre and a site on the cavity axis, and kept off the host walls by the
repulsive pair term of :class:`~cvdesign.testbed.ToyForceField`. Only the
bound state is simulated.

Optionally the written frames imitate a run without fitting in a periodic box:
``tumble=True`` rotates and translates the whole system of every frame
independently at random (after the simulation, so the dynamics are those of
the plain run), and ``box_nm`` writes a cubic box and wraps every atom into it,
so the complex is split across the boundary in many frames.

All runs of one call are walkers of one seeded
:class:`~cvdesign.testbed.LangevinBAOAB`, so the same arguments give the same
bytes (same platform and library versions).
"""

from dataclasses import dataclass
from pathlib import Path

import mdtraj as md
import numpy as np

from ..io.atomic import atomic_path
from .demo_data import write_pdb
from .forcefield import ToyForceField
from .langevin import LangevinBAOAB

__all__ = ["HostGuestData", "binding_term", "host_guest_system", "write_host_guest"]

_N_RING = 6
_R_LOW, _R_RIM, _Z_RIM, _Z_BASE = 0.40, 0.60, 0.40, -0.15   # nm
_SITE_Z = 0.30                  # nm, binding site on the axis (above the pocket centre)
_K_BIND = 250.0                 # kJ/mol/nm**2, guest centre to binding site
_K_HOLD = 500.0                 # kJ/mol/nm**2, host atoms to their reference pose
_K_BOND = 5.0e4                 # kJ/mol/nm**2
_N_HOST = 1 + 2 * _N_RING
_N_GUEST = 3


def _host_reference():
    phi = 2.0 * np.pi * np.arange(_N_RING) / _N_RING
    low = np.stack([_R_LOW * np.cos(phi), _R_LOW * np.sin(phi), np.zeros(_N_RING)], axis=1)
    rim_phi = phi + np.pi / _N_RING
    rim = np.stack([_R_RIM * np.cos(rim_phi), _R_RIM * np.sin(rim_phi),
                    np.full(_N_RING, _Z_RIM)], axis=1)
    return np.concatenate([[[0.0, 0.0, _Z_BASE]], low, rim])


def _guest_reference():
    return np.array([[-0.12, 0.0, _SITE_Z], [0.0, 0.06, _SITE_Z], [0.12, 0.0, _SITE_Z]])


def _bonds():
    low = [1 + i for i in range(_N_RING)]
    rim = [1 + _N_RING + i for i in range(_N_RING)]
    b = [(0, a) for a in low]
    for i in range(_N_RING):
        j = (i + 1) % _N_RING
        b += [(low[i], low[j]), (rim[i], rim[j]), (low[i], rim[i]), (low[j], rim[i])]
    g = _N_HOST
    b += [(g, g + 1), (g + 1, g + 2)]
    return np.array(b)


def binding_term(x, *, k_bind=_K_BIND, k_hold=_K_HOLD, host_ref=None, site=None):
    """Binding and host-holding energy with analytic forces.

    ``0.5 k_bind |c_guest - site|**2 + 0.5 k_hold sum_i |x_i - x_i^ref|**2``
    over host atoms, with ``c_guest`` the guest's geometric centre.

    Parameters
    ----------
    x : array-like of shape (16, 3)
        Positions (13 host atoms, then 3 guest atoms), nm.
    k_bind, k_hold : float
        Force constants, kJ/mol/nm**2.
    host_ref : ndarray of shape (13, 3), optional
        Reference host pose, nm (default: the built cup).
    site : ndarray of shape (3,), optional
        Binding site, nm (default ``(0, 0, 0.30)``).

    Returns
    -------
    energy : float
        kJ/mol.
    forces : ndarray of shape (16, 3)
        kJ/mol/nm.

    Examples
    --------
    >>> x = np.concatenate([_host_reference(), _guest_reference()])
    >>> e, f = binding_term(x)
    >>> round(e, 12), f.shape
    (0.05, (16, 3))
    """
    x = np.asarray(x, dtype=np.float64)
    host_ref = _host_reference() if host_ref is None else host_ref
    site = np.array([0.0, 0.0, _SITE_Z]) if site is None else np.asarray(site)
    forces = np.zeros_like(x)
    dh = x[:_N_HOST] - host_ref
    dc = x[_N_HOST:].mean(axis=0) - site
    energy = 0.5 * k_hold * float((dh * dh).sum()) + 0.5 * k_bind * float(dc @ dc)
    forces[:_N_HOST] = -k_hold * dh
    forces[_N_HOST:] = -k_bind * dc / _N_GUEST
    return energy, forces


def host_guest_system():
    """Topology, force field, masses and start positions of the host-guest toy.

    Returns
    -------
    topology : mdtraj.Topology
        Residues ``HST`` (13 atoms) and ``GST`` (3 atoms), with bonds.
    force_field : ToyForceField
        Bonds, one guest angle, guest-host repulsion, plus :func:`binding_term`.
    masses : ndarray of shape (16,)
        amu.
    x0 : ndarray of shape (16, 3)
        Start positions, nm.

    Examples
    --------
    >>> top, ff, m, x0 = host_guest_system()
    >>> top.n_atoms, [r.name for r in top.residues]
    (16, ['HST', 'GST'])
    """
    top = md.Topology()
    chain = top.add_chain()
    host = top.add_residue("HST", chain, resSeq=1)
    guest = top.add_residue("GST", chain, resSeq=2)
    names = ["CB"] + [f"L{i + 1}" for i in range(_N_RING)] + [f"R{i + 1}" for i in range(_N_RING)]
    atoms = [top.add_atom(n, md.element.carbon, host) for n in names]
    atoms += [top.add_atom(n, md.element.carbon, guest) for n in ("G1", "G2", "G3")]
    bonds = _bonds()
    for i, j in bonds:
        top.add_bond(atoms[i], atoms[j])
    x0 = np.concatenate([_host_reference(), _guest_reference()])
    r0 = np.linalg.norm(x0[bonds[:, 1]] - x0[bonds[:, 0]], axis=1)
    g = _N_HOST
    pairs = np.array([(h, q) for h in range(_N_HOST) for q in range(g, g + _N_GUEST)])
    ff = ToyForceField(
        _N_HOST + _N_GUEST, bonds=bonds, bond_k=_K_BOND, bond_r0=r0,
        angles=[(g, g + 1, g + 2)], angle_k=300.0, angle_theta0=np.deg2rad(120.0),
        pairs=pairs, pair_epsilon=1.0, pair_sigma=0.28, bias=binding_term)
    masses = np.full(_N_HOST + _N_GUEST, 12.011)
    return top, ff, masses, x0


@dataclass(frozen=True)
class HostGuestData:
    """What :func:`write_host_guest` wrote.

    Attributes
    ----------
    topology : str
        PDB path.
    paths : list of str
        XTC paths, one per run.
    ligand_atoms, pocket_atoms : tuple of int
        0-based atoms of the guest and of the host.
    cavity_axis : tuple of float
        Unit vector from the cavity centre to the open rim, ``(0, 0, 1)``.
    ligand_selection, pocket_selection : str
        mdtraj selections, ``"resname GST"`` and ``"resname HST"``.
    frame_step_ps : float
        Time between frames, ps.
    n_frames : int
        Frames per run.
    box_nm : float or None
        Edge of the cubic periodic box written with the frames, nm (None: no box).
    tumbled : bool
        Whether every frame was rotated and translated as a whole at random.
    """

    topology: str
    paths: list
    ligand_atoms: tuple
    pocket_atoms: tuple
    cavity_axis: tuple
    ligand_selection: str
    pocket_selection: str
    frame_step_ps: float
    n_frames: int
    box_nm: float | None = None
    tumbled: bool = False


def write_host_guest(out_dir, *, seed=11, n_runs=2, n_frames=400, report_interval=10,
                     md_step_ps=0.002, temperature=300.0, friction=5.0, equilibration_steps=500,
                     tumble=False, box_nm=None):
    """Simulate the bound host-guest toy and write ``host_guest.pdb`` and ``bound-<i>.xtc``.

    Parameters
    ----------
    out_dir : str or path-like
        Output folder (created if missing).
    seed : int, default=11
        Seed of the one random generator of all runs.
    n_runs : int, default=2
        Runs (walkers).
    n_frames : int, default=400
        Frames per run (the first is the equilibrated start).
    report_interval : int, default=10
        Steps between frames.
    md_step_ps : float, default=0.002
        ps.
    temperature : float, default=300.0
        K.
    friction : float, default=5.0
        1/ps.
    equilibration_steps : int, default=500
        Steps before recording.
    tumble : bool, default=False
        Rotate (uniformly at random) and translate (uniformly within the box,
        or within 5 nm without one) the whole system of every written frame
        independently, from a generator seeded with `seed` of its own, as in a
        run where the complex drifts and turns. The first frame is turned too.
    box_nm : float, optional
        Edge of a cubic periodic box, nm: written with every frame, and every
        atom wrapped into ``[0, box_nm)``.

    Returns
    -------
    HostGuestData

    Raises
    ------
    RuntimeError
        If a guest centre leaves the cavity (more than 0.45 nm from the site);
        try another seed.

    Examples
    --------
    >>> import tempfile
    >>> with tempfile.TemporaryDirectory() as d:
    ...     data = write_host_guest(d, n_runs=1, n_frames=3, equilibration_steps=10)
    ...     len(data.paths), data.cavity_axis, data.ligand_atoms
    (1, (0.0, 0.0, 1.0), (13, 14, 15))
    """
    for name, value in (("n_runs", n_runs), ("n_frames", n_frames),
                        ("report_interval", report_interval)):
        if int(value) != value or int(value) < 1:
            raise ValueError(f"{name}={value!r} must be a positive integer")
    out_dir = Path(out_dir)
    out_dir.mkdir(parents=True, exist_ok=True)
    top, ff, masses, x0 = host_guest_system()
    integ = LangevinBAOAB(ff, masses, temperature=temperature, friction=friction,
                          md_step_ps=md_step_ps, seed=seed)
    integ.run(np.stack([x0] * int(n_runs)), int(equilibration_steps),
              max(1, int(equilibration_steps)))
    x_eq, v_eq = integ.positions_, integ.velocities_
    xyz, _ = integ.run(x_eq, (int(n_frames) - 1) * int(report_interval), int(report_interval),
                       v0=v_eq)
    xyz = np.concatenate([x_eq[None], xyz])
    frame_dt = int(report_interval) * float(md_step_ps)
    times = np.arange(int(n_frames)) * frame_dt
    guest_c = xyz[:, :, _N_HOST:].mean(axis=2)
    off = np.linalg.norm(guest_c - np.array([0.0, 0.0, _SITE_Z]), axis=-1)
    if off.max() > 0.45:
        raise RuntimeError(f"guest left the cavity (max {off.max():.2f} nm from the site, "
                           f"seed={seed!r}); try another seed")
    if box_nm is not None and not (np.isfinite(box_nm) and box_nm > 0):
        raise ValueError(f"box_nm={box_nm!r} must be a positive box edge in nm")
    if tumble:
        xyz = _tumble(xyz, seed, 5.0 if box_nm is None else float(box_nm))
    if box_nm is not None:
        xyz = xyz - box_nm * np.floor(xyz / box_nm)
    pdb = out_dir / "host_guest.pdb"
    write_pdb(pdb, top, x0, title="host-guest toy (cvdesign testbed), bound")
    paths = []
    for w in range(int(n_runs)):
        path = out_dir / f"bound-{w + 1}.xtc"
        traj = md.Trajectory(xyz[:, w].astype(np.float32), top, time=times)
        if box_nm is not None:
            traj.unitcell_vectors = np.tile(np.eye(3, dtype=np.float32) * np.float32(box_nm),
                                            (traj.n_frames, 1, 1))
        with atomic_path(path) as tmp:
            traj.save_xtc(tmp, force_overwrite=True)
        paths.append(str(path))
    return HostGuestData(
        topology=str(pdb), paths=paths,
        ligand_atoms=tuple(range(_N_HOST, _N_HOST + _N_GUEST)),
        pocket_atoms=tuple(range(_N_HOST)), cavity_axis=(0.0, 0.0, 1.0),
        ligand_selection="resname GST", pocket_selection="resname HST",
        frame_step_ps=round(frame_dt, 12), n_frames=int(n_frames),
        box_nm=None if box_nm is None else float(box_nm), tumbled=bool(tumble))


def _tumble(xyz, seed, span):
    """Every frame and walker of (n_frames, n_walkers, n_atoms, 3) turned and moved as a whole.

    Rotations are uniform (a normalized 4-D Gaussian read as a unit quaternion; Shoemake,
    1992, "Uniform random rotations", Graphics Gems III; from memory), about the centre of
    the system, followed by a translation uniform in ``[0, span)`` per axis.
    """
    rng = np.random.default_rng([int(seed), 1])
    n_frames, n_walkers = xyz.shape[:2]
    q = rng.normal(size=(n_frames, n_walkers, 4))
    w, x, y, z = np.moveaxis(q / np.linalg.norm(q, axis=-1, keepdims=True), -1, 0)
    rot = np.stack([
        np.stack([1 - 2 * (y * y + z * z), 2 * (x * y - z * w), 2 * (x * z + y * w)], -1),
        np.stack([2 * (x * y + z * w), 1 - 2 * (x * x + z * z), 2 * (y * z - x * w)], -1),
        np.stack([2 * (x * z - y * w), 2 * (y * z + x * w), 1 - 2 * (x * x + y * y)], -1),
    ], -2)
    centre = xyz.mean(axis=2, keepdims=True)
    shift = rng.uniform(0.0, span, size=(n_frames, n_walkers, 1, 3))
    return np.einsum("fwaj,fwkj->fwak", xyz - centre, rot) + shift
