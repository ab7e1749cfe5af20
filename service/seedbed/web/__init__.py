"""The HTTP layer: validates, calls the core, streams the result. `create_app` builds it."""

from seedbed.settings import Settings, SettingsError
from seedbed.web.app import create_app

__all__ = ["Settings", "SettingsError", "create_app"]
