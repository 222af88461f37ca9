"""The `<prefix>/<channel>/corrected` payload as bytes, without a general JSON encoder.

The daemon publishes one of these per reading, so its encoding is on the hot path:
`json.dumps(result.to_json())` builds a dict and walks it generically (~10 µs here); the
payload's shape is fixed, so it is written directly. The bytes are exactly those of
`json.dumps(result.to_json(), allow_nan=False)` (tested on random results): floats by
`float.__repr__` as the json module does, non-finite numbers as null, and the quality
words and flags, which are ASCII identifiers of our own, as plain quoted strings.
"""

from __future__ import annotations

import json
import math
import re

from zeroline.channel import Corrected

_IDENTIFIER = re.compile(r"[a-z_]+")


def _number(value: float | None) -> str:
    if value is None:
        return "null"
    number = float(value)  # numpy scalars too: their repr is not JSON
    return float.__repr__(number) if math.isfinite(number) else "null"


def _word(text: str) -> str:
    # Every quality word and flag is an identifier; anything else takes the general path.
    return f'"{text}"' if _IDENTIFIER.fullmatch(text) else json.dumps(text)


def corrected_payload(result: Corrected) -> bytes:
    """`json.dumps(result.to_json(), allow_nan=False).encode()`, fast."""
    time = result.time
    time_text = float.__repr__(float(time)) if type(time) is not int else str(time)
    raw = result.raw
    raw_text = float.__repr__(float(raw)) if type(raw) is not int else str(raw)
    flags = ", ".join(_word(flag) for flag in result.flags)
    return (
        f'{{"time": {time_text}, "raw": {raw_text}, '
        f'"corrected": {_number(result.corrected)}, "baseline": {_number(result.baseline)}, '
        f'"uncertainty": {_number(result.uncertainty)}, "quality": {_word(result.quality)}, '
        f'"quality_code": {int(result.quality_code)}, "flags": [{flags}], '
        f'"gain": {_number(result.gain)}, "drift_rate": {_number(result.drift_rate)}}}'
    ).encode()
