"""``python -m sigmasim`` is the same as the ``sigmasim`` command.

Ctrl-C or SIGTERM while the modules are still being imported ends the command like an interrupt
later on: one line, exit status 130, no traceback (:mod:`sigmasim.interrupt` keeps the
KeyboardInterrupt out of the imports; :func:`_leave` keeps the status 130).
"""

import os
import sys


def _leave(code: int) -> None:
    """Exit with ``code``; after an interrupt (130) by ``os._exit`` with the streams flushed.

    A KeyboardInterrupt that once passed through code run by ``eval`` (``collections.namedtuple``
    does that at import time) makes CPython 3.11 end a ``python -m`` process by SIGINT (status -2)
    even when the interrupt was caught.  The command has written its checkpoint and closed its
    files before 130 comes back here.
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
    from sigmasim import interrupt

    interrupt.install()  # before the heavy imports: a signal at start-up exits 130 too
    from sigmasim.cli import main

    code = main()
except KeyboardInterrupt:  # Ctrl-C or SIGTERM while the modules are still loading
    sys.stderr.write("sigmasim: interrupted\n")
    code = 130
_leave(code)
