"""seedbed: seeded, reproducible, explained initial weights for neural networks."""

__version__ = "0.1.0"
