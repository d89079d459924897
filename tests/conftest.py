"""Shared test fixtures. Sample images come from scikit-image's bundled open data."""
from __future__ import annotations

import os

# Tests share two cores with whatever else runs; keep each library to one thread unless a test says otherwise.
os.environ.setdefault("OMP_NUM_THREADS", "1")
