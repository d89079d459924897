"""The command layer: the ``grainwright`` console command, its sub-commands and the demo (top of the house)."""
