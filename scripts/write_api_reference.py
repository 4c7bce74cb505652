"""Write docs/api.md from the service's OpenAPI schema: ``.venv/bin/python scripts/write_api_reference.py``."""

from __future__ import annotations

from pathlib import Path

from veil.server.apireference import render_api_reference

TARGET = Path(__file__).resolve().parent.parent / "docs" / "api.md"


def main() -> None:
    TARGET.write_text(render_api_reference(), encoding="utf-8")
    print(TARGET)


if __name__ == "__main__":
    main()
