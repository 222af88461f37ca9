"""Bad configs and the exact lines `zeroline check` prints for them.

Each case is a small YAML text and every `file:line: key.path: problem; what would be right`
line the loader must report for it, in order. The lines are compared exactly: the wording is
what a user reads, so a change to it should be a deliberate change to this file. Line numbers
count from the first line of the dedented YAML text.
"""

from __future__ import annotations

import textwrap
from dataclasses import dataclass

import pytest

from zeroline.config import ConfigProblemsError, parse_config
from zeroline.errors import ConfigError

NAME = "bad.yaml"
DURATION_HINT = (
    "write a number and a unit, e.g. 30s, 15min, 36h, 7d (units: ms, s, sec, m, min, h, d, w, y)"
)
RATE_HINT = (
    "write an amount per unit of time, e.g. 2/d or 0.5/h (units: ms, s, sec, m, min, h, d, w, y)"
)
TOP_KEYS = "broker, output, state, http, timeseries, logging, limits, basis_sets, channels"


@dataclass(frozen=True)
class Bad:
    """One bad config and every line its check must print."""

    id: str
    yaml: str
    expected: tuple[str, ...]


def problem_lines(text: str) -> list[str]:
    """What `zeroline check` prints for `text`: every problem line, or the one syntax line."""
    try:
        parse_config(textwrap.dedent(text).lstrip("\n"), NAME)
    except ConfigProblemsError as problems:
        return problems.lines
    except ConfigError as error:
        return [str(error)]
    pytest.fail("the config was accepted, but it should have been rejected")


def bad(id: str, yaml: str, *expected: str) -> Bad:
    return Bad(id, yaml, tuple(f"{NAME}:{line}" for line in expected))


CASES = [
    # --- unknown keys -----------------------------------------------------------------------
    bad(
        "unknown-top-level-key",
        """
        brokr: {host: 127.0.0.1}
        channels:
          - {name: cell, topic: lab/cell, basis: [constant]}
        """,
        "1: brokr: unknown key 'brokr'; did you mean 'broker'?",
    ),
    bad(
        "unknown-top-level-key-no-close-name",
        """
        colour: blue
        channels:
          - {name: cell, topic: lab/cell, basis: [constant]}
        """,
        f"1: colour: unknown key 'colour'; known keys: {TOP_KEYS}",
    ),
    bad(
        "unknown-nested-key-did-you-mean",
        """
        channels:
          - name: cell
            topic: lab/cell
            basis: [constant]
            memory: {half_lfe: 7d}
        """,
        "5: channels[0].memory.half_lfe: unknown key 'half_lfe'; did you mean 'half_life'?",
    ),
    bad(
        "unknown-key-in-basis-term",
        """
        channels:
          - name: cell
            topic: lab/cell
            basis:
              - constant
              - polynomial: {of: t, degree: 1, centre: 5}
        """,
        "6: channels[0].basis[1].polynomial.centre: unknown key 'centre'; did you mean 'center'?",
    ),
    bad(
        "unknown-basis-term",
        """
        channels:
          - name: cell
            topic: lab/cell
            basis:
              - constant
              - polynomal: {of: t, degree: 1}
        """,
        "6: channels[0].basis[1]: unknown basis term 'polynomal'; did you mean 'polynomial'?",
    ),
    # --- wrong types ------------------------------------------------------------------------
    bad(
        "string-for-int",
        """
        broker: {port: "1883"}
        channels:
          - {name: cell, topic: lab/cell, basis: [constant]}
        """,
        "1: broker.port: expected a whole number, got '1883'; remove the quotes: 1883",
    ),
    bad(
        "float-for-int",
        """
        limits:
          queue: 10.5
        channels:
          - {name: cell, topic: lab/cell, basis: [constant]}
        """,
        "2: limits.queue: expected a whole number, got 10.5",
    ),
    bad(
        "list-for-mapping",
        """
        broker: [127.0.0.1]
        channels:
          - {name: cell, topic: lab/cell, basis: [constant]}
        """,
        "1: broker: expected a mapping of keys, got ['127.0.0.1']",
    ),
    bad(
        "bool-for-number",
        """
        channels:
          - name: cell
            topic: lab/cell
            basis: [constant]
            alerts: {drift_limit: yes}
        """,
        "5: channels[0].alerts.drift_limit: expected a number, got true",
    ),
    bad(
        "number-for-bool",
        """
        channels:
          - name: cell
            topic: lab/cell
            basis: [constant]
            learn: {robust: 1}
        """,
        "5: channels[0].learn.robust: expected true or false, got 1",
    ),
    bad(
        "channel-not-a-mapping",
        """
        channels:
          - cell
        """,
        "2: channels[0]: expected a mapping of keys, got 'cell'",
    ),
    bad(
        "channels-a-mapping",
        """
        channels:
          cell: {topic: lab/cell}
        """,
        "1: channels: expected a list, got {'cell': {'topic': 'lab/cell'}}",
    ),
    # --- durations and rates ----------------------------------------------------------------
    bad(
        "duration-unknown-unit",
        """
        channels:
          - name: cell
            topic: lab/cell
            basis: [constant]
            memory: {half_life: 10x}
        """,
        f"5: channels[0].memory.half_life: '10x' is not a duration; {DURATION_HINT}",
    ),
    bad(
        "duration-in-words",
        """
        channels:
          - name: cell
            topic: lab/cell
            basis: [constant]
            memory: {window: 3 days}
        """,
        f"5: channels[0].memory.window: '3 days' is not a duration; {DURATION_HINT}",
    ),
    bad(
        "duration-negative",
        """
        channels:
          - name: cell
            topic: lab/cell
            basis: [constant]
            alerts: {dwell: -5s}
        """,
        "5: channels[0].alerts.dwell: '-5s': a duration cannot be negative; write e.g. 5s",
    ),
    bad(
        "duration-zero-where-positive",
        """
        state: {snapshot_every: 0s}
        channels:
          - {name: cell, topic: lab/cell, basis: [constant]}
        """,
        "1: state.snapshot_every: must be greater than zero, got '0s'",
    ),
    bad(
        "duration-as-number",
        """
        channels:
          - name: cell
            topic: lab/cell
            basis: [constant]
            inputs:
              temperature: {topic: lab/temp, max_age: 600}
        """,
        f"6: channels[0].inputs.temperature.max_age: expected a duration string, got 600; "
        f"{DURATION_HINT}",
    ),
    bad(
        "rate-in-words",
        """
        channels:
          - name: cell
            topic: lab/cell
            basis: [constant]
            alerts: {rate_limit: 2 per day}
        """,
        f"5: channels[0].alerts.rate_limit: '2 per day' is not a rate; {RATE_HINT}",
    ),
    bad(
        "rate-unknown-unit",
        """
        channels:
          - name: cell
            topic: lab/cell
            basis: [constant]
            alerts: {rate_limit: 2/fortnight}
        """,
        f"5: channels[0].alerts.rate_limit: '2/fortnight' is not a rate; {RATE_HINT}",
    ),
    bad(
        "rate-negative",
        """
        channels:
          - name: cell
            topic: lab/cell
            basis: [constant]
            alerts: {rate_limit: -2/d}
        """,
        "5: channels[0].alerts.rate_limit: must be greater than zero, got '-2/d'",
    ),
    # --- ranges and choices -----------------------------------------------------------------
    bad(
        "port-out-of-range",
        """
        broker: {port: 70000}
        channels:
          - {name: cell, topic: lab/cell, basis: [constant]}
        """,
        "1: broker.port: must be at most 65535, got 70000",
    ),
    bad(
        "port-zero",
        """
        broker:
          host: 127.0.0.1
          port: 0
        channels:
          - {name: cell, topic: lab/cell, basis: [constant]}
        """,
        "3: broker.port: must be at least 1, got 0",
    ),
    bad(
        "enum-with-suggestion",
        """
        channels:
          - name: cell
            topic: lab/cell
            basis: [constant]
            learn: {mode: refrence}
        """,
        "5: channels[0].learn.mode: 'refrence' is not allowed; did you mean 'reference'?",
    ),
    bad(
        "enum-without-close-choice",
        """
        broker: {protocol: 4}
        channels:
          - {name: cell, topic: lab/cell, basis: [constant]}
        """,
        "1: broker.protocol: 4 is not allowed; one of: 5, 3.1.1",
    ),
    bad(
        "fraction-above-one",
        """
        channels:
          - name: cell
            topic: lab/cell
            basis: [constant]
            alerts: {drift_limit: 5, clear_fraction: 1.5}
        """,
        "5: channels[0].alerts.clear_fraction: must be at most 1, got 1.5",
    ),
    bad(
        "polynomial-degree-too-high",
        """
        channels:
          - name: cell
            topic: lab/cell
            basis: [constant, polynomial: {of: t, degree: 20}]
        """,
        "4: channels[0].basis[1].polynomial.degree: must be from 1 to 12, got 20",
    ),
    # --- basis sets and inputs --------------------------------------------------------------
    bad(
        "unknown-basis-set-close-name",
        """
        basis_sets:
          slow_drift: [constant]
        channels:
          - {name: cell, topic: lab/cell, basis: slow_drfit}
        """,
        "4: channels[0].basis: unknown basis set 'slow_drfit'; did you mean 'slow_drift'?",
    ),
    bad(
        "unknown-basis-set-no-close-name",
        """
        basis_sets:
          slow_drift: [constant]
          warm_up: [constant, exponential: {of: t, tau: 36h}]
        channels:
          - {name: cell, topic: lab/cell, basis: humidity}
        """,
        "5: channels[0].basis: unknown basis set 'humidity'; basis_sets: slow_drift, warm_up",
    ),
    bad(
        "basis-set-not-a-list",
        """
        basis_sets:
          warm: constant
        channels:
          - {name: cell, topic: lab/cell, basis: warm}
        """,
        "2: basis_sets.warm: expected a non-empty list of basis terms, e.g. [constant]",
    ),
    bad(
        "undeclared-input-inline-basis",
        """
        channels:
          - name: cell
            topic: lab/cell
            basis:
              - constant
              - polynomial: {of: temperature, degree: 1}
            inputs:
              humidity: {topic: lab/humidity}
        """,
        "6: channels[0].basis[1].polynomial.of: 'temperature' is not t or a declared input; "
        "declare it under the channel's inputs (declared: humidity)",
    ),
    bad(
        "undeclared-input-via-basis-set",
        """
        basis_sets:
          warm:
            - constant
            - polynomial: {of: temperature, degree: 1}
        channels:
          - name: cell
            topic: lab/cell
            basis: warm
            inputs:
              humidity: {topic: lab/humidity}
        """,
        "4: basis_sets.warm[1].polynomial.of: 'temperature' is not t or a declared input; "
        "declare it under the channel's inputs (declared: humidity)",
    ),
    bad(
        "undeclared-input-in-expression",
        """
        channels:
          - name: cell
            topic: lab/cell
            basis:
              - constant
              - expression: "humidity / 100"
        """,
        "6: channels[0].basis[1].expression: unknown name 'humidity'; an expression may use "
        "t, pi and the channel's declared inputs (here: t)",
    ),
    bad(
        "input-with-topic-and-field",
        """
        channels:
          - name: cell
            topic: lab/cell
            basis: [constant]
            inputs:
              temperature: {topic: lab/temp, field: temp}
        """,
        "6: channels[0].inputs.temperature: give exactly one of `topic` (another topic) or "
        "`field` (a field of the channel's own payload)",
    ),
    bad(
        "input-with-neither-topic-nor-field",
        """
        channels:
          - name: cell
            topic: lab/cell
            basis: [constant]
            inputs:
              temperature: {max_age: 5m}
        """,
        "6: channels[0].inputs.temperature: give exactly one of `topic` (another topic) or "
        "`field` (a field of the channel's own payload)",
    ),
    bad(
        "input-named-t",
        """
        channels:
          - name: cell
            topic: lab/cell
            basis: [constant]
            inputs:
              t: {topic: lab/clock}
        """,
        "6: channels[0].inputs.t: 't' is time in every basis term; give the input another name",
    ),
    bad(
        "input-name-with-bad-characters",
        """
        channels:
          - name: cell
            topic: lab/cell
            basis: [constant]
            inputs:
              water-temp: {topic: lab/water}
        """,
        "6: channels[0].inputs.water-temp: 'water-temp' cannot name an input; use letters, "
        "digits and _ (no digit first), e.g. water_temp",
    ),
    # --- learning and gain ------------------------------------------------------------------
    bad(
        "gain-without-reference-mode",
        """
        channels:
          - name: cell
            topic: lab/cell
            basis: [constant]
            gain: [constant]
        """,
        "5: channels[0].gain: a gain basis is only identifiable with learn.mode: reference "
        "(known reference values); remove gain or change the mode",
    ),
    bad(
        "reference-mode-without-reference-input",
        """
        channels:
          - name: cell
            topic: lab/cell
            basis: [constant]
            learn: {mode: reference}
        """,
        "5: channels[0].learn.input: reference learning needs the input 'reference' declared "
        "under inputs (a topic or a payload field)",
    ),
    # --- topics and names -------------------------------------------------------------------
    bad(
        "placeholder-beyond-wildcards",
        """
        channels:
          - name: "{2}-no2"
            topic: site/+/no2
            basis: [constant]
        """,
        "2: channels[0].name: {2} has no matching + in the topic (it has 1)",
    ),
    bad(
        "input-topic-placeholder-beyond-wildcards",
        """
        channels:
          - name: "{1}-no2"
            topic: site/+/no2
            basis: [constant]
            inputs:
              temperature: {topic: "site/{2}/met/temp"}
        """,
        "6: channels[0].inputs.temperature.topic: {2} has no matching + in the topic (it has 1)",
    ),
    bad(
        "wildcard-topic-without-placeholder",
        """
        channels:
          - name: no2
            topic: site/+/no2
            basis: [constant]
        """,
        "2: channels[0].name: the topic has 1 + wildcard(s): put {1}… in the name so each "
        "matching topic gets its own channel",
    ),
    bad(
        "hash-topic",
        """
        channels:
          - name: everything
            topic: site/#
            basis: [constant]
        """,
        "3: channels[0].topic: '#' is not supported; use one + per varying level",
    ),
    bad(
        "duplicate-channel-names",
        """
        channels:
          - {name: cell, topic: lab/cell/a, basis: [constant]}
          - {name: cell, topic: lab/cell/b, basis: [constant]}
        """,
        "3: channels[1].name: channel name 'cell' is used twice (also channels[0]); "
        "names must be unique",
    ),
    bad(
        "empty-channels-list",
        """
        channels: []
        """,
        "1: channels: the list is empty; configure at least one channel",
    ),
    bad(
        "no-channels-key",
        """
        broker: {host: 127.0.0.1}
        """,
        "1: channels: missing required key; add `channels:` (the channels, each with at least "
        "name, topic and basis)",
    ),
    bad(
        "missing-name",
        """
        channels:
          - topic: lab/cell
            basis: [constant]
        """,
        "2: channels[0].name: missing required key; add `name:` (channel name; {1}, {2}… are "
        "the topic's + levels)",
    ),
    bad(
        "missing-topic",
        """
        channels:
          - name: cell
            basis: [constant]
        """,
        "2: channels[0].topic: missing required key; add `topic:` (MQTT topic of the raw "
        "readings (+ wildcards allowed))",
    ),
    bad(
        "missing-basis",
        """
        channels:
          - name: cell
            topic: lab/cell
        """,
        "2: channels[0].basis: missing required key; add `basis:` (a basis set's name, or an "
        "inline list of terms)",
    ),
    # --- memory and alerts ------------------------------------------------------------------
    bad(
        "half-life-and-window",
        """
        channels:
          - name: cell
            topic: lab/cell
            basis: [constant]
            memory: {half_life: 7d, window: 14d}
        """,
        "5: channels[0].memory: give either half_life or window, not both",
    ),
    bad(
        "horizon-without-drift-limit",
        """
        channels:
          - name: cell
            topic: lab/cell
            basis: [constant]
            alerts:
              rate_limit: 2/d
              horizon: 14d
        """,
        "7: channels[0].alerts.horizon: a forecast horizon needs alerts.drift_limit to forecast",
    ),
    bad(
        "hard-limit-not-above-limit",
        """
        channels:
          - name: cell
            topic: lab/cell
            basis: [constant]
            alerts:
              check: {limit: 0.3, hard_limit: 0.1}
        """,
        "6: channels[0].alerts.check.hard_limit: must be larger than check.limit (0.3), got 0.1",
    ),
    bad(
        "hard-limit-equal-to-limit",
        """
        channels:
          - name: cell
            topic: lab/cell
            basis: [constant]
            alerts:
              check:
                limit: 0.3
                hard_limit: 0.3
        """,
        "8: channels[0].alerts.check.hard_limit: must be larger than check.limit (0.3), got 0.3",
    ),
    bad(
        "hard-limit-without-limit",
        """
        channels:
          - name: cell
            topic: lab/cell
            basis: [constant]
            alerts:
              check: {hard_limit: 0.3}
        """,
        "6: channels[0].alerts.check.limit: check.hard_limit needs check.limit as well "
        "(the error that counts as a failure)",
    ),
    # --- security ---------------------------------------------------------------------------
    bad(
        "listen-beyond-loopback-without-token",
        """
        http: {listen: "0.0.0.0:8470"}
        channels:
          - {name: cell, topic: lab/cell, basis: [constant]}
        """,
        "1: http.listen: listening beyond loopback needs http.token_file (a bearer token); "
        "or listen on 127.0.0.1",
    ),
    bad(
        "password-without-username",
        """
        broker:
          host: 127.0.0.1
          password_file: /etc/zeroline/broker.pass
        channels:
          - {name: cell, topic: lab/cell, basis: [constant]}
        """,
        "1: broker.username: a password needs a username",
    ),
    bad(
        "password-file-and-env",
        """
        broker:
          username: gw01
          password_file: /etc/zeroline/broker.pass
          password_env: ZEROLINE_BROKER_PASSWORD
        channels:
          - {name: cell, topic: lab/cell, basis: [constant]}
        """,
        "3: broker.password_file: give password_file or password_env, not both",
    ),
    # --- bases dependent by construction ----------------------------------------------------
    bad(
        "two-constants",
        """
        channels:
          - {name: cell, topic: lab/cell, basis: [constant, constant]}
        """,
        "2: channels[0].basis: columns 'constant' and 'constant' are linearly dependent for "
        "any data (one is a multiple of the other); remove one",
    ),
    bad(
        "temperature-polynomials-at-two-centres-and-constant",
        """
        channels:
          - name: cell
            topic: lab/cell
            basis:
              - constant
              - polynomial: {of: temperature, degree: 1, center: 20}
              - polynomial: {of: temperature, degree: 1, center: 25}
            inputs:
              temperature: {topic: lab/temp}
        """,
        "4: channels[0].basis: columns 'constant', 'temperature-20' and 'temperature-25' are "
        "linearly dependent for any data (one is a weighted sum of the others); remove one",
    ),
    bad(
        "expression-2t-next-to-linear-time",
        """
        channels:
          - name: cell
            topic: lab/cell
            basis:
              - constant
              - expression: "2*t"
              - polynomial: {of: t, degree: 1}
        """,
        "4: channels[0].basis: columns '2*t' and 't' are linearly dependent for any data "
        "(one is a multiple of the other); remove one",
    ),
    bad(
        "dependent-gain-basis",
        """
        channels:
          - name: cell
            topic: lab/cell
            basis: [constant]
            gain: [constant, constant]
            inputs: {reference: {field: check_value}}
            learn: {mode: reference}
        """,
        "5: channels[0].gain: columns 'constant' and 'constant' are linearly dependent for "
        "any data (one is a multiple of the other); remove one",
    ),
    # --- expressions ------------------------------------------------------------------------
    bad(
        "expression-injection-attempt",
        """
        channels:
          - name: cell
            topic: lab/cell
            basis:
              - constant
              - expression: "__import__('os').system('x')"
        """,
        '6: channels[0].basis[1].expression: character "\'" at position 12 is not part of the '
        "expression language; use numbers, durations (7d), names, + - * / ^ and parentheses",
    ),
    bad(
        "expression-calls-unknown-function",
        """
        channels:
          - name: cell
            topic: lab/cell
            basis: [constant, expression: "__import__(t)"]
        """,
        "4: channels[0].basis[1].expression: unknown function '__import__'; the functions are "
        "abs, atan, cos, cosh, exp, expm1, log, log10, log1p, sin, sinh, sqrt, tan, tanh",
    ),
    # --- times ------------------------------------------------------------------------------
    bad(
        "step-date-without-time",
        """
        channels:
          - name: cell
            topic: lab/cell
            basis:
              - constant
              - step: {of: t, at: 2026-05-01}
        """,
        "6: channels[0].basis[1].step.at: 2026-05-01 is a date without a time; "
        "write 2026-05-01T00:00:00Z",
    ),
    bad(
        "step-time-without-zone",
        """
        channels:
          - name: cell
            topic: lab/cell
            basis:
              - constant
              - step: {of: t, at: "2026-05-01T00:00:00"}
        """,
        "6: channels[0].basis[1].step.at: '2026-05-01T00:00:00' has no zone; append Z for UTC "
        "or an offset like +02:00",
    ),
    # --- YAML itself ------------------------------------------------------------------------
    bad(
        "yaml-syntax-error",
        """
        channels:
          - name: cell
            topic: lab/cell
            basis: [constant
        broker: {}
        """,
        "5: YAML syntax error: expected ',' or ']', but got ':'; check the brackets and "
        "indentation from line 4 on",
    ),
    bad(
        "yaml-tab-indent",
        "channels:\n\t- {name: cell, topic: lab/cell, basis: [constant]}\n",
        "2: YAML syntax error: found character '\\t' that cannot start any token; indent with "
        "spaces; YAML does not allow tabs",
    ),
    bad(
        "key-given-twice",
        """
        channels:
          - name: cell
            topic: lab/cell
            name: other
            basis: [constant]
        """,
        "4: channels[0].name: key given twice; keep one",
    ),
    bad(
        "unquoted-placeholder-in-flow-mapping",
        """
        channels:
          - name: "{1}-no2"
            topic: site/+/no2
            basis: [constant]
            inputs:
              temperature: {topic: site/{1}/met/temp}
        """,
        "6: YAML syntax error: expected ',' or '}', but got '{'; inside { } a placeholder like "
        '{1} must be quoted: topic: "site/{1}/met/temp"',
    ),
    bad(
        "list-at-the-top",
        """
        - constant
        - polynomial: {of: t, degree: 1}
        """,
        "1: (top): a config is a mapping of sections such as `broker:` and `channels:`, got a "
        "list; a bare list of basis terms is a basis file for `zeroline fit --basis`",
    ),
    bad(
        "alias-containing-itself",
        """
        basis_sets:
          loop: &loop [constant, *loop]
        channels:
          - {name: cell, topic: lab/cell, basis: loop}
        """,
        "2: an alias refers to the collection it is in",
    ),
    bad(
        "merge-key",
        """
        common: &common {topic: lab/cell, basis: [constant]}
        channels:
          - <<: *common
            name: cell
        """,
        "3: merge keys (<<) are not supported; write the keys out",
    ),
    # --- several problems at once -----------------------------------------------------------
    bad(
        "several-problems-sorted-by-line",
        """
        channels:
          - name: cell
            topic: lab/cell
            basis: [constant, constant]
            memory: {half_life: 10x}
            alerts: {drift_limit: yes}
          - name: other
            topic: lab/other
            basis: nowhere
        broker:
          port: 70000
        brokr: {}
        """,
        "4: channels[0].basis: columns 'constant' and 'constant' are linearly dependent for "
        "any data (one is a multiple of the other); remove one",
        f"5: channels[0].memory.half_life: '10x' is not a duration; {DURATION_HINT}",
        "6: channels[0].alerts.drift_limit: expected a number, got true",
        "9: channels[1].basis: unknown basis set 'nowhere'; basis_sets: none defined",
        "11: broker.port: must be at most 65535, got 70000",
        "12: brokr: unknown key 'brokr'; did you mean 'broker'?",
    ),
]


@pytest.mark.parametrize("case", CASES, ids=[case.id for case in CASES])
def test_bad_config_prints_exactly_these_lines(case: Bad) -> None:
    """Every expected problem line, in line order, and nothing else."""
    assert problem_lines(case.yaml) == list(case.expected)


def test_there_are_enough_distinct_cases() -> None:
    """The issue asks for 30+ bad configs; ids must be unique so none hides another."""
    ids = [case.id for case in CASES]
    assert len(ids) >= 35
    assert len(set(ids)) == len(ids)


def test_every_problem_line_starts_with_file_line_and_a_key_path() -> None:
    """`file:line: key.path: message` — YAML-level errors have no key path but still a line."""
    for case in CASES:
        for line in case.expected:
            name, number, rest = line.split(":", 2)
            assert name == NAME and number.isdigit() and int(number) >= 1, line
            assert rest.startswith(" ") and len(rest.strip()) > 10, line


def test_problems_are_sorted_by_line_whatever_order_they_were_found_in() -> None:
    """Problems are collected section by section but printed in file order."""
    for case in CASES:
        numbers = [int(line.split(":")[1]) for line in case.expected]
        assert numbers == sorted(numbers), case.id


def test_alias_expansion_is_bounded() -> None:
    """Nested aliases that would expand to millions of values stop with one line, fast."""
    levels = ["a0: &a0 [constant, constant, constant, constant, constant, constant]"]
    for i in range(1, 9):
        previous = f"*a{i - 1}"
        levels.append(f"a{i}: &a{i} [{', '.join([previous] * 6)}]")
    text = "\n".join(levels) + "\nchannels: []\n"
    lines = problem_lines(text)
    assert len(lines) == 1
    assert lines[0].startswith(f"{NAME}:")
    assert lines[0].endswith(
        "aliases expand to more than 100000 values; write the config without nested aliases"
    )


def test_exponent_numbers_without_a_dot_are_numbers() -> None:
    """YAML 1.1 reads 1e8 as text; the loader reads it as the number a user means."""
    config = parse_config(
        textwrap.dedent(
            """
            channels:
              - name: cell
                topic: lab/cell
                basis: [constant]
                correction: {ill_conditioned_above: 1e6}
                learn: {huber_k: 2e0}
            """
        ),
        NAME,
    )
    assert config.channels[0].ill_conditioned_above == 1e6
    assert config.channels[0].learn.huber_k == 2.0


def test_a_quoted_exponent_number_stays_text() -> None:
    """Quotes still mean text, so a quoted number is reported, with the fix."""
    lines = problem_lines(
        """
        channels:
          - name: cell
            topic: lab/cell
            basis: [constant]
            correction: {ill_conditioned_above: "1e6"}
        """
    )
    assert lines == [
        f"{NAME}:5: channels[0].correction.ill_conditioned_above: expected a number, "
        "got '1e6'; remove the quotes: 1e6"
    ]
