"""prescreen.report."""
