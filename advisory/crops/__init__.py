"""crops package."""
