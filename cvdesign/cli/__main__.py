"""``python -m cvdesign.cli``: the ``cvdesign`` command."""

import sys

from .commands import main

sys.exit(main())
