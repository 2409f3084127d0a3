"""The package version, in one place (read by ibprep/__init__.py and the command line)."""

__all__ = ["__version__"]

__version__ = "0.1.0.dev0"
