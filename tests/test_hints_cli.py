"""Hints computed at suggest time, stored in the spec, and recomputed by `cvdesign hints`;
their refusals and warnings through the command and the pipeline."""

import functools
import json

import mdtraj as md
import pytest

import cvdesign.bias.hints
from cvdesign import Source, Spec, suggest
from cvdesign.cli import main
from cvdesign.errors import InputError
from cvdesign.bias.hints import suggest_hints
from cvdesign.pipeline.ranking import hints_for


def test_specs_carry_hints_computed_from_the_data(demo_result):
    spec = demo_result.specs[0]
    hints = spec["hints"]
    smallest = min(v["std"] for v in spec["states"].values())
    assert hints["kernel"]["sigma"] == pytest.approx(0.5 * smallest)
    assert hints["inputs"]["temperature_k"] == 300.0 and hints["inputs"]["md_step_fs"] == 2.0
    assert spec["provenance"]["parameters"]["md_step_fs"] == 2.0
    tau = spec["scores"]["integrated_time_ps"]
    assert tau > 0
    # sized from the time, lengthened to the rate the hints flag (5 kJ/mol/ps at the initial
    # height of 0.5 kT): the longer of the two
    kt = hints["inputs"]["kt_kj_mol"]
    from_rate = -(-0.5 * kt / 5.0 * 1000 / 2.0 // 1)
    assert hints["deposition"]["interval_steps"] == max(round(tau * 1000 / 2.0), from_rate)
    assert hints["deposition"]["rate_kj_mol_ps"] <= 5.0
    assert "not guarantees" in hints["caution"]
    # the demo's rank-1 CV (cos and sin of the latch torsion) is folded at both states; its
    # within-state time is shorter than the demo's 0.2 ps between frames, so the frames do
    # not resolve it (an interval sized from it is of the order of the spacing), and half a
    # kT per ~0.12 ps would be a fast deposition: lengthened, without a warning of its own
    assert spec["scores"]["frame_spacing_ps"] == pytest.approx(0.2)
    assert spec["scores"]["integrated_time_decayed"] == 1
    assert tau < 0.2 and hints["deposition"]["tau_resolved"] is False
    assert hints["deposition"]["tau_lower_bound"] is False
    folded, unresolved = hints["warnings"]
    assert "a folded coordinate" in folded and "'closed' sits at the lower" in folded
    assert "shorter than the spacing of the saved frames it was measured on (0.2 ps)" in \
        unresolved and "so is an interval sized from it" in unresolved
    assert hints["deposition"]["rate_limited"] is True
    assert any("lengthened to 125 steps (0.25 ps)" in line for line in hints["reasoning"])
    assert "hints_refused" not in demo_result.ranking[0]


def test_hints_command_recomputes_from_the_spec_alone(demo_result, tmp_path, capsys):
    spec_path = tmp_path / "cv.json"
    spec_path.write_text(json.dumps(demo_result.specs[0]))
    assert main(["hints", str(spec_path), "--temperature", "310", "--md-step-fs", "4",
                 "--barrier", "50", "--kernel", "lucy", "--json"]) == 0
    got = json.loads(capsys.readouterr().out)
    spec = demo_result.specs[0]
    reach, seen = spec["reachable_range"], spec["observed_range"]
    expect = suggest_hints({k: v for k, v in spec["states"].items()}, temperature=310.0,
                           md_step_fs=4.0, barrier=50.0, kernel="lucy",
                           autocorrelation_time_ps=spec["scores"]["integrated_time_ps"],
                           frame_spacing_ps=spec["scores"]["frame_spacing_ps"],
                           autocorrelation_time_decayed=True,
                           autocorrelation_time_interval_ps=spec["scores"][
                               "integrated_time_ci_ps"],
                           cv_range=(reach["lower"], reach["upper"]),
                           observed_range=(seen["lower"], seen["upper"]))
    assert got == json.loads(json.dumps(expect))
    assert main(["hints", str(spec_path), "--temperature", "300", "--md-step-fs", "2"]) == 0
    text = capsys.readouterr().out
    assert text.count("starting points to validate, not guarantees") >= 1
    assert "Fill time per state" in text and "MD step 2 fs" in text


def test_hints_command_takes_the_cvs_time_and_warns_without_one(demo_result, tmp_path, capsys):
    """Without a recorded time (files that store none) the deposition interval is a 1 ps
    placeholder: a warning says so (it had been in the reasoning alone), and
    --autocorrelation-time-ps gives the time, as autocorrelation_time_ps= does in Python."""
    doc = json.loads(json.dumps(demo_result.specs[0]))
    for key in ("integrated_time_ps", "frame_spacing_ps", "integrated_time_decayed",
                "integrated_time_ci_ps"):
        doc["scores"].pop(key, None)
    spec_path = tmp_path / "cv.json"
    spec_path.write_text(json.dumps(doc))
    base = ["hints", str(spec_path), "--temperature", "300", "--md-step-fs", "2", "--json"]
    assert main(base) == 0
    out, err = capsys.readouterr()
    got = json.loads(out)
    assert got["deposition"]["interval_ps"] == 1.0
    assert any(w.startswith("no autocorrelation time of the CV is known") for w in
               got["warnings"])
    assert "no autocorrelation time of the CV is known" in err
    assert main(base + ["--autocorrelation-time-ps", "0.8"]) == 0
    got = json.loads(capsys.readouterr().out)
    assert got["deposition"]["interval_steps"] == 400 and got["deposition"]["tau_ps"] == 0.8
    assert not any("no autocorrelation time" in w for w in got["warnings"])
    # the option replaces a recorded time too
    spec_path.write_text(json.dumps(demo_result.specs[0]))
    assert main(base + ["--autocorrelation-time-ps", "0.8"]) == 0
    assert json.loads(capsys.readouterr().out)["deposition"]["tau_ps"] == 0.8


def test_hints_command_refuses_bad_arguments(demo_result, tmp_path, capsys):
    spec_path = tmp_path / "cv.json"
    spec_path.write_text(json.dumps(demo_result.specs[0]))
    with pytest.raises(SystemExit):
        main(["hints", str(spec_path), "--temperature", "-3", "--md-step-fs", "2"])
    assert "must be positive" in capsys.readouterr().err
    assert main(["hints", str(tmp_path / "none.json"), "--temperature", "300",
                 "--md-step-fs", "2"]) == 2
    assert "does not exist" in capsys.readouterr().err


@pytest.mark.parametrize("old", [["--timestep", "2"], ["--md-timestep", "2"]])
def test_hints_command_has_no_old_step_options(demo_result, tmp_path, capsys, old):
    spec_path = tmp_path / "cv.json"
    spec_path.write_text(json.dumps(demo_result.specs[0]))
    with pytest.raises(SystemExit) as exc:
        main(["hints", str(spec_path), "--temperature", "300"] + old)
    assert exc.value.code == 2
    assert "the following arguments are required: --md-step-fs" in capsys.readouterr().err


@pytest.mark.parametrize(
    "args,message",
    [
        (["--temperature", "0.5", "--md-step-fs", "2"],
         "temperature=0.5 K is below 1 K: no barrier is crossed thermally there"),
        (["--temperature", "20000", "--md-step-fs", "2"],
         "temperature=20000.0 K is above 5000 K, hotter than any molecular simulation"),
        (["--temperature", "300", "--md-step-fs", "1000000"],  # an MD step of 1000 ps
         "md_step_fs=1000000.0 fs (1000 ps) is longer than 100 fs, beyond the stable step"),
        (["--temperature", "300", "--md-step-fs", "0.002"],
         "md_step_fs=0.002 fs is shorter than 0.01 fs, shorter than any MD step; give the MD "
         "step in femtoseconds (if 0.002 is in ps, that is 2 fs)"),
        (["--temperature", "300", "--md-step-fs", "2", "--barrier", "1"],
         "barrier=1.0 kJ/mol is below kT = 2.494 kJ/mol at 300 K: states separated by less "
         "than kT are not metastable"),
    ],
)
def test_hints_command_refuses_impossible_inputs_with_the_reason(demo_result, tmp_path, capsys,
                                                                 args, message):
    spec_path = tmp_path / "cv.json"
    spec_path.write_text(json.dumps(demo_result.specs[0]))
    assert main(["hints", str(spec_path)] + args) == 2
    captured = capsys.readouterr()
    assert captured.err.startswith(f"cvdesign hints: error: {spec_path}: no hints: ")
    assert message in captured.err
    assert "Traceback" not in captured.err and captured.out == ""


@pytest.mark.parametrize(
    "args,message",
    [
        (["--temperature", "25", "--md-step-fs", "2"],
         "warning: temperature=25 K is below 100 K, unusual for a molecular simulation; check "
         "that it is in kelvin (25 degrees Celsius = 298.15 K)"),
        (["--temperature", "300", "--md-step-fs", "20"],
         "warning: md_step_fs=20 fs is longer than 5 fs: usual for coarse-grained models only"),
        (["--temperature", "300", "--md-step-fs", "2", "--barrier", "4000"],
         "warning: the barrier estimate for 'closed', 4000 kJ/mol, is above 400 kJ/mol"),
    ],
)
def test_hints_command_warns_about_unusual_inputs(demo_result, tmp_path, capsys, args, message):
    spec_path = tmp_path / "cv.json"
    spec_path.write_text(json.dumps(demo_result.specs[0]))
    assert main(["hints", str(spec_path)] + args + ["--json"]) == 0
    captured = capsys.readouterr()
    assert f"cvdesign hints: {message}" in captured.err
    hints = json.loads(captured.out)
    assert any(message[len("warning: "):] in w for w in hints["warnings"])


def _hints_for_states(tmp_path, capsys, states):
    """`cvdesign hints` on a one-distance spec recording `states`: (exit code, out, err)."""
    top = md.Topology()
    res = top.add_residue("X", top.add_chain(), resSeq=1)
    for name in ("A", "B"):
        top.add_atom(name, md.element.carbon, res)
    Spec(name="d", topology=top, descriptors=[{"id": "d", "kind": "distance", "atoms": [0, 1]}],
         terms=[{"descriptor": "d", "transform": "identity", "center": 0.0, "scale": 1.0,
                 "weight": 1.0}],
         states=states).save(tmp_path / "cv.json")
    code = main(["hints", str(tmp_path / "cv.json"), "--temperature", "300", "--md-step-fs", "2"])
    captured = capsys.readouterr()
    assert "Traceback" not in captured.err
    return code, captured.out, captured.err


def test_hints_command_refuses_a_frozen_cv(tmp_path, capsys):
    # frozen input: the distance does not move in any state (std ~1e-16 relative to the mean)
    code, out, err = _hints_for_states(tmp_path, capsys, {
        "a": {"mean": 0.153, "std": 2e-17, "n_frames": 50},
        "b": {"mean": 0.153, "std": 0.0, "n_frames": 50}})
    assert code == 2 and out == ""
    assert "no hints: no state has a resolvable spread of the CV; hints need the within-state " \
           "spread: 'a' (std 2e-17 CV units), 'b' (std 0 CV units)" in err


def test_hints_command_leaves_out_a_frozen_state_with_a_warning(tmp_path, capsys):
    code, out, err = _hints_for_states(tmp_path, capsys, {
        "a": {"mean": 0.15, "std": 0.0, "n_frames": 50},
        "b": {"mean": 0.4, "std": 0.02, "n_frames": 50}})
    assert code == 0
    assert ("cvdesign hints: warning: left out of the kernel width and the fill times, kept "
            "inside the walls: 'a' (std 0 CV units)") in err
    assert "WARNING: left out of the kernel width" in out and "sigma = 0.01 CV units" in out


def test_hints_command_warns_that_walls_around_a_single_state_confine_the_bias_to_it(
        tmp_path, capsys):
    code, out, err = _hints_for_states(tmp_path, capsys, {
        "only": {"mean": 0.4, "std": 0.02, "n_frames": 50}})
    assert code == 0
    assert ("cvdesign hints: warning: only one state ('only') is given, so the walls at its "
            "mean -/+ 3 std and the grid around them confine the bias to that state: a run "
            "with them cannot leave it. Put the walls and the grid around the whole region the "
            "bias should explore") in err
    assert "make the spec from runs of two or more states (cvdesign suggest)" in err
    assert "WARNING: only one state ('only') is given" in out
    assert "walls            lower 0.34, upper 0.46 (CV units)" in out
    code, out, err = _hints_for_states(tmp_path, capsys, {
        "a": {"mean": 0.4, "std": 0.02, "n_frames": 50},
        "b": {"mean": 0.6, "std": 0.02, "n_frames": 50}})
    assert code == 0 and "only one state" not in err + out


def test_hints_command_refuses_a_grid_beyond_the_maximum(tmp_path, capsys):
    code, out, err = _hints_for_states(tmp_path, capsys, {
        "narrow": {"mean": 0.15, "std": 1e-5, "n_frames": 50},
        "wide": {"mean": 2.0, "std": 0.3, "n_frames": 50}})
    assert code == 2 and out == ""
    assert "more than max_grid_bins=100000: the narrowest state ('narrow', std 1e-05)" in err


@pytest.mark.parametrize(
    "args,message",
    [
        (["--md-step-fs", "1000000"], "md_step_fs=1000000.0 fs (1000 ps) is longer than 100 fs"),
        (["--temperature", "0.5"], "temperature=0.5 K is below 1 K"),
    ],
)
def test_suggest_refuses_impossible_hint_inputs_before_reading(demo_files, tmp_path, capsys,
                                                               args, message):
    top, states = demo_files
    out = tmp_path / "out"
    argv = ["suggest", "--topology", top, "--out", str(out), "--bootstrap", "0"]
    for name, files in states.items():
        argv += ["--state", name] + files[:1]
    assert main(argv + args) == 2
    err = capsys.readouterr().err
    assert err.startswith(f"cvdesign suggest: error: {message}") and "Traceback" not in err
    assert not out.exists()


def test_suggest_warns_about_an_unusual_md_step_and_stores_it_in_the_hints(demo_files, tmp_path,
                                                                           capsys):
    top, states = demo_files
    out = tmp_path / "out"
    argv = ["suggest", "--topology", top, "--out", str(out), "--bootstrap", "0",
            "--max-terms", "1", "--suggestions", "1", "--md-step-fs", "20", "--no-report"]
    for name, files in states.items():
        argv += ["--state", name] + files[:1]
    assert main(argv) == 0
    err = capsys.readouterr().err
    assert err.count("cvdesign suggest: warning: md_step_fs=20 fs is longer than 5 fs: usual "
                     "for coarse-grained models only") == 1
    spec = json.loads((out / "cv-01.json").read_text())
    assert spec["hints"]["inputs"]["md_step_fs"] == 20.0
    assert spec["hints"]["warnings"][0].startswith("md_step_fs=20 fs is longer than 5 fs")
    assert spec["provenance"]["parameters"]["md_step_fs"] == 20.0


@pytest.mark.parametrize("old", ["--timestep", "--md-timestep"])
def test_suggest_has_no_old_step_options(demo_files, tmp_path, capsys, old):
    top, states = demo_files
    name, files = next(iter(states.items()))
    with pytest.raises(SystemExit) as exc:
        main(["suggest", "--topology", top, "--out", str(tmp_path / "o"), "--state", name,
              files[0], old, "2"])
    assert exc.value.code == 2
    assert f"unrecognized arguments: {old} 2" in capsys.readouterr().err
    assert not (tmp_path / "o").exists()


def test_pipeline_records_a_frozen_cv_as_refused_hints():
    entry = {"states": {"a": {"mean": 1.0, "std": 0.0, "n_frames": 10},
                        "b": {"mean": 1.0, "std": 1e-17, "n_frames": 10}},
             "integrated_time_ps": 0.5}
    hints, refused = hints_for(entry, 300.0, 2.0)
    assert hints is None
    assert refused.startswith("no state has a resolvable spread of the CV")


def test_pipeline_records_refused_hints_in_ranking_spec_and_notes(demo_dir, monkeypatch):
    # the real grid guard, with a maximum of one bin, refuses every suggestion's hints
    monkeypatch.setattr(cvdesign.bias.hints, "suggest_hints",
                        functools.partial(cvdesign.bias.hints.suggest_hints, max_grid_bins=1))
    src = Source.from_states(demo_dir / "latch.pdb", {"closed": [demo_dir / "closed-1.xtc"],
                                                      "open": [demo_dir / "open-1.xtc"]})
    res = suggest(src, n_bootstrap=0, max_terms=1, n_suggestions=2)
    for entry, spec in zip(res.ranking, res.specs):
        assert entry["hints"] is None
        assert entry["hints_refused"].startswith("the grid would need about ")
        assert "more than max_grid_bins=1" in entry["hints_refused"]
        assert spec["hints"] == {"hints_refused": entry["hints_refused"]}
        assert f"bias hints refused for {entry['spec']}: {entry['hints_refused']}" in res.notes
        Spec.from_dict(spec)  # still a valid spec
    assert "hints_refused" in res.ranking_json()


def test_a_poorly_determined_time_is_warned_about_from_the_ranking_and_from_a_spec(
        demo_result, tmp_path, capsys):
    """Review finding: a time measured on a few short runs (95 % interval [0.12, 9.3] ps)
    sized the deposition interval without a word. The spec now records the interval
    (scores.integrated_time_ci_ps, the ranking's integrated_time_ci_ps) and the hints warn
    when its ends lie more than POOR_TIME_RATIO = 10 apart; the demo's (0.11-0.14 ps) gets
    no such warning."""
    entry, spec = demo_result.ranking[0], demo_result.specs[0]
    assert spec["scores"]["integrated_time_ci_ps"] == list(entry["integrated_time_ci_ps"])
    assert not any("poorly determined" in w for w in spec["hints"]["warnings"])
    kw = dict(temperature=300.0, md_step_fs=2.0, autocorrelation_time_ps=1.07)
    h = suggest_hints(spec["states"], autocorrelation_time_interval_ps=(0.123, 9.26), **kw)
    (text,) = [w for w in h["warnings"] if "poorly determined" in w]
    assert text.startswith("autocorrelation_time_ps = 1.07 ps is poorly determined: its 95 % "
                           "interval [0.123, 9.26] ps spans more than a factor of 10")
    assert h["inputs"]["autocorrelation_time_interval_ps"] == [0.123, 9.26]
    h = suggest_hints(spec["states"], autocorrelation_time_interval_ps=(0.2, 1.9), **kw)
    assert not any("poorly determined" in w for w in h["warnings"])
    with pytest.raises(InputError, match="autocorrelation_time_interval_ps=.* must have "
                                         "lower <= upper"):
        suggest_hints(spec["states"], autocorrelation_time_interval_ps=(2.0, 1.0), **kw)
    # from a spec file: a wide recorded interval warns; a malformed one is refused naming it
    doc = json.loads(json.dumps(spec))
    doc["scores"]["integrated_time_ci_ps"] = [0.01, 5.0]
    path = tmp_path / "cv.json"
    path.write_text(json.dumps(doc))
    assert main(["hints", str(path), "--temperature", "300", "--md-step-fs", "2"]) == 0
    assert "is poorly determined: its 95 % interval [0.01, 5] ps" in capsys.readouterr().err
    doc["scores"]["integrated_time_ci_ps"] = [5.0]
    path.write_text(json.dumps(doc))
    assert main(["hints", str(path), "--temperature", "300", "--md-step-fs", "2"]) == 2
    err = capsys.readouterr().err
    assert "$.scores.integrated_time_ci_ps: must be a pair [lower, upper]" in err
    assert "got [5.0]" in err and "cv.json" in err


def test_a_spec_with_a_malformed_time_interval_is_refused_when_it_is_loaded(demo_result,
                                                                           tmp_path):
    from cvdesign import SpecError, load_spec

    for bad in ([5.0], [2.0, 1.0], [0.0, 1.0], ["a", 1.0], 3.0):
        doc = json.loads(json.dumps(demo_result.specs[0]))
        doc["scores"]["integrated_time_ci_ps"] = bad
        path = tmp_path / "cv.json"
        path.write_text(json.dumps(doc))
        with pytest.raises(SpecError, match=r"\$\.scores\.integrated_time_ci_ps"):
            load_spec(path)
