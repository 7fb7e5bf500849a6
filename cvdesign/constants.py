"""Physical constants, units and default parameters shared by every stage.

Each value has one name, here; every module imports it from this module.

Examples
--------
>>> from cvdesign.constants import BOLTZMANN_KJ_MOL_K, UNITS
>>> round(BOLTZMANN_KJ_MOL_K * 300.0, 4), UNITS["energy"]  # kT at 300 K, kJ/mol
(2.4943, 'kJ/mol')
"""

import math

__all__ = ["BOLTZMANN_KJ_MOL_K", "UNITS", "TWO_PI", "COORDINATION_R0_NM",
           "COORDINATION_EXPONENTS", "MIN_BOOTSTRAP_REPLICATES", "BOOTSTRAP_TOO_FEW",
           "FLOAT32_SLACK"]

#: Molar Boltzmann constant, kJ/mol/K: k_B N_A (CODATA 2018, exact in the SI of 2019).
BOLTZMANN_KJ_MOL_K = 0.00831446261815324

#: Units of the quantities cvdesign reads and writes (nm, rad, ps, kJ/mol), as a spec
#: records them.
UNITS = {"length": "nm", "angle": "rad", "time": "ps", "energy": "kJ/mol"}

#: The period of a dihedral, rad.
TWO_PI = 2.0 * math.pi

#: Switching distance of the pool's coordination numbers, nm: about the heavy-atom
#: contact distance in proteins (common practice, from memory).
COORDINATION_R0_NM = 0.45

#: Exponents (n, m) of the rational switching function ``(1 - x**n) / (1 - x**m)``,
#: ``x = r / r0``, of coordination numbers (common practice).
COORDINATION_EXPONENTS = (6, 12)

#: Fewest bootstrap replicates of ``suggest`` (0 turns the bootstrap off): the 2.5th and
#: 97.5th percentiles of fewer are the extreme replicates or the estimate itself.
MIN_BOOTSTRAP_REPLICATES = 20

#: Why fewer replicates are refused (the messages of the command and of the Python API).
BOOTSTRAP_TOO_FEW = (f"a 95 % percentile interval from fewer than {MIN_BOOTSTRAP_REPLICATES} "
                     "replicates is meaningless (common practice is 200 or more); give 0 to "
                     f"turn the bootstrap off, or at least {MIN_BOOTSTRAP_REPLICATES}")


#: Relative slack within which values stored in CV units (a state's mean, min and max, the
#: observed range, all from single-precision features) count as agreeing with each other and
#: with the reachable range: float32 rounding passes an end by about 1e-7 relative (a design
#: run's own frame was 6e-9 past its stored maximum of 1.019); 1e-5 is some hundred rounding
#: steps, far below any real excursion (our choice). The spec's checks and ``cvdesign check``
#: use it.
FLOAT32_SLACK = 1e-5
