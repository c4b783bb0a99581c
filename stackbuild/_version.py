"""The package version (its own module, so that any layer may read it)."""
__version__ = "0.1.0"
