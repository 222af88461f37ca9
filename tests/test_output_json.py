"""The fast corrected payload is the document `Corrected.to_json` describes, in strict JSON
(the json module as the reference decoder)."""

from __future__ import annotations

import json
import math

from hypothesis import given
from hypothesis import strategies as st

from zeroline import quality as q
from zeroline.channel import Corrected
from zeroline.output_json import corrected_payload

FLAGS = [q.LEARNING, q.EXTRAPOLATING, q.INPUT_STALE, q.ILL_CONDITIONED, q.CAPPED]
numbers = st.floats(allow_nan=True, allow_infinity=True) | st.integers(-(10**6), 10**6).map(float)
optional = st.none() | numbers


@given(
    time=st.floats(0, 4e9, allow_nan=False) | st.integers(0, 4 * 10**9),
    raw=st.floats(allow_nan=False, allow_infinity=False) | st.integers(-(10**9), 10**9),
    corrected=optional,
    baseline=optional,
    uncertainty=optional,
    gain=optional,
    rate=optional,
    flags=st.lists(st.sampled_from(FLAGS), unique=True),
    quality=st.sampled_from(["ok", "learning", "input_stale", 'odd "word" ü']),
    code=st.integers(1, 9),
)
def test_same_document_as_to_json(
    time: float,
    raw: float,
    corrected: float | None,
    baseline: float | None,
    uncertainty: float | None,
    gain: float | None,
    rate: float | None,
    flags: list[str],
    quality: str,
    code: int,
) -> None:
    result = Corrected(
        time, raw, corrected, baseline, uncertainty, quality, code, tuple(flags), gain, rate, True
    )
    document = strict_loads(corrected_payload(result))
    expected = result.to_json()
    assert list(document) == list(expected)  # the same fields in the same order
    # repr, not ==: -0.0 must stay -0.0, and 1 must not become 1.0
    assert {k: repr(v) for k, v in document.items()} == {k: repr(v) for k, v in expected.items()}


def strict_loads(payload: bytes) -> dict[str, object]:
    """json.loads that refuses NaN and Infinity, which are not JSON."""

    def refuse(token: str) -> None:
        raise AssertionError(f"{token} in the payload")

    document = json.loads(payload, parse_constant=refuse)
    assert isinstance(document, dict)
    return document


def test_compact_utf8() -> None:
    result = Corrected(1.0, 2.0, 0.5, 1.5, 0.1, "ok ü", 1, (q.LEARNING,), None, 1e-9, True)
    assert (
        corrected_payload(result)
        == (
            '{"time":1.0,"raw":2.0,"corrected":0.5,"baseline":1.5,"uncertainty":0.1,'
            '"quality":"ok ü","quality_code":1,"flags":["learning"],"gain":null,"drift_rate":1e-9}'
        ).encode()
    )


def test_numpy_scalars_are_plain_numbers() -> None:
    import numpy as np

    result = Corrected(
        1.0,
        2.0,
        np.float64(0.5),
        np.float64(1.5),
        np.float64(math.inf),
        "ok",
        1,
        (),
        None,
        np.float64(1e-9),
        True,
    )
    document = strict_loads(corrected_payload(result))
    assert document["corrected"] == 0.5 and document["baseline"] == 1.5
    assert document["uncertainty"] is None
