"""Errors raised by ``labbook.science`` and the small input checks that raise them.

Every error is a :class:`ValueError` subclass, so callers that only know ``ValueError``
still catch it; the API layer turns :class:`ScienceInputError` into a 400/422 answer and
uses :attr:`ScienceInputError.argument` (or :attr:`QuantityError.field`) to name the field.
"""

from __future__ import annotations

import math
from numbers import Real


class ScienceInputError(ValueError):
    """An argument of a science function is invalid (wrong sign, NaN, unknown name, ...).

    ``argument`` is the name of the offending argument (or ``None`` if the problem spans
    several arguments).
    """

    def __init__(self, message: str, *, argument: str | None = None) -> None:
        super().__init__(message)
        self.argument = argument


class QuantityError(ScienceInputError):
    """A quantity string or number could not be read in the expected unit.

    ``field`` names the input field (as the API or form calls it) and ``expected`` is the
    unit the field is stored in, so the message can say what was expected.
    """

    def __init__(self, message: str, *, field: str, expected: str | None = None) -> None:
        super().__init__(message, argument=field)
        self.field = field
        self.expected = expected


class UnknownNameError(ScienceInputError):
    """A gas, substrate, material or thermocouple type that the tables do not know."""


class OutOfRangeError(ScienceInputError):
    """A value outside the range where a reference function or convention is defined."""


# --- checks -------------------------------------------------------------------------------
# Each returns the value as a float so callers can write ``p = require_positive(p, "p")``.


def require_finite(value: object, name: str) -> float:
    """Return ``value`` as a float; raise if it is not a real, finite number."""
    # bool is an int subclass; True as a pressure is a bug in the caller, not a number.
    if isinstance(value, bool) or not isinstance(value, Real):
        raise ScienceInputError(
            f"{name} must be a real number, got {type(value).__name__} {value!r}",
            argument=name,
        )
    number = float(value)
    if math.isnan(number):
        raise ScienceInputError(f"{name} is NaN (not a number)", argument=name)
    if math.isinf(number):
        raise ScienceInputError(f"{name} is infinite ({number})", argument=name)
    return number


def finite_result(value: float, name: str, *inputs: str) -> float:
    """Return a computed ``value``; raise when finite inputs overflowed it to infinity."""
    if not math.isfinite(value):
        raise OutOfRangeError(
            f"{name} is beyond the range of a float ({value}) for the given " + ", ".join(inputs),
            argument=inputs[0] if inputs else None,
        )
    return value


def require_positive(value: object, name: str) -> float:
    """Return ``value`` as a float; raise unless it is finite and > 0."""
    number = require_finite(value, name)
    if number <= 0.0:
        raise ScienceInputError(f"{name} must be greater than zero, got {number!r}", argument=name)
    return number


def require_non_negative(value: object, name: str) -> float:
    """Return ``value`` as a float; raise unless it is finite and >= 0."""
    number = require_finite(value, name)
    if number < 0.0:
        raise ScienceInputError(f"{name} must not be negative, got {number!r}", argument=name)
    return number
