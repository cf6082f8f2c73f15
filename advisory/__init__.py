"""advisory: pre-dawn frost and daytime heat risk notices for orchard and vineyard blocks."""

__version__ = "0.1.0"
