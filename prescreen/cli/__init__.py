"""prescreen.cli."""
