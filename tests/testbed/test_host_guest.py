"""Tests of the host-guest testbed scenario and funnel sizing on it."""

import hashlib
from pathlib import Path

import mdtraj as md
import numpy as np
import pytest

from cvdesign.bias.funnel import align_to_reference_pocket, funnel_energy, size_funnel
from cvdesign.testbed.host_guest import binding_term, host_guest_system, write_host_guest


@pytest.fixture(scope="module")
def data(tmp_path_factory):
    return write_host_guest(tmp_path_factory.mktemp("hg"))


def _frames(data):
    top = md.load_topology(data.topology)
    pocket = top.select(data.pocket_selection)
    ligand = top.select(data.ligand_selection)
    assert tuple(pocket) == data.pocket_atoms and tuple(ligand) == data.ligand_atoms
    traj = md.join([md.load(p, top=data.topology) for p in data.paths])
    x = traj.xyz.astype(np.float64)
    return x[:, pocket], x[:, ligand]


def test_binding_forces_match_finite_differences():
    _, ff, _, x0 = host_guest_system()
    x = x0 + np.random.default_rng(0).normal(0, 0.02, size=x0.shape)
    e, f = ff.energy_forces(x)
    h = 1e-6
    for i, k in [(0, 2), (5, 0), (13, 1), (15, 2)]:
        dx = np.zeros_like(x)
        dx[i, k] = h
        fd = -(ff.energy(x + dx) - ff.energy(x - dx)) / (2 * h)
        assert abs(fd - f[i, k]) <= 1e-5 * max(1.0, abs(f[i, k]))
    eb, fb = binding_term(x)
    assert eb > 0
    for i, k in [(2, 1), (14, 0)]:
        dx = np.zeros_like(x)
        dx[i, k] = h
        fd = -(binding_term(x + dx)[0] - binding_term(x - dx)[0]) / (2 * h)
        assert abs(fd - fb[i, k]) <= 1e-5 * max(1.0, abs(fb[i, k]))


def test_generation_is_deterministic(tmp_path):
    a = write_host_guest(tmp_path / "a", n_frames=20, equilibration_steps=20)
    b = write_host_guest(tmp_path / "b", n_frames=20, equilibration_steps=20)
    for p, q in zip([a.topology] + a.paths, [b.topology] + b.paths):
        assert hashlib.sha256(Path(p).read_bytes()).digest() == \
            hashlib.sha256(Path(q).read_bytes()).digest()


def test_guest_stays_in_cavity(data):
    pocket, ligand = _frames(data)
    c = ligand.mean(axis=1)
    assert np.all(np.abs(c[:, 2] - 0.3) < 0.45)
    assert np.all(np.linalg.norm(c[:, :2], axis=1) < 0.4)


def test_recovered_axis_within_15_degrees_without_exit_point(data):
    pocket, ligand = _frames(data)
    out = size_funnel(pocket, ligand)
    cos = np.dot(out["params"]["axis"], data.cavity_axis)
    assert np.degrees(np.arccos(min(cos, 1.0))) < 15.0


def test_axis_exact_with_exit_point_and_positions_inside(data):
    pocket, ligand = _frames(data)
    origin = pocket[0].mean(axis=0)        # the exit point is taken in the first frame
    out = size_funnel(pocket, ligand, exit_point=origin + 2.0 * np.array(data.cavity_axis))
    np.testing.assert_allclose(out["params"]["axis"], data.cavity_axis, atol=1e-12)
    xyz = np.concatenate([pocket, ligand], axis=1)
    n_p = pocket.shape[1]
    aligned, _ = align_to_reference_pocket(xyz, range(n_p), out["reference_pocket_nm"])
    d = aligned[:, n_p:].mean(axis=1) - aligned[:, :n_p].mean(axis=1)
    e, _ = funnel_energy(d, out["params"], 1000.0)
    assert np.all(e == 0.0)


def test_tumbled_boxed_frames_are_rigid_motions_of_the_plain_ones(data, tmp_path):
    moved = write_host_guest(tmp_path, tumble=True, box_nm=5.0)
    assert moved.tumbled and moved.box_nm == 5.0
    traj = md.join([md.load(p, top=moved.topology) for p in moved.paths])
    np.testing.assert_allclose(traj.unitcell_lengths, 5.0)
    x = traj.xyz.astype(np.float64)
    assert x.min() >= 0.0 and x.max() < 5.0 + 1e-3              # wrapped into the box
    plain = np.concatenate(_frames(data), axis=1)
    # every pair distance (minimum image) is that of the plain run, to XTC precision
    pairs = np.array([(i, j) for i in range(16) for j in range(i + 1, 16)])
    dr = x[:, pairs[:, 1]] - x[:, pairs[:, 0]]
    dr -= 5.0 * np.round(dr / 5.0)
    ref = plain[:, pairs[:, 1]] - plain[:, pairs[:, 0]]
    np.testing.assert_allclose(np.linalg.norm(dr, axis=-1), np.linalg.norm(ref, axis=-1),
                               atol=3e-3)
    # and the frames really were turned: the host's axis (base atom to rim) points anywhere
    up = x[:, 7:13] - x[:, :1]
    up = (up - 5.0 * np.round(up / 5.0)).mean(axis=1)
    up /= np.linalg.norm(up, axis=1, keepdims=True)
    assert np.abs(up.mean(axis=0)).max() < 0.2 and up[:, 2].min() < -0.9
