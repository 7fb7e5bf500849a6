"""The project's exceptions: one base class and a few specific ones."""

__all__ = ["CVDesignError", "InputError", "SpecError", "TopologyMismatchError", "ExecutorError",
           "SchedulerUnreachableError", "WorkerLostError"]


class CVDesignError(ValueError):
    """Base class of every error cvdesign raises on purpose.

    It subclasses :class:`ValueError`, so callers that already catch
    ``ValueError`` keep working.
    """


class InputError(CVDesignError):
    """Bad user input: a missing file, a wrong argument, inconsistent data."""


class SpecError(CVDesignError):
    """A spec document that fails validation.

    Parameters
    ----------
    message : str
        What is wrong and what to do.
    path : str, default="$"
        JSON path of the offending element, e.g. ``$.terms[2].weight``.
    """

    def __init__(self, message, path="$"):
        self.path = path
        super().__init__(f"{path}: {message}" if path else message)


class TopologyMismatchError(SpecError):
    """A spec was loaded against a topology that differs from the one it was made for."""


class ExecutorError(CVDesignError):
    """Running tasks failed for a reason outside the data: the executor itself broke."""


class SchedulerUnreachableError(ExecutorError):
    """The Dask scheduler could not be reached (wrong address, not running, firewall)."""


class WorkerLostError(ExecutorError):
    """A worker process died while running tasks (killed, out of memory, crashed)."""
