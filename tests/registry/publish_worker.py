"""A separate process that publishes versions of one recipe straight through the store.

    python publish_worker.py NAME COUNT TOKEN GO_FILE

Waits until GO_FILE exists (so several workers start publishing together), publishes COUNT
versions of NAME to the database the SEEDBED_* variables name, and prints the versions it was
given as one JSON list.
"""

from __future__ import annotations

import json
import sys
import time
from pathlib import Path

from seedbed.registry import open_registry
from seedbed.registry.prepare import prepare_recipe
from seedbed.registry.store import publish


def main(name: str, count: int, token: str, go_file: str) -> None:
    registry = open_registry()
    body = {
        "name": name,
        "request": {"seed": 77, "layers": [{"name": "w", "kind": "dense", "n_in": 6, "n_out": 4}]},
    }
    prepared = prepare_recipe(body)
    deadline = time.monotonic() + 60
    while not Path(go_file).exists():
        if time.monotonic() > deadline:
            raise SystemExit("never told to go")
        time.sleep(0.005)
    versions = [publish(registry.engine, prepared, token).version for _ in range(count)]
    registry.close()
    print(json.dumps(versions))


if __name__ == "__main__":
    main(sys.argv[1], int(sys.argv[2]), sys.argv[3], sys.argv[4])
