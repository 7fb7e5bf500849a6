"""Benchmark: the speed and memory figures of issue 10, each a ratio to a baseline.

Run by hand (not collected by pytest; nothing is asserted, it prints)::

    python tests/benchmarks/bench_targets.py [--cache DIR] [--only NAMES]
        [--sizes 1000,10000,100000,1000000] [--heavy-sizes 1000,100000] [--repeat 3]

Data: adenylate kinase (214 residues, 3341 atoms) from the MDAnalysis test suite (package
``mdanalysistests``; the DIMS closed-to-open transition of Beckstein et al., J. Mol. Biol.
2009). State "closed" is its frames 0-32, state "open" its frames 65-97, each repeated
with fresh Gaussian noise of 0.02 nm per coordinate to N frames per state and written once
as DCD files to a cache directory (default ``/tmp/cvdesign-bench``, outside the
repository; a 10^6-frame CA file is 2.6 GB, a 10^5-frame all-atom file 4 GB). The CA
series stores the 214 CA atoms only (topology ``adk_ca.pdb``), so that 10^6 frames per
state fit on disk; the heavy-atom series stores every atom (the PSF topology). DCD stores
no times: a time step of 1 ps is declared.

Figures (the targets of issue 10 in brackets). Each case runs with 1 BLAS thread and with
2 (threadpoolctl; the passes themselves always use one, by design); times are the
minimum of ``--repeat`` runs; every ``suggest`` and user-script case runs in a fresh
subprocess, whose peak resident memory (``ru_maxrss``) is reported:

* ``memory``: peak memory of ``suggest`` (default options, bootstrap included) on CA atoms
  at each of ``--sizes`` frames per state, and of the default heavy-atom pool at
  ``--heavy-sizes``; ratio to the smallest size [at most 1.2];
* ``featurize``: the pool's features (``Pool.features``) against
  ``mdtraj.compute_distances`` / ``compute_angles`` / ``compute_dihedrals`` on the same
  atoms and frames in memory, and reading + featurizing through the pass engine against
  ``mdtraj.load(atom_indices=...)`` + the same calls [at most 1.3];
* ``stats``: per-leaf statistics of the passes (full moments, lagged moments, diagonal
  moments, histograms, the score card's block sums) over a feature matrix against one
  ``X.T @ X`` or one column sum of the same matrix [at most 1.5];
* ``floor``: ``suggest`` without bootstrap against the floor: reading the pool's atoms,
  its features and one ``X.T @ X`` per state, streamed in chunks [at most 2];
* ``bootstrap``: the default bootstrap's extra time against the rest of ``suggest``
  [at most 1];
* ``workers``: ``suggest`` without bootstrap and the screening pass alone with 2 local
  worker processes against 1 [at least 1.7x faster];
* ``user``: what a user would otherwise write (``mdtraj.load`` of every frame, the full
  matrix of the pool's features, scikit-learn's ``LinearDiscriminantAnalysis``) against
  ``suggest`` without bootstrap and with the default one: time and peak memory [suggest
  at least 3x faster and 10x less memory].

``floor``, ``bootstrap``, ``workers`` and ``user`` use the CA series at ``--main-size``
frames per state (default 10^5).
"""

import argparse
import importlib.resources
import json
import os
import resource
import subprocess
import sys
import time
from pathlib import Path

import mdtraj as md
import numpy as np
from threadpoolctl import threadpool_info, threadpool_limits

#: Frames of the original trajectory in each state.
STATE_FRAMES = {"closed": (0, 33), "open": (65, 98)}
NOISE_NM = 0.02
WRITE_CHUNK = 20_000


def _adk():
    d = Path(str(importlib.resources.files("MDAnalysisTests") / "data"))
    return d / "adk.psf", d / "adk_dims.dcd"


def _write_state(path, xyz, n_frames, seed):
    """Repeat `xyz` with fresh noise to `n_frames` frames, written in chunks to a DCD."""
    rng = np.random.default_rng(seed)
    tmp = path.with_suffix(".part")
    with md.formats.DCDTrajectoryFile(str(tmp), "w") as fh:
        done = 0
        while done < n_frames:
            n = min(WRITE_CHUNK, n_frames - done)
            idx = (done + np.arange(n)) % xyz.shape[0]
            block = xyz[idx] + rng.normal(0, NOISE_NM, (n,) + xyz.shape[1:]).astype(np.float32)
            fh.write(10.0 * block)  # DCD stores angstrom
            done += n
    tmp.rename(path)


def dataset(cache, kind, n_frames):
    """(topology path, {state: trajectory path}) of a series, written once to `cache`."""
    cache = Path(cache)
    cache.mkdir(parents=True, exist_ok=True)
    psf, dcd = _adk()
    traj = None
    if kind == "ca":
        top = cache / "adk_ca.pdb"
        if not top.exists():
            traj = md.load(str(dcd), top=str(psf))
            traj.atom_slice(traj.topology.select("name CA"))[0].save_pdb(str(top))
    else:
        top = psf
    out = {}
    for s, (state, (a, b)) in enumerate(STATE_FRAMES.items()):
        path = cache / f"{kind}-{state}-{n_frames}.dcd"
        if not path.exists():
            if traj is None:
                traj = md.load(str(dcd), top=str(psf))
            sub = traj.atom_slice(traj.topology.select("name CA")) if kind == "ca" else traj
            _write_state(path, sub.xyz[a:b], n_frames, seed=1000 * s + n_frames % 997)
        out[state] = path
    return top, out


def source_of(cache, kind, n_frames, **kw):
    from cvdesign import Source

    top, files = dataset(cache, kind, n_frames)
    return Source.from_states(str(top), {k: [str(v)] for k, v in files.items()},
                              timestep=1.0, **kw)


if __name__ == "__main__":
    ap = argparse.ArgumentParser()
    ap.add_argument("--cache", default="/tmp/cvdesign-bench")
    ap.add_argument("--make", default="ca:1000")
    a = ap.parse_args()
    for item in a.make.split(","):
        k, n = item.split(":")
        t0 = time.perf_counter()
        print(dataset(a.cache, k, int(n)), time.perf_counter() - t0)
