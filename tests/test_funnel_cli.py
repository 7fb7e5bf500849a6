"""`cvdesign funnel` on the invented host-guest testbed scenario."""

import json
from pathlib import Path

import mdtraj as md
import numpy as np
import pytest

from cvdesign import load_spec
from cvdesign.cli import main
from cvdesign import Source
from cvdesign.bias.funnel import (SHAPE_KEYS, align_to_reference_pocket, funnel_energy,
                                  size_funnel, size_funnel_from_source)
from cvdesign.io.source import select_atoms
from cvdesign.testbed.host_guest import write_host_guest


@pytest.fixture(scope="module")
def host_guest(tmp_path_factory):
    return write_host_guest(tmp_path_factory.mktemp("hg"))


@pytest.fixture(scope="module")
def tumbled(tmp_path_factory):
    """The same runs, every frame turned and moved at random and wrapped into a 6 nm box."""
    return write_host_guest(tmp_path_factory.mktemp("hg-tumbled"), tumble=True, box_nm=6.0)


def _run(data, out, *extra):
    return main(["funnel", "--topology", data.topology, "--bound", *data.paths,
                 "--ligand", data.ligand_selection, "--pocket", data.pocket_selection,
                 "--out", str(out), *extra])


def _frames(data):
    traj = md.join([md.load(p, top=data.topology) for p in data.paths])
    box = None if traj.unitcell_vectors is None else traj.unitcell_vectors.astype(np.float64)
    return traj.xyz.astype(np.float64), box


def test_funnel_command_writes_parameters_that_keep_the_bound_ligand_inside(host_guest,
                                                                          tmp_path, capsys):
    out = tmp_path / "funnel.json"
    assert _run(host_guest, out) == 0
    text = capsys.readouterr().out
    assert "cone half-angle" in text and "not guarantees" in text
    assert "hold the pocket in this orientation" in text and "warning:" not in text
    # the selections echoed with their atom counts (as mdtraj selects them)
    topology = md.load_topology(host_guest.topology)
    for role, sel in [("ligand", host_guest.ligand_selection),
                      ("pocket", host_guest.pocket_selection)]:
        assert f"{role}: selection {sel!r}: {topology.select(sel).size} atoms in " in text
    spec = load_spec(out, topology=topology)
    (funnel,) = spec.restraints
    assert funnel["kind"] == "funnel" and funnel["wall_force_constant_kj_mol_nm2"] == 2000.0
    xyz, box = _frames(host_guest)
    lig, pocket = funnel["groups"]
    # the reference pocket is the first bound frame's pocket, centred
    first = xyz[0, pocket]
    np.testing.assert_allclose(funnel["reference_pocket_nm"], first - first.mean(axis=0),
                               atol=1e-9)
    # every bound frame, its pocket held in the reference orientation, sits inside the funnel
    aligned, _ = align_to_reference_pocket(xyz, pocket, funnel["reference_pocket_nm"])
    energy, grad = spec.restraint_energy(aligned, gradient=True)
    assert np.all(energy == 0.0) and np.all(grad == 0.0)
    # the same restraint through the sizing module's own energy, at the aligned vectors
    d = aligned[:, lig].mean(axis=1) - aligned[:, pocket].mean(axis=1)
    energy2, _ = funnel_energy(d, funnel, 1000.0)
    assert np.all(energy2 == 0.0)
    # the stored CV is the distance between the centres, its bound statistics match
    dist = np.linalg.norm(xyz[:, lig].mean(axis=1) - xyz[:, pocket].mean(axis=1), axis=1)
    np.testing.assert_allclose(spec.evaluate(xyz), dist, rtol=1e-6)
    assert spec.states["bound"]["n_frames"] == len(xyz)
    assert np.isclose(spec.states["bound"]["mean"], dist.mean(), rtol=1e-9)
    doc = json.loads(out.read_text())
    sizing = doc["hints"]["funnel_sizing"]
    assert sizing["reasoning"] and "not guarantees" in doc["caution"]
    assert sizing["reference"] == {"file": "bound-1.xtc", "frame": 0,
                                   "pocket_center_nm": pytest.approx(first.mean(axis=0).tolist())}
    # Axis within 15 degrees of the cavity axis known by construction.
    cos = abs(np.dot(funnel["axis"], host_guest.cavity_axis))
    assert cos > np.cos(np.radians(15))


def test_funnel_command_gives_the_same_funnel_when_the_complex_tumbles_in_a_box(
        host_guest, tumbled, tmp_path, capsys):
    plain, moved = tmp_path / "plain.json", tmp_path / "tumbled.json"
    assert _run(host_guest, plain) == 0 and _run(tumbled, moved) == 0
    capsys.readouterr()
    a = json.loads(plain.read_text())["restraints"][0]
    b = json.loads(moved.read_text())["restraints"][0]
    # XTC stores coordinates to 0.001 nm, so the turned frames differ by that much
    for key in SHAPE_KEYS:
        assert np.isclose(a[key], b[key], rtol=0.01), key
    # the complex is split across the boundary in many frames, yet every aligned frame is inside
    xyz, box = _frames(tumbled)
    lig, pocket = b["groups"]
    assert np.mean(np.ptp(xyz[:, pocket], axis=1).max(axis=1) > 3.0) > 0.1
    spec = load_spec(moved)
    aligned, aligned_box = align_to_reference_pocket(xyz, pocket, b["reference_pocket_nm"], box)
    assert np.all(spec.restraint_energy(aligned, box=aligned_box) == 0.0)


def test_funnel_command_warns_when_the_funnel_reaches_beyond_half_the_box(tmp_path, capsys):
    data = write_host_guest(tmp_path / "hg", n_runs=1, n_frames=60, box_nm=4.0)
    out = tmp_path / "f.json"
    assert _run(data, out) == 0
    captured = capsys.readouterr()
    text = captured.err  # warnings go to standard error, results to standard output
    assert "cvdesign funnel: warning: the funnel reaches" in text
    assert "beyond half the smallest box height of the bound frames (2.000 nm)" in text
    assert "warning" not in captured.out
    sizing = json.loads(out.read_text())["hints"]["funnel_sizing"]
    assert any("beyond half the smallest box height" in w for w in sizing["warnings"])
    assert any(r.startswith("WARNING: the funnel reaches") for r in sizing["reasoning"])
    # a shorter unbound length brings the funnel inside the box, and the warning goes
    reach = sizing["observed"]["funnel_reach_nm"]
    assert reach > 2.0
    assert _run(data, tmp_path / "short.json", "--unbound-length", "0.6") == 0
    captured = capsys.readouterr()
    assert "the funnel reaches" not in captured.err  # (one run of 60 frames: the axis is
    assert "the axis through the mean ligand offset is uncertain" in captured.err  # noisy)
    short = json.loads((tmp_path / "short.json").read_text())["hints"]["funnel_sizing"]
    assert short["observed"]["funnel_reach_nm"] == pytest.approx(reach - 0.9, abs=0.05)
    with pytest.raises(SystemExit) as stop:
        _run(data, tmp_path / "bad.json", "--unbound-length", "0")
    assert stop.value.code == 2
    assert "argument --unbound-length: '0' must be positive" in capsys.readouterr().err


def test_funnel_command_refuses_overlapping_selections(host_guest, tmp_path, capsys):
    out = tmp_path / "f.json"
    assert main(["funnel", "--topology", host_guest.topology, "--bound", host_guest.paths[0],
                 "--ligand", "resname GST", "--pocket", "all", "--out", str(out)]) == 2
    assert "share atoms" in capsys.readouterr().err
    assert not out.exists()


def test_funnel_command_replaces_its_own_output_with_force(host_guest, tmp_path, capsys):
    out, plot = tmp_path / "f.json", tmp_path / "f.svg"
    out.write_text("old")
    plot.write_text("old")
    assert _run(host_guest, out, "--plot", str(plot), "--force") == 0
    assert load_spec(out).restraints and plot.read_text().lstrip().startswith("<?xml")
    assert sorted(p.name for p in tmp_path.iterdir()) == ["f-report-data.json", "f-report.html",
                                                          "f.json", "f.svg"]


def test_funnel_command_writes_identical_bytes_serially_with_two_workers_and_on_dask(
        short_leaves, tumbled, threaded_dask, tmp_path, capsys):
    # the tumbled runs: turned, moved and wrapped frames in a periodic box
    outs, texts, reports, datas = [], [], [], []
    for name, extra in (("serial", ()), ("workers", ("--workers", "2")),
                        ("dask", ("--scheduler", threaded_dask.scheduler.address))):
        out = tmp_path / f"{name}.json"
        report = tmp_path / f"{name}-report.html"
        data = tmp_path / f"{name}-report-data.json"
        assert _run(tumbled, out, *extra) == 0
        outs.append(out.read_bytes())
        datas.append(data.read_bytes().replace(out.name.encode(), b"OUT"))
        texts.append(capsys.readouterr().out.replace(str(report), "REPORT")
                     .replace(str(data), "DATA").replace(str(out), "OUT"))
        reports.append(report.read_text().replace(out.stem, "OUT"))
    assert outs[1] == outs[0] and outs[2] == outs[0]
    assert datas[1] == datas[0] and datas[2] == datas[0]  # the positions the report draws
    assert texts[1] == texts[0] and texts[2] == texts[0]
    assert reports[1] == reports[0] and reports[2] == reports[0]


def test_funnel_from_a_source_is_the_sizing_of_its_frames_as_arrays(tumbled, threaded_dask):
    src = Source(tumbled.topology)
    for p in tumbled.paths:
        src.add(p, "bound")
    pocket = select_atoms(src.topology, tumbled.pocket_selection)
    ligand = select_atoms(src.topology, tumbled.ligand_selection)
    got = size_funnel_from_source(src, pocket, ligand, executor=threaded_dask)
    xyz, box = _frames(tumbled)
    ref = size_funnel(xyz[:, pocket], xyz[:, ligand], box)
    # the reference pocket is the first frame's, whatever the split: the same bits
    assert got["reference_pocket_nm"] == ref["reference_pocket_nm"]
    assert got["reference_center_nm"] == ref["reference_center_nm"]
    assert got["observed"]["n_frames"] == len(xyz) and got["density"] == ref["density"]
    # the rest differs from one pass over the arrays by the order of the sums only
    for key in ("axis", *SHAPE_KEYS):
        np.testing.assert_allclose(got["params"][key], ref["params"][key], rtol=1e-9,
                                   atol=1e-12)
    for key, value in ref["observed"].items():
        np.testing.assert_allclose(got["observed"][key], value, rtol=1e-9, err_msg=key)


# ---------------------------------------------------------------------------- biased runs
def test_funnel_from_biased_runs_with_integer_multiplicities_equals_the_repeated_frames(
        host_guest, tmp_path):
    """A bias V = kT ln(m) weighs each frame m times: the funnel sized from the biased runs
    equals the one sized from the runs with every frame repeated m times (weights are
    normalized, so frame counts differ and the density is scaled)."""
    from cvdesign.constants import BOLTZMANN_KJ_MOL_K

    kt = BOLTZMANN_KJ_MOL_K * 300.0
    rng = np.random.default_rng(7)
    biased, repeated = Source(host_guest.topology, temperature=300.0), \
        Source(host_guest.topology)
    total = 0
    for i, path in enumerate(host_guest.paths):
        traj = md.load(path, top=host_guest.topology)
        m = rng.integers(1, 5, size=traj.n_frames)
        m[0] = 1 + i  # (the reference frame is the first frame either way)
        total += int(m.sum())
        traj.save_dcd(str(tmp_path / f"b{i}.dcd"))  # float32 as read: no rounding
        bias = tmp_path / f"b{i}.bias"
        bias.write_text("bias\n" + "".join(f"{float(v)!r}\n" for v in kt * np.log(m)))
        biased.add(str(tmp_path / f"b{i}.dcd"), "bound", bias=str(bias))
        traj[np.repeat(np.arange(traj.n_frames), m)].save_dcd(str(tmp_path / f"r{i}.dcd"))
        repeated.add(str(tmp_path / f"r{i}.dcd"), "bound")
    top = biased.topology
    lig, pocket = (select_atoms(top, host_guest.ligand_selection),
                   select_atoms(top, host_guest.pocket_selection))
    a = size_funnel_from_source(biased, pocket, lig)
    b = size_funnel_from_source(repeated, pocket, lig)
    np.testing.assert_allclose(a["params"]["axis"], b["params"]["axis"], rtol=1e-9, atol=1e-12)
    for key in SHAPE_KEYS:
        assert a["params"][key] == pytest.approx(b["params"][key], rel=1e-9), key
    for key in ("z_min_nm", "z_max_nm", "r_max_nm", "z_mean_nm", "z_std_nm", "r_std_nm",
                "r_q95_nm", "center_distance_mean_nm", "center_distance_std_nm",
                "pocket_fit_rmsd_mean_nm", "pocket_fit_rmsd_max_nm", "ligand_radius_nm"):
        assert a["observed"][key] == pytest.approx(b["observed"][key], rel=1e-9, abs=1e-12), key
    n = 2 * 400
    assert a["observed"]["n_frames"] == n and b["observed"]["n_frames"] == total
    cells_a = {(z, r): c for z, r, c in a["density"]["cells"]}
    cells_b = {(z, r): c for z, r, c in b["density"]["cells"]}
    assert set(cells_a) == set(cells_b)
    for cell, c in cells_a.items():
        assert c * total / n == pytest.approx(cells_b[cell], rel=1e-9)
    assert "effective_sample_size" not in b["observed"]
    assert a["observed"]["effective_sample_size"]["bound"] == pytest.approx(
        biased.reweighting().ess[0])
    text = "\n".join(a["reasoning"])
    assert "effective sample size (Kish) of state 'bound'" in text
    assert "reweighted by exp(V/kT)" in text and "over every frame seen" in text
    # unweighted, the same frames give another funnel: the weights do matter
    plain = Source(host_guest.topology)
    for i in range(2):
        plain.add(str(tmp_path / f"b{i}.dcd"), "bound")
    c = size_funnel_from_source(plain, pocket, lig)
    assert c["observed"]["z_mean_nm"] != pytest.approx(a["observed"]["z_mean_nm"], rel=1e-6)


def test_funnel_command_accepts_the_bias_options_of_suggest(host_guest, tmp_path, capsys):
    from cvdesign.cli.commands import build_parser

    def options(command):
        sub = next(a for a in build_parser()._actions if a.dest == "command")
        return {o: (a.nargs, a.metavar, a.type, a.default)
                for a in sub.choices[command]._actions for o in a.option_strings
                if o in ("--bias-energy", "--bias-column", "--temperature")}

    assert options("funnel") == options("suggest") and len(options("funnel")) == 3
    rng = np.random.default_rng(2)
    argv = []
    for i, path in enumerate(host_guest.paths):
        bias = tmp_path / f"run{i}.csv"
        bias.write_text("time_ps, energy\n" + "".join(
            f"{0.02 * t:.2f}, {v!r}\n" for t, v in enumerate(rng.uniform(0, 3, 400).tolist())))
        argv += ["--bias-energy", path, str(bias)]
    out = tmp_path / "funnel.json"
    assert _run(host_guest, out, *argv, "--bias-column", "energy", "--temperature", "310",
                "--no-report") == 0
    text = capsys.readouterr().out
    assert "reweighting: 2 biased runs with bias energies per frame, at 310 K" in text
    assert "effective sample size (Kish) of state 'bound'" in text
    assert "caution:" in text and "not guarantees" in text
    doc = json.loads(out.read_text())
    rows = doc["provenance"]["segments"]  # as suggest writes them
    assert [r["bias"]["file"] for r in rows] == ["run0.csv", "run1.csv"]
    assert rows[0]["bias"]["column"] == "energy" and rows[0]["bias"]["temperature_k"] == 310.0
    sizing = doc["hints"]["funnel_sizing"]
    assert 0 < sizing["observed"]["effective_sample_size"]["bound"] < 800
    assert sizing["observed"]["reweighting_temperature_k"] == 310.0


def test_k_wall_help_and_the_specs_rule_give_the_rms_penetration_sqrt_kt_over_k(
        host_guest, tmp_path, capsys):
    # A harmonic wall k/2 x^2 at temperature T: the Boltzmann density exp(-k x^2 / 2kT)
    # inside it has rms penetration sqrt(kT / k); x reaches sqrt(2 kT / k) at energy kT
    # (the equipartition of a harmonic degree of freedom, from memory).
    from cvdesign.constants import BOLTZMANN_KJ_MOL_K

    kt = BOLTZMANN_KJ_MOL_K * 300.0
    with pytest.raises(SystemExit):
        main(["funnel", "--help"])
    text = " ".join(capsys.readouterr().out.split())
    assert "(default: 2000; at 300 K the ligand centre's rms penetration" in text
    rms, at_kt = np.sqrt(kt / 2000.0), np.sqrt(2.0 * kt / 2000.0)
    assert f"rms penetration into a wall, sqrt(kT / k), is {rms:.3f} nm" in text
    assert f"it reaches sqrt(2 kT / k) = {at_kt:.3f} nm at an energy of kT" in text
    assert (f"{rms:.3f}", f"{at_kt:.3f}") == ("0.035", "0.050")
    out = tmp_path / "f.json"
    assert _run(host_guest, out, "--k-wall", "500", "--no-report") == 0
    capsys.readouterr()
    sizing = json.loads(out.read_text())["hints"]["funnel_sizing"]
    rule = sizing["wall_force_constant_rule"]
    assert f"sqrt(kT / k), is {np.sqrt(kt / 500.0):.3f} nm" in rule and "0.071 nm" in rule
    assert not any("is soft" in w for w in sizing["warnings"])
    # review finding: walls of 5 kJ/mol/nm^2 let the ligand 1 nm in at kT, three times the
    # cylinder's radius, and the spec said they kept it "only a little" in, without a word
    assert _run(host_guest, out, "--k-wall", "5", "--no-report", "--force") == 0
    err = capsys.readouterr().err
    sizing = json.loads(out.read_text())["hints"]["funnel_sizing"]
    radius = json.loads(out.read_text())["restraints"][0]["cylinder_radius_nm"]
    (soft,) = [w for w in sizing["warnings"] if "is soft" in w]
    assert soft.startswith(f"--k-wall 5 kJ/mol/nm^2 is soft: at 300 K the ligand centre "
                           f"reaches {np.sqrt(2 * kt / 5.0):.3f} nm into a wall")
    assert f"radius ({radius:.3f} nm)" in soft and "is soft" in err
    # the force constant it names keeps the depth at kT within a quarter of the radius
    stiff = float(soft.split("at least ")[1].split(" kJ")[0])
    assert np.sqrt(2 * kt / stiff) == pytest.approx(0.25 * radius, rel=1e-2)


def test_funnel_command_warns_when_the_runs_store_no_box_the_topology_has(tumbled, tmp_path,
                                                                          capsys):
    """The tumbled runs (a 6 nm box) written again as DCD without unit cells, beside their
    topology, which keeps its box: the ligand offsets are taken without periodic images, so
    the funnel's reasoning and warnings say so, naming the files."""
    bare = []
    for p in tumbled.paths:
        traj = md.load(p, top=tumbled.topology)
        traj.unitcell_vectors = None
        path = tmp_path / (Path(p).stem + ".dcd")
        traj.save_dcd(str(path))
        bare.append(str(path))
    boxed_top = tmp_path / "top.pdb"
    md.load(tumbled.paths[0], top=tumbled.topology)[:1].save_pdb(str(boxed_top))
    out = tmp_path / "f.json"
    assert main(["funnel", "--topology", str(boxed_top), "--bound", *bare, "--ligand",
                 tumbled.ligand_selection, "--pocket", tumbled.pocket_selection,
                 "--out", str(out)]) == 0
    err = capsys.readouterr().err
    assert "has a periodic box (6 x 6 x 6 nm), but trajectory" in err
    sizing = json.loads(out.read_text())["hints"]["funnel_sizing"]
    assert any("stores each none" in w for w in sizing["warnings"])
    assert any(r.startswith("WARNING: topology file") for r in sizing["reasoning"])


def test_check_on_a_funnel_spec_says_why_it_records_no_observed_range_and_that_it_confines(
        host_guest, tmp_path, capsys):
    # review finding: `check` called a funnel spec just written "a spec of an earlier
    # cvdesign" and gave the CV's reachable range without the restraint that confines it
    out = tmp_path / "f.json"
    assert _run(host_guest, out, "--no-report") == 0
    capsys.readouterr()
    # two runs of 400 frames set the axis to about 12 degrees (one standard error, from the
    # runs' means), so 95 % of such axes lie within about 21: wider than the cone's 11
    sizing = json.loads(out.read_text())["hints"]["funnel_sizing"]
    (axis,) = [w for w in sizing["warnings"] if "the axis through the mean ligand" in w]
    assert "(one standard error; 95 % of such axes within about" in axis
    assert "more than the cone's half-angle (11 degrees)" in axis
    assert "from the means of the 2 runs, larger than from 10 block means" in axis
    assert main(["check", str(out), "--topology", host_guest.topology]) == 0
    text = capsys.readouterr().out
    assert ("reachable [0, +inf] (from the terms; a restraint of the spec confines it "
            "further)") in text
    assert "no observed range recorded (funnel specs record none;" in text


def test_a_failing_check_of_a_centre_distance_cv_names_groups_split_by_the_box(
        host_guest, tmp_path, capsys):
    # review finding: an engine fed wrapped frames (groups split across the box edge) gave
    # centre distances of 4 nm where the spec gives 0.14, and the advice did not name that
    out = tmp_path / "f.json"
    assert _run(host_guest, out, "--no-report") == 0
    traj = host_guest.paths[0]
    n = md.load(traj, top=host_guest.topology).n_frames
    values = tmp_path / "engine.txt"
    values.write_text("4.0\n" * n)
    capsys.readouterr()
    assert main(["check", str(out), "--topology", host_guest.topology, "--against",
                 str(values), traj]) == 1
    text = capsys.readouterr().out
    assert "FAIL: the values differ from the reference evaluator" in text
    assert "that the groups of centre distances are whole in the positions the engine" in text
