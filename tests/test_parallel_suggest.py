"""`suggest` on every executor (issue 10): the same bytes serially, in local processes and on
a Dask cluster, whatever the task split; a clear error and no output when the scheduler
cannot be reached or a worker dies."""

import os
import socket

import pytest

import cvdesign.pipeline.suggest
from cvdesign import Source, suggest
from cvdesign.cli import main
from cvdesign.passes import PoolFeaturizer
from cvdesign.progress import using_display

SETTINGS = dict(n_bootstrap=20, max_terms=2, n_suggestions=3, lag=2.0, objective="both")


@pytest.fixture(scope="module", autouse=True)
def _short_leaves(short_leaves_module):
    """Several leaves per test file (see conftest's ``short_leaves``)."""


def _source(demo_files):
    top, states = demo_files
    src = Source(top)
    for name, files in states.items():
        for f in files[:2]:
            src.add(f, name, frames=(0, 600))
    return src


def _files(result, out):
    result.write(out)
    return {p.name: p.read_bytes() for p in sorted(out.iterdir())}


@pytest.fixture(scope="module")
def serial_files(demo_files, tmp_path_factory):
    return _files(suggest(_source(demo_files), **SETTINGS), tmp_path_factory.mktemp("serial") / "o")


def test_two_local_processes_write_the_bytes_of_the_serial_run(demo_files, serial_files,
                                                              tmp_path, progress_recorder):
    with using_display(progress_recorder):  # progress bars shown: the same bytes
        got = _files(suggest(_source(demo_files), executor=2, **SETTINGS), tmp_path / "o")
    assert got.keys() == serial_files.keys() and len(got) >= 5
    assert "report-data.json" in got  # the report's histograms, traces and timescales too
    assert got == serial_files
    # a bar for each read (every frame with a state, once) and each bootstrap; the
    # timescales' read computes the ranked CVs' terms only
    reads = [b for b in progress_recorder.bars if b.unit == "frames"]
    assert [b.label for b in reads] == ["prefilter", "screening", "statistics", "held-out",
                                        "timescales"]
    assert all(b.count == b.total for b in progress_recorder.bars)
    assert [b.total for b in reads[1:]] == [4 * 600] * 4
    assert [b.label for b in progress_recorder.bars if b.unit == "replicates"] == [
        "bootstrap", "bootstrap refits", "bootstrap card"]


def test_a_dask_cluster_writes_the_bytes_of_the_serial_run(demo_files, serial_files, tmp_path):
    distributed = pytest.importorskip("distributed")
    with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=False,
                                  dashboard_address=":0") as cluster, \
            distributed.Client(cluster) as client:
        got = _files(suggest(_source(demo_files), executor=client, **SETTINGS), tmp_path / "o")
    assert got == serial_files


def test_task_split_does_not_change_the_bytes(demo_files, serial_files, tmp_path, monkeypatch):
    # many small tasks in one process: the same leaves, another split and reduction order
    real = cvdesign.pipeline.suggest._plan_for

    def fine(base, n_features, executor):
        return real(base, n_features, executor).split(frames_per_task=64)

    monkeypatch.setattr(cvdesign.pipeline.suggest, "_plan_for", fine)
    got = _files(suggest(_source(demo_files), **SETTINGS), tmp_path / "o")
    assert got == serial_files


def _cli(demo_files, out, *extra):
    top, states = demo_files
    return ["suggest", "--topology", top, "--state", "closed", *states["closed"][:2],
            "--state", "open", *states["open"][:2], "--bootstrap", "0", "--max-terms", "1",
            "--suggestions", "1", "--out", str(out), *extra]


def _free_port():
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def test_unreachable_scheduler_is_refused_with_no_output(demo_files, tmp_path, capsys):
    pytest.importorskip("distributed")
    out = tmp_path / "out"
    address = f"tcp://127.0.0.1:{_free_port()}"
    assert main(_cli(demo_files, out, "--scheduler", address)) == 2
    err = capsys.readouterr().err
    assert f"cannot reach the Dask scheduler at '{address}'" in err
    assert "Traceback" not in err
    assert not out.exists() and list(tmp_path.iterdir()) == []


class DyingPoolFeaturizer(PoolFeaturizer):
    """The pool's features, but a process exits on its second chunk (the main process reads
    one frame for the lagged sums' shift, the workers the rest)."""

    def __call__(self, trajectory):
        calls = int(os.environ.get("CVDESIGN_TEST_CALLS", "0")) + 1
        os.environ["CVDESIGN_TEST_CALLS"] = str(calls)
        if calls >= 2:
            os._exit(3)
        return super().__call__(trajectory)


def test_a_worker_that_dies_is_reported_with_no_output(demo_files, tmp_path, capsys,
                                                        monkeypatch):
    out = tmp_path / "out"
    monkeypatch.setenv("CVDESIGN_TEST_CALLS", "0")  # restored after the test
    monkeypatch.setattr(cvdesign.pipeline.suggest, "PoolFeaturizer", DyingPoolFeaturizer)
    assert main(_cli(demo_files, out, "--workers", "2")) == 2
    err = capsys.readouterr().err
    assert "a worker process died while running task" in err
    assert "nothing was written" in err and "Traceback" not in err
    assert not out.exists() and list(tmp_path.iterdir()) == []


def test_workers_and_scheduler_exclude_each_other(demo_files, tmp_path, capsys):
    with pytest.raises(SystemExit):
        main(_cli(demo_files, tmp_path / "out", "--workers", "2", "--scheduler", "tcp://x:1"))
    assert "not allowed with argument" in capsys.readouterr().err
