"""The version of basinview, in one place (read by the package, Settings and the build)."""

__all__ = ["__version__"]

__version__ = "0.1.0"
