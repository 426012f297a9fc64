"""The package version, in a leaf module that every layer may import."""

__version__ = "0.1.0"
