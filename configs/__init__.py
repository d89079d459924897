"""Plain TOML configs shipped with grainwright, one per data regime."""
