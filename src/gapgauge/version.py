"""The package version, in a base module so that no module imports the package root for it."""

__version__ = "0.1.0"
