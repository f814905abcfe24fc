"""``python -m factorize``: the command line (see :mod:`factorize.cli`)."""

from factorize.cli import main

raise SystemExit(main())
