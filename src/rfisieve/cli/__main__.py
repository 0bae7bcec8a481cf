"""``python -m rfisieve.cli``: the same as the ``rfisieve`` command."""

import sys

from rfisieve.cli import main

sys.exit(main())
