"""The fast corrected payload equals the json module's encoding of `Corrected.to_json`."""

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
def test_same_bytes_as_json_dumps(
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
    expected = json.dumps(result.to_json(), allow_nan=False).encode()
    assert corrected_payload(result) == expected


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
    assert json.loads(corrected_payload(result))["baseline"] == 1.5
    assert json.loads(corrected_payload(result))["uncertainty"] is None
