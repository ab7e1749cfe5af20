"""Producing a tensor's next pieces while the current one is hashed, encoded and sent.

The generator kernel and hashlib both release the GIL, so a producer thread that stays a couple
of pieces ahead overlaps generation with the hashing and container work of the response, and
with the socket writes. The bytes are the producer's, in its order: nothing about the body
changes, only when its pieces are ready. At most `depth` pieces wait in the queue, so memory
grows by `depth` pieces per stream.
"""

from __future__ import annotations

import queue
import threading
from collections.abc import Callable, Iterator

_POLL_S = 0.1


class _End:
    pass


class _Failed:
    def __init__(self, error: BaseException) -> None:
        self.error = error


def read_ahead(
    produce: Callable[[], Iterator[bytes]], depth: int = 2
) -> Callable[[], Iterator[bytes]]:
    """chunks() that runs produce() on its own thread, `depth` pieces ahead of the reader."""

    def chunks() -> Iterator[bytes]:
        waiting: queue.Queue[bytes | _End | _Failed] = queue.Queue(maxsize=depth)
        stop = threading.Event()

        def put(item: bytes | _End | _Failed) -> bool:
            while not stop.is_set():
                try:
                    waiting.put(item, timeout=_POLL_S)
                    return True
                except queue.Full:
                    continue
            return False  # the reader left (a client went away): stop generating

        def run() -> None:
            try:
                for piece in produce():
                    if not put(piece):
                        return
                put(_End())
            except BaseException as exc:  # handed to the reader, raised there
                put(_Failed(exc))

        worker = threading.Thread(target=run, name="seedbed-read-ahead", daemon=True)
        worker.start()
        try:
            while True:
                item = waiting.get()
                if isinstance(item, _End):
                    return
                if isinstance(item, _Failed):
                    raise item.error
                yield item
        finally:
            stop.set()
            worker.join()

    return chunks
