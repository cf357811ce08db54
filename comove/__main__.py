"""``python -m comove``: the ``comove`` command."""

import sys

from comove.cli import main

sys.exit(main())
