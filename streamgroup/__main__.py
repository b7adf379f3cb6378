"""``python -m streamgroup``: the same command line as the ``streamgroup`` script."""

import sys

from .cli import main

sys.exit(main())
