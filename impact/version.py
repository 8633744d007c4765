"""The version of impact, on its own so that every stage can name it."""

__version__ = "0.2.0"
