"""Tutorial 3: hand the rank-1 CV to a simulation, bias along it, and check the result.

Run it with

    python tutorials/03_hand_off.py [OUT_DIR]

OUT_DIR is where cvdesign's outputs are written (default: a temporary directory
that is removed at the end). It takes about a minute on two CPU cores. The script

1. runs `cvdesign.suggest` on the bundled demo and writes the outputs, as in
   tutorial 1;
2. loads the rank-1 spec `cv-01.json`, checked against the topology of the
   molecule that will be simulated;
3. builds, by hand, a spec for a poorly ranked descriptor (the last dihedral on
   the score card), to compare with;
4. turns each spec into starting values for a well-tempered metadynamics bias
   (`cvdesign.bias.hints.spec_hints`) and runs the testbed's Langevin engine with
   that bias, the forces coming from the spec's own evaluator
   (`Spec.evaluate(..., gradient=True)`), exactly as an engine would apply them;
5. counts transitions between the two states in the same number of steps for
   both CVs;
6. recovers the free-energy difference between the states from the rank-1 bias,
   F(s) = -gamma / (gamma - 1) V(s) (Barducci, Bussi and Parrinello, Phys. Rev.
   Lett. 100, 020603, 2008), and compares it with an independent reference: long
   unbiased runs of the same molecule with its latch torsion switched off,
   reweighted by that torsion's energy (exact, because the torsion depends on
   the latch dihedral only; see `cvdesign.testbed.metad.softened_delta_f`).

The demo molecule ("latch", invented, 12 united atoms) has one slow torsion
C3-C4-C5-C6 with a barrier of about 35 kJ/mol between closed (near 0 rad) and
open (near pi rad); see data/README.md. Units: nm, rad, ps, kJ/mol, K.
"""

import sys
import tempfile
import time
from pathlib import Path

import mdtraj as md
import numpy as np

import cvdesign
from cvdesign.io.demo import demo_inputs
from cvdesign.bias.hints import spec_hints
from cvdesign.testbed import count_transitions, latch
from cvdesign.testbed.metad import (WellTemperedBias, run_biased, softened_delta_f, spec_cv,
                                    well_delta_f)

TEMPERATURE_K = 300.0     # the demo data were simulated at 300 K
TIMESTEP_PS = 0.002       # ... with a 2 fs step
FRICTION_PER_PS = 1.0
N_WALKERS = 32            # walkers share one bias and are integrated in lockstep
N_STEPS = 40_000          # per walker: 80 ps each, 2.56 ns in all
BARRIER_KJ_MOL = 35.0     # barrier estimate for the hints (the toy's, by construction)
HEIGHT_KT = 0.125         # kernel height: a quarter of the hints' default 0.5 kT; see step 4
SEED = 2026


def dihedral_spec(row, topology, states):
    """A one-dihedral spec for a score-card row, with its per-state spread from the data.

    A dihedral is periodic, so the state mean is the circular mean and the spread
    is measured about it with wrapped differences (rad).
    """
    desc = {"id": row["id"], "kind": "dihedral", "atoms": list(row["atoms"]),
            "label": row["label"]}
    term = {"descriptor": row["id"], "transform": "identity", "center": 0.0, "scale": 1.0,
            "weight": 1.0}
    bare = cvdesign.Spec(name="poor", topology=md.load_topology(topology),
                         descriptors=[desc], terms=[term], periodic=True)
    stats = {}
    for name, files in states.items():
        phi = np.concatenate([bare.evaluate(md.load(f, top=topology).xyz) for f in files])
        mean = float(np.angle(np.exp(1j * phi).mean()))
        spread = float(np.sqrt(np.mean(np.angle(np.exp(1j * (phi - mean))) ** 2)))
        stats[name] = {"mean": mean, "std": spread, "n_frames": int(phi.size)}
    # The score card's integrated autocorrelation time (ps) sets the deposition
    # interval, as it does for the suggestions.
    scores = ({} if row.get("integrated_time") is None
              else {"integrated_time_ps": row["integrated_time"]})
    return cvdesign.Spec(name="poor", topology=md.load_topology(topology), descriptors=[desc],
                         terms=[term], periodic=True, states=stats, scores=scores,
                         caution="a deliberately poor CV, for comparison")


def biased_run(spec, system, label):
    """Hints from the spec, then a well-tempered run of all walkers along its CV."""
    hints = spec_hints(spec, temperature=TEMPERATURE_K, md_step_fs=TIMESTEP_PS * 1000,
                       barrier=BARRIER_KJ_MOL, height_kt=HEIGHT_KT)
    grid = hints["grid"]
    kernel_sigma = hints["kernel"]["sigma"]
    interval_steps = hints["deposition"]["interval_steps"]
    bias_factor = hints["well_tempered"]["bias_factor"]
    height = hints["height_kj_mol"]
    print(f"\n{label}: sigma {kernel_sigma:.4g} CV units, deposit every {interval_steps} steps, "
          f"bias factor {bias_factor:.2f} (for a {BARRIER_KJ_MOL:g} kJ/mol barrier), height "
          f"{height:.3f} kJ/mol, grid [{grid['lower']:.4g}, {grid['upper']:.4g}] in "
          f"{grid['n_bins']} bins")
    bias = WellTemperedBias(spec_cv(spec), sigma=kernel_sigma, height=height,
                            interval_steps=interval_steps,
                            bias_factor=bias_factor, temperature=TEMPERATURE_K,
                            grid=(grid["lower"], grid["upper"], grid["n_bins"]),
                            periodic=grid["periodic"])
    # Half the walkers start closed, half open.
    x0 = np.stack([system.states[s] for s in ("closed", "open")] * (N_WALKERS // 2))
    start = time.perf_counter()
    run = run_biased(system, x0, N_STEPS, bias=bias, friction=FRICTION_PER_PS,
                     md_step_ps=TIMESTEP_PS, seed=SEED, report_interval=interval_steps,
                     observe=system.slow_angle)
    # The states are told apart by the molecule's latch dihedral itself, not by the
    # CV, so that both CVs are judged by the same yardstick.
    n_transitions = sum(count_transitions(phi) for phi in run.observed.T)
    print(f"  {N_STEPS} steps x {N_WALKERS} walkers in {time.perf_counter() - start:.0f} s, "
          f"{bias.n_kernels} kernels")
    return run, n_transitions


def state_intervals(spec, nodes):
    """CV intervals of the two states: split at the midpoint between their means."""
    (a, sa), (b, sb) = spec.states.items()
    lo_state, hi_state = (a, b) if sa["mean"] < sb["mean"] else (b, a)
    mid = 0.5 * (sa["mean"] + sb["mean"])
    return {lo_state: (nodes.min(), mid), hi_state: (mid, nodes.max())}


def main(out_dir, keep=True):
    # ------------------------------------------------------------ 1. suggestions
    topology, states = demo_inputs()
    source = cvdesign.Source.from_states(topology, states)
    result = cvdesign.suggest(source, max_terms=3, n_suggestions=5)
    print(result.top_table(5))
    written = Path(result.write(out_dir, force=True))
    print(f"wrote the suggestions to {written}/")

    # ------------------------------------------------------------ 2. the rank-1 spec
    # The molecule to simulate is the testbed's latch, the one the demo data came
    # from. Loading with its topology refuses a spec made for another molecule.
    system = latch()
    best = cvdesign.load_spec(written / "cv-01.json", topology=system.topology)
    terms = ", ".join(f"{t['weight']:+.4f} {t['transform']}({t['descriptor']})"
                      for t in best.terms)
    print(f"\nrank-1 CV cv-01: {terms}")

    # ------------------------------------------------------------ 3. a poor CV
    # The last dihedral on the score card: it barely differs between the states.
    row = [r for r in result.scorecard if r["kind"] == "dihedral"][-1]
    poor = dihedral_spec(row, topology, states)
    print(f"poorly ranked CV: {row['label']} (score-card position "
          f"{result.scorecard.index(row) + 1} of {len(result.scorecard)}, Fisher ratio "
          f"{row['fisher_ratio']:.2g})")

    # ------------------------------------------------------------ 4-5. biased runs
    # Starting values from the hints: kernel width from the within-state spread,
    # deposition interval from the CV's integrated autocorrelation time (lengthened so
    # that the bias grows no faster than 5 kJ/mol per ps at the kernel height), bias
    # factor from the barrier estimate. One deliberate change: the walkers all deposit into
    # one bias, so it grows N_WALKERS times as fast as a single run's would; a quarter
    # of the hints' default height (height_kt=HEIGHT_KT, so that the interval the hints
    # give fits that height) keeps the growth nearer to the quasi-static regime that
    # the free-energy estimate assumes, and the basins still fill within the run.
    # Like every hint, that is a choice to check, here against the reference below.
    best_run, best_transitions = biased_run(best, system, "rank-1 CV")
    poor_run, poor_transitions = biased_run(poor, system, "poorly ranked CV")
    print(f"\ntransitions between closed and open in {N_STEPS} steps x {N_WALKERS} walkers:")
    print(f"transitions with rank-1 CV (cv-01): {best_transitions}")
    print(f"transitions with poorly ranked CV ({row['label']}): {poor_transitions}")

    # ------------------------------------------------------------ 6. free energy
    # F(s) from the bias averaged over the second half of the run, on the CV values
    # the walkers visited; each state is the side of the midpoint between the state
    # means (the barrier between them is far too high to matter for the split).
    bias = best_run.bias
    f = bias.free_energy(values=best_run.mean_values)
    visited = (bias.nodes >= best_run.cv.min()) & (bias.nodes <= best_run.cv.max())
    wells = state_intervals(best, bias.nodes[visited])
    delta_bias = well_delta_f(bias.nodes[visited], f[visited], TEMPERATURE_K,
                              wells["closed"], wells["open"])
    print("\nindependent reference: the latch torsion switched off, unbiased walkers, "
          "frames reweighted by its energy ...")
    start = time.perf_counter()
    ref = softened_delta_f(system, N_STEPS, temperature=TEMPERATURE_K,
                           friction=FRICTION_PER_PS, md_step_ps=TIMESTEP_PS,
                           n_walkers=N_WALKERS, report_interval=25, seed=SEED,
                           states=("closed", "open"))
    print(f"  {ref.n_transitions} transitions, {ref.effective_samples:.0f} effective frames, "
          f"{time.perf_counter() - start:.0f} s")
    print(f"F(closed) - F(open) from the bias: {delta_bias:+.2f} kJ/mol")
    print(f"F(closed) - F(open) reference: {ref.delta_f:+.2f} ± {ref.stderr:.2f} kJ/mol")
    print(f"difference: {abs(delta_bias - ref.delta_f):.2f} kJ/mol (kT = "
          f"{bias.kT:.2f} kJ/mol)")

    print(f"\nCaution: {best.caution} The bias parameters above are starting points "
          "from cvdesign's hints, checked here on a toy with a known answer; in your "
          "system, short test runs and your own convergence checks decide.")
    if not keep:
        print("\n(the outputs were written to a temporary directory, now removed; give an "
              "OUT_DIR to keep them)")


if __name__ == "__main__":
    if len(sys.argv) > 2:
        sys.exit("usage: python tutorials/03_hand_off.py [OUT_DIR]")
    if len(sys.argv) == 2:
        main(sys.argv[1])
    else:
        with tempfile.TemporaryDirectory() as tmp:
            main(Path(tmp) / "cv-suggestions", keep=False)
