"""Executors for the pass engine: serial, local processes, Dask (see :mod:`.executors`)."""

from ..errors import ExecutorError, SchedulerUnreachableError, WorkerLostError
from .executors import (DaskExecutor, Executor, ProcessExecutor, SerialExecutor, as_executor,
                        using_executor)

__all__ = ["Executor", "SerialExecutor", "ProcessExecutor", "DaskExecutor", "as_executor",
           "using_executor",
           "ExecutorError", "SchedulerUnreachableError", "WorkerLostError"]
