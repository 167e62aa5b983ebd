"""prescreen.featurise."""
