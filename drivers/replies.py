"""Parsing of numbers in device replies; a bad field is a transient fault."""
from __future__ import annotations

from drivers.base import TransientDeviceError


def parse_steps(text: str) -> int:
    """'1234', '+1234', '-5', '1234.0' -> int; ValueError for non-integral values."""
    value = float(text)
    if value != value or abs(value) == float("inf") or value != int(value):
        raise ValueError(f"{text!r} is not a whole number of steps")
    return int(value)


def parse_value(text: str, where: str, sent: str, line: str) -> float:
    """A finite float from a reply field, else TransientDeviceError."""
    try:
        value = float(text)
    except ValueError:
        raise TransientDeviceError(f"{where}: sent {sent!r}, got {line!r}: {text!r} is not a number") from None
    if value != value or value in (float("inf"), float("-inf")):
        raise TransientDeviceError(f"{where}: sent {sent!r}, got {line!r}: not a finite number")
    return value


def template_fields(template: str) -> set[str] | None:
    """Field names of a str.format template ('MA {steps:+d}' -> {'steps'}); None if malformed."""
    import string

    try:
        return {name for _, name, _, _ in string.Formatter().parse(template) if name is not None}
    except ValueError:
        return None
