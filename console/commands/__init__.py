"""One module per ``grainwright`` sub-command; see ``grainwright.console.cli``."""
