"""prescreen.io."""
