"""YAML loading that remembers where every key came from.

Config errors must read `file:line: key.path: problem; what would be right`, so the loader
keeps, for every key path (`channels[0].learn.mode`), the line it was written on. Only the
safe YAML subset is built (no Python tags), and a key given twice in one mapping is an error
rather than the silent "last one wins" of plain `yaml.safe_load`.
"""

from __future__ import annotations

import re
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import yaml

from zeroline.errors import ConfigError


@dataclass(frozen=True)
class Located:
    """Plain Python data from a YAML file, with the line of every key path."""

    path: str
    data: Any
    lines: dict[str, int]

    def line_of(self, key_path: str) -> int:
        """The line of `key_path`, or of its nearest parent that has one (1 if none)."""
        probe = key_path
        while probe:
            if probe in self.lines:
                return self.lines[probe]
            cut = max(probe.rfind("."), probe.rfind("["))
            probe = probe[:cut] if cut > 0 else ""
        return 1

    def where(self, key_path: str) -> str:
        """`file:line` for a key path."""
        return f"{self.path}:{self.line_of(key_path)}"


def load_yaml(path: str | Path) -> Located:
    """Read and parse a YAML file; ConfigError `file:line: ...` for syntax errors."""
    name = str(path)
    try:
        text = Path(path).read_text(encoding="utf-8")
    except OSError as error:
        raise ConfigError(f"{name}: cannot read ({error.strerror}); check the path") from None
    except UnicodeDecodeError:
        raise ConfigError(f"{name}: not UTF-8 text") from None
    return parse_yaml(text, name)


def parse_yaml(text: str, name: str = "<config>") -> Located:
    """Parse YAML text; see `load_yaml`."""
    try:
        node = yaml.compose(text, Loader=yaml.SafeLoader)
    except yaml.MarkedYAMLError as error:
        mark = error.problem_mark
        line = mark.line + 1 if mark is not None else 1
        hint = ""
        source_line = text.splitlines()[line - 1] if 0 < line <= len(text.splitlines()) else ""
        if re.search(r"\{\d+\}", source_line):
            hint = '; inside { } a placeholder like {1} must be quoted: topic: "site/{1}/met/temp"'
        raise ConfigError(f"{name}:{line}: YAML syntax error: {error.problem}{hint}") from None
    except yaml.YAMLError as error:
        raise ConfigError(f"{name}: YAML error: {error}") from None
    lines: dict[str, int] = {}
    if node is None:
        return Located(name, None, lines)
    constructor = yaml.SafeLoader(text)  # only used for its scalar constructors
    try:
        data = _build(node, "", lines, constructor, name, frozenset())
    finally:
        constructor.dispose()
    return Located(name, data, lines)


#: Collections may carry only YAML's own map and sequence tags: no Python objects.
_PLAIN_TAGS = {"tag:yaml.org,2002:map", "tag:yaml.org,2002:seq"}
_MERGE_TAG = "tag:yaml.org,2002:merge"


def _build(
    node: yaml.Node,
    path: str,
    lines: dict[str, int],
    loader: yaml.SafeLoader,
    name: str,
    active: frozenset[int],
) -> Any:
    """Plain data from a node; `active` holds the collections on the way here, so an alias
    that points back into itself is refused instead of recursing forever."""
    here = node.start_mark.line + 1
    lines.setdefault(path, here)
    if isinstance(node, (yaml.MappingNode, yaml.SequenceNode)):
        if id(node) in active:
            raise ConfigError(f"{name}:{here}: an alias refers to the collection it is in")
        if node.tag not in _PLAIN_TAGS:
            raise ConfigError(f"{name}:{here}: tag {node.tag!r} is not supported; remove it")
        active = active | {id(node)}
    if isinstance(node, yaml.MappingNode):
        result: dict[str, Any] = {}
        for key_node, value_node in node.value:
            line = key_node.start_mark.line + 1
            if key_node.tag == _MERGE_TAG:
                raise ConfigError(
                    f"{name}:{line}: merge keys (<<) are not supported; write the keys out"
                )
            key = _scalar(key_node, loader, name)
            if not isinstance(key, (str, int, float)) or isinstance(key, bool):
                raise ConfigError(f"{name}:{line}: keys must be names")
            key = str(key)
            child = f"{path}.{key}" if path else key
            if key in result:
                raise ConfigError(f"{name}:{line}: {child}: key given twice; keep one")
            lines[child] = line
            result[key] = _build(value_node, child, lines, loader, name, active)
        return result
    if isinstance(node, yaml.SequenceNode):
        return [
            _build(item, f"{path}[{i}]", lines, loader, name, active)
            for i, item in enumerate(node.value)
        ]
    return _scalar(node, loader, name)


def _scalar(node: yaml.Node, loader: yaml.SafeLoader, name: str) -> Any:
    line = node.start_mark.line + 1
    try:
        return loader.construct_object(node, deep=True)
    except yaml.constructor.ConstructorError as error:
        raise ConfigError(f"{name}:{line}: {error.problem}") from None
    except ValueError as error:  # e.g. a timestamp-shaped value that is no real date
        raise ConfigError(f"{name}:{line}: {node.value!r} is not a valid value ({error})") from None
