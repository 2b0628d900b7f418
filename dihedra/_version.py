"""The version of dihedra (its own module, so that nothing imports the package root for it)."""

__version__ = "0.1.0"
