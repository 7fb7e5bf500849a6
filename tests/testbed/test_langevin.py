"""Tests of cvdesign.testbed.langevin, the latch toy and the demo data generator."""

import hashlib
import json
from pathlib import Path

import mdtraj as md
import numpy as np
import pytest

from cvdesign.constants import BOLTZMANN_KJ_MOL_K
from cvdesign.testbed import LangevinBAOAB, generate, latch

DATA = Path(__file__).resolve().parents[2] / "data"


def harmonic(k):
    """Isotropic harmonic wells at the origin, one per particle, k in kJ/mol/nm**2."""
    def energy_forces(x):
        return 0.5 * k * float((x * x).sum()), -k * x
    return energy_forces


def block_mean_and_error(series, n_blocks=20):
    """Mean and its standard error from block averages (time series on axis 0)."""
    blocks = np.array_split(np.asarray(series), n_blocks)
    means = np.array([b.mean() for b in blocks])
    return means.mean(), means.std(ddof=1) / np.sqrt(n_blocks)


# Harmonic test system: 200 independent particles of 10 amu in wells of
# k = 100 kJ/mol/nm**2 at 300 K, angular frequency omega = sqrt(k/m) = 3.16/ps.
N_PART, MASS, K_SPRING, TEMP = 200, 10.0, 100.0, 300.0
KT = BOLTZMANN_KJ_MOL_K * TEMP


@pytest.mark.parametrize("md_step_ps", [0.02, 0.3])
def test_baoab_samples_harmonic_configurations_exactly(md_step_ps):
    # <x^2> = kT/k per Cartesian component by equipartition (Frenkel and Smit,
    # "Understanding Molecular Simulation", 2nd ed., Academic Press 2002). BAOAB
    # samples the configurational distribution of a harmonic system exactly at
    # any stable step (Leimkuhler and Matthews, Appl. Math. Res. Express 2013),
    # so even omega*dt = 0.95 shows no step-size bias.
    n_steps = int(round(600.0 / md_step_ps))
    integ = LangevinBAOAB(harmonic(K_SPRING), np.full(N_PART, MASS), temperature=TEMP,
                          friction=2.0, md_step_ps=md_step_ps, seed=11)
    x0 = np.random.default_rng(0).normal(scale=np.sqrt(KT / K_SPRING), size=(N_PART, 3))
    xyz, _ = integ.run(x0, n_steps, report_interval=max(1, n_steps // 4000))
    xyz = xyz[len(xyz) // 20:]
    for axis in range(3):
        mean, err = block_mean_and_error((xyz[..., axis] ** 2).mean(axis=1))
        assert abs(mean - KT / K_SPRING) < max(4 * err, 1e-4), (axis, mean, err)
    assert abs(xyz.mean()) < 0.01 * np.sqrt(KT / K_SPRING)


def test_baoab_kinetic_temperature_at_small_step():
    # Equipartition: <m v^2> = kT per component (Frenkel and Smit 2002); BAOAB's
    # velocity error is O(dt^2), negligible at omega*dt = 0.06.
    integ = LangevinBAOAB(harmonic(K_SPRING), np.full(N_PART, MASS), temperature=TEMP,
                          friction=2.0, md_step_ps=0.02, seed=5)
    integ.run(np.zeros((N_PART, 3)), 5000, report_interval=10)
    v = integ.reported_velocities_[50:]
    mean, err = block_mean_and_error((MASS * v * v).mean(axis=(1, 2)))
    assert abs(mean - KT) < max(4 * err, 0.005 * KT), (mean, err)
    t_kin = MASS * (v * v).sum(axis=(1, 2)).mean() / (3 * N_PART * BOLTZMANN_KJ_MOL_K)
    assert t_kin == pytest.approx(TEMP, rel=0.02)


def test_zero_friction_conserves_total_energy_of_latch():
    # Velocity Verlet limit (common practice: energy drift as a force check).
    system = latch()
    integ = LangevinBAOAB(system.force_field, system.masses, temperature=300.0,
                          friction=0.0, md_step_ps=0.0005, seed=0)
    integ.run(system.states["open"], 2000, report_interval=10)
    kinetic = 0.5 * (system.masses[:, None] * integ.reported_velocities_ ** 2).sum(axis=(1, 2))
    total = kinetic + integ.reported_energies_
    assert np.ptp(total) < 0.1  # kJ/mol, against kinetic energy fluctuations of ~10


def test_same_seed_same_trajectory_different_seed_different():
    system = latch()

    def trajectory(seed):
        integ = LangevinBAOAB(system.force_field, system.masses, temperature=300.0,
                              friction=1.0, md_step_ps=0.002, seed=seed)
        return integ.run(system.states["closed"], 200, report_interval=20)

    a, ta = trajectory(7)
    b, tb = trajectory(7)
    c, _ = trajectory(8)
    assert a.shape == (10, 12, 3) and a.dtype == np.float64
    assert np.array_equal(a, b) and np.array_equal(ta, tb)
    assert not np.array_equal(a, c)
    np.testing.assert_allclose(ta, 0.04 * np.arange(1, 11))


def test_run_continued_with_final_velocities_equals_one_long_run():
    system = latch()
    kwargs = dict(temperature=300.0, friction=1.0, md_step_ps=0.002, seed=4)
    one = LangevinBAOAB(system.force_field, system.masses, **kwargs)
    long, _ = one.run(system.states["open"], 100, report_interval=50)
    two = LangevinBAOAB(system.force_field, system.masses, **kwargs)
    first, _ = two.run(system.states["open"], 50, report_interval=50)
    second, _ = two.run(two.positions_, 50, report_interval=50, v0=two.velocities_)
    assert np.array_equal(long, np.concatenate([first, second]))


def test_walkers_are_integrated_in_lockstep():
    system = latch()
    x0 = np.stack([system.states["closed"], system.states["open"], system.states["open"]])
    integ = LangevinBAOAB(system.force_field, system.masses, temperature=300.0,
                          friction=1.0, md_step_ps=0.002, seed=0)
    xyz, t = integ.run(x0, 40, report_interval=10)
    assert xyz.shape == (4, 3, 12, 3) and t.shape == (4,)
    assert integ.reported_energies_.shape == (4, 3)
    assert not np.array_equal(xyz[:, 1], xyz[:, 2])  # independent noise


@pytest.mark.parametrize("kwargs, match", [
    (dict(temperature=-1.0, friction=1.0, md_step_ps=0.002), r"temperature=-1.0 must be positive"),
    (dict(temperature=300.0, friction=-1.0, md_step_ps=0.002),
     r"friction=-1.0 must be zero or positive"),
    (dict(temperature=300.0, friction=1.0, md_step_ps=0.0), r"md_step_ps=0.0 must be positive"),
])
def test_invalid_parameters_raise_with_the_argument_name(kwargs, match):
    with pytest.raises(ValueError, match=match):
        LangevinBAOAB(harmonic(1.0), [1.0], **kwargs)


def test_wrong_start_shape_raises():
    integ = LangevinBAOAB(harmonic(1.0), [1.0, 1.0], temperature=300.0, friction=1.0,
                          md_step_ps=0.01)
    with pytest.raises(ValueError, match=r"x0 must have shape \(2, 3\) or \(n_walkers, 2, 3\)"):
        integ.run(np.zeros((3, 3)), 10)


# ---------------------------------------------------------------------- latch toy


def test_latch_states_are_built_as_documented():
    system = latch()
    top = system.topology
    assert [a.name for a in top.atoms] == [f"C{i}" for i in range(1, 10)] + ["F1", "F2", "F3"]
    assert top.n_bonds == 11 and top.residue(0).name == "LCH"
    np.testing.assert_allclose(system.masses, [a.element.mass for a in top.atoms])
    closed, opened = system.states["closed"], system.states["open"]
    assert abs(system.slow_angle(closed)) < 1e-3
    assert abs(abs(system.slow_angle(opened)) - np.pi) < 1e-3
    d = {s: np.linalg.norm(x[0] - x[7]) for s, x in system.states.items()}
    assert d["closed"] < 0.5 < 0.75 < d["open"]
    for x in (closed, opened):  # both are minima with (almost) zero strain
        assert system.force_field.energy(x) < 1e-3
    assert system.assign_state(np.stack([closed, opened])).tolist() == ["closed", "open"]


def test_latch_short_runs_stay_in_their_well_and_separate_the_contact():
    system = latch()
    integ = LangevinBAOAB(system.force_field, system.masses, temperature=300.0,
                          friction=1.0, md_step_ps=0.002, seed=1)
    x0 = np.stack([system.states["closed"], system.states["open"]])
    xyz, _ = integ.run(x0, 5000, report_interval=25)
    states = system.assign_state(xyz)
    assert np.all(states[:, 0] == "closed") and np.all(states[:, 1] == "open")
    d = np.linalg.norm(xyz[..., 0, :] - xyz[..., 7, :], axis=-1)
    assert d[:, 0].mean() + 0.2 < d[:, 1].mean()


# ---------------------------------------------------------------------- demo data


def test_demo_data_is_byte_identical_when_regenerated(tmp_path):
    kwargs = dict(seed=2026, n_runs=1, n_frames=30, equilibration_steps=100)
    m1 = generate(tmp_path / "a" / "data", **kwargs)
    m2 = generate(tmp_path / "b" / "data", **kwargs)
    files = sorted(p.name for p in (tmp_path / "a" / "data").iterdir())
    assert files == ["README.md", "closed-1.xtc", "latch.pdb", "manifest.json", "open-1.xtc"]
    for name in files:
        assert (tmp_path / "a" / "data" / name).read_bytes() == \
            (tmp_path / "b" / "data" / name).read_bytes(), name
    assert m1 == m2
    assert m1["command"] == ("python -m cvdesign.testbed.demo_data --out data --seed 2026 "
                             "--n-runs 1 --n-frames 30 --equilibration-steps 100")


def test_demo_data_reads_back_with_bonds_and_time_step(tmp_path):
    m = generate(tmp_path, n_runs=1, n_frames=12, equilibration_steps=10)
    top = md.load_topology(str(tmp_path / "latch.pdb"))
    assert top.n_bonds == 11
    assert sorted((a.index, b.index) for a, b in top.bonds) == \
        sorted(map(tuple, m["topology"]["bonds"]))
    traj = md.load(str(tmp_path / "open-1.xtc"), top=top)
    assert traj.n_frames == 12 and traj.timestep == pytest.approx(0.2, rel=1e-6)
    assert traj.time[0] == 0.0
    assert m["slow_dihedral"]["atoms"] == [2, 3, 4, 5] and m["contact"]["atoms"] == [0, 7]
    json.loads((tmp_path / "manifest.json").read_text())  # valid JSON


@pytest.mark.skipif(not (DATA / "manifest.json").exists(), reason="no shipped demo data")
def test_shipped_demo_data_matches_its_manifest():
    m = json.loads((DATA / "manifest.json").read_text())
    assert m["format"] == "cvdesign-demo-data" and m["version"] == 1
    files = [m["topology"]] + [{"file": t["name"], "sha256": t["sha256"]}
                               for t in m["trajectories"]]
    for entry in files:
        digest = hashlib.sha256((DATA / entry["file"]).read_bytes()).hexdigest()
        assert digest == entry["sha256"], entry["file"]
    assert sum((DATA / f["file"]).stat().st_size for f in files) < 5e6
    assert all(t["slow_dihedral_rad"]["frames_outside_well"] == 0 for t in m["trajectories"])
