"""``python -m cvdesign``: the ``cvdesign`` command."""

import sys

from .cli import main

sys.exit(main())
