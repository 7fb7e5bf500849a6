"""The pass engine (issue 10): any task split, chunk size and arrival order gives the same bytes.

Property tests (hypothesis, seeded) on tiny DCD trajectories written on the fly, with the
atoms' Cartesian coordinates as features, so the direct numpy reference is plain
arithmetic on the coordinates mdtraj loads; plus the reduction tree, the frame keys and the
raw reader on their own.
"""

import tempfile
from pathlib import Path

import mdtraj as md
import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from cvdesign import InputError, Source
from cvdesign.parallel import ProcessExecutor
from cvdesign.passes import (BlockPass, CardPass, CoordinateFeaturizer, FoldMomentsPass, Folds,
                             HistogramPass, LaggedPass, LagGridPass, Leaf, PoolFeaturizer,
                             ScreeningPass, Task, TreeReducer, frame_keys, group_rows,
                             plan_tasks, reference_features, run_pass)
from cvdesign.passes.keys import SegmentLayout
from cvdesign.passes.read import read_chunks
from cvdesign.pool import build_pool
from cvdesign.testbed.host_guest import write_host_guest

SETTINGS = settings(max_examples=30, deadline=None, derandomize=True, database=None,
                    suppress_health_check=[HealthCheck.too_slow])
ATOMS = np.array([0, 2])
N_BINS = 7
CARD_COLUMNS = [5, 0, 3]  # the score card's sums on some features, in another order
GRID = (1, 2, 4)  # lags of the LagGridPass (every segment)


def _topology(n_atoms=3):
    top = md.Topology()
    res = top.add_residue("TOY", top.add_chain())
    for i in range(n_atoms):
        top.add_atom(f"C{i}", md.element.carbon, res)
    return top


def _write(path, xyz, box=None, time=None):
    """Write coordinates (nm) with mdtraj, format from the suffix; `box` as edge lengths."""
    traj = md.Trajectory(np.asarray(xyz, dtype=np.float32), _topology(xyz.shape[1]),
                         time=time)
    if box is not None:
        traj.unitcell_lengths = np.asarray(box, dtype=np.float32)
        traj.unitcell_angles = np.full_like(traj.unitcell_lengths, 90.0)
    traj.save(str(path))
    return str(path)


def _block_sums(z, key):
    """Additive block sums for the tests: rows and column sums (module level: it pickles)."""
    return {"n": np.array([z.shape[0]], dtype=np.float64), "s1": z.sum(axis=0)}


# ---------------------------------------------------------------------------- scenarios
@st.composite
def scenarios(draw):
    segments = []
    for _ in range(draw(st.integers(1, 3))):
        n_file = draw(st.integers(1, 30))
        if draw(st.booleans()):
            labels = draw(st.lists(st.sampled_from([None, "a", "b"]), min_size=n_file,
                                   max_size=n_file))
            if all(x is None for x in labels):
                labels[draw(st.integers(0, n_file - 1))] = "a"
            segments.append({"n": n_file, "labels": labels})
        else:
            start = draw(st.one_of(st.none(), st.integers(0, n_file - 1)))
            stop = draw(st.one_of(st.none(), st.integers((start or 0) + 1, n_file + 4)))
            segments.append({"n": n_file, "state": draw(st.sampled_from(["a", "b"])),
                             "start": start, "stop": stop})
    n = len(segments)
    return {
        "segments": segments,
        "leaf": draw(st.integers(1, 9)),
        "lags": {i: draw(st.one_of(st.none(), st.integers(1, 5))) for i in range(n)},
        "n_folds": draw(st.integers(1, 3)),
        "fold_mode": draw(st.sampled_from(["block", "trajectory"])),
        "block": draw(st.one_of(st.none(), st.integers(1, 7))),
        "chunk": draw(st.integers(1, 13)),
        "within_fold": draw(st.booleans()),
        "within_block": draw(st.booleans()),
        "box": draw(st.booleans()),
        "seed": draw(st.integers(0, 2**31 - 1)),
    }


def _build(sc, tmp):
    """Write the scenario's files; return (source, {path: coordinates as mdtraj loads them})."""
    rng = np.random.default_rng(sc["seed"])
    top = _topology()
    src = Source(top)
    loaded = {}
    for i, seg in enumerate(sc["segments"]):
        xyz = rng.normal(2.0, 0.5, size=(seg["n"], 3, 3))
        box = np.tile([5.0, 6.0, 7.0], (seg["n"], 1)) + rng.uniform(0, 0.1, (seg["n"], 3)) \
            if sc["box"] else None
        path = _write(Path(tmp) / f"s{i}.dcd", xyz, box)
        loaded[path] = md.load(path, top=top)
        if "labels" in seg:
            src.add_labelled(path, seg["labels"])
        else:
            src.add(path, seg["state"], frames=None if seg["start"] is None and seg["stop"] is None
                    else (seg["start"], seg["stop"]))
    return src, loaded


def _folds(sc, src):
    if sc["fold_mode"] == "block":
        return Folds(sc["n_folds"])
    rng = np.random.default_rng(sc["seed"] + 1)
    mapping = {(s, str(seg.path)): int(rng.integers(0, sc["n_folds"]))
               for s in range(src.n_states) for seg in src.segments}
    return Folds(sc["n_folds"], "trajectory", mapping)


def _card_run_means(shift):
    """Run means of the score card's within-run sums: given for segment 0's runs (the others
    fall back to the center)."""
    return {(0, s): shift[CARD_COLUMNS] + 0.25 * (s + 1) for s in (0, 1)}


def _card_pass(sc, featurizer, shift):
    lo, hi = np.full(6, 0.5), np.full(6, 3.5)
    return CardPass(featurizer, center=shift[CARD_COLUMNS], low=lo[CARD_COLUMNS],
                    high=hi[CARD_COLUMNS], n_bins=N_BINS, block_frames=sc["block"],
                    lags=sc["lags"], run_means=_card_run_means(shift), columns=CARD_COLUMNS)


def _passes(sc, src, featurizer, shift):
    folds = _folds(sc, src)
    lo, hi = np.full(6, 0.5), np.full(6, 3.5)
    return (ScreeningPass(featurizer, lags=sc["lags"], shift=shift),
            FoldMomentsPass(featurizer, folds),
            LaggedPass(featurizer, sc["lags"], shift=shift, folds=folds,
                       within_fold=sc["within_fold"]),
            LaggedPass(featurizer, sc["lags"], shift=shift[[4, 1]], diagonal=True,
                       columns=[4, 1]),
            HistogramPass(featurizer, lo, hi, n_bins=N_BINS),
            BlockPass(featurizer, folds=folds, block_frames=sc["block"], lags=sc["lags"],
                      pairs_within_block=sc["within_block"], sums=_block_sums,
                      center=shift, scale=np.full(6, 2.0)),
            _card_pass(sc, featurizer, shift),
            LagGridPass(featurizer, GRID, shift=shift[[2, 5]], columns=[2, 5]))


# ---------------------------------------------------------------------------- direct reference
def _direct_frames(sc, src, loaded):
    """Per segment: (frames, state codes, features) of the frames that belong to a state,
    worked out from the scenario itself (not through the engine's keys)."""
    out = []
    for seg, spec in zip(src.segments, sc["segments"]):
        n = spec["n"]
        if "labels" in spec:
            codes = np.array([-1 if x is None else src.states.index(x) for x in spec["labels"]])
        else:
            codes = np.full(n, -1)
            lo = spec["start"] or 0
            hi = n if spec["stop"] is None else min(spec["stop"], n)
            codes[lo:hi] = src.states.index(spec["state"])
        x = loaded[str(seg.path)].xyz[:, ATOMS].reshape(n, -1).astype(np.float64)
        frames = np.flatnonzero(codes >= 0)
        out.append((frames, codes, x))
    return out


def _direct_keys(sc, src, frames, codes, folds, si):
    """Rank, fold and block of each selected frame, by counting frame after frame."""
    counts = {s: int((codes == s).sum()) for s in range(src.n_states)}
    seen, fold_seen = {}, {}
    rank, fold, block = {}, {}, {}
    for t in frames:
        s = int(codes[t])
        r = seen.get(s, 0)
        seen[s] = r + 1
        if folds.mode == "block":
            k = r * folds.n_folds // counts[s]
        else:
            k = folds.file_fold[(s, str(src.segments[si].path))]
        q = fold_seen.get((s, k), 0)
        fold_seen[(s, k)] = q + 1
        rank[t], fold[t] = r, k
        block[t] = 0 if sc["block"] is None else q // sc["block"]
    return rank, fold, block


def _direct_pairs(frames, codes, lag):
    """Pairs (t, t + lag) with every frame between in the same state."""
    pairs = []
    for t in frames:
        end = t + lag
        if end < codes.size and np.all(codes[t:end + 1] == codes[t]):
            pairs.append((int(t), int(end)))
    return pairs


def _bin_counts(X):
    """Counts of each column of X on N_BINS bins over [0.5, 3.5] (edge bins take the rest)."""
    b = np.clip(np.floor((X - 0.5) / 3.0 * N_BINS).astype(int), 0, N_BINS - 1)
    return np.array([np.bincount(b[:, f], minlength=N_BINS) for f in range(X.shape[1])])


def _close(a, b):
    scale = max(1.0, float(np.max(np.abs(b)))) if np.size(b) else 1.0
    np.testing.assert_allclose(a, b, rtol=1e-12, atol=1e-12 * scale)


def _check_direct(sc, src, loaded, results, shift):
    screen, fold_m, lagged, lagged_diag, hist, blocks, card, grid = results
    folds = _folds(sc, src)
    data = _direct_frames(sc, src, loaded)
    n_states = src.n_states
    all_x = {s: [] for s in range(n_states)}
    by_fold = {}
    runs, runs_diag = {}, {}
    block_rows, block_pairs = {}, {}
    for si, (frames, codes, x) in enumerate(data):
        rank, fold, block = _direct_keys(sc, src, frames, codes, folds, si)
        for t in frames:
            s = int(codes[t])
            all_x[s].append(x[t])
            by_fold.setdefault((s, fold[t]), []).append(x[t])
            block_rows.setdefault((s, fold[t], si, block[t]), []).append(x[t])
            assert screen.segment_counts[si, s] > 0
        lag = sc["lags"][si]
        if lag is None:
            continue
        for t, u in _direct_pairs(frames, codes, lag):
            s = int(codes[t])
            runs_diag.setdefault((si, s, 0), []).append((x[t], x[u]))
            if not sc["within_fold"] or fold[t] == fold[u] or folds.n_folds == 1:
                runs.setdefault((si, s, fold[t]), []).append((x[t], x[u]))
            if fold[t] == fold[u] and (not sc["within_block"] or block[t] == block[u]):
                block_pairs.setdefault((s, fold[t], si, block[t]), []).append((x[t], x[u]))
    # screening: per-state diagonal moments, counts, per-run lagged diagonal sums
    for s in range(n_states):
        X = np.array(all_x[s])
        d = screen.diagonal[s]
        assert d.count == X.shape[0] and screen.segment_counts[:, s].sum() == X.shape[0]
        _close(d.mean, X.mean(axis=0))
        _close(d.m2, ((X - X.mean(axis=0)) ** 2).sum(axis=0))
        assert np.array_equal(d.minimum, X.min(axis=0)) and np.array_equal(d.maximum,
                                                                           X.max(axis=0))
    assert set(screen.lagged) == {key[:2] for key in runs_diag}
    for key, pairs in runs_diag.items():
        m = screen.lagged[key[:2]]
        x0, xt = (np.array(v) - shift for v in zip(*pairs))
        assert m.n_pairs == len(pairs) and m.lag == sc["lags"][key[0]]
        _close(m.sum_x, x0.sum(axis=0))
        _close(m.sum_xy, (x0 * xt).sum(axis=0))
    # fold moments
    for s in range(n_states):
        for k in range(folds.n_folds):
            m = fold_m[s][k]
            X = np.array(by_fold.get((s, k), np.zeros((0, 6))))
            assert m.count == X.shape[0]
            if X.shape[0]:
                _close(m.mean, X.mean(axis=0))
                _close(m.scatter, (X - X.mean(axis=0)).T @ (X - X.mean(axis=0)))
    # lagged moments per (segment, state, fold), full and diagonal (columns 4, 1)
    assert set(lagged.runs) == set(runs)
    for key, pairs in runs.items():
        m = lagged.runs[key]
        x0, xt = (np.array(v) - shift for v in zip(*pairs))
        assert m.n_pairs == len(pairs)
        _close(m.sum_xy, x0.T @ xt)
        _close(m.sum_yy, xt.T @ xt)
    assert set(lagged_diag.runs) == set(runs_diag)
    for key, pairs in runs_diag.items():
        x0, xt = (np.array(v)[:, [4, 1]] - shift[[4, 1]] for v in zip(*pairs))
        _close(lagged_diag.runs[key].sum_xy, (x0 * xt).sum(axis=0))
    merged = lagged.by_fold()
    for k in range(folds.n_folds):
        assert merged[k].n_pairs == sum(len(v) for key, v in runs.items() if key[2] == k)
    # histograms: exact counts
    counts = np.array([_bin_counts(np.array(all_x[s])) for s in range(n_states)])
    assert np.array_equal(hist.counts, counts)
    # bootstrap blocks of standardized values
    z = {key: (np.array(v) - shift) / 2.0 for key, v in block_rows.items()}
    got = {}
    for (s, k), items in blocks.items():
        keys = sorted(key for key in z if key[:2] == (s, k))
        assert len(items) == len(keys)
        got.update(zip(keys, items))
    assert set(got) == set(z)
    for key, (m, lm, sums) in got.items():
        assert m.count == z[key].shape[0] and sums["n"][0] == z[key].shape[0]
        _close(m.mean, z[key].mean(axis=0))
        _close(sums["s1"], z[key].sum(axis=0))
        pairs = block_pairs.get(key, [])
        assert lm.n_pairs == len(pairs)
        if pairs:
            x0, xt = ((np.array(v) - shift) / 2.0 for v in zip(*pairs))
            _close(lm.sum_xy, x0.T @ xt)
    _check_card(sc, src, data, card, shift)
    # the lag grid: per run, at every lag, diagonal sums of the pairs (columns 2, 5)
    for g, lag in enumerate(GRID):
        want = {}
        for si, (frames, codes, x) in enumerate(data):
            for t, u in _direct_pairs(frames, codes, lag):
                want.setdefault((si, int(codes[t]), 0), []).append((x[t], x[u]))
        assert grid[g].diagonal and set(grid[g].runs) == set(want)
        for key, pairs in want.items():
            m = grid[g].runs[key]
            x0, xt = (np.array(v)[:, [2, 5]] - shift[[2, 5]] for v in zip(*pairs))
            assert m.n_pairs == len(pairs) and m.lag == lag
            _close(m.sum_x, x0.sum(axis=0))
            _close(m.sum_yy, (xt * xt).sum(axis=0))
            _close(m.sum_xy, (x0 * xt).sum(axis=0))


def _check_card(sc, src, data, card, shift):
    """The score card's sums per (state, segment, block of rank // block within the run),
    every lagged pair in the block of its first frame, whatever block its second is in."""
    cols, center = CARD_COLUMNS, shift[CARD_COLUMNS]
    means = _card_run_means(shift)
    rows, pairs = {}, {}
    for si, (frames, codes, x) in enumerate(data):
        _, _, block = _direct_keys(sc, src, frames, codes, Folds(1), si)  # one fold: run rank
        for t in frames:
            rows.setdefault((int(codes[t]), si, block[t]), []).append(x[t, cols])
        if sc["lags"][si] is not None:
            for t, u in _direct_pairs(frames, codes, sc["lags"][si]):
                pairs.setdefault((int(codes[t]), si, block[t]), []).append((x[t, cols],
                                                                            x[u, cols]))
    assert card.has_lag
    for s in range(src.n_states):
        keys = sorted(key for key in rows if key[0] == s)
        assert len(card.blocks()[s]) == len(keys)
        for key, got in zip(keys, card.blocks()[s]):
            X = np.array(rows[key])
            assert got["n"] == X.shape[0]
            _close(got["s1"], (X - center).sum(axis=0))
            _close(got["s2"], ((X - center) ** 2).sum(axis=0))
            assert np.array_equal(got["hist"], _bin_counts(X))
            p = pairs.get(key, [])
            assert got["n_pairs"] == len(p)
            x0 = np.array([a for a, _ in p]).reshape(len(p), len(cols))
            xt = np.array([b for _, b in p]).reshape(len(p), len(cols))
            mean = means.get((key[1], s), center)  # run means are keyed (segment, state)
            (a, b), (u, v) = (x0 - center, xt - center), (x0 - mean, xt - mean)
            for name, want in (("sx", a), ("sy", b), ("sxx", a * a), ("sxy", a * b),
                               ("syy", b * b), ("l0", 0.5 * (u * u + v * v)), ("lt", u * v)):
                _close(got[name], want.sum(axis=0))


@SETTINGS
@given(sc=scenarios())
def test_any_task_split_chunk_size_and_arrival_order_gives_identical_results(
        sc, same_for_any_split):
    featurizer = CoordinateFeaturizer(ATOMS)
    with tempfile.TemporaryDirectory() as tmp:
        src, loaded = _build(sc, tmp)
        plan = plan_tasks(src, leaf_frames=sc["leaf"])
        shift = reference_features(plan, featurizer)
        passes = _passes(sc, src, featurizer, shift)
        reference = same_for_any_split(passes, src, plan, sc["seed"] + 2, sc["chunk"])
        _check_direct(sc, src, loaded, reference, shift)


@settings(max_examples=10, deadline=None, derandomize=True, database=None,
          suppress_health_check=[HealthCheck.too_slow])
@given(sc=scenarios())
def test_lag_grid_pass_gives_the_bytes_of_one_diagonal_lagged_pass_per_lag(sc, assert_same):
    featurizer = CoordinateFeaturizer(ATOMS)
    with tempfile.TemporaryDirectory() as tmp:
        src, _ = _build(sc, tmp)
        plan = plan_tasks(src, leaf_frames=sc["leaf"])
        shift = reference_features(plan, featurizer)
        grid = LagGridPass(featurizer, GRID, shift=shift, center=shift, scale=np.full(6, 3.0))
        one = [LaggedPass(featurizer, lag, shift=shift, diagonal=True, center=shift,
                          scale=np.full(6, 3.0)) for lag in GRID]
        results = run_pass((grid, *one), src, tasks=plan, chunk_frames=sc["chunk"])
        assert_same(results[0], list(results[1:]))


@pytest.fixture(scope="module")
def two_processes():
    """Two local worker processes, started once for the module's examples."""
    with ProcessExecutor(2) as ex:
        yield ex


@settings(max_examples=8, deadline=None, derandomize=True, database=None,
          suppress_health_check=[HealthCheck.too_slow])
@given(sc=scenarios())
def test_card_sums_are_identical_serially_and_in_two_processes_for_any_split_and_leaf_size(
        sc, two_processes, assert_same, random_tasks):
    """The score card's block sums (CardPass): one task per segment in this process, and
    random tasks and read chunks in 2 worker processes, give the same bytes (leaf length,
    block length, lags and labels drawn at random; the other executors are in the property
    test above and in test_executors.py)."""
    featurizer = CoordinateFeaturizer(ATOMS)
    with tempfile.TemporaryDirectory() as tmp:
        src, loaded = _build(sc, tmp)
        plan = plan_tasks(src, leaf_frames=sc["leaf"])
        shift = reference_features(plan, featurizer)
        card = _card_pass(sc, featurizer, shift)
        reference = run_pass(card, src, tasks=plan)
        rng = np.random.default_rng(sc["seed"] + 4)
        other = run_pass(card, src, tasks=plan.with_tasks(random_tasks(plan, rng)),
                         executor=two_processes, chunk_frames=sc["chunk"])
        assert_same(reference, other)
        _check_card(sc, src, _direct_frames(sc, src, loaded), reference, shift)


# ---------------------------------------------------------------------------- the tree alone
def _canonical(lo, hi):
    """The tree's value over leaves [lo, hi) built recursively: the order it promises."""
    if hi - lo == 1:
        return "abcdefghijklmnopqrstuvwxyz"[lo]
    half = 1 << ((hi - lo - 1).bit_length() - 1)
    return f"({_canonical(lo, lo + half)}{_canonical(lo + half, hi)})"


@settings(max_examples=60, deadline=None, derandomize=True, database=None)
@given(st.integers(1, 26), st.integers(0, 2**31 - 1))
def test_tree_root_is_the_fixed_balanced_merge_whatever_the_split_and_order(n, seed):
    rng = np.random.default_rng(seed)
    merge = lambda a, b: f"({a}{b})"  # noqa: E731 - not associative: order shows
    cuts = sorted(rng.choice(np.arange(1, n), size=rng.integers(0, n), replace=False).tolist()) \
        if n > 1 else []
    edges = [0, *cuts, n]
    nodes = []
    for a, b in zip(edges[:-1], edges[1:]):  # each task reduces its own leaves
        task = TreeReducer(n, merge)
        for k in range(a, b):
            task.add(0, k, "abcdefghijklmnopqrstuvwxyz"[k])
        nodes += task.nodes()
    root = TreeReducer(n, merge)
    for i in rng.permutation(len(nodes)):
        if not root.done:
            root.add(*nodes[i])
    # a power-of-two-aligned tree: the left part of any node is a full power of two
    assert root.done and root.root == _canonical(0, n)


@settings(max_examples=80, deadline=None, derandomize=True, database=None)
@given(st.integers(0, 40), st.integers(1, 3), st.integers(0, 2**31 - 1))
def test_group_rows_gives_each_key_tuple_in_order_with_its_rows(n, n_keys, seed):
    # reference by plain Python: distinct key tuples sorted, each with its rows in order
    rng = np.random.default_rng(seed)
    keys = [rng.integers(-3, int(rng.integers(1, 6)), n) for _ in range(n_keys)]
    if n and rng.random() < 0.3:
        keys = [np.full(n, int(k[0])) for k in keys]  # one group
    want = {}
    for r in range(n):
        want.setdefault(tuple(int(k[r]) for k in keys), []).append(r)
    got = group_rows(*keys)
    assert [key for key, _ in got] == sorted(want)
    assert all(rows.tolist() == want[key] for key, rows in got)


def test_tree_refuses_a_node_given_twice():
    tree = TreeReducer(4, lambda a, b: a + b)
    tree.add(0, 0, 1)
    with pytest.raises(ValueError, match=r"node \(0, 0\) was added twice"):
        tree.add(0, 0, 1)


# ---------------------------------------------------------------------------- frame keys
@settings(max_examples=40, deadline=None, derandomize=True, database=None)
@given(st.lists(st.sampled_from([-1, 0, 1, 2]), min_size=1, max_size=60), st.integers(1, 4),
       st.integers(1, 9))
def test_frame_keys_of_a_labelled_file_match_counting_frame_by_frame(codes, n_folds, block):
    codes = np.array(codes)
    lay = SegmentLayout.from_codes(0, "run.xtc", codes, 3)
    frames = np.flatnonzero(codes >= 0)
    keys = frame_keys(lay, frames, folds=Folds(n_folds), block_frames=block)
    seen, in_fold = {}, {}
    for i, t in enumerate(frames):
        s = int(codes[t])
        r = seen.get(s, 0)
        seen[s] = r + 1
        k = r * n_folds // int((codes == s).sum())
        q = in_fold.get((s, k), 0)
        in_fold[(s, k)] = q + 1
        assert (keys.states[i], keys.rank[i], keys.fold[i], keys.block[i]) == (s, r, k, q // block)
        run_end = t
        while run_end < codes.size and codes[run_end] == s:
            run_end += 1
        assert lay.run_end_of([t])[0] == run_end
    # a window of the layout (what a worker gets) gives the same keys for its frames
    win = lay.window(codes.size // 3, codes.size)
    inside = frames[frames >= codes.size // 3]
    part = frame_keys(win, inside, folds=Folds(n_folds), block_frames=block)
    assert np.array_equal(part.block, keys.block[frames >= codes.size // 3])


def test_folds_plan_by_trajectory_when_every_state_has_enough_files_else_by_block():
    lays = [SegmentLayout.plain(i, f"{i}.xtc", 30, 0, 30, i % 2, 2) for i in range(4)]
    f = Folds.plan(lays, 3)
    assert (f.mode, f.n_folds) == ("trajectory", 2)
    assert f.file_fold == {(0, "0.xtc"): 0, (0, "2.xtc"): 1, (1, "1.xtc"): 0, (1, "3.xtc"): 1}
    f = Folds.plan(lays[:2], 3)
    assert (f.mode, f.n_folds) == ("block", 3)
    with pytest.raises(InputError, match=r"state 'closed' has only 15 frames; held-out scoring "
                                         r"needs at least 20 per state"):
        Folds.plan([SegmentLayout.plain(0, "a.xtc", 15, 0, 15, 0, 1)], 4, state_names=["closed"])


# ---------------------------------------------------------------------------- the reader
@pytest.mark.filterwarnings("ignore:.*netCDF4:UserWarning")  # mdtraj: scipy's reader is used
@pytest.mark.parametrize("suffix", [".xtc", ".dcd", ".trr", ".nc", ".pdb"])
@pytest.mark.parametrize("atoms", [[1, 3], [0, 1, 2, 3]])  # some atoms; every atom (whole frames)
def test_raw_reader_returns_what_mdtraj_load_returns(tmp_path, suffix, atoms):
    rng = np.random.default_rng(5)
    xyz = rng.normal(2.0, 0.4, size=(11, 4, 3))
    path = _write(tmp_path / f"t{suffix}", xyz, box=np.tile([3.0, 3.5, 4.0], (11, 1)),
                  time=0.5 * np.arange(11))
    ref = md.load(path, top=_topology(4))
    atoms = np.array(atoms)
    chunks = list(read_chunks(path, 2, 9, atoms, _topology(4), chunk_frames=3))
    assert np.concatenate([c.frames for c in chunks]).tolist() == list(range(2, 9))
    assert max(c.frames.size for c in chunks) <= 3
    xyz_got = np.concatenate([c.trajectory.xyz for c in chunks])
    assert np.array_equal(xyz_got, ref.xyz[2:9][:, atoms])
    box = np.concatenate([c.trajectory.unitcell_vectors for c in chunks])
    np.testing.assert_allclose(box, ref.unitcell_vectors[2:9], rtol=1e-6)
    if suffix in (".xtc", ".trr", ".nc"):
        np.testing.assert_allclose(np.concatenate([c.time for c in chunks]), ref.time[2:9])
    else:
        assert chunks[0].time is None


def test_engine_reads_the_same_frames_as_source_iter_chunks(demo_files):
    top, states = demo_files
    src = Source(top)
    src.add(states["closed"][0], "closed", frames=(100, 900))
    src.add(states["open"][0], "open", frames=(1500, 5000))  # beyond the end: clipped
    src.add(states["open"][1], "open", frames=(3000, None))  # starts after the end: no frame
    pool = build_pool(src)
    featurizer = PoolFeaturizer(pool)
    res = run_pass(ScreeningPass(featurizer), src)
    rows = {0: [], 1: []}
    counts = np.zeros((3, 2), dtype=np.int64)
    for chunk in src.iter_chunks(atom_indices=featurizer.atom_indices):
        x = pool.features(chunk.trajectory, atom_indices=featurizer.atom_indices)
        for s in (0, 1):
            rows[s].append(x[chunk.states == s])
            counts[chunk.segment_index, s] += int((chunk.states == s).sum())
    assert np.array_equal(res.segment_counts, counts)
    assert counts.tolist() == [[800, 0], [0, 500], [0, 0]]
    for s in (0, 1):
        X = np.concatenate(rows[s])
        _close(res.diagonal[s].mean, X.mean(axis=0))
        _close(res.diagonal[s].m2, ((X - X.mean(axis=0)) ** 2).sum(axis=0))


def _bad_source(tmp_path, *, nan=False, box=False):
    rng = np.random.default_rng(11)
    good = rng.normal(2.0, 0.4, size=(12, 3, 3))
    xyz = rng.normal(2.0, 0.4, size=(12, 3, 3))
    lengths = np.tile([4.0, 4.0, 4.0], (12, 1))
    if nan:
        xyz[7, 2, 1] = np.nan
    if box:
        lengths[9] = [4.0, np.nan, 4.0]
    src = Source(_topology())
    src.add(_write(tmp_path / "ok.dcd", good), "a")
    src.add(_write(tmp_path / "bad.dcd", xyz, box=lengths), "b")
    return src


def test_a_non_finite_coordinate_is_refused_naming_file_frame_and_atom(tmp_path):
    src = _bad_source(tmp_path, nan=True)
    before = sorted(p.name for p in tmp_path.iterdir())
    with pytest.raises(InputError, match=r"trajectory '.*bad.dcd' frame 7 has a NaN or infinite "
                                         r"coordinate for atom 2 \(TOY0-C2\)"):
        run_pass(ScreeningPass(CoordinateFeaturizer([0, 2])), src,
                 tasks=plan_tasks(src, leaf_frames=4, frames_per_task=4))
    assert sorted(p.name for p in tmp_path.iterdir()) == before


def test_an_invalid_periodic_box_is_refused_naming_file_and_frame(tmp_path):
    src = _bad_source(tmp_path, box=True)
    with pytest.raises(InputError, match=r"trajectory '.*bad.dcd' frame 9 has an invalid "
                                         r"periodic box"):
        run_pass(ScreeningPass(CoordinateFeaturizer([0, 2])), src)


@pytest.mark.parametrize("n_labels, message", [
    (13, r"trajectory '.*run.dcd' has 12 frames but 13 labels were given; give one label per "
         r"frame"),
    (11, r"trajectory '.*run.dcd' has more frames than its 11 labels; give one label per frame"),
])
def test_a_label_array_of_another_length_than_its_file_is_refused(tmp_path, n_labels, message):
    path = _write(tmp_path / "run.dcd", np.zeros((12, 3, 3)) + 1.0)
    src = Source.from_labels(_topology(), path, ["a"] * n_labels)
    with pytest.raises(InputError, match=message):
        plan_tasks(src)


def test_frames_without_a_label_are_neither_read_into_statistics_nor_checked(tmp_path):
    rng = np.random.default_rng(3)
    xyz = rng.normal(2.0, 0.4, size=(10, 3, 3))
    xyz[4, 0, 0] = np.nan  # unlabelled frame: skipped before the checks, as iter_chunks does
    path = _write(tmp_path / "run.dcd", xyz)
    labels = ["a", "a", "b", "b", None, "a", "a", "a", "b", "b"]
    src = Source.from_labels(_topology(), path, labels)
    res = run_pass(ScreeningPass(CoordinateFeaturizer([0, 1]), lags=1), src,
                   tasks=plan_tasks(src, leaf_frames=3))
    assert res.segment_counts.tolist() == [[5, 4]]
    # pairs within runs only: (0,1), (2,3), (5,6), (6,7), (8,9)
    assert {k: m.n_pairs for k, m in res.lagged.items()} == {(0, 0): 3, (0, 1): 2}


def test_plan_tasks_splits_segments_into_leaf_aligned_tasks(demo_files):
    top, states = demo_files
    src = Source(top)
    src.add(states["closed"][0], "closed", frames=(100, 1000))
    plan = plan_tasks(src, leaf_frames=256, frames_per_task=512)
    assert [(t.leaf_start, t.leaf_stop) for t in plan.tasks] == [(0, 2), (2, 4)]
    assert [plan.task_frames(t) for t in plan.tasks] == [(100, 512), (512, 1000)]
    with pytest.raises(ValueError, match="tasks of segment 0 leave a gap or overlap at leaf 2"):
        plan.with_tasks([Task(0, 0, 2), Task(0, 3, 4)])
    with pytest.raises(InputError, match=r"leaf_frames=0 must be a positive number of frames"):
        plan_tasks(src, leaf_frames=0)


def test_residue_group_features_in_a_periodic_box_give_identical_results_for_any_split(
        tmp_path, assert_same, shuffled_executor):
    write_host_guest(tmp_path, n_runs=2, n_frames=200, tumble=True, box_nm=4.0)
    runs = sorted(str(p) for p in tmp_path.glob("*.xtc"))
    src = Source.from_states(str(tmp_path / "host_guest.pdb"), {"a": runs[:1], "b": runs[1:]})
    pool = build_pool(src, kinds=("center_distance", "coordination", "distance"), cutoff=3.0)
    assert {d.kind for d in pool.descriptors} == {"center_distance", "coordination", "distance"}
    featurizer = PoolFeaturizer(pool)
    passes = (ScreeningPass(featurizer, lags=3), FoldMomentsPass(featurizer, Folds(2)),
              LaggedPass(featurizer, 3, folds=Folds(2)))
    plan = plan_tasks(src, leaf_frames=16)
    reference = run_pass(passes, src, tasks=plan)
    other = run_pass(passes, src, tasks=plan.split(frames_per_task=48), chunk_frames=7,
                     executor=shuffled_executor(1))
    assert_same(reference, other)
    assert reference[0].min_box_height == pytest.approx(4.0)


# ------------------------------------------- transition pairs: along whole crossing runs
def _direct_transition_pairs(n, lag, n_folds, clock=None):
    """Pairs (t, u, fold) along every frame of a file (states ignored: pairs span state
    changes and unlabelled frames), both frames in one contiguous fold ``f * n_folds // n``;
    ``u = t + lag``, or in rescaled time the frame after t closest to clock[t] + lag among
    those up to the first that reaches it (a tie: the later one)."""
    out = []
    for t in range(n):
        if clock is None:
            u = t + lag
        else:
            reach = [f for f in range(t + 1, n) if clock[f] >= clock[t] + lag]
            if not reach:
                continue
            u = reach[0]
            if u - 1 > t and clock[t] + lag - clock[u - 1] < clock[u] - clock[t] - lag:
                u -= 1
        if u < n and t * n_folds // n == u * n_folds // n:
            out.append((t, u, t * n_folds // n))
    return out


@settings(max_examples=20, deadline=None, derandomize=True, database=None,
          suppress_health_check=[HealthCheck.too_slow])
@given(sc=scenarios(), biased=st.booleans())
def test_transition_pairs_span_state_changes_and_give_the_same_bytes_for_any_split(
        sc, biased, same_for_any_split):
    """The crossing runs as states of their own (Source.runs_as_states): LaggedPass pairs
    every frame of the file, the unlabelled frames and state changes included, weighted and
    in rescaled time when biased; the same bytes for any split, chunk size and order, and
    the sums of a direct computation."""
    import dataclasses

    featurizer = CoordinateFeaturizer(ATOMS)
    with tempfile.TemporaryDirectory() as tmp:
        src, loaded = _build(sc, tmp)
        runs = src.crossing_runs()
        if not runs:
            return
        rng = np.random.default_rng(sc["seed"] + 4)
        kt = 0.0083144626181532 * 300.0
        if biased:
            src.temperature = 300.0
            for si in runs:
                seg = src.segments[si]
                src.segments[si] = dataclasses.replace(
                    seg, bias=rng.uniform(0.0, 3.0, seg.labels.shape[0]) * kt,
                    bias_path=Path(tmp) / f"{si}.bias")
        tsrc = src.runs_as_states(runs, [f"run {i}" for i in range(len(runs))])
        plan = plan_tasks(tsrc, leaf_frames=sc["leaf"])
        lags = {i: sc["lags"][si] for i, si in enumerate(runs)}
        shift = reference_features(plan, featurizer)
        result = same_for_any_split(
            LaggedPass(featurizer, lags, shift=shift, folds=Folds(sc["n_folds"])), tsrc, plan,
            sc["seed"] + 3, sc["chunk"])
        want = {}
        for i, si in enumerate(runs):
            seg = src.segments[si]
            x = loaded[str(seg.path)].xyz[:, ATOMS].reshape(seg.labels.shape[0], -1)
            n = x.shape[0]
            if lags[i] is None:
                continue
            clock = w = None
            if biased:
                e = np.exp(seg.bias / kt)
                clock, w = np.concatenate([[0.0], np.cumsum(e)])[:n], e / e.mean()
            for t, u, k in _direct_transition_pairs(n, lags[i], sc["n_folds"], clock):
                want.setdefault((i, i, k), []).append((x[t], x[u], 1.0 if w is None else w[t]))
        assert set(result.runs) == set(want)
        for key, pairs in want.items():
            m = result.runs[key]
            x0, xt = (np.array(v) - shift for v in list(zip(*pairs))[:2])
            wt = np.array([p[2] for p in pairs])
            assert m.n_pairs == len(pairs)
            _close(m.count, wt.sum())
            _close(m.sum_xy, (wt[:, None] * x0).T @ xt)
            _close(m.sum_yy, (wt[:, None] * xt).T @ xt)


def test_a_leaf_given_as_row_blocks_gives_the_bytes_of_its_joined_window():
    # the engine hands a leaf whose window spans two read chunks over as row blocks; the
    # rows, the window and a subset of its columns must be the same bytes as when joined
    rng = np.random.default_rng(11)
    x = rng.normal(size=(30, 7))
    frames = np.arange(100, 130)
    lay = SegmentLayout.plain(0, "memory", 200, 0, 200, 0, 1)
    cols = np.array([5, 0, 3])
    for n, cut in ((12, 20), (12, 5), (12, 12)):  # leaf rows in the first block, or not
        whole = Leaf(0, 3, lay, 1, frames, np.zeros(30, np.int64), x, None, None, n)
        split = Leaf(0, 3, lay, 1, frames, np.zeros(30, np.int64), [x[:cut], x[cut:]], None,
                     None, n)
        assert split.x.tobytes() == whole.x.tobytes() and split.x.flags.c_contiguous
        assert (cut >= n) == np.shares_memory(split.x, x)  # a view when in one block
        assert split.window_columns(cols).tobytes() == whole.window_columns(cols).tobytes()
        assert split.window_x.tobytes() == x.tobytes()
        assert split.window_columns(cols).tobytes() == x[:, cols].tobytes()
