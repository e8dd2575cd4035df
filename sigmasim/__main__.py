"""``python -m sigmasim`` is the same as the ``sigmasim`` command."""

import signal
import sys


def _stop(signum, frame):
    raise KeyboardInterrupt


try:
    signal.signal(signal.SIGTERM, _stop)  # before the imports: SIGTERM at start-up exits 130 too
    from sigmasim.cli import main

    code = main()
except KeyboardInterrupt:  # Ctrl-C or SIGTERM while the modules are still loading
    sys.stderr.write("sigmasim: interrupted\n")
    code = 130
raise SystemExit(code)
