"""Benchmark: the speed and memory figures of issue 10, each a ratio to a baseline.

Run by hand (not collected by pytest; nothing is asserted, it prints)::

    python tests/benchmarks/bench_targets.py [--cache DIR] [--only NAMES]
        [--sizes 1000,10000,100000,1000000] [--heavy-sizes 1000,100000] [--repeat 3]
        [--threads 1,2] [--out figures.json]

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

* ``memory``: peak memory of ``suggest`` on CA atoms at each of ``--sizes`` frames per
  state (default options, and without bootstrap), and of the default heavy-atom pool at
  ``--heavy-sizes`` (default options only); ratio to the smallest size [at most 1.2];
* ``featurize``: the pool's features (``Pool.features``, per kind) against
  ``mdtraj.compute_distances`` / ``compute_angles`` / ``compute_dihedrals`` on the same
  atoms and frames in memory, in the engine's read chunks, each chunk's result dropped
  before the next on both sides, as in the engine (also shown: the same mdtraj call written into a new float64 array, the floor of a
  float64 result built on mdtraj's float32 one); and
  reading + featurizing every frame through the pass engine (a pass that keeps nothing)
  against ``mdtraj.load(atom_indices=...)`` + the same calls [at most 1.3]; the calls
  of each case are timed in turn, round after round;
* ``stats``: per-leaf statistics of the passes (full moments, lagged moments, diagonal
  moments, histograms, the score card's block sums, the integrated-time lag grid) over
  an in-memory matrix of ``--stats-frames`` rows (200 and 1802 features) against one
  ``X.T @ X`` or one column sum of the same matrix [at most 1.5];
* ``floor``: ``suggest`` without bootstrap against the floor of a streaming pass: reading
  the pool's atoms, its features (``mdtraj.compute_distances``) and one ``X.T @ X`` per
  state, in chunks [at most 2];
* ``bootstrap``: the default bootstrap's extra time against the rest of ``suggest``
  [at most 1];
* ``workers``: ``suggest`` without bootstrap with 2 local worker processes against the
  serial run, and the screening pass alone with 2 processes against 1 (started
  beforehand) [at least 1.7x faster];
* ``user``: what a user would otherwise write (``mdtraj.load`` of every frame, the full
  matrix of the pool's features -- the pairs ``suggest`` keeps -- and scikit-learn's
  ``LinearDiscriminantAnalysis``) against ``suggest`` without bootstrap and with the
  default one: time and peak memory [suggest at least 3x faster and 10x less memory].

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



# ----------------------------------------------------------------------------- child cases
def _peak_mib():
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024


def _pool_pairs(pool):
    return np.array([d.atoms for d in pool.descriptors if d.kind == "distance"], dtype=np.intp)


def child_suggest(args):
    """`suggest` on a series; returns wall time (s) and this process's peak memory."""
    from cvdesign import suggest

    src = source_of(args["cache"], args["kind"], args["frames"])
    sel = "name CA" if args["kind"] == "ca" else None
    t0 = time.perf_counter()
    res = suggest(src, selection=sel, n_bootstrap=args["bootstrap"],
                  executor=args.get("workers"))
    return {"time": time.perf_counter() - t0, "peak_mib": _peak_mib(),
            "n_features": res.pool.n_features, "rank1": res.ranking[0]["spec"]}


def child_user(args):
    """What a user would otherwise write: load every frame, the full matrix of the pool's
    features (the pairs `suggest` keeps, from a file), scikit-learn's LDA."""
    from sklearn.discriminant_analysis import LinearDiscriminantAnalysis

    top, files = dataset(args["cache"], args["kind"], args["frames"])
    pairs = np.load(args["pairs"])
    t0 = time.perf_counter()
    xs, ys = [], []
    for label, path in enumerate(files.values()):
        traj = md.load(str(path), top=str(top))
        xs.append(md.compute_distances(traj, pairs, periodic=False))
        ys.append(np.full(traj.n_frames, label))
        del traj
    lda = LinearDiscriminantAnalysis().fit(np.concatenate(xs), np.concatenate(ys))
    return {"time": time.perf_counter() - t0, "peak_mib": _peak_mib(),
            "n_features": int(lda.coef_.shape[1])}


def child_floor(args):
    """The floor of a streaming pass: read the pool's atoms (mdtraj's file object; whole
    frames when they are every atom), its features (``mdtraj.compute_distances``) and one
    ``X.T @ X`` and column sum per state, in chunks of 1000 frames."""
    top, files = dataset(args["cache"], args["kind"], args["frames"])
    pairs = np.load(args["pairs"])
    atoms = np.unique(pairs)
    local = np.searchsorted(atoms, pairs)
    every = atoms.size == md.load_topology(str(top)).n_atoms  # then read whole frames
    t0 = time.perf_counter()
    for path in files.values():
        p = len(local)
        s1, s2 = np.zeros(p), np.zeros((p, p))
        with md.open(str(path)) as fh:
            while True:
                xyz = fh.read(1000, atom_indices=None if every else atoms)[0]
                if len(xyz) == 0:
                    break
                x = md.compute_distances(md.Trajectory(xyz / 10.0, None), local,
                                         periodic=False).astype(np.float64)
                s1 += x.sum(axis=0)
                s2 += x.T @ x
    return {"time": time.perf_counter() - t0, "peak_mib": _peak_mib()}


def _null_pass(featurizer):
    """A pass that reads and featurizes and keeps nothing (bench_passes.py's)."""
    from bench_passes import NullPass

    return NullPass(featurizer)


def _best(fn, repeat):
    """Shortest wall time of `repeat` calls (after one call to warm up), s."""
    fn()
    times = []
    for _ in range(repeat):
        t0 = time.perf_counter()
        fn()
        times.append(time.perf_counter() - t0)
    return min(times)


def _best_interleaved(fns, repeat):
    """Shortest wall time of each of `fns` (s), the calls taken in turn `repeat` times (after
    one warm-up round), so that a change of load hits them all alike; the order turns by
    one each round, so that none always runs on the memory the one before it freed."""
    for fn in fns:
        fn()
    times = [[] for _ in fns]
    for r in range(repeat):
        for k in range(len(fns)):
            i = (k + r) % len(fns)
            t0 = time.perf_counter()
            fns[i]()
            times[i].append(time.perf_counter() - t0)
    return [min(t) for t in times]


def _each(chunks, fn):
    """``fn(chunk)`` for every chunk, each result dropped before the next call."""
    for c in chunks:
        fn(c)


def _written(out, values):
    """`values` written into `out`; `out`."""
    out[...] = values
    return out


def child_workers(args):
    """The screening pass alone with 1 and 2 local worker processes (started beforehand)."""
    from cvdesign.parallel import ProcessExecutor
    from cvdesign.passes import PoolFeaturizer, ScreeningPass, leaf_frames_for, plan_tasks, run_pass
    from cvdesign.pool import build_pool

    src = source_of(args["cache"], args["kind"], args["frames"])
    featurizer = PoolFeaturizer(build_pool(src, selection="name CA"))
    plan = plan_tasks(src, leaf_frames=leaf_frames_for(featurizer.n_features)).split(n_tasks=8)
    out = {}
    for n in (1, 2):
        with ProcessExecutor(n) as ex:
            run_pass(_null_pass(featurizer), src, executor=ex, tasks=plan)  # start workers
            out[n] = _best(lambda: run_pass(ScreeningPass(featurizer, lags=10), src, tasks=plan,
                                            executor=ex), args["repeat"])
    return {"one": out[1], "two": out[2]}


def child_featurize(args):
    """Featurization against mdtraj on the same atoms and frames: in memory per kind, and
    reading + featurizing through the pass engine against mdtraj.load + compute_*."""
    from cvdesign.passes import FEATURE_BUDGET, PoolFeaturizer, run_pass
    from cvdesign.pool import build_pool

    out = {}
    repeat = args["repeat"]
    for kind, n_frames in (("ca", args["frames"]), ("heavy", args["heavy_frames"])):
        src = source_of(args["cache"], kind, n_frames)
        pool = build_pool(src, selection="name CA" if kind == "ca" else None)
        top, files = dataset(args["cache"], kind, n_frames)
        path = str(files["closed"])
        for pkind in ("distance", "angle", "dihedral"):
            idx = [i for i, d in enumerate(pool.descriptors) if d.kind == pkind]
            if not idx:
                continue
            sub = pool.subset(idx)
            atoms = sub.atom_indices()
            traj = md.load(path, top=str(top), atom_indices=atoms)
            # in the engine's read chunks (FEATURE_BUDGET feature values each)
            step = max(1, FEATURE_BUDGET // sub.n_features)
            chunks = [md.Trajectory(traj.xyz[a:a + step], None)
                      for a in range(0, traj.n_frames, step)]
            tuples = np.searchsorted(atoms, np.array([d.atoms for d in sub.descriptors]))
            fn = {"distance": md.compute_distances, "angle": md.compute_angles,
                  "dihedral": md.compute_dihedrals}[pkind]
            # the floor of a float64 result built on mdtraj's float32 one: the same call
            # written into a new float64 array (what Pool.features does for one kind)
            # each chunk's result is dropped before the next, on every side, as the engine
            # does (it bins and sums a chunk's features, then reads the next); keeping them
            # all would time the kernel's fresh pages for twice mdtraj's bytes instead
            base, floor, ours = _best_interleaved([
                lambda: _each(chunks, lambda c: fn(c, tuples, periodic=False)),
                lambda: _each(chunks, lambda c: _written(np.empty((c.n_frames, len(tuples))),
                                                         fn(c, tuples, periodic=False))),
                lambda: _each(chunks, lambda c: sub.features(c, atom_indices=atoms))], repeat)
            out[f"{kind}:{pkind}"] = {"base": base, "ours": ours, "floor": floor,
                                      "n": len(idx), "frames": traj.n_frames}
        # reading + featurizing every frame of both states, the whole pool
        featurizer = PoolFeaturizer(pool)
        atoms = pool.atom_indices()
        kinds = {}
        for d in pool.descriptors:
            kinds.setdefault(d.kind, []).append(d.atoms)

        def baseline():
            for p in files.values():
                t = md.load(str(p), top=str(top), atom_indices=atoms)
                for pkind, tup in kinds.items():
                    fn = {"distance": md.compute_distances, "angle": md.compute_angles,
                          "dihedral": md.compute_dihedrals}[pkind]
                    fn(t, np.searchsorted(atoms, np.array(tup)), periodic=False)
        base, ours = _best_interleaved([baseline,
                                        lambda: run_pass(_null_pass(featurizer), src)], repeat)
        out[f"{kind}:read+featurize"] = {"base": base, "ours": ours, "n": pool.n_features,
                                         "frames": 2 * n_frames}
    return out


def child_stats(args):
    """Per-leaf statistics of the passes over an in-memory feature matrix, against one
    ``X.T @ X`` or one column sum of the same matrix."""
    from cvdesign.passes import (CardPass, FoldMomentsPass, HistogramPass,
                                 LagGridPass, LaggedPass, ScreeningPass, TreeReducer,
                                 leaf_frames_for)
    from cvdesign.passes.engine import Leaf, one_blas_thread

    repeat = args["repeat"]
    n = args["stats_frames"]
    rng = np.random.default_rng(1)
    out = {}

    class Mem:
        def __init__(self, p):
            self.n_features = p

    def run(p, lv):
        if p.exact:
            acc = None
            for leaf in lv:
                acc = p.accumulate(acc, leaf)
            return acc
        tree = TreeReducer(len(lv), p.merge)
        for k, leaf in enumerate(lv):
            tree.add(0, k, p.map(leaf))
        return tree.root

    for p_feat in (200, 1802):
        x = np.ascontiguousarray(rng.normal(size=(n, p_feat)))
        lf = leaf_frames_for(p_feat)
        shift, lo, hi = x.mean(axis=0), x.min(axis=0), x.max(axis=0)
        cases = {
            "full moments (FoldMomentsPass)": (FoldMomentsPass(Mem(p_feat)), 0, "xtx"),
            "lagged moments, lag 10 (LaggedPass)": (
                LaggedPass(Mem(p_feat), 10, shift=shift), 10, "xtx"),
            "diagonal moments + lagged, lag 10 (ScreeningPass)": (
                ScreeningPass(Mem(p_feat), lags=10, shift=shift), 10, "colsum"),
            "histograms, 50 bins (HistogramPass)": (
                HistogramPass(Mem(p_feat), lo, hi), 0, "colsum"),
            "score-card block sums, 50 bins, lag 10 (CardPass)": (
                CardPass(Mem(p_feat), center=shift, low=lo, high=hi, n_bins=50,
                         block_frames=2000, lags=10), 10, "colsum"),
            "lag grid, 18 lags up to 2000 (LagGridPass), per lag": (
                LagGridPass(Mem(p_feat), np.unique(np.round(np.geomspace(1, 2000, 18))
                                                   .astype(int)), shift=shift), 2000,
                "colsum"),
        }
        if p_feat > 500:  # full matrices of the whole pool are not what the pipeline does
            cases = {k: v for k, v in cases.items() if v[2] == "colsum"}
        base = {}
        for threads in (1, 2):
            with threadpool_limits(limits=threads, user_api="blas"):
                base[("xtx", threads)] = _best(lambda: x.T @ x, repeat)
                base[("colsum", threads)] = _best(lambda: x.sum(axis=0), repeat)
        for label, (p, halo, ref) in cases.items():
            lv = Leaf.of_matrix(x, lf, halo)
            with one_blas_thread():
                t = _best(lambda: run(p, lv), repeat)
            if "per lag" in label:
                t /= len(p.lags)
            out[f"{p_feat}:{label}"] = {"ours": t, "ref": ref, "leaf": lf,
                                        "base1": base[(ref, 1)], "base2": base[(ref, 2)]}
    return out


CHILDREN = {"suggest": child_suggest, "user": child_user, "floor": child_floor,
            "workers": child_workers, "featurize": child_featurize, "stats": child_stats}


def run_child(case, threads, **args):
    """Run one case in a fresh interpreter with `threads` BLAS threads; its JSON result."""
    payload = json.dumps({"case": case, "threads": threads, **args})
    env = dict(os.environ)
    env["PYTHONPATH"] = str(Path(__file__).resolve().parents[2]) + os.pathsep + \
        env.get("PYTHONPATH", "")
    proc = subprocess.run([sys.executable, __file__, "--child", payload], env=env,
                          capture_output=True, text=True)
    lines = [ln for ln in proc.stdout.splitlines() if ln.startswith("RESULT ")]
    if proc.returncode or not lines:
        raise RuntimeError(f"case {case} failed:\n{proc.stderr[-3000:]}")
    return json.loads(lines[-1][len("RESULT "):])


def _child_main(payload):
    args = json.loads(payload)
    with threadpool_limits(limits=args["threads"], user_api="blas"):
        result = CHILDREN[args["case"]](args)
    print("RESULT " + json.dumps(result), flush=True)


# ----------------------------------------------------------------------------- the figures
class Bench:
    """Runs the cases (each `repeat` times in fresh processes), keeps the minima, prints."""

    def __init__(self, opts):
        self.opts = opts
        self.memo = {}
        self.figures = []

    def child(self, case, threads, repeat=None, **args):
        key = (case, threads, json.dumps(args, sort_keys=True))
        if key not in self.memo:
            runs = [run_child(case, threads, cache=self.opts.cache, repeat=self.opts.repeat,
                              **args) for _ in range(repeat or self.opts.repeat)]
            best = dict(runs[0])
            for r in runs[1:]:
                for k in ("time", "peak_mib"):
                    if k in r:
                        best[k] = min(best[k], r[k])
            self.memo[key] = best
            scalars = {k: v for k, v in best.items() if not isinstance(v, dict)}
            print(f"   [{case} {args} BLAS threads {threads}: "
                  + ", ".join(f"{k}={v:.4g}" if isinstance(v, float) else f"{k}={v}"
                              for k, v in scalars.items()) + "]", flush=True)
        return self.memo[key]

    def figure(self, name, threads, value, op, bound, what=""):
        met = value <= bound if op == "<=" else value >= bound
        self.figures.append({"figure": name, "blas_threads": threads, "value": value,
                             "target": f"{op} {bound}", "met": bool(met), "what": what})
        print(f"{name:60s} BLAS {threads}: {value:8.3g}  (target {op} {bound}: "
              f"{'met' if met else 'NOT met'})  {what}", flush=True)


def section_memory(b):
    o = b.opts
    for kind, sizes in (("ca", o.sizes), ("heavy", o.heavy_sizes)):
        # (the heavy-atom pool with the default options only: a run at 10^5 frames per
        # state takes about half an hour)
        for boot in (o.n_bootstrap, 0) if kind == "ca" else (o.n_bootstrap,):
            what = "default bootstrap" if boot else "no bootstrap"
            for threads in b.opts.threads:
                peaks = {}
                for n in sizes:
                    dataset(o.cache, kind, n)
                    r = b.child("suggest", threads, repeat=1, kind=kind, frames=n,
                                bootstrap=boot)
                    peaks[n] = r["peak_mib"]
                small = min(sizes)
                for n in sizes:
                    if n != small:
                        b.figure(f"memory: {kind} {n} / {small} frames per state, {what}",
                                 threads, peaks[n] / peaks[small], "<=", 1.2,
                                 f"{peaks[n]:.0f} / {peaks[small]:.0f} MiB")


def section_featurize(b):
    o = b.opts
    dataset(o.cache, "ca", o.main_size)
    dataset(o.cache, "heavy", o.heavy_feat_size)
    for threads in b.opts.threads:
        r = b.child("featurize", threads, repeat=1, frames=o.main_size,
                    heavy_frames=o.heavy_feat_size)
        for key, v in r.items():
            floor = (f"; mdtraj into float64 {v['floor'] / v['base']:.2f}x"
                     if "floor" in v else "")
            b.figure(f"featurize {key} ({v['n']} descriptors, {v['frames']} frames)", threads,
                     v["ours"] / v["base"], "<=", 1.3,
                     f"{v['ours']:.3g} s / {v['base']:.3g} s{floor}")


def section_stats(b):
    for threads in b.opts.threads:
        r = b.child("stats", threads, repeat=1, stats_frames=b.opts.stats_frames)
        for key, v in r.items():
            base = v[f"base{threads}"]
            ref = "X.T @ X" if v["ref"] == "xtx" else "column sum"
            b.figure(f"stats {key}", threads, v["ours"] / base, "<=", 1.5,
                     f"vs one {ref}: {v['ours'] * 1e3:.3g} ms / {base * 1e3:.3g} ms "
                     f"(leaves of {v['leaf']})")


def _pairs_file(b):
    """The CA pool's distance pairs at the main size (what `suggest` keeps), saved once."""
    from cvdesign.pool import build_pool

    path = Path(b.opts.cache) / f"pairs-ca-{b.opts.main_size}.npy"
    if not path.exists():
        pool = build_pool(source_of(b.opts.cache, "ca", b.opts.main_size), selection="name CA")
        np.save(path, _pool_pairs(pool))
    return str(path)


def section_floor(b):
    o = b.opts
    pairs = _pairs_file(b)
    for threads in b.opts.threads:
        ours = b.child("suggest", threads, kind="ca", frames=o.main_size, bootstrap=0)
        floor = b.child("floor", threads, kind="ca", frames=o.main_size, pairs=pairs)
        b.figure(f"suggest without bootstrap / floor, {o.main_size} frames", threads,
                 ours["time"] / floor["time"], "<=", 2.0,
                 f"{ours['time']:.3g} s / {floor['time']:.3g} s")


def section_bootstrap(b):
    o = b.opts
    for threads in b.opts.threads:
        none = b.child("suggest", threads, kind="ca", frames=o.main_size, bootstrap=0)
        boot = b.child("suggest", threads, kind="ca", frames=o.main_size,
                       bootstrap=o.n_bootstrap)
        extra = boot["time"] - none["time"]
        b.figure(f"default bootstrap's extra time / the rest, {o.main_size} frames", threads,
                 extra / none["time"], "<=", 1.0, f"{extra:.3g} s / {none['time']:.3g} s")


def section_workers(b):
    o = b.opts
    for threads in b.opts.threads:
        one = b.child("suggest", threads, kind="ca", frames=o.main_size, bootstrap=0)
        two = b.child("suggest", threads, kind="ca", frames=o.main_size, bootstrap=0,
                      workers=2)
        b.figure(f"suggest speed-up, 2 local workers / serial, {o.main_size} frames", threads,
                 one["time"] / two["time"], ">=", 1.7,
                 f"{one['time']:.3g} s / {two['time']:.3g} s")
        r = b.child("workers", threads, repeat=1, kind="ca", frames=o.main_size)
        b.figure(f"screening pass speed-up, 2 processes / 1, {o.main_size} frames", threads,
                 r["one"] / r["two"], ">=", 1.7, f"{r['one']:.3g} s / {r['two']:.3g} s")


def section_user(b):
    o = b.opts
    pairs = _pairs_file(b)
    for threads in b.opts.threads:
        user = b.child("user", threads, kind="ca", frames=o.main_size, pairs=pairs)
        for boot in (0, o.n_bootstrap):
            ours = b.child("suggest", threads, kind="ca", frames=o.main_size, bootstrap=boot)
            what = "without bootstrap" if boot == 0 else "default bootstrap"
            b.figure(f"user script / suggest ({what}): time, {o.main_size} frames", threads,
                     user["time"] / ours["time"], ">=", 3.0,
                     f"{user['time']:.3g} s / {ours['time']:.3g} s")
            b.figure(f"user script / suggest ({what}): peak memory", threads,
                     user["peak_mib"] / ours["peak_mib"], ">=", 10.0,
                     f"{user['peak_mib']:.0f} MiB / {ours['peak_mib']:.0f} MiB")


SECTIONS = {"memory": section_memory, "featurize": section_featurize, "stats": section_stats,
            "floor": section_floor, "bootstrap": section_bootstrap, "workers": section_workers,
            "user": section_user}


def _ints(text):
    return [int(float(v)) for v in text.split(",") if v]


def main():
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--cache", default="/tmp/cvdesign-bench",
                    help="directory for the generated trajectories (outside the repository)")
    ap.add_argument("--only", default=",".join(SECTIONS),
                    help=f"comma-separated sections, from {', '.join(SECTIONS)}")
    ap.add_argument("--sizes", default="1000,10000,100000,1000000",
                    help="frames per state of the CA memory series")
    ap.add_argument("--heavy-sizes", default="1000,100000",
                    help="frames per state of the heavy-atom memory series")
    ap.add_argument("--main-size", type=int, default=100_000,
                    help="frames per state for floor, bootstrap, workers, user")
    ap.add_argument("--heavy-feat-size", type=int, default=1000,
                    help="frames per state of the heavy-atom featurization case")
    ap.add_argument("--stats-frames", type=int, default=20_000,
                    help="rows of the in-memory matrix of the statistics case")
    ap.add_argument("--n-bootstrap", type=int, default=200, help="the default bootstrap")
    ap.add_argument("--repeat", type=int, default=3, help="runs per timed case (minimum kept)")
    ap.add_argument("--threads", default="1,2",
                    help="BLAS thread counts to run each case with (e.g. 1 for memory only)")
    ap.add_argument("--out", default=None, help="also write the figures to this JSON file")
    opts = ap.parse_args()
    opts.sizes, opts.heavy_sizes = _ints(opts.sizes), _ints(opts.heavy_sizes)
    opts.threads = _ints(opts.threads)
    blas = [(i["internal_api"], i.get("version"), i["num_threads"]) for i in threadpool_info()
            if i["user_api"] == "blas"]
    cpu = next((ln.split(":", 1)[1].strip() for ln in open("/proc/cpuinfo")
                if ln.startswith("model name")), "?") if os.path.exists("/proc/cpuinfo") else "?"
    print(f"machine: {os.cpu_count()} CPUs, {cpu}; numpy {np.__version__}, mdtraj "
          f"{md.__version__}; BLAS {blas}; load average {os.getloadavg()}", flush=True)
    b = Bench(opts)
    for name in opts.only.split(","):
        print(f"== {name}", flush=True)
        SECTIONS[name](b)
    print(f"load average at the end {os.getloadavg()}")
    if opts.out:
        Path(opts.out).write_text(json.dumps({"figures": b.figures, "runs": [
            {"case": k[0], "threads": k[1], "args": json.loads(k[2]), **v}
            for k, v in b.memo.items()]}, indent=1))


if __name__ == "__main__":
    if len(sys.argv) == 3 and sys.argv[1] == "--child":
        _child_main(sys.argv[2])
    else:
        sys.exit(main())
