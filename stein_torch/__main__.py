"""``python -m stein_torch`` runs the command line (same as ``stein-torch``)."""

import sys

from .cli import main

sys.exit(main())
