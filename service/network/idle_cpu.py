"""Work on CPU time nothing else wants: one thread of the Linux ``SCHED_IDLE`` class.

A spare grader (``assembly.spare_workers``) hands each study's grading, which only computes, to
this thread; its claims, results and leases stay on its other threads, at the process's own
priority.  A thread of the idle class runs only when a core would otherwise be idle (sched(7):
"for running very low priority background jobs"), so the spare grader takes up a backlog on the
cores the receiver and the sender leave free, and gives way as soon as they want a core.  No
journal transaction ever runs on the idle thread: a starved thread must not hold a database lock
the receiver waits for.

Lowering a thread's class needs no privilege; raising it back would (RLIMIT_NICE), so the thread
keeps the class for life.  Where the class does not exist (not Linux) or is refused, the thread
runs at the lowest niceness instead, and :attr:`IdleThread.idle_class` says so.
"""

from __future__ import annotations

import contextlib
import os
from collections.abc import Callable
from concurrent.futures import ThreadPoolExecutor
from typing import Any, TypeVar

T = TypeVar("T")

__all__ = ["IdleThread"]


class IdleThread:
    """One worker thread at the idle scheduling class; :meth:`run` calls a function on it and
    returns its result (or raises its exception) in the calling thread."""

    def __init__(self, name: str = "idle-cpu") -> None:
        #: True: the thread is of the SCHED_IDLE class; False: it runs at niceness 19 instead
        self.idle_class = False
        self._pool = ThreadPoolExecutor(
            max_workers=1, thread_name_prefix=name, initializer=self._lower
        )
        self._pool.submit(lambda: None).result()  # the thread exists, with its class, from now

    def _lower(self) -> None:
        # pid 0: the calling thread (Linux scheduling policies and nice values are per thread)
        try:
            os.sched_setscheduler(0, os.SCHED_IDLE, os.sched_param(0))
        except (AttributeError, OSError):
            with contextlib.suppress(OSError):
                os.setpriority(os.PRIO_PROCESS, 0, 19)
        else:
            self.idle_class = True

    def run(self, fn: Callable[..., T], *args: Any) -> T:
        return self._pool.submit(fn, *args).result()

    def close(self) -> None:
        self._pool.shutdown(wait=True)
