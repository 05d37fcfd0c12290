"""A CPU-first blockyard for training tiny language models and ablating their temporal-mixing blocks."""

__version__ = "0.1.0"
