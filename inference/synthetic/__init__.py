"""Generated data: the demo scenario (procedural frames with known clean versions)."""
