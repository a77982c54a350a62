"""``python -m boxwood`` runs the ``boxwood`` command line."""
import sys

from .cli import main

sys.exit(main())
