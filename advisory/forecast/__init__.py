"""forecast package."""
