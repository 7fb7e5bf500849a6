"""`cvdesign hints` on a spec written by `cvdesign funnel`: walls and grid from the funnel.

The scenario is the testbed's invented host-guest complex (a ring host with a bound
three-atom guest). The funnel spec's CV is the distance between the pocket and ligand
centres and its single state is 'bound'; hints built from that state alone would put walls
at its mean -/+ 3 std, on the coordinate the funnel exists to let the ligand leave along.
"""

import json

import mdtraj as md
import numpy as np
import pytest

from cvdesign import load_spec
from cvdesign.bias.funnel import align_to_reference_pocket, funnel_reach
from cvdesign.bias.hints import spec_hints, suggest_hints
from cvdesign.cli import main
from cvdesign.errors import InputError
from cvdesign.testbed.host_guest import write_host_guest

RUN = ["--temperature", "300", "--md-step-fs", "2", "--barrier", "50"]


@pytest.fixture(scope="module")
def funnel_spec(tmp_path_factory):
    """(data, path of funnel.json) from 'cvdesign funnel' on short host-guest runs."""
    out_dir = tmp_path_factory.mktemp("funnel-hints")
    data = write_host_guest(out_dir / "hg", n_runs=1, n_frames=80)
    out = out_dir / "funnel.json"
    assert main(["funnel", "--topology", data.topology, "--bound", *data.paths,
                 "--ligand", data.ligand_selection, "--pocket", data.pocket_selection,
                 "--out", str(out), "--no-report"]) == 0
    return data, out


def _ligand_placed(frame, lig, pocket, z, r, axis):
    """Copies of one aligned frame with the ligand moved rigidly so that its centre sits at
    (z, r) from the pocket centre (nm; r along a direction perpendicular to the axis)."""
    axis = np.asarray(axis, dtype=np.float64)
    perp = np.cross(axis, [1.0, 0.0, 0.0])
    if np.linalg.norm(perp) < 0.5:
        perp = np.cross(axis, [0.0, 1.0, 0.0])
    perp /= np.linalg.norm(perp)
    target = frame[pocket].mean(axis=0) + z[:, None] * axis + r[:, None] * perp
    xyz = np.repeat(frame[None], len(z), axis=0)
    xyz[:, lig] += (target - frame[lig].mean(axis=0))[:, None, :]
    return xyz


def test_funnel_hints_put_no_wall_on_the_cv_and_a_grid_over_every_position_the_funnel_allows(
        funnel_spec, capsys):
    data, path = funnel_spec
    top = md.load_topology(data.topology)
    spec = load_spec(path, topology=top)
    (res,) = spec.restraints
    assert list(spec.states) == ["bound"]
    assert main(["hints", str(path), *RUN, "--json"]) == 0
    captured = capsys.readouterr()
    hints = json.loads(captured.out)
    assert hints["walls"] == {"lower": None, "upper": None, "k_std": None, "restraint": "funnel",
                              "restraint_walls": pytest.approx(hints["walls"]["restraint_walls"])}
    assert f"its walls at z = {res['lower_wall_z_nm']:.4g} and {res['upper_wall_z_nm']:.4g} nm" \
        in hints["walls"]["restraint_walls"]
    assert hints["grid"]["covers_restraint"] is True
    assert "only one state" not in captured.err
    # Independent check: ligand centres placed over the funnel (axis and rim, up to the upper
    # wall), every one the restraint leaves at zero energy must have its CV on the grid.
    traj = md.load_frame(data.paths[0], 0, top=data.topology)
    lig, pocket = res["groups"]
    aligned, _ = align_to_reference_pocket(traj.xyz.astype(np.float64), pocket,
                                           res["reference_pocket_nm"])
    z = np.linspace(res["lower_wall_z_nm"], res["upper_wall_z_nm"], 61)
    zz, frac = np.meshgrid(z, np.linspace(0.0, 1.0, 11))
    zz = zz.ravel()
    radius = res["cylinder_radius_nm"] + np.tan(res["cone_half_angle_rad"]) * np.clip(
        res["cone_end_z_nm"] - zz, 0.0, None)   # inside the blend too: R there is larger
    xyz = _ligand_placed(aligned[0], lig, pocket, zz, 0.999 * frac.ravel() * radius,
                         res["axis"])
    inside = spec.restraint_energy(xyz) == 0.0
    assert inside.sum() > 500
    cv = spec.evaluate(xyz)[inside]
    grid = hints["grid"]
    assert grid["lower"] <= cv.min() and cv.max() <= grid["upper"]
    assert cv.max() > 0.99 * funnel_reach(res)[0]   # the rim of the upper wall is reached
    # walls at the bound state's mean -/+ 3 std would have cut the funnel short
    bound = spec.states["bound"]
    assert cv.max() > 2 * (bound["mean"] + 3 * bound["std"])
    # the text says where walls and grid come from, and what the fill times mean
    assert main(["hints", str(path), *RUN]) == 0
    text = capsys.readouterr().out
    assert "walls            none on the CV: restraint 'funnel' confines it (its walls at z" \
        in text
    assert "spans every value restraint 'funnel' allows" in text
    assert "the time to leave the state, e.g. the first unbinding, not to converge a binding " \
           "free energy" in text
    assert "- Restraint 'funnel', a funnel, holds the ligand centre within a cone and " \
           "cylinder" in text
    assert f"up to {funnel_reach(res)[0]:.4g} nm, the funnel's reach (its farthest point from " \
           "the pocket centre, on the rim of its upper wall) [derived from the restraint]" in text
    assert "Walls: none on the CV; restraint 'funnel' confines it" in text
    assert "Fill times with a funnel: each state's row is the time to fill that state's basin" \
        in text
    assert hints["fill_time"]["note"].startswith("Fill times with a funnel")
    assert "starting points to validate, not guarantees" in text


def test_funnel_hints_follow_the_terms_scale_and_a_lower_wall_above_the_pocket(funnel_spec):
    _, path = funnel_spec
    doc = json.loads(path.read_text())
    res = doc["restraints"][0]
    doc["terms"][0].update(weight=2.0, center=0.1, scale=0.5)   # CV = 4 (d - 0.1)
    doc["states"]["bound"].update(mean=4 * (doc["states"]["bound"]["mean"] - 0.1),
                                  std=4 * doc["states"]["bound"]["std"])
    for key in ("reachable_range", "observed_range", "cv_digest"):  # states redone by hand
        doc.pop(key, None)
    res["lower_wall_z_nm"] = 0.05   # nearest point of the funnel: on the axis at z = 0.05 nm
    path2 = path.with_name("scaled.json")
    path2.write_text(json.dumps(doc))
    hints = spec_hints(load_spec(path2), temperature=300.0, md_step_fs=2.0, barrier=50.0)
    reach, _ = funnel_reach(res)
    text = " ".join(hints["reasoning"])
    assert f"[{4 * (0.05 - 0.1):.4g}, {4 * (reach - 0.1):.4g}] CV units" in text
    assert "from 0.05 nm (its lower wall, on the axis)" in text
    assert "nm before the CV's scaling" in text
    margin = hints["grid"]["lower"] - 4 * (0.05 - 0.1)
    assert margin < 0 and hints["grid"]["upper"] >= 4 * (reach - 0.1) - margin - 1e-9


def test_a_funnel_whose_distance_is_not_the_cv_gets_a_warning_and_the_state_walls(funnel_spec):
    _, path = funnel_spec
    doc = json.loads(path.read_text())
    desc = doc["descriptors"][0]
    desc["groups"][0] = desc["groups"][0][:-1]   # the pocket less one atom
    if "atom_identities" in desc:
        desc["atom_identities"][0] = desc["atom_identities"][0][:-1]
    del doc["cv_digest"]  # the states are taken as they are (a spec of an earlier cvdesign)
    path2 = path.with_name("other-cv.json")
    path2.write_text(json.dumps(doc))
    hints = spec_hints(load_spec(path2), temperature=300.0, md_step_fs=2.0, barrier=50.0)
    assert hints["walls"]["k_std"] == 3.0 and "restraint" not in hints["walls"]
    (other,) = [w for w in hints["warnings"] if "carries the funnel restraint" in w]
    assert other.startswith(
        "the spec carries the funnel restraint 'funnel', but its CV is not the distance between "
        "the geometric centres of the restraint's two groups, so the walls and grid cannot be "
        "taken from the funnel")
    assert f"lower_wall_z_nm {doc['restraints'][0]['lower_wall_z_nm']:.4g} to upper_wall_z_nm" \
        in other
    (single,) = [w for w in hints["warnings"] if "only one state" in w]
    assert "confine the bias to that state: a run with them cannot leave it" in single


def test_suggest_hints_checks_the_confinement():
    states = {"a": {"mean": 0.3, "std": 0.05}}
    base = dict(temperature=300.0, md_step_fs=2.0, barrier=40.0, autocorrelation_time_ps=0.5)
    conf = {"id": "r", "lower": 0.0, "upper": 2.0, "walls": "w", "reasoning": "why",
            "fill_note": "note"}
    h = suggest_hints(states, **base, confinement=conf)
    assert h["walls"]["restraint"] == "r" and h["warnings"] == []
    assert h["grid"]["lower"] <= 0.0 and h["grid"]["upper"] >= 2.0
    assert h["reasoning"].count("why") == 1 and h["fill_time"]["note"] == "note"
    with pytest.raises(InputError, match=r"confinement lacks fill_note"):
        suggest_hints(states, **base, confinement={k: v for k, v in conf.items()
                                                   if k != "fill_note"})
    with pytest.raises(InputError, match=r"confinement range \[2\.0, 0\.0\] must have lower < "
                                         r"upper"):
        suggest_hints(states, **base, confinement={**conf, "lower": 2.0, "upper": 0.0})
    with pytest.raises(InputError, match=r"confinement goes with a CV that is not periodic"):
        suggest_hints(states, **base, confinement=conf, periodic=True, cv_range=(-3.2, 3.2))
