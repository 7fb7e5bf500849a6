"""Tutorial 1: first CV suggestions from the Python API, on the bundled demo.

Run it with

    python tutorials/01_first_suggestions.py [OUT_DIR]

OUT_DIR is where the outputs are written (default: a temporary directory that is
removed at the end). The script

1. builds a Source (topology + trajectories grouped by state) from the demo's
   manifest;
2. runs `cvdesign.suggest` and prints the top suggestions;
3. writes the outputs (ranking, score card, summary, one spec per suggestion);
4. loads the rank-1 spec `cv-01.json` back, evaluates it with coordinates read
   by mdtraj, and compares the per-state mean and spread with the values the
   spec stores.

The demo is an invented 12-atom molecule ("latch") whose only slow motion is the
torsion C3-C4-C5-C6: closed near 0 rad, open near pi rad (see data/README.md).
Units throughout: nm, rad, ps.
"""

import json
import sys
import tempfile
from pathlib import Path

import mdtraj as md
import numpy as np

import cvdesign
from cvdesign.io.demo import demo_data_dir


def main(out_dir, keep=True):
    # ------------------------------------------------------------------ 1. inputs
    # The demo ships a manifest listing the topology and each state's trajectories.
    # With your own data you would write the dict by hand:
    #     {"closed": ["closed-1.xtc", "closed-2.xtc"], "open": ["open-1.xtc", ...]}
    data = demo_data_dir()
    manifest = json.loads((data / "manifest.json").read_text(encoding="utf-8"))
    topology = str(data / manifest["topology"]["file"])
    states = {name: [str(data / f) for f in entry["files"]]
              for name, entry in manifest["states"].items()}
    for name, files in states.items():
        print(f"state {name!r}: {', '.join(Path(f).name for f in files)}")

    # A Source only records what to read; trajectories are streamed in chunks later,
    # so memory does not grow with trajectory length.
    source = cvdesign.Source.from_states(topology, states)

    # ------------------------------------------------------------------ 2. suggest
    # The pool is built from the solute's heavy atoms (default selection): distances
    # whose mean is below 1 nm in some state, bond angles, one dihedral per rotatable
    # bond. Combinations of up to max_terms descriptors are ranked by their Fisher
    # ratio measured on held-out trajectories; n_suggestions of them are kept.
    result = cvdesign.suggest(source, max_terms=3, n_suggestions=5)
    print("\nWhat was done:")
    for note in result.notes:
        print(f"  - {note}")
    print("\nTop suggestions. Held-out J: between-state over within-state variance of the")
    print("CV on trajectories the fit did not see; overlap: 0 = separated, 1 = identical;")
    print("summary.md in the output directory explains every column.")
    print(result.top_table(5))

    # ------------------------------------------------------------------ 3. write
    # All or nothing: the files are written into a temporary directory that is then
    # renamed onto out_dir. force=True replaces an earlier cvdesign output (never a
    # directory cvdesign did not write), so the tutorial can be re-run.
    written = result.write(out_dir, force=True)
    print(f"\nwrote {', '.join(sorted(p.name for p in Path(written).iterdir()))} to {written}/")

    # ------------------------------------------------------------------ 4. use a spec
    # Loading validates the spec and, given a topology, refuses one it was not made for.
    spec = cvdesign.load_spec(Path(written) / "cv-01.json", topology=topology)
    print(f"\n{spec!r}")
    for term in spec.terms:
        print(f"  term: {term['transform']}({term['descriptor']}), weight {term['weight']:+.4f}")

    # Evaluate from coordinates alone: the first trajectory of each state, read with
    # mdtraj (xyz in nm). Pass box=traj.unitcell_vectors so that periodic systems use
    # the minimum image (the demo has no box, so it is None here).
    stored = spec.states
    print("\nCV per state: this evaluation (first trajectory of the state) vs the spec "
          "(all trajectories of the state):")
    for name, files in states.items():
        traj = md.load(files[0], top=topology)
        values = spec.evaluate(traj.xyz, box=traj.unitcell_vectors)
        ref = stored[name]
        print(f"  {name:>6}: {values.mean():+.4f} ± {values.std():.4f} over {values.size} frames "
              f"of {Path(files[0]).name};  spec: {ref['mean']:+.4f} ± {ref['std']:.4f} over "
              f"{ref['n_frames']} frames")
        # One trajectory is a sample of the state, so its mean differs a little from the
        # stored one; a difference of many standard deviations would mean the wrong
        # topology, wrong units, or a trajectory from another state.
        if abs(values.mean() - ref["mean"]) > 3 * ref["std"]:
            print(f"  warning: state {name!r} is more than 3 std away from the stored mean")
    (a, b) = (stored[s] for s in states)
    pooled_std = np.sqrt(0.5 * (a["std"] ** 2 + b["std"] ** 2))
    print(f"\nthe two state means are {abs(b['mean'] - a['mean']) / pooled_std:.1f} pooled "
          "within-state standard deviations apart along cv-01")

    print(f"\nCaution: {spec.caution}")
    if keep:
        print(f"\nNext, the same from the command line:\n  cvdesign apply "
              f"{Path(written) / 'cv-01.json'} --topology {topology} "
              f"{states[next(iter(states))][0]}")
    else:
        print("\n(the outputs were written to a temporary directory, now removed; give an "
              "OUT_DIR to keep them)")


if __name__ == "__main__":
    if len(sys.argv) > 2:
        sys.exit("usage: python tutorials/01_first_suggestions.py [OUT_DIR]")
    if len(sys.argv) == 2:
        main(sys.argv[1])
    else:
        with tempfile.TemporaryDirectory() as tmp:
            main(Path(tmp) / "cv-suggestions", keep=False)
