"""``python -m laueline``: the same as the ``laueline`` command."""

import sys

from .cli import main

sys.exit(main())
