"""grainwright's torch half, part two: data layouts, training schemes and the training loop."""
