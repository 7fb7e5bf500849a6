"""Hints computed at suggest time, stored in the spec, and recomputed by `cvdesign hints`."""

import json

import pytest

from cvdesign.cli import main
from cvdesign.hints import suggest_hints


def test_specs_carry_hints_computed_from_the_data(demo_result):
    spec = demo_result.specs[0]
    hints = spec["hints"]
    smallest = min(v["std"] for v in spec["states"].values())
    assert hints["kernel"]["sigma"] == pytest.approx(0.5 * smallest)
    assert hints["inputs"]["temperature_k"] == 300.0 and hints["inputs"]["timestep_fs"] == 2.0
    tau = spec["scores"]["integrated_time_ps"]
    assert tau > 0
    assert hints["deposition"]["interval_steps"] == max(1, round(tau * 1000 / 2.0))
    assert "not guarantees" in hints["caution"]


def test_hints_command_recomputes_from_the_spec_alone(demo_result, tmp_path, capsys):
    spec_path = tmp_path / "cv.json"
    spec_path.write_text(json.dumps(demo_result.specs[0]))
    assert main(["hints", str(spec_path), "--temperature", "310", "--timestep", "4",
                 "--barrier", "50", "--kernel", "lucy", "--json"]) == 0
    got = json.loads(capsys.readouterr().out)
    spec = demo_result.specs[0]
    expect = suggest_hints({k: v for k, v in spec["states"].items()}, temperature=310.0,
                           timestep_fs=4.0, barrier=50.0, kernel="lucy",
                           autocorrelation_time_ps=spec["scores"]["integrated_time_ps"])
    assert got == json.loads(json.dumps(expect))
    assert main(["hints", str(spec_path), "--temperature", "300", "--timestep", "2"]) == 0
    text = capsys.readouterr().out
    assert text.count("starting points to validate, not guarantees") >= 1
    assert "Fill time per state" in text


def test_hints_command_refuses_bad_arguments(demo_result, tmp_path, capsys):
    spec_path = tmp_path / "cv.json"
    spec_path.write_text(json.dumps(demo_result.specs[0]))
    with pytest.raises(SystemExit):
        main(["hints", str(spec_path), "--temperature", "-3", "--timestep", "2"])
    assert "must be positive" in capsys.readouterr().err
    assert main(["hints", str(tmp_path / "none.json"), "--temperature", "300",
                 "--timestep", "2"]) == 2
    assert "does not exist" in capsys.readouterr().err
