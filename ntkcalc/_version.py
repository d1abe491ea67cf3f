"""The package version, in a module of its own so that any module can read it without importing
the public namespace (which imports every room)."""

__version__ = "0.1.0"
