"""Duration parsing and formatting: "90s", "15m", "36h", "7d", ISO 8601 ("P7D") or timedelta."""

from __future__ import annotations

import datetime as dt

from pydantic import TypeAdapter, ValidationError
from pytimeparse import parse as _parse_short

_ISO = TypeAdapter(dt.timedelta)
_UNITS = (("d", 86_400_000_000), ("h", 3_600_000_000), ("m", 60_000_000), ("s", 1_000_000))


def parse_duration(value: object, *, what: str = "duration") -> dt.timedelta:
    """Parse a duration; raise ValueError naming the value and the accepted forms."""
    if isinstance(value, dt.timedelta):
        result = value
    elif isinstance(value, str) and value.strip():
        text = value.strip()
        if text.upper().lstrip("-").startswith("P"):
            try:
                result = _ISO.validate_python(text.upper())
            except ValidationError:
                result = None  # type: ignore[assignment]  # reported below
        else:
            seconds = _parse_short(text)
            result = None if seconds is None else dt.timedelta(seconds=seconds)  # type: ignore[assignment]
        if result is None:
            msg = (
                f"{what} {value!r} is not a duration; write e.g. '90s', '15m', '36h', '7d' "
                "or ISO 8601 like 'P7D'"
            )
            raise ValueError(msg)
    else:
        msg = f"{what} {value!r} is not a duration; write a string like '7d' or a timedelta"
        raise ValueError(msg)
    if result < dt.timedelta(0):
        msg = f"{what} {value!r} is negative; durations must be zero or more"
        raise ValueError(msg)
    return result


def to_micros(value: dt.timedelta) -> int:
    """Whole microseconds in a timedelta (the resolution every engine compares at)."""
    return (value.days * 86_400 + value.seconds) * 1_000_000 + value.microseconds


def format_duration(value: dt.timedelta) -> str:
    """The shortest text form that parses back to the same duration ('7d', '36h', 'PT0.5S')."""
    micros = to_micros(value)
    if micros == 0:
        return "0s"
    for suffix, size in _UNITS:
        if micros % size == 0:
            return f"{micros // size}{suffix}"
    return str(_ISO.dump_python(value, mode="json"))
