"""``python -m grainhabit`` runs the ``grainhabit`` command line."""

import sys

from .cli import main

sys.exit(main())
