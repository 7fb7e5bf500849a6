"""Progress of the long loops, shown only when asked for.

The passes over the trajectories (:func:`cvdesign.passes.run_pass`, the pool's
prefilter) and the block bootstrap (:func:`cvdesign.stats.block_bootstrap`)
each open a bar with :func:`bar` and advance it as frames are read or
replicates are done. Nothing is shown, and nothing is computed for it (not
even the frame count of a file), unless a *display* is active for the current
context: :func:`show_progress` (tqdm bars on a stream, the command's way) or
:func:`using_display` (any callable). A display only watches: results are the
same bytes with or without it.

The library is otherwise silent: it reports through the ``cvdesign`` logger
(:mod:`logging`; a :class:`logging.NullHandler` on it, so nothing is printed
unless the application configures logging), and the ``cvdesign`` command maps
``-v``/``-q`` to its level.
"""

import contextlib
import contextvars
import logging
import os
import sys

__all__ = ["bar", "active", "show_progress", "using_display", "stage_messages"]

#: The display of the current context: ``display(label, total, unit)`` returns a context
#: manager whose value has ``update(n)``; None: nothing is shown.
_DISPLAY = contextvars.ContextVar("cvdesign_progress_display", default=None)


class _NoBar:
    """The bar when no display is active: advancing it does nothing."""

    def update(self, n=1):
        """Do nothing (no display is active)."""


_NO_BAR = _NoBar()


def active():
    """Whether a display is active in the current context.

    Examples
    --------
    >>> active()
    False
    >>> with using_display(lambda label, total, unit: contextlib.nullcontext()):
    ...     active()
    True
    """
    return _DISPLAY.get() is not None


@contextlib.contextmanager
def bar(label, total, *, unit="frames"):
    """A progress bar for the length of a ``with`` block; advance it with ``update(n)``.

    Parameters
    ----------
    label : str
        What is being done, shown before the bar (e.g. ``"screening"``).
    total : int, None or callable
        How many units the loop will do; None when unknown (the bar then shows
        the count and the rate only). A callable is called only when a display
        is active (for totals that cost something to know, such as the frame
        count of a file); an exception it raises gives an unknown total.
    unit : str, default='frames'
        What is counted (``'frames'``, ``'replicates'``).

    Yields
    ------
    object
        With a method ``update(n)`` that advances the bar by `n` units (a
        no-op when no display is active).

    Examples
    --------
    Without a display nothing happens (and the total is not computed):

    >>> with bar("reading", lambda: 1 / 0) as b:
    ...     b.update(10)

    With a display (here one that records what it is told):

    >>> seen = []
    >>> class Recorder:
    ...     def __init__(self, label, total, unit):
    ...         seen.append((label, total, unit))
    ...     def __enter__(self):
    ...         return self
    ...     def __exit__(self, *exc):
    ...         pass
    ...     def update(self, n=1):
    ...         seen.append(n)
    >>> with using_display(Recorder):
    ...     with bar("bootstrap", 3, unit="replicates") as b:
    ...         for _ in range(3):
    ...             b.update(1)
    >>> seen
    [('bootstrap', 3, 'replicates'), 1, 1, 1]
    """
    display = _DISPLAY.get()
    if display is None:
        yield _NO_BAR
        return
    if callable(total):
        try:
            total = total()
        except Exception:  # noqa: BLE001 - a display must never change what happens
            total = None
    with display(str(label), None if total is None else int(total), str(unit)) as shown:
        yield shown


@contextlib.contextmanager
def using_display(display):
    """Show the progress of the loops run in a ``with`` block through `display`.

    Parameters
    ----------
    display : callable or None
        ``display(label, total, unit)`` returns a context manager whose value
        has ``update(n)`` (a :class:`tqdm.tqdm` does); it is called once per
        bar. None shows nothing.

    Notes
    -----
    The display belongs to the context (:mod:`contextvars`) that entered the
    block: loops run in other threads or processes (executors' workers) do
    not see it; the pass engine advances the bar as their tasks complete.

    Examples
    --------
    See :func:`bar`.
    """
    token = _DISPLAY.set(display)
    try:
        yield
    finally:
        _DISPLAY.reset(token)


def _sized(stream):
    """Whether the terminal behind `stream` says how big it is (some pseudo-terminals give
    0 x 0, where tqdm would draw nothing)."""
    try:
        size = os.get_terminal_size(stream.fileno())
    except (AttributeError, ValueError, OSError):
        return False
    return size.columns > 0 and size.lines > 0


def _tqdm_display(stream):
    """A display drawing tqdm bars on `stream` (kept after they end, one line each), as wide
    as the terminal, or 80 columns when it does not say."""
    from tqdm import tqdm

    def display(label, total, unit):
        sized = _sized(stream)
        return tqdm(total=total, desc=label, unit=f" {unit}", file=stream, leave=True,
                    dynamic_ncols=sized, ncols=None if sized else 80,
                    nrows=None if sized else 24, mininterval=0.2)

    return display


@contextlib.contextmanager
def show_progress(stream=None, *, enabled=None):
    """tqdm progress bars on `stream` for the loops run in a ``with`` block.

    Each pass over the trajectories draws a bar of the frames read of the
    total, with the rate, labelled with what is read (``screening``,
    ``statistics``, ``held-out``, ...); each bootstrap a bar of its replicates.

    Parameters
    ----------
    stream : file-like, default=None
        Where the bars are drawn; None: standard error at entry.
    enabled : bool, default=None
        Whether to draw; None: only when `stream` is a terminal (so a log file
        or a pipe gets no bar characters). In a notebook, whose standard error
        is not a terminal, pass True.

    Examples
    --------
    ::

        import cvdesign
        with cvdesign.show_progress(enabled=True):
            result = cvdesign.suggest(source)

    On a stream that is not a terminal it draws nothing:

    >>> import io
    >>> with show_progress(io.StringIO()):
    ...     active()
    False
    """
    stream = sys.stderr if stream is None else stream
    if enabled is None:
        try:
            enabled = bool(stream.isatty())
        except (AttributeError, ValueError, OSError):
            enabled = False
    with using_display(_tqdm_display(stream) if enabled else None):
        yield


def stage_messages(logger, callback=None):
    """A function ``say(message)`` for the stages of a long job: each message is logged
    at INFO on `logger` and passed to `callback` (when given).

    Parameters
    ----------
    logger : logging.Logger or str
    callback : callable, default=None
        Called with each message too (the ``progress`` argument of
        :func:`cvdesign.suggest` and :func:`cvdesign.propose_states`).

    Examples
    --------
    >>> said = []
    >>> say = stage_messages("cvdesign.example", said.append)
    >>> say("screening pass")
    >>> said
    ['screening pass']
    """
    log = logging.getLogger(logger) if isinstance(logger, str) else logger

    def say(message):
        log.info("%s", message, stacklevel=2)
        if callback is not None:
            callback(message)

    return say
