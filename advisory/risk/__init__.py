"""risk package."""
