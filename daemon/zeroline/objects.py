"""Copying an object's fields without running its constructor, for slotted classes too.

A channel template builds its estimator, alert rules and input cache once; every channel
(and every restored one) gets copies of them, which is what makes building 10,000 channels
cheap (see `zeroline.state_layout`). Hot-path classes use `__slots__` (less memory and
faster attribute access per channel), so the copy cannot simply update `__dict__`.
"""

from __future__ import annotations

import functools
from typing import TypeVar

T = TypeVar("T")


@functools.cache
def _slot_names(cls: type) -> tuple[str, ...]:
    names: list[str] = []
    for klass in cls.__mro__:
        slots = klass.__dict__.get("__slots__", ())
        for name in (slots,) if isinstance(slots, str) else slots:
            if name not in ("__dict__", "__weakref__") and name not in names:
                names.append(name)
    return tuple(names)


def shallow_copy(source: T) -> T:
    """A new object of `source`'s class holding the same values (not copies of them)."""
    cls: type[T] = type(source)
    new: T = object.__new__(cls)
    fields = getattr(source, "__dict__", None)
    if fields is not None:
        new.__dict__.update(fields)
    setter = object.__setattr__  # frozen classes too
    for name in _slot_names(cls):  # type: ignore[arg-type]  # a class is hashable
        try:
            value = getattr(source, name)
        except AttributeError:  # a slot never set
            continue
        setter(new, name, value)
    return new
