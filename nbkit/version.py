"""The package version, in one place (the metadata of every recording names it)."""
__version__ = "0.1.0"
