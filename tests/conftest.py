"""Shared fixtures: the bundled demo data, the MDAnalysis test data, and helpers of the
pass-engine tests (bitwise comparison, random task splits, shuffled arrival order, a
progress display that records what it is told)."""

import contextlib
import importlib.resources
import json
from pathlib import Path

import mdtraj as md
import numpy as np
import pytest

from cvdesign import Source, suggest
from cvdesign.io.demo import demo_data_dir
from cvdesign.parallel import Executor
from cvdesign.passes import Task, engine, run_pass


@pytest.fixture(scope="session", autouse=True)
def early_tutorials(request, tmp_path_factory):
    """``{module name: started runs}``: test modules that define ``start_tutorials(items,
    tmp_path_factory)`` (test_tutorials.py) start the scripts the session selected when the
    session starts, so they run beside the other tests; the module's tests wait for them."""
    started = {}
    modules = {getattr(item, "module", None) for item in request.session.items}
    for module in sorted((m for m in modules if hasattr(m, "start_tutorials")),
                         key=lambda m: m.__name__):
        runs = module.start_tutorials(request.session.items, tmp_path_factory)
        if runs is not None:
            started[module.__name__] = runs
    yield started
    for runs in started.values():
        runs.stop()


@pytest.fixture(scope="session")
def demo_dir():
    """Directory of the bundled demo data (the invented 'latch' molecule)."""
    return demo_data_dir()


@pytest.fixture(scope="session")
def demo_manifest(demo_dir):
    return json.loads((demo_dir / "manifest.json").read_text())


@pytest.fixture(scope="session")
def demo_files(demo_dir, demo_manifest):
    """(topology path, {state: [trajectory paths]}) of the demo."""
    top = str(demo_dir / demo_manifest["topology"]["file"])
    states = {name: [str(demo_dir / f) for f in entry["files"]]
              for name, entry in demo_manifest["states"].items()}
    return top, states


@pytest.fixture(scope="session")
def demo_result(demo_files):
    """`suggest` on the whole demo, computed once per test session."""
    top, states = demo_files
    return suggest(Source.from_states(top, states))


@pytest.fixture(scope="session")
def mda_data():
    """Directory of the real MD test data shipped by the `mdanalysistests` package.

    Source: the MDAnalysis test suite (Michaud-Agrawal et al., J. Comput. Chem. 2011;
    Gowers et al., Proc. SciPy 2016), installed by the project's `test` extra.
    """
    return Path(str(importlib.resources.files("MDAnalysisTests") / "data"))


@pytest.fixture(scope="session")
def adk_result_for_redundancy(mda_data):
    """`suggest` on adenylate kinase CA atoms, closed (frames 0-29) vs open (68-97)."""
    src = Source(str(mda_data / "adk.psf"))
    src.add(str(mda_data / "adk_dims.dcd"), "closed", frames=(0, 30))
    src.add(str(mda_data / "adk_dims.dcd"), "open", frames=(68, 98))
    return suggest(src, selection="name CA", max_terms=2, n_suggestions=2)


class OrnsteinUhlenbeck:
    """A reversible 3-D Ornstein-Uhlenbeck process dx = -A x dt + sqrt(2 D) dW.

    The drift is ``A = D K`` with a symmetric positive definite mobility ``D``
    and potential Hessian ``K`` (``U(x) = x^T K x / 2`` in kT units), which makes
    the process reversible with equilibrium covariance ``K^-1``; both ``D`` and
    ``K`` are rotated so that no mode lies along a coordinate axis. ``A`` is built
    from prescribed relaxation rates: ``A = D^1/2 S D^-1/2`` with
    ``S = R diag(rates) R^T``, so the eigenvalues of ``A`` are ``rates``.

    The equilibrium covariance is solved independently from the Lyapunov
    equation ``A Sigma + Sigma A^T = 2 D`` (Gardiner, Handbook of Stochastic
    Methods, Springer, chapter on the multivariate Ornstein-Uhlenbeck process;
    Risken, The Fokker-Planck Equation, Springer; from memory), and trajectories
    are sampled EXACTLY at the frame spacing ``dt`` by the AR(1) update
    ``x_{n+1} = e^{-A dt} x_n + xi_n``, ``xi_n ~ N(0, Sigma - e^{-A dt} Sigma e^{-A^T dt})``,
    which is the exact transition density of the OU process (same sources), not a
    discretization. Each trajectory starts from the equilibrium distribution, so
    every frame is stationary.
    """

    def __init__(self, rates=(0.02, 0.1, 0.4), dt=1.0, seed=27):
        import numpy as np
        import scipy.linalg

        rng = np.random.default_rng(seed)
        self.rates = np.asarray(rates, dtype=np.float64)
        self.dt = float(dt)
        n = len(self.rates)
        R, _ = np.linalg.qr(rng.normal(size=(n, n)))
        Q, _ = np.linalg.qr(rng.normal(size=(n, n)))
        self.D = Q @ np.diag(np.linspace(0.5, 2.0, n)) @ Q.T
        d_half = scipy.linalg.sqrtm(self.D).real
        S = R @ np.diag(self.rates) @ R.T
        self.A = d_half @ S @ np.linalg.inv(d_half)
        self.Sigma = scipy.linalg.solve_continuous_lyapunov(self.A, 2.0 * self.D)
        self.Sigma = 0.5 * (self.Sigma + self.Sigma.T)
        self.F = scipy.linalg.expm(-self.A * self.dt)
        noise = self.Sigma - self.F @ self.Sigma @ self.F.T
        self._noise_chol = np.linalg.cholesky(0.5 * (noise + noise.T))
        self._eq_chol = np.linalg.cholesky(self.Sigma)

    def slow_modes(self):
        """(rates ascending, unit left eigenvectors of A as columns): w^T x relaxes as e^{-k t}."""
        import numpy as np

        evals, evecs = np.linalg.eig(self.A.T)
        order = np.argsort(evals.real)
        vecs = evecs[:, order].real
        return evals.real[order], vecs / np.linalg.norm(vecs, axis=0)

    def simulate(self, n_traj, n_frames, seed):
        """List of `n_traj` arrays of shape (n_frames, n_dim), exact OU samples."""
        import numpy as np

        rng = np.random.default_rng(seed)
        n = len(self.rates)
        out = np.empty((n_frames, n_traj, n))
        out[0] = rng.standard_normal((n_traj, n)) @ self._eq_chol.T
        noise = rng.standard_normal((n_frames - 1, n_traj, n)) @ self._noise_chol.T
        Ft = self.F.T
        for t in range(1, n_frames):
            out[t] = out[t - 1] @ Ft + noise[t - 1]
        return [np.ascontiguousarray(out[:, i]) for i in range(n_traj)]


@pytest.fixture(scope="session")
def ou():
    """The 3-D reversible OU test process (see :class:`OrnsteinUhlenbeck`)."""
    return OrnsteinUhlenbeck()


@pytest.fixture(scope="session")
def ou_train(ou):
    """100 independent equilibrium trajectories of 10 000 frames of `ou` (1e6 frames)."""
    return ou.simulate(100, 10_000, seed=2024)


@pytest.fixture(scope="session")
def ou_test(ou):
    """An independent set of 50 trajectories of 10 000 frames of `ou`."""
    return ou.simulate(50, 10_000, seed=7)


def _adk_domain(resseq):
    if 30 <= resseq <= 59:
        return "NMP"
    if 122 <= resseq <= 159:
        return "LID"
    return "CORE"


@pytest.fixture(scope="session")
def adk_domain():
    """Domain of an adenylate kinase residue number: CORE 1-29, 60-121, 160-214; NMP
    30-59; LID 122-159, as defined by Beckstein, Denning, Perilla and Woolf (J. Mol. Biol.
    394:160, 2009; from memory). The closed/open change of the MDAnalysis test trajectory
    is the LID and NMP domains closing over the CORE."""
    return _adk_domain


def _assert_same(a, b, where="result"):
    """Bitwise equality of pass results: arrays with np.array_equal, dicts with the same keys,
    statistics objects field by field."""
    import numpy as np

    assert type(a) is type(b), f"{where}: {type(a).__name__} != {type(b).__name__}"
    if isinstance(a, dict):
        assert list(a.keys()) == list(b.keys()), f"{where}: keys differ"
        for k in a:
            _assert_same(a[k], b[k], f"{where}[{k!r}]")
    elif isinstance(a, (list, tuple)):
        assert len(a) == len(b), f"{where}: lengths differ"
        for i, (x, y) in enumerate(zip(a, b)):
            _assert_same(x, y, f"{where}[{i}]")
    elif isinstance(a, np.ndarray):
        assert a.dtype == b.dtype and np.array_equal(a, b, equal_nan=True), \
            f"{where}: arrays differ"
    elif a is None or isinstance(a, (int, float, str, np.integer, np.floating)):
        assert a == b or (a != a and b != b), f"{where}: {a!r} != {b!r}"
    elif hasattr(a, "__dataclass_fields__"):
        for name in a.__dataclass_fields__:
            _assert_same(getattr(a, name), getattr(b, name), f"{where}.{name}")
    else:
        if type(a).__name__ in ("DiagonalLaggedMoments", "LaggedMoments"):
            names = ("count", "n_pairs", "lag", "shift", "sum_x", "sum_y", "sum_xx", "sum_xy",
                     "sum_yy")
        else:
            names = getattr(type(a), "__slots__", None) or list(vars(a))
        assert names, f"{where}: nothing to compare in {type(a).__name__}"
        for name in names:
            _assert_same(getattr(a, name), getattr(b, name), f"{where}.{name}")


@pytest.fixture(scope="session")
def assert_same():
    """Function asserting that two pass results are identical, bit for bit."""
    return _assert_same


class ShuffledExecutor(Executor):
    """Runs the tasks here, then hands the results over in a seeded random order."""

    def __init__(self, seed):
        self.seed = seed

    def run(self, fn, context, items):
        items = list(items)
        results = [fn(context, item) for item in items]
        order = np.random.default_rng(self.seed).permutation(len(items))
        for i in order:
            yield int(i), results[i]


@pytest.fixture(scope="session")
def shuffled_executor():
    """``shuffled_executor(seed)``: a pass-engine executor that runs the tasks in this process
    and hands their results over in a seeded random order."""
    return ShuffledExecutor


def _random_tasks(plan, rng):
    """Tasks cutting every segment's leaves at random points, in random order."""
    tasks = []
    for si in range(plan.n_segments):
        leaves = plan.leaves(si)
        if not len(leaves):
            continue
        inner = np.arange(leaves.start + 1, leaves.stop)
        cuts = np.sort(rng.choice(inner, size=rng.integers(0, inner.size + 1), replace=False)) \
            if inner.size else np.zeros(0, int)
        edges = [leaves.start, *cuts.tolist(), leaves.stop]
        tasks += [Task(si, a, b) for a, b in zip(edges[:-1], edges[1:])]
    rng.shuffle(tasks)
    return tasks


@pytest.fixture(scope="session")
def random_tasks():
    """``random_tasks(plan, rng)``: tasks of a :class:`cvdesign.passes.TaskPlan` cut at random
    leaves and shuffled (any such split must give the same bytes)."""
    return _random_tasks


def _same_for_any_split(passes, source, plan, seed, chunk_frames):
    """Run `passes` on the plan as given, and again on a random split of its leaves (seed
    `seed`) through a shuffled executor (seed ``seed + 1``) with reads of `chunk_frames`;
    assert the two identical and return the first."""
    reference = run_pass(passes, source, tasks=plan)
    rng = np.random.default_rng(seed)
    other = run_pass(passes, source, tasks=plan.with_tasks(_random_tasks(plan, rng)),
                     executor=ShuffledExecutor(seed + 1), chunk_frames=chunk_frames)
    _assert_same(reference, other)
    return reference


@pytest.fixture(scope="session")
def same_for_any_split():
    """``same_for_any_split(passes, source, plan, seed, chunk_frames)``: the passes' result,
    checked to be the same bytes for a random task split, arrival order and chunk size."""
    return _same_for_any_split


def _hopping_runs(out, *, n_runs=3, n_frames=1500, seed=5):
    """Unlabelled runs of a four-atom toy whose C1-C2 distance hops between 0.4 and 0.8 nm
    (a two-state Markov chain, 1 % switching per frame, AR(1) wiggle within a state)."""
    rng = np.random.default_rng(seed)
    top = md.Topology()
    res = top.add_residue("HOP", top.add_chain(), resSeq=1)
    for name in ("C1", "C2", "C3", "C4"):
        top.add_atom(name, md.element.carbon, res)
    paths = []
    for k in range(n_runs):
        state, dev = k % 2, 0.0
        x = np.empty(n_frames)
        for t in range(n_frames):
            if rng.random() < 0.01:
                state = 1 - state
            dev = 0.7 * dev + rng.normal(0, 0.02)
            x[t] = (0.4, 0.8)[state] + dev
        xyz = np.zeros((n_frames, 4, 3))
        xyz[:, 1, 0] = x
        xyz[:, 2] = [0.0, 0.5, 0.0] + rng.normal(0, 0.02, (n_frames, 3))
        xyz[:, 3] = [0.4, 0.4, 0.3] + rng.normal(0, 0.02, (n_frames, 3))
        path = out / f"hop-{k + 1}.xtc"
        md.Trajectory(xyz.astype(np.float32), top,
                      time=np.arange(n_frames) * 0.1).save_xtc(str(path))
        paths.append(str(path))
    pdb = out / "hop.pdb"
    md.Trajectory(xyz[:1].astype(np.float32), top).save_pdb(str(pdb))
    return str(pdb), paths


@pytest.fixture(scope="session")
def hopping_runs():
    """``hopping_runs(directory, n_runs=3, n_frames=1500, seed=5)``: write unlabelled runs of
    a four-atom toy hopping between two states; returns (topology path, [run paths])."""
    return _hopping_runs


@pytest.fixture(scope="session")
def threaded_dask():
    """A Dask client of a LocalCluster of three threaded workers (no processes: fast), for
    the tests that compare executors; three workers make another task split than two
    local processes."""
    distributed = pytest.importorskip("distributed")
    with distributed.LocalCluster(n_workers=3, threads_per_worker=1, processes=False,
                                  dashboard_address=":0") as cluster, \
            distributed.Client(cluster) as client:
        yield client


class RecordedBar:
    """One progress bar as a :class:`ProgressRecorder` saw it: label, total, unit, updates."""

    def __init__(self, label, total, unit):
        self.label, self.total, self.unit = label, total, unit
        self.updates, self.closed = [], False

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.closed = True

    def update(self, n=1):
        self.updates.append(n)

    @property
    def count(self):
        return sum(self.updates)


class ProgressRecorder:
    """A progress display (``cvdesign.progress.using_display``) recording every bar."""

    def __init__(self):
        self.bars = []

    def __call__(self, label, total, unit):
        self.bars.append(RecordedBar(label, total, unit))
        return self.bars[-1]

    def labelled(self, label):
        return [b for b in self.bars if b.label == label]


@pytest.fixture
def progress_recorder():
    """A fresh :class:`ProgressRecorder`; activate it with ``using_display(recorder)``."""
    return ProgressRecorder()


@contextlib.contextmanager
def _leaves_of_at_most_256():
    with pytest.MonkeyPatch.context() as mp:
        mp.setattr(engine, "MAX_LEAF_FRAMES", engine.LEAF_FRAMES)
        yield


@pytest.fixture
def short_leaves():
    """Leaves of at most :data:`~cvdesign.passes.LEAF_FRAMES` (256) frames whatever the number
    of features, for one test: the small test inputs then span several leaves per file, so
    that the byte-identity checks across task splits and executors have leaf boundaries to
    cross (few features otherwise get leaves of up to 4096 frames, one per test file)."""
    with _leaves_of_at_most_256():
        yield


@pytest.fixture(scope="module")
def short_leaves_module():
    """:func:`short_leaves` for a whole module (for its module-scoped fixtures too)."""
    with _leaves_of_at_most_256():
        yield


#: Where the three states of ``three_states`` put the two distances C1-C2 and C3-C4 (nm):
#: C1-C2 sets A apart from B and C, which it leaves on top of each other; C3-C4 sets C apart
#: from A and B; only their sum separates all three.
THREE_STATES = {"A": (0.4, 0.4), "B": (0.8, 0.4), "C": (0.8, 0.8)}


@pytest.fixture(scope="session")
def three_states(tmp_path_factory):
    """(topology path, {state: [run paths]}): five atoms jittering about fixed places (AR(1),
    0.9 per 1 ps frame, 0.03 nm), two runs of 1200 frames per state of
    :data:`THREE_STATES`; the states differ only in where atoms C2 and C4 sit."""
    from scipy.signal import lfilter

    directory = tmp_path_factory.mktemp("three")
    rng = np.random.default_rng(11)
    top = md.Topology()
    res = top.add_residue("TRI", top.add_chain())
    for i in range(5):
        top.add_atom(f"C{i + 1}", md.element.carbon, res)
    files = {}
    for state, (d12, d34) in THREE_STATES.items():
        place = np.array([[0, 0, 0], [d12, 0, 0], [0, 1.0, 0], [d34, 1.0, 0], [0.5, 0.5, 1.0]])
        for r in range(2):
            noise = lfilter([1.0], [1.0, -0.9], rng.normal(size=(1200, 15)), axis=0)
            xyz = place + 0.03 * np.sqrt(1 - 0.9 ** 2) * noise.reshape(1200, 5, 3)
            traj = md.Trajectory(xyz.astype(np.float32), top, time=np.arange(1200.0))
            path = directory / f"{state}{r}.xtc"
            traj.save_xtc(str(path))
            files.setdefault(state, []).append(str(path))
    pdb = directory / "top.pdb"
    traj[:1].save_pdb(str(pdb))
    return str(pdb), files
