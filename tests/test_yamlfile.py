"""YAML loading with line numbers: safe subset only, duplicates refused, one-line errors.

Sources: YAML 1.1 (the dialect PyYAML's SafeLoader implements: timestamps, `<<` merge
keys, anchors and aliases, tags) and design §5 (config errors read
`file:line: key.path: problem; what would be right`). That a duplicate key is an error
rather than "last one wins" is this project's rule (YAML 1.2 §3.2.1.1 also requires keys
to be unique).
"""

from __future__ import annotations

from pathlib import Path

import pytest

from zeroline.errors import ConfigError
from zeroline.yamlfile import load_yaml, parse_yaml

CONFIG = """\
basis_sets:
  slow:
    - constant
    - polynomial: {of: t, degree: 2}
channels:
  - name: a
    learn:
      mode: all
"""


def test_data_and_line_of_every_key_path() -> None:
    located = parse_yaml(CONFIG, "site.yaml")
    assert located.data["channels"][0]["learn"] == {"mode": "all"}
    assert located.line_of("basis_sets.slow") == 2
    assert located.line_of("basis_sets.slow[1]") == 4
    assert located.line_of("basis_sets.slow[1].polynomial.degree") == 4
    assert located.line_of("channels[0].learn.mode") == 8
    assert located.where("channels[0].name") == "site.yaml:6"


def test_line_of_an_unknown_path_falls_back_to_its_nearest_parent() -> None:
    located = parse_yaml(CONFIG, "site.yaml")
    assert located.line_of("channels[0].learn.nope") == 7
    assert located.line_of("channels[0].nope.deeper") == 6
    assert located.line_of("nothing.at.all") == 1


def test_scalars_are_yaml_1_1_safe_types() -> None:
    data = parse_yaml("a: 1\nb: 1.5\nc: true\nd: ~\ne: '7d'\nf: 2026-05-01T00:00:00Z\n").data
    assert (data["a"], data["b"], data["c"], data["d"], data["e"]) == (1, 1.5, True, None, "7d")
    assert data["f"].isoformat() == "2026-05-01T00:00:00+00:00"


def test_empty_document_is_none() -> None:
    assert parse_yaml("", "x.yaml").data is None
    assert parse_yaml("# only a comment\n", "x.yaml").data is None


@pytest.mark.parametrize(
    ("text", "says"),
    [
        ("a: 1\na: 2\n", "x.yaml:2: a: key given twice; keep one"),
        ("a:\n  b: 1\n  b: 2\n", "x.yaml:3: a.b: key given twice"),
        ("a: [1, 2\n", "x.yaml:2: YAML syntax error"),
        ("a:\n\t- b\n", "x.yaml:2: YAML syntax error"),
        ("a: 1\n---\nb: 2\n", "YAML syntax error"),
        ("? [a, b]\n: 1\n", "x.yaml:1: keys must be names"),
        ("~: 1\n", "x.yaml:1: keys must be names"),
        ("a: !!binary 'xyz'\n", "x.yaml:1:"),
        ("a: *nowhere\n", "x.yaml:1:"),
    ],
)
def test_errors_are_one_line_with_file_and_line(text: str, says: str) -> None:
    with pytest.raises(ConfigError) as caught:
        parse_yaml(text, "x.yaml")
    assert says in str(caught.value)
    assert "\n" not in str(caught.value)


@pytest.mark.parametrize(
    "text",
    [
        "- !!python/object/apply:os.system ['echo unsafe']\n",
        "a: !!python/object/apply:os.system ['echo unsafe']\n",
        "a: !!python/name:os.system\n",
        "a: !!python/tuple [1, 2]\n",
        "a: !custom {b: 1}\n",
    ],
)
def test_python_and_unknown_tags_are_refused(text: str) -> None:
    """Only the safe subset is built: a Python or unknown tag is an error, never ignored."""
    with pytest.raises(ConfigError) as caught:
        parse_yaml(text, "x.yaml")
    assert str(caught.value).startswith("x.yaml:1:")
    assert "\n" not in str(caught.value)


@pytest.mark.parametrize(
    ("text", "line"),
    [
        ("a:\n  at: 2026-13-45\n", 2),  # looks like a YAML timestamp, is no date
        ("a:\n  b: 1\n  at: 2026-02-30T10:00:00Z\n", 3),
        ("a: &x [1, *x]\n", 1),  # an alias inside its own anchor: infinitely deep
        ("base: &b {x: 1}\nc:\n  <<: *b\n", 3),
    ],
)
def test_constructor_problems_are_config_errors(text: str, line: int) -> None:
    """Impossible dates, recursive aliases and merge keys: a ConfigError with the line.

    (A merge key may instead be supported; then it must give {x: 1} — see the next test.)
    """
    try:
        located = parse_yaml(text, "x.yaml")
    except ConfigError as error:
        assert str(error).startswith(f"x.yaml:{line}:"), str(error)
        assert "\n" not in str(error)
        return
    assert "<<" in text, f"accepted {located.data!r}"
    assert located.data["c"] == {"x": 1}


def test_load_yaml_reads_a_file_and_names_it(tmp_path: Path) -> None:
    path = tmp_path / "basis.yaml"
    path.write_text("- constant\n- constant\n", encoding="utf-8")
    located = load_yaml(path)
    assert located.data == ["constant", "constant"]
    assert located.where("[1]") == f"{path}:2"


def test_load_yaml_errors(tmp_path: Path) -> None:
    with pytest.raises(ConfigError, match=r"nope\.yaml: cannot read"):
        load_yaml(tmp_path / "nope.yaml")
    (tmp_path / "latin1.yaml").write_bytes("a: temp\u00e9rature\n".encode("latin-1"))
    with pytest.raises(ConfigError, match="not UTF-8 text"):
        load_yaml(tmp_path / "latin1.yaml")
