"""store package."""
