"""`cvdesign funnel` on the invented host-guest testbed scenario."""

import json

import numpy as np
import pytest

from cvdesign import load_spec
from cvdesign.cli import main
from cvdesign.funnel import funnel_energy
from cvdesign.testbed.host_guest import write_host_guest


@pytest.fixture(scope="module")
def host_guest(tmp_path_factory):
    return write_host_guest(tmp_path_factory.mktemp("hg"))


def test_funnel_command_writes_parameters_that_keep_the_bound_ligand_inside(host_guest,
                                                                          tmp_path, capsys):
    import mdtraj as md

    out = tmp_path / "funnel.json"
    assert main(["funnel", "--topology", host_guest.topology, "--bound", *host_guest.paths,
                 "--ligand", "resname GST", "--pocket", "resname HST", "--out", str(out)]) == 0
    text = capsys.readouterr().out
    assert "cone half-angle" in text and "not guarantees" in text
    spec = load_spec(out, topology=md.load_topology(host_guest.topology))
    (funnel,) = spec.restraints
    assert funnel["kind"] == "funnel" and funnel["k_wall"] == 2000.0
    # every bound frame sits inside the funnel: the restraint's energy is exactly 0
    xyz = np.concatenate([md.load(p, top=host_guest.topology).xyz for p in host_guest.paths])
    energy, grad = spec.restraint_energy(xyz, gradient=True)
    assert np.all(energy == 0.0) and np.all(grad == 0.0)
    # the stored CV is the distance between the centres, its bound statistics match
    lig, pocket = funnel["groups"]
    dist = np.linalg.norm(xyz[:, lig].mean(axis=1) - xyz[:, pocket].mean(axis=1), axis=1)
    np.testing.assert_allclose(spec.evaluate(xyz), dist, rtol=1e-6)
    assert spec.states["bound"]["n_frames"] == len(xyz)
    doc = json.loads(out.read_text())
    assert doc["hints"]["funnel_sizing"]["reasoning"] and "not guarantees" in doc["caution"]
    # the same restraint through the sizing module's own energy, at the ligand centres
    params = dict(doc["hints"]["funnel_sizing"]["margins"], **{k: funnel[k] for k in (
        "z_min", "z_max", "z_cc", "alpha", "r_cyl", "blend")})
    params.update(origin=doc["hints"]["funnel_sizing"]["origin_nm"], axis=funnel["axis"])
    energy2, _ = funnel_energy(xyz[:, lig].astype(np.float64).mean(axis=1), params, 1000.0)
    assert np.all(energy2 == 0.0)
    doc = {"params": {"axis": funnel["axis"]}}
    # Axis within 15 degrees of the cavity axis known by construction.
    cos = abs(np.dot(doc["params"]["axis"], host_guest.cavity_axis))
    assert cos > np.cos(np.radians(15))


def test_funnel_command_refuses_overlapping_selections(host_guest, tmp_path, capsys):
    out = tmp_path / "f.json"
    assert main(["funnel", "--topology", host_guest.topology, "--bound", host_guest.paths[0],
                 "--ligand", "resname GST", "--pocket", "all", "--out", str(out)]) == 2
    assert "share atoms" in capsys.readouterr().err
    assert not out.exists()
