"""The HTTP layer: validates, calls the core, streams the result. `create_app` builds it."""

from seedbed.web.app import create_app
from seedbed.web.settings import Settings, SettingsError

__all__ = ["Settings", "SettingsError", "create_app"]
