"""The version of warmstart, in a module of its own so that any layer (the
archive's export manifest, the command line) can read it without importing
the package face."""

__version__ = "0.1.0"
