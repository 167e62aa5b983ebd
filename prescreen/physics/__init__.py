"""prescreen.physics."""
