"""The distribution's Chromium (Debian's `chromium` package), driven by Playwright for Python.

Playwright never downloads a browser here: it starts /usr/bin/chromium (SEEDBED_CHROMIUM
overrides the path) headless, with a fresh profile directory and the background services
switched off, so the only traffic is what the page under test asks for.
"""

from __future__ import annotations

import os
import shutil
from pathlib import Path
from typing import Any

CHROMIUM_FLAGS = [
    "--no-sandbox",  # CI runs as root, where Chromium's sandbox cannot start
    "--disable-gpu",
    "--disable-background-networking",
    "--disable-component-update",
    "--disable-sync",
    "--no-first-run",
    "--disable-quic",
]


def chromium_path() -> str | None:
    wanted = os.environ.get("SEEDBED_CHROMIUM", "/usr/bin/chromium")
    if os.path.exists(wanted):
        return wanted
    return shutil.which("chromium")


def launch(playwright: Any, profile: Path, executable: str, downloads: Path) -> Any:
    """A persistent context on a new, empty profile directory; downloads are accepted."""
    return playwright.chromium.launch_persistent_context(
        str(profile),
        executable_path=executable,
        headless=True,
        args=CHROMIUM_FLAGS,
        accept_downloads=True,
        downloads_path=str(downloads),
        viewport={"width": 1360, "height": 900},
    )
