"""Executors: where the tasks of a pass run.

An executor runs ``fn(context, item)`` for every item and yields ``(index,
result)`` pairs as they complete, in any order; the pass engine
(:func:`cvdesign.passes.run_pass`) reduces them in its fixed tree, so the
result does not depend on the executor. The context (the passes and their
featurizer) reaches each worker once per run, not once per task.

* :class:`SerialExecutor` -- in this process, in order (the default; never
  imports dask);
* :class:`ProcessExecutor` -- local worker processes
  (:class:`concurrent.futures.ProcessPoolExecutor`, forked by a fork server that
  imported the passes once, where the platform has one, otherwise ``spawn``);
* :class:`DaskExecutor` -- a Dask cluster (``dask.distributed``; a
  :class:`~dask.distributed.Client` or a scheduler address), imported only
  when this executor is made.

Failures of the executor itself raise a
:class:`~cvdesign.errors.ExecutorError`: :class:`~cvdesign.errors.SchedulerUnreachableError`
when the scheduler cannot be reached, :class:`~cvdesign.errors.WorkerLostError`
when a worker dies (a local process at once; on Dask, when Dask gives up on a
task that killed its workers ``distributed.scheduler.allowed-failures`` times,
or when no worker is left for ``no_worker_timeout`` seconds). Errors raised
by the tasks themselves (bad input found while reading) pass through unchanged.
"""

import asyncio
import concurrent.futures
import contextlib
import importlib
import multiprocessing
import os
import pickle
import tempfile
import threading
import time
import warnings

from ..errors import ExecutorError, InputError, SchedulerUnreachableError, WorkerLostError

__all__ = ["Executor", "SerialExecutor", "ProcessExecutor", "DaskExecutor", "as_executor",
           "using_executor"]


#: Modules the fork server imports once, so that every worker it forks starts with them
#: instead of importing them afresh: what the tasks of ``suggest`` unpickle (about 0.5 s of
#: CPU on the 2-core machine, on the way to the first task). The tasks of ``funnel``
#: (:mod:`cvdesign.bias.funnel`, about 0.2 s more) and ``propose_states`` (with
#: scikit-learn) import what else they need in each worker, once, when they first come.
#: (Each worker also runs the main script again as ``__mp_main__``, as with ``spawn``:
#: Python 3.11-3.13 do not pass the script's path to the fork server, so naming
#: ``"__main__"`` here would not preload it; the CLI's main module imports little.)
WORKER_PRELOAD = ("cvdesign.passes", "cvdesign.pool", "cvdesign.parallel.executors",
                  "cvdesign.pipeline.timing", "cvdesign.pipeline.report_data")


def default_start_method():
    """``"forkserver"`` where the platform has it (Linux, macOS), else ``"spawn"``.

    Both start workers from a fresh interpreter, never a copy of this process's
    threads and locks (which ``fork`` would give); the fork server imports
    :data:`WORKER_PRELOAD` once and forks each worker from there.

    Examples
    --------
    >>> default_start_method() in ("forkserver", "spawn")
    True
    """
    return "forkserver" if "forkserver" in multiprocessing.get_all_start_methods() else "spawn"


def _describe(item):
    describe = getattr(item, "describe", None)
    return describe() if describe is not None else repr(item)


class Executor:
    """Base class: ``run(fn, context, items)`` yields ``(index, result)`` as tasks complete."""

    #: Workers that run tasks at once (used to size the default task split).
    n_workers = 1
    #: Whether ``fn`` runs in this process and thread (so it may call back into the caller,
    #: e.g. to report progress leaf by leaf); otherwise only completed tasks are seen.
    in_process = False

    def run(self, fn, context, items):
        raise NotImplementedError

    def start(self):
        """Get workers ready for the first tasks without waiting for them (nothing here)."""

    def close(self):
        """Release the executor's resources (worker processes, an owned client)."""

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.close()


class SerialExecutor(Executor):
    """Run every task in this process, one after the other, in order.

    Examples
    --------
    >>> list(SerialExecutor().run(lambda ctx, x: ctx * x, 10, [1, 2]))
    [(0, 10), (1, 20)]
    """

    in_process = True

    def run(self, fn, context, items):
        for i, item in enumerate(items):
            yield i, fn(context, item)


# --------------------------------------------------------------------------- local processes
_CONTEXTS = {}


def _process_call(fn, context_path, item):
    """Worker side: load the run's context once (cached by file), then run the task.

    Returns ``(result, warnings)``: the warnings the task raised, each once, as
    ``(message, category module, category name)``, for :meth:`ProcessExecutor.run`
    to raise again in the calling process (a worker's own would only reach its
    standard error). A worker runs one task at a time, so catching them is safe.
    """
    ctx = _CONTEXTS.get(context_path)
    if ctx is None:
        with open(context_path, "rb") as fh:
            ctx = pickle.load(fh)
        _CONTEXTS.clear()
        _CONTEXTS[context_path] = ctx
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        result = fn(ctx, item)
    seen = []
    for w in caught:
        entry = (str(w.message), w.category.__module__, w.category.__qualname__)
        if entry not in seen:
            seen.append(entry)
    return result, seen


def _warn_again(entries):
    """Raise the warnings of a worker's task in this process (categories by name; one that
    cannot be found here becomes a UserWarning)."""
    for message, module, name in entries:
        try:
            category = getattr(importlib.import_module(module), name)
            if not (isinstance(category, type) and issubclass(category, Warning)):
                raise TypeError(name)
        except Exception:  # noqa: BLE001 -- the message still reaches the user
            category = UserWarning
        warnings.warn(message, category, stacklevel=3)


def _ready():
    """A task that does nothing: started workers import this module (and cvdesign)."""


def _pickled(context):
    """The context as bytes, or a clear error for what cannot be sent to another process."""
    try:
        return pickle.dumps(context, protocol=pickle.HIGHEST_PROTOCOL)
    except Exception as exc:
        raise ExecutorError(f"the passes cannot be sent to worker processes (they do not "
                            f"pickle: {exc}); define featurizers and callables at module "
                            "level") from exc


def _dump_context(context):
    """Pickle the context once, to a temporary file the workers read; returns its path."""
    data = _pickled(context)
    fd, path = tempfile.mkstemp(prefix="cvdesign-pass-", suffix=".pkl")
    with os.fdopen(fd, "wb") as fh:
        fh.write(data)
    return path


class ProcessExecutor(Executor):
    """Run tasks in local worker processes.

    Parameters
    ----------
    n_workers : int, default=2
        Worker processes.
    start_method : {'forkserver', 'spawn', 'fork'} or None, default=None
        How workers start; None is :func:`default_start_method` (``forkserver``
        where the platform has it: the server imports :data:`WORKER_PRELOAD`
        once and each worker is forked from it; ``spawn`` imports them afresh in
        each worker). The results are the same bytes whichever is used.

    Notes
    -----
    The worker processes start on :meth:`start` (in the background) or on the
    first run, and stay for the next runs until :meth:`close` (or the end of a
    ``with`` block). If a worker dies
    (killed, out of memory) the run stops with a
    :class:`~cvdesign.errors.WorkerLostError` and the pool is discarded.

    Examples
    --------
    ::

        with ProcessExecutor(2) as ex:
            result = run_pass(ScreeningPass(featurizer), source, executor=ex)
    """

    def __init__(self, n_workers=2, *, start_method=None):
        if isinstance(n_workers, bool) or not isinstance(n_workers, int) or n_workers < 1:
            raise InputError(f"n_workers={n_workers!r} must be a positive number of processes")
        self.n_workers = n_workers
        self.start_method = default_start_method() if start_method is None else start_method
        self._pool = None
        self._starting = None  # the thread of start(), until a run or close() joins it

    def _make_pool(self):
        ctx = multiprocessing.get_context(self.start_method)
        if self.start_method == "forkserver":  # no effect once the server runs
            ctx.set_forkserver_preload(list(WORKER_PRELOAD))
        return concurrent.futures.ProcessPoolExecutor(self.n_workers, mp_context=ctx)

    def _join_start(self):
        """Wait for :meth:`start`'s thread; its pool, or None when it failed (the next
        :meth:`_get_pool` then starts afresh, raising what is wrong)."""
        thread, self._starting = self._starting, None
        if thread is not None:
            thread.join()
            self._pool = thread.pool
        return self._pool

    def _get_pool(self):
        if self._pool is None and self._join_start() is None:
            self._pool = self._make_pool()
        return self._pool

    def start(self):
        """Start the worker processes in the background and return at once.

        The fork server imports :data:`WORKER_PRELOAD` (and the workers start)
        while this process goes on, instead of when the first tasks come:
        starting a pool waits for the server's imports, so it runs in a
        thread of its own. The first :meth:`run` waits for that thread. With
        ``start_method="fork"`` the pool is made here, in the calling thread
        (forking while another thread runs would copy its locks).
        """
        if self._pool is not None or self._starting is not None:
            return
        if self.start_method == "fork":  # never fork while a thread of ours runs
            self._get_pool()
            return

        def work():
            pool = None
            try:
                pool = self._make_pool()
                for _ in range(self.n_workers):
                    pool.submit(_ready)
                thread.pool = pool
            except Exception:  # noqa: BLE001 -- the first run starts again and reports it
                if pool is not None:
                    pool.shutdown(wait=False, cancel_futures=True)

        thread = threading.Thread(target=work, name="cvdesign-start-workers", daemon=True)
        thread.pool = None
        self._starting = thread
        thread.start()

    def run(self, fn, context, items):
        items = list(items)
        path = _dump_context(context)
        futures = {}
        try:
            pool = self._get_pool()
            futures = {pool.submit(_process_call, fn, path, item): i
                       for i, item in enumerate(items)}
            for fut in concurrent.futures.as_completed(futures):
                i = futures[fut]
                try:
                    result, raised = fut.result()
                except concurrent.futures.process.BrokenProcessPool as exc:
                    self._discard()
                    raise WorkerLostError(
                        f"a worker process died while running {_describe(items[i])} (killed, "
                        "out of memory, or a crash in compiled code); the run was stopped and "
                        "nothing was written. Check memory and the worker's messages, then "
                        "run again (fewer workers use less memory)") from exc
                _warn_again(raised)
                yield i, result
        finally:
            for fut in futures:
                fut.cancel()
            try:
                os.remove(path)
            except OSError:
                pass

    def _discard(self):
        self._join_start()
        if self._pool is not None:
            self._pool.shutdown(wait=False, cancel_futures=True)
            self._pool = None

    def close(self):
        self._join_start()
        if self._pool is not None:
            self._pool.shutdown(wait=True, cancel_futures=True)
            self._pool = None


# --------------------------------------------------------------------------- dask
def _dask_call(item, *, fn, context):
    return fn(context, item)


def _dask_context(payload):
    """The run's context, unpickled on a worker. A task rather than scattered data: if the
    workers holding it die, Dask recomputes it instead of cancelling every task."""
    return pickle.loads(payload)


def _import_distributed():
    try:
        import distributed
    except ImportError as exc:
        raise InputError("the Dask executor needs dask.distributed, which is not installed: "
                         "pip install 'cvdesign[dask]'") from exc
    return distributed


def check_scheduler_address(address, distributed=None):
    """Refuse a scheduler address that is not one, before any connection is tried.

    Accepted: ``SCHEME://HOST:PORT`` for the schemes dask.distributed knows (tcp, tls,
    ws, wss, ucx, ... as installed; ``inproc://NAME`` for a scheduler in this process), and
    ``HOST:PORT`` (tcp). HOST may be a bracketed IPv6 address.

    Raises
    ------
    InputError
        Naming the address, what is wrong and the form to give.

    Examples
    --------
    >>> check_scheduler_address("tcp://10.0.0.5:8786", distributed=False)
    >>> check_scheduler_address("notanaddress", distributed=False)
    Traceback (most recent call last):
    ...
    cvdesign.errors.InputError: scheduler address 'notanaddress' has no port; give tcp://HOST:PORT (or HOST:PORT), e.g. tcp://10.0.0.5:8786
    """
    form = "give tcp://HOST:PORT (or HOST:PORT), e.g. tcp://10.0.0.5:8786"
    schemes = {"tcp", "tls", "ws", "wss", "ucx", "inproc"}
    if distributed:
        try:
            schemes = set(distributed.comm.registry.backends)
        except AttributeError:
            pass
    scheme, sep, rest = address.strip().partition("://")
    if not sep:
        scheme, rest = "tcp", address.strip()
    elif scheme not in schemes:
        raise InputError(f"scheduler address {address!r}: unknown scheme {scheme!r} (known: "
                         f"{', '.join(sorted(schemes))}); {form}")
    if scheme == "inproc":
        if not rest:
            raise InputError(f"scheduler address {address!r} names no scheduler; {form}")
        return
    host, colon, port = rest.rpartition(":")
    if not colon or host.endswith(":") and not host.startswith("["):
        raise InputError(f"scheduler address {address!r} has no port; {form}")
    if not host or "/" in host or (":" in host and not (host.startswith("[")
                                                        and host.endswith("]"))):
        raise InputError(f"scheduler address {address!r} has no valid host before the port; "
                         f"{form}")
    if not port.isdigit() or not 0 < int(port) < 65536:
        raise InputError(f"scheduler address {address!r}: port {port!r} is not a number from "
                         f"1 to 65535; {form}")


def _discard_client(client):
    """Mark a dask Client that failed to connect closed and stop its event loop, so that its
    ``__del__`` neither waits nor prints a traceback."""
    try:
        client.status = "closed"
        client._loop_runner.stop()
    except Exception:  # a client that failed before making its loop has nothing to stop
        pass


class DaskExecutor(Executor):
    """Run tasks on a Dask cluster (``dask.distributed``).

    Parameters
    ----------
    client : dask.distributed.Client or str
        A connected client, or the address of a scheduler (e.g.
        ``'tcp://10.0.0.5:8786'``), to which this executor then connects (and
        which it disconnects from on :meth:`close`).
    connect_timeout : float, default=10
        Seconds to wait for a scheduler given by address.
    no_worker_timeout : float, default=120
        Seconds without any worker after which a run gives up.

    Raises
    ------
    SchedulerUnreachableError
        When the scheduler at the address cannot be reached.
    InputError
        When dask.distributed is not installed.

    Notes
    -----
    Tasks are pure (the same inputs give the same bytes), so a task Dask
    restarts after a worker was lost gives the same result. Dask gives up on a
    task that killed workers more than ``distributed.scheduler.allowed-failures``
    times; the run then raises :class:`~cvdesign.errors.WorkerLostError`.
    """

    def __init__(self, client, *, connect_timeout=10, no_worker_timeout=120):
        distributed = _import_distributed()
        self._distributed = distributed
        self._owned = False
        if isinstance(client, str):
            check_scheduler_address(client, distributed)
            address = client
            # made in two steps, so that a client that failed to connect can be marked closed:
            # else its __del__ waits twice the timeout to close it and prints a traceback
            client = distributed.Client.__new__(distributed.Client)
            try:
                client.__init__(address, timeout=connect_timeout, set_as_default=False)
            except Exception as exc:
                _discard_client(client)
                client = address
                detail = str(exc).strip().splitlines()[0] if str(exc).strip() else \
                    type(exc).__name__
                raise SchedulerUnreachableError(
                    f"cannot reach the Dask scheduler at {client!r} within {connect_timeout:g} s "
                    f"({detail}); check the address (tcp://HOST:PORT), that the scheduler is "
                    "running and that this machine may connect to it") from None
            self._owned = True
        elif not isinstance(client, distributed.Client):
            raise InputError(f"DaskExecutor needs a dask.distributed.Client or a scheduler "
                             f"address, not {type(client).__name__}")
        self.client = client
        self.no_worker_timeout = float(no_worker_timeout)

    @property
    def n_workers(self):
        try:
            return max(1, sum(self.client.nthreads().values()))
        except Exception:
            return 1

    def _lost_connection(self, exc):
        return ExecutorError(
            f"lost the connection to the Dask scheduler ({type(exc).__name__}: "
            f"{str(exc).strip() or 'no message'}); the run was stopped and nothing was "
            "written. Check that the scheduler is still running, then run again")

    def run(self, fn, context, items):
        d = self._distributed
        items = list(items)
        futures = []
        try:
            payload = _pickled(context)
            try:
                ctx = self.client.submit(_dask_context, payload, pure=False)
                futures = self.client.map(_dask_call, items, fn=fn, context=ctx, pure=False)
            except Exception as exc:
                raise self._lost_connection(exc) from None
            index = {f.key: i for i, f in enumerate(futures)}
            pending = set(futures)
            idle_since = None
            while pending:
                try:
                    done, pending = d.wait(list(pending), timeout=1.0,
                                           return_when="FIRST_COMPLETED")
                    pending = set(pending)
                except d.TimeoutError:
                    done = ()
                except Exception as exc:
                    for fut in futures:  # a task that failed explains it better
                        if fut.status == "error":
                            self._result(d, fut, items[index[fut.key]])
                    raise self._lost_connection(exc) from None
                for fut in sorted(done, key=lambda f: index[f.key]):
                    i = index[fut.key]
                    yield i, self._result(d, fut, items[i])
                if not done:
                    try:
                        workers = len(self.client.nthreads())
                    except Exception as exc:
                        raise self._lost_connection(exc) from None
                    if workers:
                        idle_since = None
                    elif idle_since is None:
                        idle_since = time.monotonic()
                    elif time.monotonic() - idle_since > self.no_worker_timeout:
                        raise WorkerLostError(
                            f"the Dask cluster has had no worker for {self.no_worker_timeout:g} "
                            f"s with {len(pending)} task(s) left (workers died or were "
                            "stopped); the run was stopped and nothing was written. Start "
                            "workers and run again")
        finally:
            if futures:
                try:
                    self.client.cancel(futures)
                except Exception:
                    pass

    def _result(self, d, fut, item):
        try:
            return fut.result()
        except d.KilledWorker:
            raise WorkerLostError(
                f"Dask workers died while running {_describe(item)} (killed, out of memory, "
                "or a crash in compiled code; Dask gave up after the task had lost its "
                "workers repeatedly); the run was stopped and nothing was written. Check the "
                "workers' memory and logs, then run again") from None
        except _cancelled(d) as exc:
            raise self._lost_connection(exc) from None

    def close(self):
        if self._owned:
            try:
                self.client.close()
            finally:
                self._owned = False


def _cancelled(distributed):
    """Exception types of a future cancelled under us (the scheduler went away)."""
    kinds = [concurrent.futures.CancelledError, asyncio.CancelledError]
    extra = getattr(distributed.client, "FutureCancelledError", None)
    if extra is not None:
        kinds.append(extra)
    return tuple(kinds)


def as_executor(executor):
    """An executor from None (serial), an int (local processes), an Executor, a Dask
    client or a scheduler address.

    Examples
    --------
    >>> type(as_executor(None)).__name__, type(as_executor(3)).__name__
    ('SerialExecutor', 'ProcessExecutor')
    """
    if executor is None:
        return SerialExecutor()
    if isinstance(executor, Executor):
        return executor
    if isinstance(executor, bool):
        raise InputError(f"executor={executor!r} is not an executor")
    if isinstance(executor, int):
        return SerialExecutor() if executor == 1 else ProcessExecutor(executor)
    if isinstance(executor, str) or type(executor).__module__.startswith("distributed"):
        return DaskExecutor(executor)
    raise InputError(f"executor={executor!r} must be None, a number of processes, an Executor, "
                     "a dask.distributed.Client or a scheduler address")


@contextlib.contextmanager
def using_executor(executor):
    """:func:`as_executor` for the length of a ``with`` block, closed at its end when it was
    made here (from an int or a scheduler address); a given Executor or client stays open.

    Examples
    --------
    >>> with using_executor(None) as ex:
    ...     type(ex).__name__
    'SerialExecutor'
    """
    owned = executor is not None and not isinstance(executor, Executor)
    executor = as_executor(executor)
    try:
        yield executor
    finally:
        if owned:
            executor.close()
