"""``python -m rfisieve``: the same as the ``rfisieve`` command."""

import sys

from rfisieve.cli import main

sys.exit(main())
