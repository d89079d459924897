"""One module per ``grainwright`` sub-command; see ``grainwright.inference.cli``."""
