"""The refit process pool, whose workers die with the service however it dies.

A spawn-context :class:`~concurrent.futures.ProcessPoolExecutor` whose worker
initializer asks Linux to send the worker SIGKILL when its parent dies
(``prctl(PR_SET_PDEATHSIG, SIGKILL)`` through :mod:`ctypes`, see prctl(2)).
Without it a SIGKILL of the service left each fitting worker, and
multiprocessing's resource tracker, running re-parented to PID 1.

The signal is tied to the parent *thread* that forked the worker; the pool
creates its workers from the thread that submits, which is the service
loop's main thread, so it fires when the service process dies. The
initializer also checks that the parent it was spawned from is still its
parent: a parent that died before ``prctl`` ran is caught there. On a
system without ``prctl`` (not Linux) the initializer falls back to a
daemon thread that polls ``os.getppid()`` once a second.
"""

from __future__ import annotations

import ctypes
import ctypes.util
import multiprocessing
import os
import signal
import threading
import time
from concurrent.futures import ProcessPoolExecutor

#: From <linux/prctl.h>.
PR_SET_PDEATHSIG = 1


def _watch_parent(parent_pid: int, period_s: float = 1.0) -> None:
    while True:
        if os.getppid() != parent_pid:
            os.kill(os.getpid(), signal.SIGKILL)
        time.sleep(period_s)


def die_with_parent(parent_pid: int) -> None:
    """Worker initializer: SIGKILL this process when ``parent_pid`` dies.

    Parameters
    ----------
    parent_pid : int
        The pid of the service that starts the pool (read before the spawn).
    """
    for name in ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS"):
        os.environ.setdefault(name, "1")
    armed = False
    libc_name = ctypes.util.find_library("c")
    if libc_name is not None:
        try:
            libc = ctypes.CDLL(libc_name, use_errno=True)
            armed = libc.prctl(PR_SET_PDEATHSIG, int(signal.SIGKILL), 0, 0, 0) == 0
        except (OSError, AttributeError):
            armed = False
    if not armed:
        threading.Thread(target=_watch_parent, args=(parent_pid,), daemon=True, name="parent-watch").start()
    if os.getppid() != parent_pid:  # the parent died before the signal was armed
        os.kill(os.getpid(), signal.SIGKILL)


def refit_pool(workers: int) -> ProcessPoolExecutor:
    """A spawn-context pool of ``workers`` processes that die with this one."""
    return ProcessPoolExecutor(max_workers=workers, mp_context=multiprocessing.get_context("spawn"),
                               initializer=die_with_parent, initargs=(os.getpid(),))
