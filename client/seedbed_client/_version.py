"""The client's version (independent of the service's and of the generator's algorithm)."""

__version__ = "0.1.0"
