"""Quality flags of a corrected reading, and their QARTOD codes.

A reading can carry several flags at once; `quality` (the contract field) is the most
severe of them. The numeric code follows the open QARTOD convention used for real-time
ocean and water-quality data: 1 pass, 2 not evaluated, 3 suspect, 4 fail, 9 missing.
"""

from __future__ import annotations

from collections.abc import Iterable

OK = "ok"
LEARNING = "learning"  # not enough information yet: the correction is not evaluated
EXTRAPOLATING = "extrapolating"  # no useful sample for longer than the channel allows
INPUT_STALE = "input_stale"  # a covariate is stale (its last value was used) or missing
ILL_CONDITIONED = "ill_conditioned"  # the model's terms are nearly dependent on recent data
CAPPED = "capped"  # the correction hit its configured cap (extra flag, not a quality value)

QARTOD_PASS, QARTOD_NOT_EVALUATED, QARTOD_SUSPECT, QARTOD_FAIL, QARTOD_MISSING = 1, 2, 3, 4, 9

#: Most severe first: the first flag present becomes the reading's `quality`.
SEVERITY_ORDER = (ILL_CONDITIONED, INPUT_STALE, EXTRAPOLATING, LEARNING)

_CODES = {
    OK: QARTOD_PASS,
    LEARNING: QARTOD_NOT_EVALUATED,
    EXTRAPOLATING: QARTOD_SUSPECT,
    INPUT_STALE: QARTOD_SUSPECT,
    ILL_CONDITIONED: QARTOD_FAIL,
}

QUALITY_VALUES = (OK, *SEVERITY_ORDER)


def summarise(flags: Iterable[str], *, missing: bool = False) -> tuple[str, int]:
    """(quality, QARTOD code) for a set of flags; `missing` when no correction was possible."""
    if not missing and isinstance(flags, (list, tuple)) and not flags:
        return OK, QARTOD_PASS  # the common case, once per reading
    present = set(flags)
    quality = next((flag for flag in SEVERITY_ORDER if flag in present), OK)
    if missing:
        return quality, QARTOD_MISSING
    code = _CODES[quality]
    if quality == OK and CAPPED in present:
        code = QARTOD_SUSPECT
    return quality, code
