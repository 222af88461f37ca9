"""Write config/zeroline.schema.json from the loader's own key definitions.

Run it after changing a config key: `python config/write_schema.py`. tests/test_schema.py fails
while the file and `zeroline.config.json_schema()` differ. Editors use the file for completion
and checking, e.g. with the YAML language server: `# yaml-language-server: $schema=...`.
"""

from __future__ import annotations

import json
import sys
from pathlib import Path

HERE = Path(__file__).resolve().parent
SCHEMA_FILE = HERE / "zeroline.schema.json"
sys.path.insert(0, str(HERE.parent / "daemon"))  # this clone's package, installed or not

from zeroline.config import json_schema  # noqa: E402  (needs the path above)


def render() -> str:
    """The schema file's exact text: stable key order, two-space indent, final newline."""
    return json.dumps(json_schema(), indent=2, ensure_ascii=False) + "\n"


def main() -> int:
    SCHEMA_FILE.write_text(render(), encoding="utf-8")
    print(f"wrote {SCHEMA_FILE}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
