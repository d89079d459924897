"""``python -m grainwright.inference`` runs the ``grainwright`` command."""
import sys

from grainwright.inference.cli import main

sys.exit(main())
