"""Write the app's OpenAPI document to openapi/openapi.json (or check it is current).

python -m seedbed.web.openapi_export            # rewrite the committed file
python -m seedbed.web.openapi_export --check    # exit 1 if the committed file is stale
"""

from __future__ import annotations

import argparse
import json
import sys
from pathlib import Path
from typing import Any

from seedbed.settings import Settings
from seedbed.web.app import create_app

DEFAULT_PATH = Path(__file__).resolve().parents[3] / "openapi" / "openapi.json"
REGENERATE = "python -m seedbed.web.openapi_export"


def current_document() -> dict[str, Any]:
    # Built from default settings so the environment of whoever runs it cannot leak in.
    return create_app(Settings()).openapi()


def render(document: dict[str, Any]) -> str:
    return json.dumps(document, indent=2, sort_keys=True, ensure_ascii=False) + "\n"


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description="Export seedbed's OpenAPI document.")
    parser.add_argument("--path", type=Path, default=DEFAULT_PATH, help="file to write or check")
    parser.add_argument("--check", action="store_true", help="only compare; exit 1 when stale")
    args = parser.parse_args(argv)
    text = render(current_document())
    if args.check:
        on_disk = args.path.read_text(encoding="utf-8") if args.path.exists() else ""
        if on_disk != text:
            print(f"{args.path} is out of date; run: {REGENERATE}", file=sys.stderr)
            return 1
        return 0
    args.path.parent.mkdir(parents=True, exist_ok=True)
    args.path.write_text(text, encoding="utf-8")
    print(f"wrote {args.path}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
