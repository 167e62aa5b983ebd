"""prescreen.acquire."""
