"""The analysis worker: one separate process for the numerics.

A fit can keep a CPU busy for seconds; in the host's own process it would compete for the
interpreter with the link's reader and keepalive threads (a starved keepalive lets the board's
watchdog kill an idle, armed stand). The worker ignores SIGINT: a terminal's Ctrl-C reaches the
whole process group, but only the main process acts on it (it kills the stand).
"""

from __future__ import annotations

import atexit
import contextlib
import multiprocessing
import signal
import sys
import threading
from concurrent.futures import ProcessPoolExecutor
from concurrent.futures.process import BrokenProcessPool

from .. import analysis
from ..errors import WorkflowError
from ..stand import Stand
from .experiment import wait

_POOL: ProcessPoolExecutor | None = None
_POOL_LOCK = threading.Lock()


@contextlib.contextmanager
def _real_std_streams():
    """Starting a worker passes stderr's file descriptor to the child; a terminal UI replaces
    sys.stdout/sys.stderr with objects that have none, so use the real ones meanwhile."""
    saved = sys.stdout, sys.stderr
    sys.stdout = sys.__stdout__ or saved[0]
    sys.stderr = sys.__stderr__ or saved[1]
    try:
        yield
    finally:
        sys.stdout, sys.stderr = saved


def _ignore_sigint() -> None:
    signal.signal(signal.SIGINT, signal.SIG_IGN)


def analysis_pool() -> ProcessPoolExecutor:
    """The shared one-process pool, started on first use (with the real std streams)."""
    global _POOL
    with _POOL_LOCK:
        if _POOL is None:
            with _real_std_streams():
                pool = ProcessPoolExecutor(max_workers=1,
                                           mp_context=multiprocessing.get_context("spawn"),
                                           initializer=_ignore_sigint)
                pool.submit(int).result()  # start the worker now, with the real streams
            _POOL = pool
            atexit.register(_POOL.shutdown, wait=False, cancel_futures=True)
        return _POOL


def identify_and_tune(record, kwargs: dict):
    """``analysis.identify`` then ``analysis.tune`` (top level so the worker can run it)."""
    ident = analysis.identify(record)
    return ident, analysis.tune(ident, **kwargs)


def analyse(stand: Stand, record, kwargs: dict, stop: threading.Event | None) -> tuple:
    """Identify and tune in the worker; kills and stop requests stay live meanwhile.

    Returns
    -------
    (Identification, TuningResult)

    Raises
    ------
    RecordError
        The record cannot be analysed (raised in the worker, carried back).
    KillTripped, Cancelled
        A kill or the operator's stop while the worker runs.
    """
    global _POOL
    fut = analysis_pool().submit(identify_and_tune, record, kwargs)
    while not fut.done():
        wait(stand, stop, 0.05)
    try:
        return fut.result()
    except BrokenProcessPool as exc:
        with _POOL_LOCK:
            _POOL = None  # the next analysis starts a fresh worker
        raise WorkflowError(f"the analysis worker process ended unexpectedly ({exc}); "
                            "run again") from None
