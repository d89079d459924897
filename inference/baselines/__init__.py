"""Classical denoisers by name (no torch); see ``registry.py``."""
