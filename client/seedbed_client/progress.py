"""A one-line download progress bar on standard error, standard library only."""

from __future__ import annotations

import shutil
import sys
import time
from typing import TextIO

# Bodies smaller than this finish too quickly for a bar to be worth drawing.
LARGE_BODY_BYTES = 4 * 1024 * 1024


def human_bytes(n: float) -> str:
    for unit in ("B", "KiB", "MiB", "GiB"):
        if n < 1024 or unit == "GiB":
            return f"{n:.0f} {unit}" if unit == "B" else f"{n:.1f} {unit}"
        n /= 1024
    return f"{n:.1f} GiB"


class ProgressBar:
    """Redraws `[#####.....]  42%  12.0 MiB / 28.6 MiB  9.8 MiB/s` at most ten times a second.

    With `always` False it draws nothing for bodies under LARGE_BODY_BYTES (or of unknown
    length); `done()` ends the line only if something was drawn.
    """

    def __init__(self, stream: TextIO | None = None, *, always: bool = False) -> None:
        self.stream = stream if stream is not None else sys.stderr
        self.always = always
        self.started = time.monotonic()
        self._last_draw = 0.0
        self._drawn = False

    def __call__(self, received: int, total: int | None) -> None:
        if not self.always and (total is None or total < LARGE_BODY_BYTES):
            return
        now = time.monotonic()
        if now - self._last_draw < 0.1 and (total is None or received < total):
            return
        self._last_draw = now
        self.stream.write("\r" + self.line(received, total, now - self.started))
        self.stream.flush()
        self._drawn = True

    def line(self, received: int, total: int | None, elapsed: float) -> str:
        rate = human_bytes(received / elapsed) + "/s" if elapsed > 0 else ""
        width = max(10, min(40, shutil.get_terminal_size((80, 20)).columns - 45))
        if total:
            filled = int(width * min(received, total) / total)
            bar = "#" * filled + "." * (width - filled)
            return (
                f"[{bar}] {100 * received / total:3.0f}%  {human_bytes(received)} / "
                f"{human_bytes(total)}  {rate}"
            )
        return f"{human_bytes(received)}  {rate}"

    def done(self) -> None:
        if self._drawn:
            self.stream.write("\n")
            self.stream.flush()
