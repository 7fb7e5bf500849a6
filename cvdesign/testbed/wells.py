"""A one-dimensional double well under a static bias: biased runs with exact answers.

The particle moves along x (nm) in the tilted double well

    U(x) = h (x^2 - 1)^2 + s x        (kJ/mol)

with wells near x = -1 and +1 nm and the barrier near 0. The static bias

    V(x) = f max(0, c - U(x))         (kJ/mol, 0 <= f < 1)

raises the bottoms of the wells (by up to ``f c``) and vanishes wherever
``U >= c``: around the barrier and on the outer walls. So it lowers the barrier
seen from the wells, and leaves the barrier region unbiased, the condition
under which rescaled time recovers the unbiased kinetics (Voter, J. Chem. Phys.
106, 4665, 1997).

Dynamics: overdamped Langevin, ``dx = -(D / kT) dW/dx dt + sqrt(2 D dt) N(0, 1)``
with ``W = U`` or ``U + V``, integrated by Euler-Maruyama for many independent
walkers at once, each started from the exact equilibrium of the potential it
moves in (so every frame is stationary). Exact answers: the states'
populations by quadrature (:meth:`DoubleWell.populations`), and i.i.d. samples
of either equilibrium by inverse transform on a fine grid
(:meth:`DoubleWell.samples`).

Files (:func:`write_well_runs`): a topology of two carbon atoms (residue
``DWL``), an anchor at (-1.8, 0, 0) nm and the particle at (x, 0, 0) nm, so the
anchor-particle distance is ``x + 1.8`` nm; XTC trajectories with times; and
one bias-energy file per run (one value per frame, kJ/mol, header ``bias``).
All parameters are invented for this testbed.
"""

import math
from dataclasses import dataclass
from pathlib import Path

import mdtraj as md
import numpy as np
from scipy.integrate import quad

from ..constants import BOLTZMANN_KJ_MOL_K
from ..io.atomic import atomic_path, atomic_write_text

__all__ = ["DoubleWell", "write_well_runs", "ANCHOR_NM"]

#: x coordinate of the anchor atom, nm (the distance to the particle is x - ANCHOR_NM).
ANCHOR_NM = -1.8


@dataclass(frozen=True)
class DoubleWell:
    """The tilted double well, its static bias and overdamped dynamics.

    Parameters
    ----------
    barrier : float, default=10.0
        ``h``, kJ/mol (about 4 kT at 300 K).
    tilt : float, default=1.0
        ``s``, kJ/mol/nm: the right well (x > 0) is higher by about ``2 s``.
    cap : float, default=3.7
        ``c``, kJ/mol: the bias vanishes where ``U >= c``.
    fill : float, default=0.9
        ``f``: the bias is ``f (c - U)`` below the cap.
    temperature : float, default=300.0
        K.
    diffusion : float, default=1.0
        ``D``, nm^2/ps.

    Examples
    --------
    >>> well = DoubleWell()
    >>> round(float(well.potential(np.array([0.0]))[0]), 3), float(well.bias(np.array([0.0]))[0])
    (10.0, 0.0)
    >>> p = well.populations()
    >>> bool(p[0] > p[1]), round(float(p.sum()), 12)  # the left well is lower
    (True, 1.0)
    """

    barrier: float = 10.0
    tilt: float = 1.0
    cap: float = 3.7
    fill: float = 0.9
    temperature: float = 300.0
    diffusion: float = 1.0

    @property
    def kt(self):
        """float : kT, kJ/mol."""
        return BOLTZMANN_KJ_MOL_K * self.temperature

    def potential(self, x):
        """``U(x)``, kJ/mol, for positions `x` in nm."""
        x = np.asarray(x, dtype=np.float64)
        return self.barrier * (x * x - 1.0) ** 2 + self.tilt * x

    def bias(self, x):
        """``V(x)``, kJ/mol: raises the wells, 0 where ``U >= cap``."""
        return self.fill * np.maximum(0.0, self.cap - self.potential(x))

    def _slope(self, x, biased):
        """d(U [+ V])/dx, kJ/mol/nm."""
        du = 4.0 * self.barrier * x * (x * x - 1.0) + self.tilt
        if not biased:
            return du
        return np.where(self.potential(x) < self.cap, (1.0 - self.fill) * du, du)

    def populations(self):
        """Exact unbiased populations of the left (x < 0) and right (x > 0) wells.

        Quadrature of ``exp(-U / kT)`` (scipy.integrate.quad) on each side.

        Returns
        -------
        ndarray of shape (2,)
        """
        def density(x):
            return math.exp(-float(self.potential(np.array([x]))[0]) / self.kt)

        left = quad(density, -3.0, 0.0, epsabs=0, epsrel=1e-12, limit=200)[0]
        right = quad(density, 0.0, 3.0, epsabs=0, epsrel=1e-12, limit=200)[0]
        return np.array([left, right]) / (left + right)

    def samples(self, n, *, biased, seed):
        """Independent samples of the equilibrium of ``U`` (or ``U + V``), nm.

        Inverse transform of the cumulative distribution on a grid of 200 001
        points over [-3, 3] nm (linear within a cell).

        Parameters
        ----------
        n : int
        biased : bool
            Sample ``exp(-(U + V) / kT)`` instead of ``exp(-U / kT)``.
        seed : int

        Returns
        -------
        ndarray of shape (n,)
        """
        grid = np.linspace(-3.0, 3.0, 200_001)
        w = self.potential(grid) + (self.bias(grid) if biased else 0.0)
        p = np.exp(-(w - w.min()) / self.kt)
        cdf = np.concatenate([[0.0], np.cumsum(0.5 * (p[1:] + p[:-1]))])
        cdf /= cdf[-1]
        u = np.random.default_rng(seed).random(int(n))
        return np.interp(u, cdf, grid)

    def run(self, n_walkers, n_frames, *, md_step_ps, stride, biased, seed):
        """Overdamped Langevin runs of independent walkers (Euler-Maruyama).

        Parameters
        ----------
        n_walkers, n_frames : int
        md_step_ps : float
            Integration step, ps.
        stride : int
            Steps between saved frames.
        biased : bool
            Move in ``U + V`` instead of ``U``.
        seed : int

        Returns
        -------
        ndarray of shape (n_walkers, n_frames)
            Positions x, nm; frame 0 drawn from the equilibrium of the
            potential moved in.
        """
        rng = np.random.default_rng(seed)
        x = self.samples(n_walkers, biased=biased, seed=int(rng.integers(2**31)))
        out = np.empty((int(n_frames), int(n_walkers)))
        drift = self.diffusion / self.kt * md_step_ps
        noise = math.sqrt(2.0 * self.diffusion * md_step_ps)
        for f in range(int(n_frames)):
            out[f] = x
            for _ in range(int(stride)):
                x = x - drift * self._slope(x, biased) + noise * rng.standard_normal(x.size)
        return out.T.copy()


def _topology():
    top = md.Topology()
    res = top.add_residue("DWL", top.add_chain())
    top.add_atom("C1", md.element.carbon, res)
    top.add_atom("C2", md.element.carbon, res)
    return top


def write_well_runs(out_dir, runs, *, frame_step_ps, well=None, prefix="run"):
    """Write runs of the double well as XTC files, with bias-energy files.

    Parameters
    ----------
    out_dir : path-like
        Directory (created if missing).
    runs : array-like of shape (n_runs, n_frames)
        Positions x, nm.
    frame_step_ps : float
        Time between frames, ps.
    well : DoubleWell, default=None
        Writes ``prefix-i.bias`` (the bias energy ``V(x)`` of every frame,
        kJ/mol, under a ``bias`` header) when given.
    prefix : str, default='run'

    Returns
    -------
    topology : pathlib.Path
        ``well.pdb``.
    trajectories : list of pathlib.Path
    bias_files : list of pathlib.Path
        Empty without `well`.
    """
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    top = _topology()
    pdb = out / "well.pdb"
    md.Trajectory(np.array([[[ANCHOR_NM, 0, 0], [1.0, 0, 0]]], dtype=np.float32),
                  top).save_pdb(str(pdb))
    trajs, biases = [], []
    for i, x in enumerate(np.asarray(runs, dtype=np.float64)):
        xyz = np.zeros((x.size, 2, 3), dtype=np.float32)
        xyz[:, 0, 0] = ANCHOR_NM
        xyz[:, 1, 0] = x
        path = out / f"{prefix}-{i}.xtc"
        with atomic_path(path) as tmp:
            md.Trajectory(xyz, top, time=np.arange(x.size) * frame_step_ps).save_xtc(tmp)
        trajs.append(path)
        if well is not None:
            # the bias of the positions as the file stores them (XTC rounds to 1e-3 nm)
            stored = md.load(str(path), top=top).xyz[:, 1, 0].astype(np.float64)
            energies = well.bias(stored)
            bias = out / f"{prefix}-{i}.bias"
            atomic_write_text(bias, "# static bias of the double-well testbed, kJ/mol\nbias\n"
                              + "".join(f"{v!r}\n" for v in energies.tolist()))
            biases.append(bias)
    return pdb, trajs, biases
