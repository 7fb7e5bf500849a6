"""Benchmark: `suggest` on a protein of about 200 residues, a few hundred frames.

Run by hand (not collected by pytest)::

    python tests/benchmarks/bench_suggest.py

Data: adenylate kinase (214 residues, 3341 atoms; 214 CA atoms, 22,791 CA-CA pairs)
from the MDAnalysis test suite (package ``mdanalysistests``; the DIMS closed-to-open
transition of Beckstein et al., J. Mol. Biol. 2009). Its 98 frames are repeated with
0.02 nm of Gaussian noise to 294 frames; the first third is labelled "closed", the
last third "open"; the DCD stores no times, so a time step of 1 ps is declared.

Prints wall time and peak memory for each case, and their ratio to a baseline
measured in the same run: one plain pass of mdtraj.iterload over the same frames
(reading is the floor of any streaming method). Target (issue 2): the CA case well
under a minute on 2 cores.
"""

import importlib.resources
import resource
import sys
import tempfile
import time
from pathlib import Path

import mdtraj as md
import numpy as np

from cvdesign import Source, suggest


def _data():
    d = Path(str(importlib.resources.files("MDAnalysisTests") / "data"))
    return d / "adk.psf", d / "adk_dims.dcd"


def _make(tmp):
    psf, dcd = _data()
    t = md.load(str(dcd), top=str(psf))
    rng = np.random.default_rng(0)
    reps = [t.xyz + rng.normal(0, 0.02, t.xyz.shape).astype(np.float32) for _ in range(3)]
    xyz = np.concatenate([np.concatenate([r[:33] for r in reps]),
                          np.concatenate([r[33:65] for r in reps]),
                          np.concatenate([r[65:] for r in reps])])
    big = md.Trajectory(xyz, t.topology, time=np.arange(len(xyz)) * 1.0)
    out = Path(tmp) / "adk_long.dcd"
    big.save_dcd(str(out))
    return psf, out, len(xyz)


def _timed(fn):
    t0 = time.perf_counter()
    fn()
    return time.perf_counter() - t0


def main():
    with tempfile.TemporaryDirectory() as tmp:
        psf, dcd, n = _make(tmp)
        third = n // 3

        def source():
            src = Source(str(psf), timestep=1.0)
            src.add(str(dcd), "closed", frames=(0, third))
            src.add(str(dcd), "open", frames=(n - third, n))
            return src

        base = _timed(lambda: sum(c.n_frames for c in md.iterload(str(dcd), top=str(psf),
                                                                    chunk=500)))
        print(f"frames: {n}; baseline (one iterload pass): {base:.2f} s")
        cases = [("CA, separate, no bootstrap", "name CA", {"n_bootstrap": 0}),
                 ("CA, separate (default)", "name CA", {}),
                 ("CA, both, lag 5 ps", "name CA", {"objective": "both", "lag": 5.0}),
                 ("heavy atoms, residue pairs", None,
                  {"kinds": ("center_distance", "coordination")}),
                 ("heavy atoms (default)", None, {})]
        for label, sel, kw in cases:
            src = source()
            t = _timed(lambda: suggest(src, selection=sel, **kw))
            peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
            print(f"{label:28s} {t:7.2f} s   ratio to baseline {t / base:8.1f}   "
                  f"peak RSS so far {peak:.0f} MiB")


if __name__ == "__main__":
    sys.exit(main())
