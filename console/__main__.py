"""``python -m grainwright.inference`` runs the ``grainwright`` command."""
import sys

from grainwright.console.cli import main

sys.exit(main())
