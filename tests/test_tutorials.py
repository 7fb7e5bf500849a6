"""Every tutorial script runs to completion on the bundled demo."""

import subprocess
import sys
from pathlib import Path

import pytest

TUTORIALS = sorted((Path(__file__).resolve().parent.parent / "tutorials").glob("*.py"))


def _run(script, cwd, *args):
    return subprocess.run([sys.executable, str(script), *map(str, args)], capture_output=True,
                          text=True, cwd=cwd)


@pytest.fixture(scope="module", params=TUTORIALS, ids=[p.name for p in TUTORIALS])
def tutorial_run(request, tmp_path_factory):
    """(script, working directory, output directory, completed process), run once each."""
    cwd = tmp_path_factory.mktemp("tutorial")
    out = cwd / "out"
    return request.param, cwd, out, _run(request.param, cwd, out)


def test_there_is_at_least_one_tutorial():
    assert [p.name for p in TUTORIALS][:1] == ["01_first_suggestions.py"]


def test_tutorial_exits_0_and_writes_only_its_output_directory(tutorial_run):
    script, cwd, out, res = tutorial_run
    assert res.returncode == 0, res.stdout + res.stderr
    assert "Caution: " in res.stdout
    assert (out / "cv-01.json").is_file() and (out / "ranking.json").is_file()
    assert sorted(p.name for p in cwd.iterdir()) == ["out"]


def test_first_tutorial_compares_each_state_with_the_spec(tutorial_run):
    script, _, _, res = tutorial_run
    if script.name != "01_first_suggestions.py":
        pytest.skip("checks the output of tutorial 01 only")
    for state in ("closed", "open"):
        line = next(x for x in res.stdout.splitlines() if x.strip().startswith(f"{state}:"))
        assert "±" in line and "spec:" in line and "over 6000 frames" in line
    assert "warning:" not in res.stdout
    assert "cvdesign apply" in res.stdout

