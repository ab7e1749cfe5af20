"""The seedbed client, tested over real services (tests/client/conftest.py)."""
