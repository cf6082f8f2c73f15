"""notices package."""
