"""The package version (its own module, so library modules can record it without importing
the public API in rescore/__init__.py)."""

__version__ = "0.1.0"
