"""The package's version (one place; cache keys and ``reduce --version`` read it)."""

__version__ = "0.1.0"
