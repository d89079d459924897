"""Ground floor of the library: errors, atomic writes, TOML I/O. Imports nothing else of grainwright."""
