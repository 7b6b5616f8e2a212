"""The fictional desk: a seeded synthetic generator with planted episodes, and `comove demo`."""
