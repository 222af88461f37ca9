"""Write config/zeroline.schema.json and the README's config reference from the loader's
own key definitions.

Run it after changing a config key: `python config/write_schema.py`. tests/test_schema.py fails
while the file and `zeroline.config.json_schema()` differ, or the README's table is stale.
Editors use the file for completion and checking, e.g. with the YAML language server:
`# yaml-language-server: $schema=...`.
"""

from __future__ import annotations

import json
import sys
from pathlib import Path

HERE = Path(__file__).resolve().parent
SCHEMA_FILE = HERE / "zeroline.schema.json"
README = HERE.parent / "README.md"
START_MARK = "<!-- config-reference:start (written by config/write_schema.py) -->"
END_MARK = "<!-- config-reference:end -->"
sys.path.insert(0, str(HERE.parent / "daemon"))  # this clone's package, installed or not

from zeroline.config import json_schema, reference_rows  # noqa: E402  (needs the path above)


def render() -> str:
    """The schema file's exact text: stable key order, two-space indent, final newline."""
    return json.dumps(json_schema(), indent=2, ensure_ascii=False) + "\n"


def reference_table() -> str:
    """The README's config reference block, markers included."""
    lines = [START_MARK, "", "| key | default | meaning |", "| --- | --- | --- |"]
    return "\n".join([*lines, *reference_rows(), "", END_MARK])


def readme_with_reference(text: str) -> str:
    """README text with its config reference block replaced by the current one."""
    start, end = text.index(START_MARK), text.index(END_MARK) + len(END_MARK)
    return text[:start] + reference_table() + text[end:]


def main() -> int:
    SCHEMA_FILE.write_text(render(), encoding="utf-8")
    README.write_text(readme_with_reference(README.read_text(encoding="utf-8")), encoding="utf-8")
    print(f"wrote {SCHEMA_FILE} and the config reference in {README}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
