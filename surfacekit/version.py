"""The package version, in a module of its own so every stage can read it without importing
the package's top level (which would be an import from below)."""

__version__ = "0.1.0"
