"""Team recipes: named, immutable, versioned network requests in a shared database.

Storage is SQLAlchemy 2 Core over an embedded SQLite file (default) or PostgreSQL (psycopg 3),
chosen by SEEDBED_DATABASE_URL (see config.py). No web imports here: the HTTP routes live in
seedbed.web.routes.recipes and the key commands in seedbed.keys_cli.
"""

from seedbed.registry.config import RegistryConfig, RegistryConfigError, config_from_env
from seedbed.registry.lifecycle import LazyRegistry, Registry, open_registry

__all__ = [
    "LazyRegistry",
    "Registry",
    "RegistryConfig",
    "RegistryConfigError",
    "config_from_env",
    "open_registry",
]
