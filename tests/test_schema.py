"""config/zeroline.schema.json: in sync with the loader, and right about good and bad configs.

The schema is generated from the same key definitions the loader validates with; this test
makes a key change without regenerating the file fail. The configs are then checked with the
general-purpose `jsonschema` package (JSON Schema draft 2020-12, json-schema.org), loading the
YAML the way an editor's YAML language server sees it (timestamps as text).
"""

from __future__ import annotations

import importlib.util
import json
import textwrap
from datetime import date
from pathlib import Path
from typing import Any

import jsonschema
import pytest
import yaml

from test_config_bad import CASES
from test_config_good import DESIGN_EXAMPLE
from zeroline.config import json_schema, parse_config

ROOT = Path(__file__).resolve().parent.parent
SCHEMA_FILE = ROOT / "config" / "zeroline.schema.json"
EXAMPLES = sorted(
    p for p in (ROOT / "config" / "examples").glob("*.yaml") if not p.name.endswith("_basis.yaml")
)
REGENERATE = "config/zeroline.schema.json is out of date; run `python config/write_schema.py`"


def _writer() -> Any:
    spec = importlib.util.spec_from_file_location(
        "write_schema", ROOT / "config" / "write_schema.py"
    )
    assert spec is not None and spec.loader is not None
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


@pytest.fixture(scope="module")
def validator() -> jsonschema.Draft202012Validator:
    schema = json.loads(SCHEMA_FILE.read_text(encoding="utf-8"))
    jsonschema.Draft202012Validator.check_schema(schema)
    return jsonschema.Draft202012Validator(schema)


def as_an_editor_sees_it(text: str) -> Any:
    """YAML → JSON-like data; an unquoted timestamp is text, as in YAML 1.2's JSON schema."""

    def plain(value: Any) -> Any:
        if isinstance(value, dict):
            return {str(k): plain(v) for k, v in value.items()}
        if isinstance(value, list):
            return [plain(v) for v in value]
        if isinstance(value, date):  # datetime is a date, too
            return value.isoformat()
        return value

    return plain(yaml.safe_load(text))


def schema_errors(validator: jsonschema.Draft202012Validator, text: str) -> list[str]:
    return [error.message for error in validator.iter_errors(as_an_editor_sees_it(text))]


def test_schema_file_equals_the_loaders_schema() -> None:
    """Same content, and the same text the writer produces (so diffs stay reviewable)."""
    on_disk = SCHEMA_FILE.read_text(encoding="utf-8")
    assert json.loads(on_disk) == json_schema(), REGENERATE
    assert on_disk == _writer().render(), REGENERATE


def test_schema_is_a_valid_draft_2020_12_schema() -> None:
    schema = json.loads(SCHEMA_FILE.read_text(encoding="utf-8"))
    assert schema["$schema"] == "https://json-schema.org/draft/2020-12/schema"
    jsonschema.Draft202012Validator.check_schema(schema)


def test_there_are_examples() -> None:
    assert len(EXAMPLES) >= 3


@pytest.mark.parametrize("path", EXAMPLES, ids=[p.name for p in EXAMPLES])
def test_every_example_config_validates(
    path: Path, validator: jsonschema.Draft202012Validator
) -> None:
    assert schema_errors(validator, path.read_text(encoding="utf-8")) == []


def test_design_example_validates(validator: jsonschema.Draft202012Validator) -> None:
    """The design §5 example, including `protocol: 5` (a YAML number)."""
    assert schema_errors(validator, DESIGN_EXAMPLE) == []


def test_less_common_keys_validate(validator: jsonschema.Draft202012Validator) -> None:
    """Durations in every unit, rates with a count before the unit, check and severity."""
    text = textwrap.dedent(
        """\
        broker: {protocol: 3.1.1, keepalive: 90s}
        channels:
          - name: "{1}"
            topic: plant/+/pressure
            epoch: 2026-01-01T00:00:00Z
            inputs:
              temperature: {topic: "plant/{1}/temp", max_age: 15m}
            basis: [constant, {polynomial: {of: temperature, degree: 1, center: 12}}]
            memory: {window: 2w}
            alerts:
              drift_limit: 5
              rate_limit: 1.5/12h
              dwell: 30min
              check: {limit: 0.2, hard_limit: 1}
              severity: {forecast: warning}
        """
    )
    parse_config(text, "check.yaml")  # the loader agrees it is good
    assert schema_errors(validator, text) == []


# Bad configs from test_config_bad that the schema alone can see, and the error it gives.
SCHEMA_CATCHES = {
    "unknown-top-level-key": "Additional properties are not allowed ('brokr' was unexpected)",
    "unknown-nested-key-did-you-mean": (
        "Additional properties are not allowed ('half_lfe' was unexpected)"
    ),
    "string-for-int": "'1883' is not of type 'integer'",
    "list-for-mapping": "['127.0.0.1'] is not of type 'object'",
    "bool-for-number": "True is not of type 'number'",
    "duration-unknown-unit": "'10x' does not match",
    "duration-in-words": "'3 days' does not match",
    "duration-negative": "'-5s' does not match",
    "rate-in-words": "'2 per day' is not valid under any of the given schemas",
    "rate-unknown-unit": "'2/fortnight' is not valid under any of the given schemas",
    "port-out-of-range": "70000 is greater than the maximum of 65535",
    "enum-with-suggestion": "'refrence' is not one of ['all', 'reference', 'envelope']",
    "enum-without-close-choice": "4 is not one of ['5', 5, '3.1.1']",
    "fraction-above-one": "1.5 is greater than the maximum of 1.0",
    "input-named-t": "'t' should not be valid under {'const': 't'}",
    "input-name-with-bad-characters": "'water-temp' does not match",
    "no-channels-key": "'channels' is a required property",
    "missing-name": "'name' is a required property",
    "missing-basis": "'basis' is a required property",
    "channels-a-mapping": "is not of type 'array'",
}


@pytest.mark.parametrize("case_id", sorted(SCHEMA_CATCHES))
def test_bad_configs_are_rejected_by_the_schema_too(
    case_id: str, validator: jsonschema.Draft202012Validator
) -> None:
    """The editor flags these before `zeroline check` runs, with the matching complaint."""
    (case,) = [case for case in CASES if case.id == case_id]
    errors = schema_errors(validator, textwrap.dedent(case.yaml))
    assert len(errors) == 1, errors
    assert SCHEMA_CATCHES[case_id] in errors[0]


def test_every_key_of_the_loader_is_in_the_schema() -> None:
    """Walk the channel section: each key the loader knows has a description for editors."""
    channel = json_schema()["properties"]["channels"]["items"]
    assert channel["required"] == ["name", "topic", "basis"]
    for name, entry in channel["properties"].items():
        assert entry["description"], name
    assert set(channel["properties"]) >= {"name", "topic", "basis", "gain", "inputs", "learn"}


def test_readme_config_reference_is_current() -> None:
    """The README's config reference table is generated from the same key definitions."""
    writer = _writer()
    readme = (ROOT / "README.md").read_text(encoding="utf-8")
    assert writer.readme_with_reference(readme) == readme, (
        "README.md's config reference is out of date; run `python config/write_schema.py`"
    )
