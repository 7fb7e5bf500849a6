"""Tutorial 05: refine a CV from a biased run (bias along CV 1, feed the run back, get CV 2).

    python tutorials/05_refine.py [OUT_DIR] [--long]

The loop, on the testbed's demo molecule "latch" (invented, 12 united atoms; one
slow torsion C3-C4-C5-C6 between closed, near 0 rad, and open, near pi rad):

1. ``suggest`` on the bundled unbiased basin runs (written to OUT_DIR).
2. CV 1: deliberately not the rank-1 spec but a lower-ranked one, a distance
   that separates the basins without following the torsion.
3. A well-tempered bias along CV 1 (testbed code, several walkers sharing one
   bias); every walker's frames are written as an XTC file with a bias-energy
   file beside it: the bias each frame felt at that time minus the bias's
   time-dependent offset c(t) (Tiwary and Parrinello, J. Phys. Chem. B 119, 736
   (2015), from memory). For a bias that changes during the run, the energies to
   reweight with are the user's choice; this is one common choice. A second column,
   ``clock_bias``, holds the bias each frame felt: the rescaled clock of the lagged
   pairs needs it (its offset matters there, unlike in the weights).
4. The walkers' frames are labelled by the basins of CV 1 they visit
   (``cvdesign.pipeline.refine.label_basins``): frames in a basin core get the
   state, frames between cores are transition frames.
5. ``suggest`` again from the biased frames of half the walkers: CV 2. (The
   bundled basin runs could join the same states: a state with biased and
   unbiased runs combines the two groups by their effective sample sizes; here
   CV 2 comes from the biased frames alone, so that it shows what they add.)
6. How CV 2 differs from CV 1 (terms, cosine of the weights, Fisher ratio of
   each on the other half of the walkers, which neither was fitted on), and a
   second biased run with the same settings along CV 2: crossings of each run,
   judged by the same yardstick (the latch torsion itself).

By default a short test configuration (about half a minute); ``--long`` runs
longer biased runs. Units: nm, rad, ps, kJ/mol, K.
"""

import sys
import tempfile
import time
from pathlib import Path

import mdtraj as md
import numpy as np

import cvdesign
from cvdesign.bias.hints import spec_hints
from cvdesign.constants import BOLTZMANN_KJ_MOL_K
from cvdesign.io.demo import demo_inputs
from cvdesign.pipeline.refine import (basins_from_spec, compare_specs, fisher_separation,
                                      label_basins)
from cvdesign.testbed import count_transitions, latch
from cvdesign.testbed.metad import WellTemperedBias, run_biased, spec_cv

TEMPERATURE_K = 300.0     # the demo data were simulated at 300 K
TIMESTEP_PS = 0.002
FRICTION_PER_PS = 1.0
BARRIER_KJ_MOL = 35.0     # barrier estimate for the hints (the toy's, by construction)
HEIGHT_KT = 0.125         # a quarter of the hints' default height: the walkers share one
                          # bias (see tutorial 03)
REPORT_STEPS = 50         # steps between saved frames (0.1 ps)
SEED = 2026
CV1_RANK = 3              # CV 1: the rank-3 spec, deliberately not the best


def bias_offset(bias):
    """c(t) of a well-tempered bias on its grid, kJ/mol: the reweighting offset."""
    kt, gamma = bias.kT, bias.bias_factor
    a = bias.values / kt
    num = gamma / (gamma - 1) * a
    den = a / (gamma - 1)
    return kt * (np.logaddexp.reduce(num) - np.logaddexp.reduce(den))


def biased_walkers(spec, system, n_walkers, n_steps, label, out_dir):
    """A well-tempered run along the spec; each walker's frames and bias energies written.

    Returns the file pairs [(xtc, bias file)], the latch torsion (n_frames, n_walkers)
    and the bias energies (n_frames, n_walkers), kJ/mol.
    """
    hints = spec_hints(spec, temperature=TEMPERATURE_K, md_step_fs=TIMESTEP_PS * 1000,
                       barrier=BARRIER_KJ_MOL, height_kt=HEIGHT_KT)
    grid = hints["grid"]
    interval = hints["deposition"]["interval_steps"]
    interval = max(REPORT_STEPS, REPORT_STEPS * round(interval / REPORT_STEPS))
    bias = WellTemperedBias(spec_cv(spec), sigma=hints["kernel"]["sigma"],
                            height=hints["height_kj_mol"],
                            interval_steps=interval,
                            bias_factor=hints["well_tempered"]["bias_factor"],
                            temperature=TEMPERATURE_K,
                            grid=(grid["lower"], grid["upper"], grid["n_bins"]),
                            periodic=grid["periodic"])
    frames, energies, felt = [], [], []

    def observe(xyz):
        # Called before the kernels of this interval are deposited: the bias now is
        # the bias these frames felt.
        values = spec.evaluate(xyz.reshape((-1,) + xyz.shape[-2:])).reshape(xyz.shape[:2])
        felt.append(bias.bias_at(values))
        energies.append(felt[-1] - bias_offset(bias))
        frames.append(xyz.astype(np.float32))
        return system.slow_angle(xyz)

    x0 = np.stack([system.states[s] for s in ("closed", "open")] * (n_walkers // 2))
    start = time.perf_counter()
    run = run_biased(system, x0, n_steps, bias=bias, friction=FRICTION_PER_PS,
                     md_step_ps=TIMESTEP_PS, seed=SEED, report_interval=REPORT_STEPS,
                     observe=observe)
    xyz, energy, clock = np.concatenate(frames), np.concatenate(energies), np.concatenate(felt)
    print(f"{label}: {n_steps} steps x {n_walkers} walkers in "
          f"{time.perf_counter() - start:.0f} s, {bias.n_kernels} kernels")
    pairs = []
    out_dir.mkdir(parents=True, exist_ok=True)
    times = np.arange(xyz.shape[0]) * REPORT_STEPS * TIMESTEP_PS
    for w in range(n_walkers):
        xtc = out_dir / f"walker-{w + 1:02d}.xtc"
        md.Trajectory(xyz[:, w], system.topology, time=times).save_xtc(str(xtc))
        energy_file = out_dir / f"walker-{w + 1:02d}-bias.txt"
        # bias: to reweight with (minus c(t)); clock_bias: as felt, for the rescaled clock
        energy_file.write_text("bias clock_bias\n" + "".join(
            f"{e:.6f} {f:.6f}\n" for e, f in zip(energy[:, w], clock[:, w])), encoding="utf-8")
        pairs.append((xtc, energy_file))
    return pairs, run.observed, energy


def torsion_crossings(phi):
    """Crossings between the latch torsion's closed and open cores, summed over walkers."""
    return sum(count_transitions(p) for p in phi.T)


def main(out_dir, long=False, keep=True):
    n_walkers, n_steps = (16, 80_000) if long else (8, 40_000)
    out_dir = Path(out_dir)

    # ------------------------------------------------------------ 1. suggestions
    topology, states = demo_inputs()
    first = cvdesign.suggest(cvdesign.Source.from_states(topology, states), max_terms=3,
                             n_suggestions=5)
    print(first.top_table(5))
    written = Path(first.write(out_dir, force=True))

    # ------------------------------------------------------------ 2. CV 1
    system = latch()
    cv1 = cvdesign.load_spec(written / f"cv-{CV1_RANK:02d}.json", topology=system.topology)
    print(f"\nCV 1 (rank {CV1_RANK} of the basin runs): "
          + ", ".join(f"{t['weight']:+.4f} {t['transform']}({t['descriptor']})"
                      for t in cv1.terms))

    # ------------------------------------------------------------ 3. bias along CV 1
    work = out_dir / "refine"
    pairs, phi1, energy1 = biased_walkers(cv1, system, n_walkers, n_steps,
                                          "biased run along CV 1", work / "cv1")

    # ------------------------------------------------------------ 4. label by basins
    basins = basins_from_spec(cv1, core=1.0)
    period = cv1.period if cv1.periodic else None
    frame_ps = REPORT_STEPS * TIMESTEP_PS
    visits = []
    for (xtc, _), energy in zip(pairs, energy1.T):
        values = cv1.evaluate(md.load(str(xtc), top=system.topology))
        visits.append(label_basins(values, basins, bias=energy, temperature=TEMPERATURE_K,
                                   period=period, timestep_ps=frame_ps))
    print("basin cores of CV 1: " + ", ".join(f"{s} [{lo:.4g}, {hi:.4g}]"
                                              for s, (lo, hi) in basins.items()))
    for w, v in enumerate(visits):
        print(f"  walker {w + 1}: {v.summary()}")

    # ------------------------------------------------------------ 5. CV 2
    # Walkers alternate closed and open starts: fit on pairs 1, 3, ..., hold out 2, 4, ...
    fit = [w for w in range(n_walkers) if (w // 2) % 2 == 0]
    held = [w for w in range(n_walkers) if (w // 2) % 2 == 1]
    source = cvdesign.Source(topology, temperature=TEMPERATURE_K)
    for w in fit:
        source.add_labelled(pairs[w][0], visits[w].labels, bias=pairs[w][1])
    second = cvdesign.suggest(source, max_terms=3, n_suggestions=3)
    print("\nfrom the biased frames:\n" + second.top_table(3))
    second.write(work / "suggestions", force=True)
    cv2 = cvdesign.load_spec(work / "suggestions" / "cv-01.json", topology=system.topology)

    # ------------------------------------------------------------ 6. compare
    print("\nhow CV 2 differs from CV 1:")
    print(compare_specs(cv1, cv2).summary())
    # The held-out frames are labelled by the basin cores of CV 1 (visits), so this yardstick
    # favours CV 1 by construction: CV 2 scoring higher on it says more than it would on
    # neutral labels. (The Fisher ratio here is the ranking's: between over within state
    # variance, equal state weights.)
    xyz = np.concatenate([md.load(str(pairs[w][0]), top=system.topology).xyz for w in held])
    labels = np.concatenate([visits[w].labels for w in held])
    kt = BOLTZMANN_KJ_MOL_K * TEMPERATURE_K
    a = energy1[:, held].T.reshape(-1) / kt
    weights = np.exp(a - a.max())
    for name, spec in (("CV 1", cv1), ("CV 2", cv2)):
        j = fisher_separation(spec.evaluate(xyz), labels, tuple(basins), weights=weights,
                              period=spec.period if spec.periodic else None)
        print(f"Fisher ratio of {name} on the held-out walkers: {j:.4g}")

    _, phi2, _ = biased_walkers(cv2, system, n_walkers, n_steps, "biased run along CV 2",
                                work / "cv2")
    total_ns = n_walkers * n_steps * TIMESTEP_PS / 1000.0
    c1, c2 = torsion_crossings(phi1), torsion_crossings(phi2)
    print(f"\ncrossings of the latch torsion in {total_ns:.2f} ns of biased run each:")
    print(f"crossings along CV 1: {c1} ({c1 / total_ns:.1f} per ns)")
    print(f"crossings along CV 2: {c2} ({c2 / total_ns:.1f} per ns)")
    print(f"crossings between the cores of CV 1 in its own run: "
          f"{sum(v.crossings for v in visits)}")

    print(f"\nCaution: {cv2.caution} Both CVs and the bias parameters are starting points "
          "checked here on a toy; in your system, short test runs and your own convergence "
          "checks decide.")
    if not keep:
        print("\n(the outputs were written to a temporary directory, now removed; give an "
              "OUT_DIR to keep them)")


if __name__ == "__main__":
    args = [a for a in sys.argv[1:] if a != "--long"]
    if len(args) > 1:
        sys.exit("usage: python tutorials/05_refine.py [OUT_DIR] [--long]")
    if args:
        main(args[0], long="--long" in sys.argv)
    else:
        with tempfile.TemporaryDirectory() as tmp:
            main(Path(tmp) / "cv-suggestions", long="--long" in sys.argv, keep=False)
