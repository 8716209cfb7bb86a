"""``python -m thermeta.daemon.cli``: the same command line as ``thermeta``."""

import sys

from thermeta.daemon.cli import main

sys.exit(main())
