"""Shared fixtures: the bundled demo data and the MDAnalysis test data."""

import importlib.resources
import json
from pathlib import Path

import pytest

from cvdesign import Source, suggest
from cvdesign.cli import demo_data_dir


@pytest.fixture(scope="session")
def demo_dir():
    """Directory of the bundled demo data (the invented 'latch' molecule)."""
    return demo_data_dir()


@pytest.fixture(scope="session")
def demo_manifest(demo_dir):
    return json.loads((demo_dir / "manifest.json").read_text())


@pytest.fixture(scope="session")
def demo_files(demo_dir, demo_manifest):
    """(topology path, {state: [trajectory paths]}) of the demo."""
    top = str(demo_dir / demo_manifest["topology"]["file"])
    states = {name: [str(demo_dir / f) for f in entry["files"]]
              for name, entry in demo_manifest["states"].items()}
    return top, states


@pytest.fixture(scope="session")
def demo_result(demo_files):
    """`suggest` on the whole demo, computed once per test session."""
    top, states = demo_files
    return suggest(Source.from_states(top, states))


@pytest.fixture(scope="session")
def mda_data():
    """Directory of the real MD test data shipped by the `mdanalysistests` package.

    Source: the MDAnalysis test suite (Michaud-Agrawal et al., J. Comput. Chem. 2011;
    Gowers et al., Proc. SciPy 2016), installed by the project's `test` extra.
    """
    return Path(str(importlib.resources.files("MDAnalysisTests") / "data"))


@pytest.fixture(scope="session")
def adk_result_for_redundancy(mda_data):
    """`suggest` on adenylate kinase CA atoms, closed (frames 0-29) vs open (68-97)."""
    src = Source(str(mda_data / "adk.psf"))
    src.add(str(mda_data / "adk_dims.dcd"), "closed", frames=(0, 30))
    src.add(str(mda_data / "adk_dims.dcd"), "open", frames=(68, 98))
    return suggest(src, selection="name CA", max_terms=2, n_suggestions=2)
