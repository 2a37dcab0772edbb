"""Validation of scalar arguments: one exception type per kind of mistake.

A value of the wrong kind raises :class:`TypeError`: not a real number, a
bool (``True`` is not a noise level), a non-integer where a count is needed,
or not a pair of integers where an image size is needed. A value of the right
kind that is out of range raises :class:`ValueError`: NaN or infinite, zero or
negative where a positive value is needed, outside an interval, not one of
the valid choices. Every message names the argument, says what was expected
and shows what was received, so the same mistake reads the same everywhere.
"""

from __future__ import annotations

import difflib
import math
import numbers
from collections.abc import Collection, Hashable, Iterable
from typing import Any


def is_real(value: Any) -> bool:
    """True for a real number (Python, numpy or fractions), False for bools."""
    return isinstance(value, numbers.Real) and not isinstance(value, bool)


def is_integer(value: Any) -> bool:
    """True for an integer (Python or numpy), False for bools."""
    return isinstance(value, numbers.Integral) and not isinstance(value, bool)


def _received(value: Any) -> str:
    return f"{value!r} ({type(value).__name__})"


def _real(value: Any, name: str, expected: str) -> float:
    """``float(value)``; TypeError unless ``value`` is a real number, ValueError unless finite."""
    if not is_real(value):
        raise TypeError(f"`{name}` must be {expected}, got {_received(value)}")
    result = float(value)
    if not math.isfinite(result):
        raise ValueError(f"`{name}` must be {expected}, got {value!r}")
    return result


def number(value: Any, name: str) -> float:
    """A finite real number, as a float."""
    return _real(value, name, "a finite real number")


def positive_number(value: Any, name: str) -> float:
    """A finite real number ``> 0``, as a float."""
    result = _real(value, name, "a positive finite number")
    if result <= 0:
        raise ValueError(f"`{name}` must be a positive finite number, got {value!r}")
    return result


def nonnegative_number(value: Any, name: str) -> float:
    """A finite real number ``>= 0``, as a float."""
    result = _real(value, name, "a non-negative finite number")
    if result < 0:
        raise ValueError(f"`{name}` must be a non-negative finite number, got {value!r}")
    return result


def number_in(
    value: Any,
    name: str,
    low: float,
    high: float,
    *,
    low_open: bool = False,
    high_open: bool = False,
) -> float:
    """A finite real number in the interval from ``low`` to ``high``, as a float.

    The interval is closed unless ``low_open`` / ``high_open`` say otherwise;
    an infinite end is always open (the number must be finite).
    """
    interval = (
        f"{'(' if low_open or low == -math.inf else '['}{low:g}, "
        f"{high:g}{')' if high_open or high == math.inf else ']'}"
    )
    expected = f"a finite number in {interval}"
    result = _real(value, name, expected)
    below = result <= low if low_open else result < low
    above = result >= high if high_open else result > high
    if below or above:
        raise ValueError(f"`{name}` must be {expected}, got {value!r}")
    return result


def _integer(value: Any, name: str, minimum: int, expected: str) -> int:
    if not is_integer(value):
        raise TypeError(f"`{name}` must be {expected}, got {_received(value)}")
    if value < minimum:
        raise ValueError(f"`{name}` must be {expected}, got {value!r}")
    return int(value)


def int_at_least(value: Any, name: str, minimum: int) -> int:
    """An integer ``>= minimum``, as an int."""
    return _integer(value, name, minimum, f"an integer >= {minimum}")


def positive_int(value: Any, name: str) -> int:
    """An integer ``>= 1``, as an int."""
    return _integer(value, name, 1, "a positive integer")


def nonnegative_int(value: Any, name: str) -> int:
    """An integer ``>= 0``, as an int."""
    return _integer(value, name, 0, "a non-negative integer")


def image_shape(value: Any, name: str) -> tuple[int, int]:
    """An image size ``(H, W)``: a pair of positive integers, as a tuple of ints.

    TypeError when ``value`` is not a sequence of integers (a number, a
    string, floats, bools); ValueError when it does not have two entries or an
    entry is below 1.
    """
    expected = "a pair of positive integers (H, W)"
    entries = tuple(value) if isinstance(value, Iterable) and not isinstance(value, str) else None
    if entries is None or not all(is_integer(entry) for entry in entries):
        raise TypeError(f"`{name}` must be {expected}, got {_received(value)}")
    if len(entries) != 2 or min(entries) < 1:
        raise ValueError(f"`{name}` must be {expected}, got {value!r}")
    return int(entries[0]), int(entries[1])


def unknown_message(what: str, value: Any, valid: Iterable[str]) -> str:
    """``unknown <what> <value>; valid: <sorted list>; did you mean <closest>?``.

    The closest match is :func:`difflib.get_close_matches` of ``str(value)``
    among the valid names; the hint is left out when nothing is close.
    """
    names = sorted(valid)
    close = difflib.get_close_matches(str(value), names, n=1)
    hint = f"; did you mean {close[0]!r}?" if close else ""
    return f"unknown {what} {value!r}; valid: {', '.join(map(repr, names))}{hint}"


def choice(value: Any, name: str, valid: Collection[str]) -> str:
    """``value`` when it is one of ``valid``; ValueError listing them (and the closest) otherwise."""
    if not isinstance(value, Hashable) or value not in valid:
        raise ValueError(unknown_message(f"`{name}`", value, valid))
    return value
