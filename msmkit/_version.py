"""The package version, in a separate module so that any module can read it."""
__version__ = "0.1.0"
