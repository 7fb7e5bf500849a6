"""Per-thread scratch arrays for the leaf arithmetic.

A leaf's temporaries (a shifted window, histogram indices) are hundreds of kilobytes;
a fresh array of that size is new memory from the system on most calls, and writing it
the first time costs more than the arithmetic. A scratch array is allocated once per
thread and name (grown when a larger one is asked for) and handed out again; it is as
large as the largest leaf window (leaf and halo rows) asked for, whatever the
trajectory's length, and :func:`release` drops a thread's arrays (``run_pass`` does at
its end, in the calling thread).
"""

import threading

import numpy as np

__all__ = ["scratch", "release"]

_LOCAL = threading.local()


def scratch(name, shape, dtype=np.float64):
    """A C-contiguous array of `shape` whose memory this thread reuses under `name`.

    Its contents are undefined; it is valid until the next call with the same name in
    the same thread, so use it as a temporary and never keep or return it.

    Parameters
    ----------
    name : str
    shape : tuple of int
    dtype : numpy dtype, default=float64

    Returns
    -------
    ndarray

    Examples
    --------
    >>> a = scratch("example", (2, 3)); a[:] = 1.0
    >>> b = scratch("example", (3, 2))
    >>> bool(np.shares_memory(a, b)), b.shape
    (True, (3, 2))
    """
    pool = getattr(_LOCAL, "pool", None)
    if pool is None:
        pool = _LOCAL.pool = {}
    dtype = np.dtype(dtype)
    size = 1
    for n in shape:
        size *= int(n)
    buf = pool.get((name, dtype))
    if buf is None or buf.size < size:
        buf = pool[(name, dtype)] = np.empty(size, dtype=dtype)
    return buf[:size].reshape(shape)


def release():
    """Drop this thread's scratch arrays (the memory goes back when nothing uses it).

    Examples
    --------
    >>> _ = scratch("example", (4,)); release()
    """
    _LOCAL.pool = {}
