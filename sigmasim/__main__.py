"""``python -m sigmasim`` is the same as the ``sigmasim`` command."""

import os
import signal
import sys


def _stop(signum, frame):
    raise KeyboardInterrupt


def _leave(code: int) -> None:
    """Exit with ``code``; after an interrupt (130) without the interpreter's own exit path.

    A SIGTERM at start-up can raise KeyboardInterrupt inside code that a library runs through
    ``eval`` while it is being imported (``collections.namedtuple`` does); CPython 3.11 then marks
    the interrupt as unhandled although ``main`` caught it, and ``python -m`` ends the process by
    SIGINT (status -2) instead of 130 (seen in about 5 of 100 signals 0.12-0.4 s after start).
    The run has written its checkpoint and closed its files before 130 comes back here.
    """
    if code == 130:
        for stream in (sys.stdout, sys.stderr):
            try:
                stream.flush()
            except Exception:  # a closed pipe: nothing more to say
                pass
        os._exit(130)
    raise SystemExit(code)


try:
    signal.signal(signal.SIGTERM, _stop)  # before the imports: SIGTERM at start-up exits 130 too
    from sigmasim.cli import main

    code = main()
except KeyboardInterrupt:  # Ctrl-C or SIGTERM while the modules are still loading
    sys.stderr.write("sigmasim: interrupted\n")
    code = 130
_leave(code)
