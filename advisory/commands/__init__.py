"""Command-line topics: each module registers its sub-commands."""
