"""Demo data: short unbiased Langevin runs of the latch toy in each of its two states.

Run ``python -m cvdesign.testbed.demo_data --out data`` to (re)write, bit for
bit, the files shipped in the repository's ``data/`` folder:

* ``latch.pdb``: topology (with CONECT bond records) and the closed structure;
* ``closed-1.xtc`` .. ``closed-3.xtc`` and ``open-1.xtc`` .. ``open-3.xtc``:
  one run per file, each started in its state, equilibrated there, then
  recorded every 0.2 ps;
* ``manifest.json`` (machine-readable) and ``README.md`` (for humans).

All runs of one call are integrated together as independent walkers of one
:class:`~cvdesign.testbed.LangevinBAOAB` seeded with `seed`, so the same
arguments give the same bytes.
"""

import argparse
import hashlib
import json
import os
import sys
import time
from pathlib import Path

import mdtraj as md
import numpy as np

from ..io.atomic import atomic_write_text
from ..io.atomic import atomic_path
from .langevin import LangevinBAOAB
from .toys import latch

__all__ = ["generate", "write_pdb", "main"]

_FORMAT = "cvdesign-demo-data"
_VERSION = 1


def write_pdb(path, topology, xyz, *, title=None):
    """Write one structure as PDB, with CONECT records for every bond.

    Unlike :meth:`mdtraj.Trajectory.save_pdb`, nothing in the file depends on
    the date or the library version, so the output is reproducible byte for
    byte.

    Parameters
    ----------
    path : str or path-like
        Output file.
    topology : mdtraj.Topology
        Atoms, residues, chains and bonds.
    xyz : array-like of shape (n_atoms, 3)
        Positions, nm (written in Angstrom with three decimals).
    title : str, optional
        Text of a ``TITLE`` record.

    Examples
    --------
    >>> import tempfile, os
    >>> system = latch()
    >>> with tempfile.TemporaryDirectory() as d:
    ...     write_pdb(os.path.join(d, "x.pdb"), system.topology, system.states["open"])
    ...     md.load_topology(os.path.join(d, "x.pdb")).n_bonds
    11
    """
    xyz = np.asarray(xyz, dtype=np.float64)
    if xyz.shape != (topology.n_atoms, 3):
        raise ValueError(
            f"xyz must have shape ({topology.n_atoms}, 3) to match the topology; "
            f"got {xyz.shape}"
        )
    if topology.n_atoms > 99999:
        raise ValueError(f"PDB holds at most 99999 atoms; topology has {topology.n_atoms}")
    lines = []
    if title:
        lines.append(f"TITLE     {title[:70]}")
    chain_ids = "ABCDEFGHIJKLMNOPQRSTUVWXYZ"
    serial = {}
    for atom in topology.atoms:
        n = atom.index + 1
        serial[atom.index] = n
        name = atom.name if len(atom.name) >= 4 else f" {atom.name:<3s}"
        element = atom.element.symbol if atom.element is not None else ""
        x, y, z = np.round(10.0 * xyz[atom.index], 3) + 0.0  # no "-0.000"
        lines.append(
            f"HETATM{n:5d} {name:4s} {atom.residue.name:>3s} "
            f"{chain_ids[atom.residue.chain.index % 26]}{atom.residue.resSeq % 10000:4d}    "
            f"{x:8.3f}{y:8.3f}{z:8.3f}{1.0:6.2f}{0.0:6.2f}          {element:>2s}"
        )
    neighbours = {a.index: [] for a in topology.atoms}
    for a, b in topology.bonds:
        neighbours[a.index].append(b.index)
        neighbours[b.index].append(a.index)
    for i in sorted(neighbours):
        partners = sorted(neighbours[i])
        for k in range(0, len(partners), 4):
            lines.append("CONECT" + "".join(f"{serial[j]:5d}" for j in [i] + partners[k:k + 4]))
    lines.append("END")
    _write_text(path, "\n".join(lines) + "\n")


def _write_text(path, text):
    """Atomic write, then the usual permissions of a data file (rw-r--r--)."""
    atomic_write_text(path, text)
    os.chmod(path, 0o644)


def _save_xtc(path, topology, xyz, times):
    """Write an XTC atomically (through a temporary file beside `path`)."""
    with atomic_path(path) as tmp:
        md.Trajectory(np.asarray(xyz, dtype=np.float32), topology, time=times).save_xtc(
            tmp, force_overwrite=True)


def _sha256(path):
    return hashlib.sha256(Path(path).read_bytes()).hexdigest()


def _in_well(phi, well):
    lo, hi = well
    return (phi >= lo) & (phi <= hi) if lo <= hi else (phi >= lo) | (phi <= hi)


def generate(out_dir, seed=2026, *, n_runs=3, n_frames=2000, report_interval=100,
             md_step_ps=0.002, temperature=300.0, friction=1.0, equilibration_steps=10000,
             verbose=False):
    """Simulate the latch toy in both states and write the demo data set.

    Parameters
    ----------
    out_dir : str or path-like
        Output folder (created if missing); existing files of the same names
        are replaced.
    seed : int, default=2026
        Seed of the one random generator of all runs.
    n_runs : int, default=3
        Runs per state.
    n_frames : int, default=2000
        Frames per run; the first is the equilibrated start of the recording.
    report_interval : int, default=100
        Steps between frames (100 steps of 0.002 ps = 0.2 ps).
    md_step_ps : float, default=0.002
        Integration time step, ps.
    temperature : float, default=300.0
        K.
    friction : float, default=1.0
        Langevin friction, 1/ps.
    equilibration_steps : int, default=10000
        Steps run inside the state before recording (20 ps by default).
    verbose : bool, default=False
        Print a summary to standard output.

    Returns
    -------
    manifest : dict
        The content of ``manifest.json``: files, frames, time step (ps),
        states, the slow dihedral and the contact atoms, checksums.

    Raises
    ------
    RuntimeError
        If any frame of a run left the well of its state (the data would be
        mislabelled); choose another seed.

    Examples
    --------
    >>> import tempfile
    >>> with tempfile.TemporaryDirectory() as d:
    ...     m = generate(d, n_runs=1, n_frames=5, equilibration_steps=10)
    ...     [f["name"] for f in m["trajectories"]]
    ['closed-1.xtc', 'open-1.xtc']
    """
    t_start = time.perf_counter()
    for name, value in (("n_runs", n_runs), ("n_frames", n_frames),
                        ("report_interval", report_interval)):
        if int(value) < 1:
            raise ValueError(f"{name}={value!r} must be a positive integer")
    if int(equilibration_steps) < 0:
        raise ValueError(f"equilibration_steps={equilibration_steps!r} must be >= 0")
    out_dir = Path(out_dir)
    out_dir.mkdir(parents=True, exist_ok=True)
    system = latch()
    top = system.topology
    state_names = ["closed", "open"]
    labels = [s for s in state_names for _ in range(n_runs)]
    names = [f"{s}-{r + 1}" for s in state_names for r in range(n_runs)]
    x0 = np.stack([system.states[s] for s in labels])

    integ = LangevinBAOAB(system.force_field, system.masses, temperature=temperature,
                          friction=friction, md_step_ps=md_step_ps, seed=seed)
    integ.run(x0, equilibration_steps, max(1, equilibration_steps))
    x_eq, v_eq = integ.positions_, integ.velocities_
    xyz, _ = integ.run(x_eq, (n_frames - 1) * report_interval, report_interval, v0=v_eq)
    xyz = np.concatenate([x_eq[None], xyz])            # (n_frames, n_walkers, n_atoms, 3)
    frame_dt = report_interval * md_step_ps
    times = np.arange(n_frames) * frame_dt

    pdb_name = "latch.pdb"
    write_pdb(out_dir / pdb_name, top, system.states["closed"],
              title="latch toy (cvdesign testbed), closed minimum")
    records, problems = [], []
    for w, (name, label) in enumerate(zip(names, labels)):
        fname = f"{name}.xtc"
        _save_xtc(out_dir / fname, top, xyz[:, w], times)
        # Check what a user will read back, not what we meant to write.
        traj = md.load(str(out_dir / fname), top=str(out_dir / pdb_name))
        phi = md.compute_dihedrals(traj, [system.slow_dihedral])[:, 0].astype(np.float64)
        dist = md.compute_distances(traj, [system.contact])[:, 0].astype(np.float64)
        outside = int(np.count_nonzero(~_in_well(phi, system.wells[label])))
        if outside:
            problems.append(f"{fname}: {outside} of {traj.n_frames} frames outside the "
                            f"{label} well")
        if traj.n_frames != n_frames or not np.isclose(traj.timestep, frame_dt, rtol=1e-5):
            problems.append(f"{fname}: read back {traj.n_frames} frames every "
                            f"{traj.timestep} ps, expected {n_frames} every {frame_dt} ps")
        # Circular statistics for the dihedral.
        c, s = np.cos(phi).mean(), np.sin(phi).mean()
        center = np.arctan2(s, c)
        spread = np.abs(np.angle(np.exp(1j * (phi - center))))
        records.append({
            "name": fname,
            "state": label,
            "n_frames": int(traj.n_frames),
            "frame_step_ps": round(frame_dt, 6),
            "length_ps": round((n_frames - 1) * frame_dt, 6),
            "bytes": (out_dir / fname).stat().st_size,
            "sha256": _sha256(out_dir / fname),
            "slow_dihedral_rad": {
                "circular_mean": round(float(center), 4),
                "max_deviation_from_mean": round(float(spread.max()), 4),
                "min": round(float(phi.min()), 4),
                "max": round(float(phi.max()), 4),
                "frames_outside_well": outside,
            },
            "contact_nm": {
                "mean": round(float(dist.mean()), 4),
                "std": round(float(dist.std()), 4),
                "min": round(float(dist.min()), 4),
                "max": round(float(dist.max()), 4),
            },
        })
    if problems:
        raise RuntimeError("demo data failed its checks (seed=%r): %s; try another seed"
                           % (seed, "; ".join(problems)))

    atoms = [{"index": a.index, "name": a.name, "element": a.element.symbol,
              "mass_amu": round(float(m), 5)} for a, m in zip(top.atoms, system.masses)]
    command = _command(out_dir, seed, n_runs, n_frames, report_interval, md_step_ps,
                       temperature, friction, equilibration_steps)
    manifest = {
        "format": _FORMAT,
        "version": _VERSION,
        "system": system.name,
        "description": system.description,
        "units": {"length": "nm", "time": "ps", "energy": "kJ/mol", "angle": "rad",
                  "mass": "amu", "temperature": "K"},
        "topology": {"file": pdb_name, "sha256": _sha256(out_dir / pdb_name),
                     "n_atoms": top.n_atoms, "residue": "LCH", "atoms": atoms,
                     "bonds": [[a.index, b.index] for a, b in top.bonds]},
        "slow_dihedral": {"atoms": list(system.slow_dihedral),
                          "names": [top.atom(i).name for i in system.slow_dihedral],
                          "note": "slow by construction: the only barrier above a few kT"},
        "contact": {"atoms": list(system.contact),
                    "names": [top.atom(i).name for i in system.contact],
                    "note": "short in closed, long in open"},
        "states": {s: {"slow_dihedral_well_rad": [round(float(v), 6) for v in system.wells[s]],
                       "files": [r["name"] for r in records if r["state"] == s]}
                   for s in state_names},
        "fast_torsions": system.notes["fast_torsions"],
        "arm_torsions": system.notes["arm_torsions"],
        "simulation": {"integrator": "BAOAB Langevin", "temperature_K": temperature,
                       "friction_per_ps": friction, "md_step_ps": md_step_ps,
                       "equilibration_steps": int(equilibration_steps),
                       "report_interval_steps": int(report_interval), "seed": seed,
                       "walkers": names},
        "trajectories": records,
        "command": command,
    }
    _write_text(out_dir / "manifest.json", json.dumps(manifest, indent=2) + "\n")
    _write_text(out_dir / "README.md", _readme(manifest))
    if verbose:
        print(_summary(manifest, time.perf_counter() - t_start))
    return manifest


def _command(out_dir, seed, n_runs, n_frames, report_interval, md_step_ps, temperature,
             friction, equilibration_steps):
    parts = ["python -m cvdesign.testbed.demo_data", f"--out {Path(out_dir).name or '.'}",
             f"--seed {seed}"]
    defaults = dict(n_runs=3, n_frames=2000, report_interval=100, md_step_ps=0.002,
                    temperature=300.0, friction=1.0, equilibration_steps=10000)
    given = dict(n_runs=n_runs, n_frames=n_frames, report_interval=report_interval,
                 md_step_ps=md_step_ps, temperature=temperature, friction=friction,
                 equilibration_steps=equilibration_steps)
    for key, value in given.items():
        if value != defaults[key]:
            parts.append(f"--{key.replace('_', '-')} {value}")
    return " ".join(parts)


def _summary(manifest, seconds):
    lines = [f"wrote {len(manifest['trajectories'])} runs of the latch toy "
             f"in {seconds:.1f} s",
             f"{'file':<14s}{'frames':>7s}{'dt/ps':>7s}  {'phi / rad (mean, max dev)':<27s}"
             f"contact / nm (mean, sd)"]
    for r in manifest["trajectories"]:
        ph, c = r["slow_dihedral_rad"], r["contact_nm"]
        lines.append(f"{r['name']:<14s}{r['n_frames']:7d}{r['frame_step_ps']:7.2f}  "
                     f"{ph['circular_mean']:+.2f}, {ph['max_deviation_from_mean']:.2f}"
                     f"{'':<17s}{c['mean']:.3f}, {c['std']:.3f}")
    lines.append("every frame stays in the well of its state")
    return "\n".join(lines)


def _readme(m):
    sd, ct = m["slow_dihedral"], m["contact"]
    sim = m["simulation"]
    rows = "\n".join(
        f"| `{r['name']}` | {r['state']} | {r['n_frames']} | {r['frame_step_ps']:g} | "
        f"{r['length_ps']:g} | {r['contact_nm']['mean']:.3f} ± {r['contact_nm']['std']:.3f} |"
        for r in m["trajectories"])
    atoms = ", ".join(f"{a['index']} {a['name']}" for a in m["topology"]["atoms"])
    return f"""# Demo data: the latch toy

Generated by `cvdesign.testbed.demo_data`; do not edit by hand. Regenerate
(byte for byte, same platform) with

    {m['command']}

## Scenario

{m['description']}

The molecule is invented (residue `LCH`, {m['topology']['n_atoms']} united atoms:
{atoms}). Atom indices below are 0-based.

* **Slow by construction:** the dihedral {'-'.join(sd['names'])}, atoms
  `{sd['atoms']}`. Wells: closed {m['states']['closed']['slow_dihedral_well_rad']} rad,
  open {m['states']['open']['slow_dihedral_well_rad']} rad (wrapping through ±pi).
  Barrier about 35 kJ/mol; no run crosses it (checked frame by frame).
* **Contact:** the distance {'-'.join(ct['names'])}, atoms `{ct['atoms']}`:
  short in closed, long in open. It follows the slow dihedral but overlaps a
  little more between the states.
* **Fast and irrelevant:** bond and angle vibrations, single-well arm torsions,
  the three-fold torsion C6-C7-C8-C9 (barrier about 3 kJ/mol) and the C9 rotor
  (F1-F3).

A good collective variable for these data is the slow dihedral (as a periodic
CV, or cos/sin of it in a combination); the contact distance is a decent
second; fast torsions should score low.

## Files

* `{m['topology']['file']}`: topology with CONECT bond records, closed structure.
* `manifest.json`: everything here in machine-readable form, with checksums.

| file | state | frames | time step / ps | length / ps | contact / nm |
| --- | --- | --- | --- | --- | --- |
{rows}

Each run starts at the energy minimum of its state, is equilibrated there for
{sim['equilibration_steps']} steps, then recorded. BAOAB Langevin dynamics,
{sim['temperature_K']:g} K, friction {sim['friction_per_ps']:g}/ps, time step
{sim['md_step_ps']:g} ps, seed {sim['seed']}; all runs are walkers of one
integrator. Units: nm, ps, kJ/mol, rad, amu.
"""


def main(argv=None):
    """Command line: ``python -m cvdesign.testbed.demo_data --out DIR``.

    Parameters
    ----------
    argv : list of str, optional
        Arguments (default: ``sys.argv[1:]``).

    Returns
    -------
    int
        Exit status, 0 on success.

    Examples
    --------
    >>> import tempfile, contextlib, io
    >>> with tempfile.TemporaryDirectory() as d, contextlib.redirect_stdout(io.StringIO()):
    ...     status = main(["--out", d, "--n-runs", "1", "--n-frames", "3",
    ...                    "--equilibration-steps", "10"])
    >>> status
    0
    """
    p = argparse.ArgumentParser(
        prog="python -m cvdesign.testbed.demo_data",
        description="Write the latch demo data set (topology, trajectories, manifest).")
    p.add_argument("--out", required=True, help="output folder")
    p.add_argument("--seed", type=int, default=2026)
    p.add_argument("--n-runs", type=int, default=3, help="runs per state")
    p.add_argument("--n-frames", type=int, default=2000, help="frames per run")
    p.add_argument("--report-interval", type=int, default=100, help="steps between frames")
    p.add_argument("--md-step-ps", type=float, default=0.002, help="MD step of the integrator, ps")
    p.add_argument("--temperature", type=float, default=300.0, help="K")
    p.add_argument("--friction", type=float, default=1.0, help="1/ps")
    p.add_argument("--equilibration-steps", type=int, default=10000)
    a = p.parse_args(argv)
    generate(a.out, a.seed, n_runs=a.n_runs, n_frames=a.n_frames,
             report_interval=a.report_interval, md_step_ps=a.md_step_ps,
             temperature=a.temperature, friction=a.friction,
             equilibration_steps=a.equilibration_steps, verbose=True)
    return 0


if __name__ == "__main__":
    sys.exit(main())
