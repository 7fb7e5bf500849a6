"""Where the bundled demo data live (installed package or source tree)."""

from pathlib import Path

from ..errors import InputError

__all__ = ["demo_data_dir"]


def demo_data_dir():
    """Directory holding the bundled demo data (topology, trajectories, manifest.json)."""
    package = Path(__file__).resolve().parent.parent
    # Installed: the package 'cvdesign.demo_data'; source tree: the top-level data/.
    for cand in (package / "demo_data", package.parent / "data"):
        if (cand / "manifest.json").exists():
            return cand
    raise InputError("the bundled demo data are missing; regenerate them with "
                     "'python -m cvdesign.testbed.demo_data --out data' in the source tree")
