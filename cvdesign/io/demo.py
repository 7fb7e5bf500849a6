"""Where the bundled demo data live (installed package or source tree)."""

import json
from pathlib import Path

from ..errors import InputError

__all__ = ["demo_data_dir", "demo_inputs"]


def demo_data_dir():
    """Directory holding the bundled demo data (topology, trajectories, manifest.json)."""
    package = Path(__file__).resolve().parent.parent
    # Installed: the package 'cvdesign.demo_data'; source tree: the top-level data/.
    for cand in (package / "demo_data", package.parent / "data"):
        if (cand / "manifest.json").exists():
            return cand
    raise InputError("the bundled demo data are missing; regenerate them with "
                     "'python -m cvdesign.testbed.demo_data --out data' in the source tree")


def demo_inputs():
    """Topology file and ``{state: [trajectory files]}`` of the bundled demo (str paths).

    Examples
    --------
    >>> topology, states = demo_inputs()
    >>> sorted(states), topology.endswith(".pdb")
    (['closed', 'open'], True)
    """
    data = demo_data_dir()
    manifest = json.loads((data / "manifest.json").read_text(encoding="utf-8"))
    topology = str(data / manifest["topology"]["file"])
    states = {name: [str(data / f) for f in entry["files"]]
              for name, entry in manifest["states"].items()}
    return topology, states
