"""Training schemes by name (supervised, noise2noise, masked, neighbor2neighbor, recorrupted)."""
