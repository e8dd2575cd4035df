"""``python -m sigmasim`` is the same as the ``sigmasim`` command."""

from sigmasim.cli import main

raise SystemExit(main())
