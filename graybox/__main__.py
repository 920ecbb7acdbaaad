"""``python -m graybox``: the same command line as the ``graybox`` script."""

import sys

from graybox.cli import main

sys.exit(main())
