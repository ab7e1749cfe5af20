"""seedbed: seeded, reproducible, explained initial weights for neural networks."""

from seedbed_client._version import __version__

__all__ = ["__version__"]
