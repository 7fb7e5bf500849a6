"""`cvdesign funnel` on the invented host-guest testbed scenario."""

import json

import numpy as np
import pytest

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
    doc = json.loads(out.read_text())
    assert doc["format"] == "cvdesign-funnel" and doc["units"]["length"] == "nm"
    lig = doc["ligand_atoms"]
    centres = np.concatenate([md.load(p, top=host_guest.topology).xyz[:, lig].mean(axis=1)
                              for p in host_guest.paths]).astype(np.float64)
    energy, _ = funnel_energy(centres, doc["params"], 1000.0)
    assert np.all(energy == 0.0)
    # Axis within 15 degrees of the cavity axis known by construction.
    cos = abs(np.dot(doc["params"]["axis"], host_guest.cavity_axis))
    assert cos > np.cos(np.radians(15))


def test_funnel_command_refuses_overlapping_selections(host_guest, tmp_path, capsys):
    out = tmp_path / "f.json"
    assert main(["funnel", "--topology", host_guest.topology, "--bound", host_guest.paths[0],
                 "--ligand", "resname GST", "--pocket", "all", "--out", str(out)]) == 2
    assert "share atoms" in capsys.readouterr().err
    assert not out.exists()
