"""The version of seedbed, written once: the service and the client distributions both read
it (pyproject.toml and client/pyproject.toml take it from here; seedbed.__version__ is this)."""

__version__ = "0.1.0"
