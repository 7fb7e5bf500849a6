"""Testbed: a small Langevin engine and invented toy molecules with known answers.

Used for demo data, for tests whose right answer is known by construction
(:func:`write_two_wells` writes a small one in seconds), and (later) for
checking a collective variable under bias.

Examples
--------
>>> from cvdesign.testbed import latch, LangevinBAOAB
>>> system = latch()
>>> integ = LangevinBAOAB(system.force_field, system.masses, temperature=300.0,
...                       friction=1.0, md_step_ps=0.002, seed=0)
>>> xyz, times = integ.run(system.states["closed"], 100, report_interval=50)
>>> xyz.shape, str(system.assign_state(xyz[-1]))
((2, 12, 3), 'closed')
"""

from .forcefield import ToyForceField, dihedral_angles, pairs_beyond
from .langevin import LangevinBAOAB
from .toys import ToySystem, TwoWellSystem, latch, two_wells

__all__ = [
    "LangevinBAOAB",
    "ToyForceField",
    "ToySystem",
    "TwoWellSystem",
    "TwoWellsData",
    "count_transitions",
    "dihedral_angles",
    "generate",
    "latch",
    "pairs_beyond",
    "two_wells",
    "write_pdb",
    "write_two_wells",
]


def __getattr__(name):
    # demo_data is imported on first use, so that
    # ``python -m cvdesign.testbed.demo_data`` does not import it twice.
    if name in ("generate", "write_pdb"):
        from . import demo_data

        return getattr(demo_data, name)
    if name in ("TwoWellsData", "count_transitions", "write_two_wells"):
        # scenarios imports demo_data, so it is also imported on first use.
        from . import scenarios

        return getattr(scenarios, name)
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")
