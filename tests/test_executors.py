"""Executors of the pass engine (issue 10): the same bytes serially, in local processes and on
Dask; a clear error when the scheduler cannot be reached or a worker dies."""

import csv
import os
import pickle
import socket
import subprocess
import sys
import tempfile
from pathlib import Path

import mdtraj as md
import numpy as np
import pytest

import cvdesign
from cvdesign import InputError, Source, suggest
from cvdesign.errors import SchedulerUnreachableError, WorkerLostError
from cvdesign.parallel import DaskExecutor, ProcessExecutor, SerialExecutor, as_executor
from cvdesign.parallel.executors import WORKER_PRELOAD, Executor
from cvdesign.passes import (BlockPass, CardPass, CoordinateFeaturizer, Featurizer,
                             FoldMomentsPass, Folds, HistogramPass, LaggedPass, LagGridPass,
                             PoolFeaturizer, ProjectionRangePass, ScreeningPass, leaf_frames_for,
                             plan_tasks, reference_features, run_pass)
from cvdesign.io.source import select_atoms
from cvdesign.pool import build_pool, candidate_pairs
from cvdesign.pool.candidates import _PairDistances, _strided_state_means
from cvdesign.progress import using_display


def block_sums(z, key):
    """Additive block sums (module level, so that worker processes can load it)."""
    return {"n": np.array([z.shape[0]], dtype=np.float64), "s2": (z * z).sum(axis=0)}


class DyingFeaturizer(Featurizer):
    """A featurizer whose worker process exits on its second chunk: a worker dying mid-run."""

    def __init__(self, inner):
        self.inner = inner
        self.atom_indices = inner.atom_indices
        self.n_features = inner.n_features

    def __call__(self, trajectory):
        calls = int(os.environ.get("CVDESIGN_TEST_CALLS", "0")) + 1
        os.environ["CVDESIGN_TEST_CALLS"] = str(calls)
        if calls >= 2:
            os._exit(3)
        return self.inner(trajectory)


def _source(demo_files, frames=None):
    top, states = demo_files
    src = Source(top)
    for name, files in states.items():
        for f in files[:2]:
            src.add(f, name, frames=frames)
    return src


def _passes(src):
    """Every concrete pass, sharing the demo pool's featurizer; and the fold assignment."""
    featurizer = PoolFeaturizer(build_pool(src))
    plan = plan_tasks(src, leaf_frames=leaf_frames_for(featurizer.n_features))  # run_pass's
    shift = reference_features(plan, featurizer)
    folds = Folds.plan(plan.layouts, 4)
    p = featurizer.n_features
    cols = np.arange(0, p, 3)
    lags = {0: 5, 1: 5, 2: 3, 3: 3}
    return plan, (ScreeningPass(featurizer, lags=lags, shift=shift),
                  FoldMomentsPass(featurizer, folds, columns=cols),
                  LaggedPass(featurizer, lags, shift=shift[cols], folds=folds, columns=cols),
                  HistogramPass(featurizer, np.full(p, -1.0), np.full(p, 2.0), n_bins=20),
                  BlockPass(featurizer, folds=folds, block_frames=40, lags=lags, columns=cols,
                            center=shift[cols], sums=block_sums),
                  CardPass(featurizer, center=shift[cols], low=np.full(cols.size, -1.0),
                           high=np.full(cols.size, 2.0), n_bins=20, block_frames=40, lags=lags,
                           run_means={(0, 0): shift[cols] + 0.1}, columns=cols),
                  LagGridPass(featurizer, (1, 3, 7), shift=shift[cols], columns=cols),
                  ProjectionRangePass(featurizer,
                                      [(np.arange(cols.size), np.linspace(-1, 1, cols.size)),
                                       ([2, 0], [0.5, 3.0])], columns=cols, center=shift[cols]))


@pytest.fixture(scope="module", autouse=True)
def _short_leaves(short_leaves_module):
    """Several leaves per test file (see conftest's ``short_leaves``)."""


@pytest.fixture(autouse=True)
def _private_tempdir(tmp_path_factory, monkeypatch):
    """Each test's own temporary directory for the pickled contexts: other runs sharing the
    machine's /tmp would otherwise add or remove files the leftover checks count."""
    monkeypatch.setattr(tempfile, "tempdir", str(tmp_path_factory.mktemp("tempdir")))


def _leftover_contexts():
    return sorted(Path(tempfile.gettempdir()).glob("cvdesign-pass-*"))


@pytest.fixture(scope="module")
def demo_reference(demo_files):
    """The demo's passes run serially in one task per segment."""
    src = _source(demo_files)
    plan, passes = _passes(src)
    return src, plan, passes, run_pass(passes, src, tasks=plan)


@pytest.fixture(scope="module")
def dask_threads():
    """A Dask LocalCluster with two threaded workers (fast: no processes)."""
    distributed = pytest.importorskip("distributed")
    with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=False,
                                  dashboard_address=":0") as cluster, \
            distributed.Client(cluster) as client:
        yield client


def _frames(plan):
    return int(plan.segment_counts().sum())


def test_local_processes_give_the_bytes_of_the_serial_run(demo_reference, assert_same,
                                                          progress_recorder):
    src, plan, passes, reference = demo_reference
    before = _leftover_contexts()
    split = plan.split(frames_per_task=640)
    with ProcessExecutor(2) as ex:
        other = run_pass(passes, src, executor=ex, tasks=split, chunk_frames=97)
        with using_display(progress_recorder):  # watching changes nothing
            again = run_pass(passes, src, executor=ex, label="test")  # 4 tasks per worker
    assert_same(reference, other)
    assert_same(reference, again)
    assert _leftover_contexts() == before
    # the parent sees the workers' tasks complete: every frame counted once, task by task
    (shown,) = progress_recorder.bars
    assert (shown.label, shown.total, shown.unit) == ("test", _frames(plan), "frames")
    tasks = plan.for_features(passes[0].featurizer.n_features, 2).tasks  # run_pass's split
    assert shown.count == shown.total and 1 < len(shown.updates) <= len(tasks) and shown.closed


def test_progress_counts_every_frame_once_whatever_runs_the_tasks(
        demo_reference, dask_threads, shuffled_executor, progress_recorder, assert_same):
    src, plan, passes, reference = demo_reference
    with using_display(progress_recorder):
        serial = run_pass(passes, src, tasks=plan, label="serial")
        shuffled = run_pass(passes, src, executor=shuffled_executor(3),
                            tasks=plan.split(n_tasks=9), label="shuffled")
        dask = run_pass(passes, src, executor=DaskExecutor(dask_threads),
                        tasks=plan.split(n_tasks=7), label="dask")
    for result in (serial, shuffled, dask):
        assert_same(reference, result)
    total = _frames(plan)
    by_label = {b.label: b for b in progress_recorder.bars}
    assert list(by_label) == ["serial", "shuffled", "dask"]
    for b in by_label.values():
        assert b.total == total and b.count == total and b.closed
    # in this process leaf by leaf (smooth for one task per file), elsewhere task by task
    # (a Dask worker thread never reaches the bar)
    leaves = sum(len(plan.leaves(si)) for si in range(plan.n_segments))
    assert len(by_label["serial"].updates) == leaves > len(plan.tasks)
    assert len(by_label["shuffled"].updates) <= len(plan.split(n_tasks=9).tasks)
    assert len(by_label["dask"].updates) <= len(plan.split(n_tasks=7).tasks)


def test_dask_threaded_cluster_gives_the_bytes_of_the_serial_run(demo_reference, dask_threads,
                                                                 assert_same):
    src, plan, passes, reference = demo_reference
    other = run_pass(passes, src, executor=DaskExecutor(dask_threads),
                     tasks=plan.split(n_tasks=7), chunk_frames=50)
    assert_same(reference, other)
    # a client passed as it is works too (wrapped by as_executor)
    assert_same(reference, run_pass(passes, src, executor=dask_threads, tasks=plan))


def test_dask_worker_processes_give_the_bytes_of_the_serial_run(demo_files, assert_same):
    distributed = pytest.importorskip("distributed")
    src = _source(demo_files, frames=(0, 300))
    plan, passes = _passes(src)
    reference = run_pass(passes, src, tasks=plan)
    with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True,
                                  dashboard_address=":0") as cluster, \
            distributed.Client(cluster) as client:
        other = run_pass(passes, src, executor=DaskExecutor(client),
                         tasks=plan.split(frames_per_task=256))
    assert_same(reference, other)


def test_bad_input_found_by_a_dask_task_reaches_the_caller_unchanged(dask_threads, tmp_path):
    top = md.Topology()
    res = top.add_residue("TOY", top.add_chain())
    for i in range(3):
        top.add_atom(f"C{i}", md.element.carbon, res)
    xyz = np.random.default_rng(4).normal(2.0, 0.3, size=(40, 3, 3)).astype(np.float32)
    xyz[33, 1, 2] = np.inf
    md.Trajectory(xyz, top).save_dcd(str(tmp_path / "run.dcd"))
    src = Source(top)
    src.add(str(tmp_path / "run.dcd"), "a")
    with pytest.raises(InputError, match=r"trajectory '.*run.dcd' frame 33 has a NaN or "
                                         r"infinite coordinate for atom 1 \(TOY0-C1\)"):
        run_pass(ScreeningPass(CoordinateFeaturizer([0, 1])), src,
                 executor=DaskExecutor(dask_threads),
                 tasks=plan_tasks(src, leaf_frames=8, frames_per_task=8))
    assert sorted(p.name for p in tmp_path.iterdir()) == ["run.dcd"]


def test_serial_executor_runs_in_order_and_as_executor_maps_its_arguments():
    assert list(SerialExecutor().run(lambda ctx, x: ctx + x, 1, [1, 2, 3])) == \
        [(0, 2), (1, 3), (2, 4)]
    assert isinstance(as_executor(None), SerialExecutor)
    ex = as_executor(2)
    assert isinstance(ex, ProcessExecutor) and ex.n_workers == 2
    with pytest.raises(ValueError, match=r"n_workers=0 must be a positive number of processes"):
        ProcessExecutor(0)


def test_started_local_workers_run_the_next_tasks_and_stop_at_close(demo_reference,
                                                                    assert_same):
    src, plan, passes, reference = demo_reference
    ex = ProcessExecutor(2)
    ex.start()  # returns at once: a thread starts the workers (the fork server's imports)
    assert ex._starting is not None
    ex.start()  # a second call starts nothing more
    assert_same(reference, run_pass(passes, src, executor=ex, tasks=plan.split(n_tasks=4)))
    started = ex._pool
    assert started is not None and ex._starting is None  # the run took the started pool
    assert_same(reference, run_pass(passes, src, executor=ex, tasks=plan.split(n_tasks=3)))
    assert ex._pool is started  # the next run used the same workers
    ex.close()
    assert ex._pool is None
    closed = ProcessExecutor(2)
    closed.start()
    closed.close()  # closing while the workers start waits for them, then stops them
    assert closed._pool is None and closed._starting is None
    SerialExecutor().start()  # nothing to start


class _PicklingExecutor(Executor):
    """Runs every task in this process on an unpickled copy of the context, keeping the
    pickled contexts: what local worker processes would receive."""

    n_workers = 2

    def __init__(self):
        self.contexts = []

    def run(self, fn, context, items):
        data = pickle.dumps(context, protocol=pickle.HIGHEST_PROTOCOL)
        self.contexts.append(data)
        for i, item in enumerate(items):
            yield i, fn(pickle.loads(data), item)


def _fresh_python(script):
    """Standard output of `script` run by a new interpreter (from the repository's root)."""
    return subprocess.run([sys.executable, "-c", script], capture_output=True, text=True,
                          check=True, cwd=str(Path(__file__).resolve().parents[1])).stdout


def test_workers_unpickle_every_task_of_suggest_from_the_preloaded_modules(demo_files,
                                                                          tmp_path):
    """A worker forked by the fork server has WORKER_PRELOAD's modules; a task whose context
    needs another module of cvdesign (or scikit-learn, pandas) would import it in every
    worker on the way (about half a second each with the pipeline's imports)."""
    top, states = demo_files
    src = Source.from_states(top, {k: v[:1] for k, v in states.items()})
    ex = _PicklingExecutor()
    suggest(src, n_bootstrap=20, max_terms=2, n_suggestions=2, executor=ex)
    assert len(ex.contexts) >= 4  # prefilter, screening, statistics, held-out, checksums
    paths = []
    for k, data in enumerate(ex.contexts):
        path = tmp_path / f"context-{k}.pkl"
        path.write_bytes(data)
        paths.append(str(path))
    preload = [m for m in WORKER_PRELOAD if m != "__main__"]
    script = (
        "import importlib, pickle, sys\n"
        f"for m in {preload!r}:\n"
        "    importlib.import_module(m)\n"
        "before = set(sys.modules)\n"
        f"for p in {paths!r}:\n"
        "    pickle.loads(open(p, 'rb').read())\n"
        "new = sorted(m for m in set(sys.modules) - before\n"
        "             if m.split('.')[0] in ('cvdesign', 'sklearn', 'pandas'))\n"
        "print(repr(new))\n")
    out = _fresh_python(script)
    assert out.strip() == "[]", out


def test_importing_cvdesign_and_its_pass_engine_does_not_import_the_pipeline():
    """``import cvdesign`` is lazy (its public names load on first use), so a worker that
    needs the pass engine does not pull in scikit-learn, pandas or the pipeline."""
    script = ("import sys, cvdesign, cvdesign.passes, cvdesign.pool\n"
              "heavy = sorted(m for m in ('sklearn', 'pandas', 'cvdesign.pipeline.suggest',\n"
              "                           'cvdesign.fit') if m in sys.modules)\n"
              "print(repr(heavy))\n"
              "from cvdesign import suggest, LDA, Source, Spec\n"
              "print(all(hasattr(cvdesign, n) for n in cvdesign.__all__),\n"
              "      'suggest' in dir(cvdesign), 'sklearn' in sys.modules)\n")
    out = _fresh_python(script)
    assert out.split("\n")[:2] == ["[]", "True True True"], out
    with pytest.raises(AttributeError, match="module 'cvdesign' has no attribute 'nothing'"):
        getattr(cvdesign, "nothing")


def test_importing_suggest_does_not_import_scikit_learn_until_an_estimator_is_used():
    """``from cvdesign import suggest`` stays free of scikit-learn (about 0.65 s of imports):
    the searches use the estimator-free functions of ``cvdesign.fit`` (``directions``,
    ``slowmodes``), and LDA, HLDA and TICA load on first use. It matters at two start-ups:
    a user's script that imports ``suggest`` at its top and runs with local workers
    (``executor=2``) imports it again in each worker (the fork server and ``spawn`` run
    the main module there) before the first task; and every ``cvdesign suggest`` command.
    The estimators are still there, from where they always were."""
    script = ("import sys\n"
              "from cvdesign import suggest\n"
              "from cvdesign.fit import rayleigh_quotient, timescales_from_eigenvalues\n"
              "from cvdesign.search.objectives import slow_direction\n"
              "print('sklearn' in sys.modules)\n"
              "import cvdesign, cvdesign.fit, cvdesign.fit.discriminant, cvdesign.fit.tica\n"
              "from cvdesign.fit import LDA, TICA\n"
              "print('sklearn' in sys.modules,\n"
              "      LDA is cvdesign.LDA is cvdesign.fit.discriminant.LDA,\n"
              "      TICA.__module__, cvdesign.fit.HLDA.__module__,\n"
              "      'TICA' in dir(cvdesign.fit))\n")
    out = _fresh_python(script)
    assert out.split("\n")[:2] == [
        "False", "True True cvdesign.fit.tica cvdesign.fit.discriminant True"], out
    import cvdesign.fit

    with pytest.raises(AttributeError, match="module 'cvdesign.fit' has no attribute 'LDB'"):
        getattr(cvdesign.fit, "LDB")


def test_the_suggest_command_does_not_import_scikit_learn(demo_files, tmp_path):
    """The whole ``cvdesign suggest`` command (the search with objective ``slow``, whose
    slowest directions are TICA's, and the report) runs without scikit-learn: its start-up
    does not pay for importing it."""
    top, states = demo_files
    argv = ["-q", "suggest", "--topology", top, "--out", str(tmp_path / "out"),
            "--objective", "slow", "--lag", "1", "--bootstrap", "0", "--max-terms", "2",
            "--suggestions", "2"]
    for name, files in sorted(states.items()):
        argv += ["--state", name, files[0]]
    script = ("import sys\n"
              "from cvdesign.cli import main\n"
              f"rc = main({argv!r})\n"
              "print(rc, 'sklearn' in sys.modules,\n"
              "      'cvdesign.search.objectives' in sys.modules)\n")
    out = _fresh_python(script)
    assert out.strip().split("\n")[-1] == "0 False True", out
    assert (tmp_path / "out" / "ranking.json").is_file()
    assert (tmp_path / "out" / "report.html").is_file()


def test_the_bootstrap_intervals_do_not_import_scipy_stats(demo_files, tmp_path):
    """The score card's intervals of integrated times need one normal quantile: it comes
    from ``scipy.special.ndtri`` (the same value as ``scipy.stats.norm.ppf``), since
    importing ``scipy.stats`` alone took about 0.5 s of a bootstrapped ``suggest``."""
    top, states = demo_files
    argv = ["-q", "suggest", "--topology", top, "--out", str(tmp_path / "out"),
            "--lag", "1", "--bootstrap", "20", "--max-terms", "1", "--suggestions", "1",
            "--no-report"]
    for name, files in sorted(states.items()):
        argv += ["--state", name, files[0]]
    script = ("import sys\n"
              "from cvdesign.cli import main\n"
              f"rc = main({argv!r})\n"
              "print(rc, 'scipy.stats' in sys.modules, 'scipy.special' in sys.modules)\n")
    out = _fresh_python(script)
    assert out.strip().split("\n")[-1] == "0 False True", out
    with open(tmp_path / "out" / "scorecard.csv", newline="") as fh:
        first = next(csv.DictReader(fh))
    low, tau, high = (float(first[k]) for k in ("integrated_time_ci_low_ps",
                                                "integrated_time_ps",
                                                "integrated_time_ci_high_ps"))
    assert 0 < low < tau < high


def test_the_worker_preload_imports_neither_scipy_nor_networkx():
    """The fork server imports WORKER_PRELOAD before the first worker starts, while suggest
    waits: SciPy (about 0.15 s, once needed for one BLAS call of the moments' merge) and
    networkx (the bond graph and the redundancy graph, used in this process only) stay out
    of it."""
    script = ("import importlib, sys\n"
              f"for m in {list(WORKER_PRELOAD)!r}:\n"
              "    importlib.import_module(m)\n"
              "print(repr(sorted(m for m in ('scipy', 'networkx', 'sklearn', 'pandas',\n"
              "                              'matplotlib') if m in sys.modules)))\n")
    assert _fresh_python(script).strip() == "[]"


def _free_port():
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def test_unreachable_scheduler_gives_a_clear_error(demo_files, tmp_path):
    pytest.importorskip("distributed")
    address = f"tcp://127.0.0.1:{_free_port()}"
    with pytest.raises(SchedulerUnreachableError,
                       match=rf"cannot reach the Dask scheduler at '{address}' within 1 s .*; "
                             r"check the address \(tcp://HOST:PORT\), that the scheduler is "
                             "running"):
        DaskExecutor(address, connect_timeout=1)
    src = _source(demo_files, frames=(0, 50))
    featurizer = PoolFeaturizer(build_pool(src))
    with pytest.raises(SchedulerUnreachableError, match="cannot reach the Dask scheduler"):
        run_pass(ScreeningPass(featurizer), src, executor=DaskExecutor(address,
                                                                        connect_timeout=1))
    assert list(tmp_path.iterdir()) == []


@pytest.mark.parametrize("address", ["notanaddress", "tcp://HOST"])
def test_a_failed_connection_leaves_no_traceback_from_the_client(address):
    # a Client that failed to connect was closed by its __del__, which waited 20 s and
    # printed "Exception ignored in: <function Client.__del__ ...>" and a traceback;
    # the client is made here directly, without the address check of DaskExecutor
    pytest.importorskip("distributed")
    script = ("import distributed\n"
              "from cvdesign.parallel.executors import _discard_client\n"
              "client = distributed.Client.__new__(distributed.Client)\n"
              "try:\n"
              f"    client.__init__({address!r}, timeout=1, set_as_default=False)\n"
              "except Exception as exc:\n"
              "    print(type(exc).__name__)\n"
              "    _discard_client(client)\n")  # `client` lives until the interpreter exits
    res = subprocess.run([sys.executable, "-c", script], capture_output=True, text=True,
                         timeout=120, cwd=str(Path(__file__).resolve().parents[1]))
    assert res.returncode == 0 and res.stdout.strip() == "ValueError"
    assert "Exception ignored" not in res.stderr and "Traceback" not in res.stderr


@pytest.mark.parametrize("address,message", [
    ("notanaddress", r"scheduler address 'notanaddress' has no port; give tcp://HOST:PORT"),
    ("tcp://:8786", r"'tcp://:8786' has no valid host before the port"),
    ("tcp://h:port", r"'tcp://h:port': port 'port' is not a number from 1 to 65535"),
    ("gopher://h:1", r"'gopher://h:1': unknown scheme 'gopher' \(known: .*tcp"),
])
def test_a_malformed_scheduler_address_is_refused_before_connecting(address, message):
    pytest.importorskip("distributed")
    with pytest.raises(InputError, match=message):
        DaskExecutor(address, connect_timeout=60)  # refused at once, not after 60 s


def test_scheduler_addresses_that_dask_accepts_pass_the_check():
    from cvdesign.parallel.executors import check_scheduler_address
    for address in ("tcp://10.0.0.5:8786", "10.0.0.5:8786", "tls://node-3.cluster:8786",
                    "tcp://[::1]:8786", "inproc://10.0.0.5/1234/1", "ws://h:80"):
        check_scheduler_address(address, distributed=False)


def test_a_local_worker_process_that_dies_mid_run_gives_a_clear_error(demo_files, tmp_path):
    src = _source(demo_files, frames=(0, 400))
    dying = DyingFeaturizer(PoolFeaturizer(build_pool(src)))
    before = _leftover_contexts()
    with ProcessExecutor(2) as ex, pytest.raises(
            WorkerLostError, match=r"a worker process died while running task \d+: frames "
                                   r"\d+-\d+ of '.*\.xtc' \(killed, out of memory, or a crash "
                                   r"in compiled code\); the run was stopped and nothing was "
                                   "written"):
        run_pass(ScreeningPass(dying), src, executor=ex,
                 tasks=plan_tasks(src, leaf_frames=32, frames_per_task=64), chunk_frames=16)
    assert _leftover_contexts() == before
    assert list(tmp_path.iterdir()) == []


def test_a_dask_worker_that_dies_mid_run_gives_a_clear_error(demo_files, tmp_path):
    distributed = pytest.importorskip("distributed")
    import dask

    src = _source(demo_files, frames=(0, 400))
    dying = DyingFeaturizer(PoolFeaturizer(build_pool(src)))
    # Dask retries a task whose worker died; with no retries allowed it gives up at once
    with dask.config.set({"distributed.scheduler.allowed-failures": 0}), \
            distributed.LocalCluster(n_workers=1, threads_per_worker=1, processes=True,
                                     dashboard_address=":0") as cluster, \
            distributed.Client(cluster) as client, pytest.raises(
                WorkerLostError, match=r"Dask workers died while running task \d+: frames "
                                       r"\d+-\d+ of '.*\.xtc' \(killed, out of memory"):
        run_pass(ScreeningPass(dying), src, executor=DaskExecutor(client),
                 tasks=plan_tasks(src, leaf_frames=32, frames_per_task=64), chunk_frames=16)
    assert list(tmp_path.iterdir()) == []


class DyingDistances:
    """Prefilter values whose worker process exits on its second call: a worker dying in the
    prefilter's read."""

    def __init__(self, inner):
        self.inner = inner

    def blocks(self, sub, periodic):
        calls = int(os.environ.get("CVDESIGN_TEST_CALLS", "0")) + 1
        os.environ["CVDESIGN_TEST_CALLS"] = str(calls)
        if calls >= 2:
            os._exit(3)
        return self.inner.blocks(sub, periodic)


def _prefilter_inputs(src):
    atoms = np.unique(candidate_pairs(src.topology, select_atoms(src.topology, None))[0])
    pairs = np.stack(np.triu_indices(atoms.size, k=1), axis=1)
    return atoms, _PairDistances(pairs, 5_000_000), len(pairs)


@pytest.mark.parametrize("frames", [(0, 400), (3, 400)])  # strided reads; every frame read
def test_the_prefilter_gives_the_same_means_and_pool_on_every_executor(
        demo_files, frames, dask_threads, shuffled_executor):
    # three files per state: the per-file sums are added in file order whatever the
    # executor (the sum of three in another order may differ in its last bits)
    top, states = demo_files
    src = Source(top)
    for name, files in states.items():
        for f in files[:3]:
            src.add(f, name, frames=frames)
    atoms, values, n = _prefilter_inputs(src)
    ref, ref_var, ref_min, used = _strided_state_means(src, atoms, values, n, 10,
                                                        cutoff=0.6)
    pool = build_pool(src)
    with ProcessExecutor(2) as ex:
        executors = [ex, DaskExecutor(dask_threads), shuffled_executor(3)]
        for other in executors:
            got, got_var, got_min, got_used = _strided_state_means(src, atoms, values, n, 10,
                                                                   executor=other, cutoff=0.6)
            assert got.tobytes() == ref.tobytes() and got_used == used
            assert got_var.tobytes() == ref_var.tobytes()
            assert got_min.tobytes() == ref_min.tobytes()
            other_pool = build_pool(src, executor=other)
            assert other_pool.descriptors == pool.descriptors and other_pool.notes == pool.notes
    # the reference itself: the mean over every 10th frame of each state in each file
    start = frames[0]
    direct = []
    for files in demo_files[1].values():
        traj = md.join([md.load(f, top=top, atom_indices=atoms)[start:400:10]
                        for f in files[:3]])
        d = md.compute_distances(traj, values.local, periodic=False).astype(np.float64)
        direct.append((d.mean(axis=0), d.var(axis=0)))
    np.testing.assert_allclose(ref, np.array([m for m, _ in direct]), rtol=1e-6)
    np.testing.assert_allclose(ref_var, np.array([v for _, v in direct]), rtol=1e-4, atol=1e-9)
    assert used == 6 * len(range(start, 400, 10))


def test_a_local_worker_that_dies_in_the_prefilter_gives_a_clear_error(demo_files, tmp_path,
                                                                       monkeypatch):
    src = _source(demo_files, frames=(0, 400))
    atoms, values, n = _prefilter_inputs(src)
    monkeypatch.setenv("CVDESIGN_TEST_CALLS", "0")  # restored after the test
    with ProcessExecutor(2) as ex, pytest.raises(
            WorkerLostError, match=r"a worker process died while running task \d+: the "
                                   r"prefilter's read of '.*\.xtc' \(killed, out of memory"):
        _strided_state_means(src, atoms, DyingDistances(values), n, 10, executor=ex)
    assert list(tmp_path.iterdir()) == []


class Exponential:
    """Prefilter values ``exp(50 x)`` of the first atom's x (nm): sums of very unequal
    terms, whose bits depend on the order they are added in."""

    def blocks(self, sub, periodic):
        yield 0, np.exp(50.0 * sub.xyz[:, 0, :1].astype(np.float64))


def test_the_prefilter_adds_the_files_in_their_order_whatever_order_they_arrive_in(
        tmp_path, shuffled_executor):
    top = md.Topology()
    residue = top.add_residue("X", top.add_chain())
    top.add_atom("C1", md.element.carbon, residue)
    top.add_atom("C2", md.element.carbon, residue)
    paths = []
    for i, x in enumerate((0.75, 0.0, 0.0)):  # exp(37.5) ~ 2e16 in the first file, 1 after
        xyz = np.zeros((40, 2, 3), dtype=np.float32)
        xyz[:, 0, 0] = x
        xyz[:, 1, 0] = 1.0
        traj = md.Trajectory(xyz, top)
        if i == 0:
            traj[0].save_pdb(str(tmp_path / "top.pdb"))
        paths.append(tmp_path / f"run-{i}.dcd")
        traj.save_dcd(str(paths[-1]))
    src = Source.from_states(str(tmp_path / "top.pdb"), {"a": paths}, chunk_size=8)
    atoms = np.array([0, 1])
    ref, _, _, _ = _strided_state_means(src, atoms, Exponential(), 1, 2)
    in_order = [float(np.exp(50.0 * np.float64(np.float32(x)))) * 20 for x in (0.75, 0.0, 0.0)]
    seed = next(s for s in range(100)
                if np.random.default_rng(s).permutation(3).tolist() == [1, 2, 0])
    got, _, _, _ = _strided_state_means(src, atoms, Exponential(), 1, 2,
                                  executor=shuffled_executor(seed))
    assert got.tobytes() == ref.tobytes()
    # the order matters for these sums: added as they arrived, they would differ
    first, second, third = in_order
    assert (first + second) + third != (second + third) + first
