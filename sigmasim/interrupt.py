"""Ctrl-C and SIGTERM as KeyboardInterrupt, never raised in the middle of an import.

A command imports numba and the kernels when it needs them, which takes up to a second; a
KeyboardInterrupt raised by a signal handler in the middle of that lands wherever the interpreter
happens to be, and several places turn it into something else (each seen in start-up signal
tests, ``tests/test_cli_hostile.py``): a weakref callback of the import machinery ignores it
with a printed traceback (and the signal is lost), ``__set_name__`` wraps it in a RuntimeError,
numba's C extension replaces it by an ImportError after printing it.  :func:`handler` therefore
raises only when no import is running; inside one it asks for the same signal again 50 ms later,
until the import is over.  Only the standard library is imported here.
"""

from __future__ import annotations

import signal
import threading

__all__ = ["handler", "install"]

RETRY_SECONDS = 0.05


def _in_import(frame) -> bool:
    while frame is not None:
        if frame.f_code.co_filename.startswith("<frozen importlib"):
            return True
        frame = frame.f_back
    return False


def handler(signum, frame):
    """Raise KeyboardInterrupt, or, inside an import, deliver ``signum`` again a little later."""
    if _in_import(frame):
        later = threading.Timer(RETRY_SECONDS, signal.pthread_kill, (threading.main_thread().ident, signum))
        later.daemon = True
        later.start()
        return
    raise KeyboardInterrupt


def install(signals=(signal.SIGINT, signal.SIGTERM)) -> None:
    """Use :func:`handler` for ``signals`` (main thread only; elsewhere nothing happens)."""
    if threading.current_thread() is threading.main_thread():
        for s in signals:
            signal.signal(s, handler)
