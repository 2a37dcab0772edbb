"""``python -m pnpguard``: the same command line as the ``pnpguard`` script."""

import sys

from .cli import main

sys.exit(main())
