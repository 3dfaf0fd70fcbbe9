"""Checks of user arguments shared by psiloom's public functions (private module).

Each check returns the value converted to a plain Python type, or raises with a message that
names the argument and shows the value (``repr``). A value of the wrong *type* (a string, a
bool, a float where an integer is needed, a complex where a real is needed) raises
:class:`ArgumentTypeError`, which is both a ``TypeError`` and a ``ValueError`` so that callers
catching either keep working; a value of the right type but out of range raises ``ValueError``.

``bool`` is never accepted as a number (``True`` would otherwise pass as the integer 1).
Integers are Python ``int`` and NumPy integers (anything registered as ``numbers.Integral``);
integral floats such as ``2.0`` are refused, so a fractional value can never be truncated.
"""

from __future__ import annotations

import math
import numbers
from typing import Any, Iterable, cast

__all__ = [
    "ArgumentTypeError", "integer", "positive_int", "nonnegative_int", "finite_real",
    "positive_real", "finite_complex", "probability", "one_of", "boolean",
]


class ArgumentTypeError(TypeError, ValueError):
    """An argument of the wrong type (both a TypeError and, for older callers, a ValueError)."""


def integer(name: str, value: Any, minimum: int | None = None, maximum: int | None = None) -> int:
    """``value`` as an ``int`` within ``[minimum, maximum]`` (either bound optional)."""
    if isinstance(value, bool) or not isinstance(value, numbers.Integral):
        raise ArgumentTypeError(f"{name} must be an integer, got {value!r} ({type(value).__name__})")
    value = int(value)
    if minimum is not None and value < minimum:
        raise ValueError(f"{name} must be an integer >= {minimum}, got {value!r}")
    if maximum is not None and value > maximum:
        raise ValueError(f"{name} must be an integer <= {maximum}, got {value!r}")
    return value


def positive_int(name: str, value: Any) -> int:
    """``value`` as an ``int`` ≥ 1."""
    if isinstance(value, bool) or not isinstance(value, numbers.Integral):
        raise ArgumentTypeError(f"{name} must be a positive integer, got {value!r} ({type(value).__name__})")
    if value < 1:
        raise ValueError(f"{name} must be a positive integer, got {value!r}")
    return int(value)


def nonnegative_int(name: str, value: Any) -> int:
    """``value`` as an ``int`` ≥ 0."""
    if isinstance(value, bool) or not isinstance(value, numbers.Integral):
        raise ArgumentTypeError(
            f"{name} must be a non-negative integer, got {value!r} ({type(value).__name__})"
        )
    if value < 0:
        raise ValueError(f"{name} must be a non-negative integer, got {value!r}")
    return int(value)


def finite_real(name: str, value: Any, minimum: float | None = None, maximum: float | None = None) -> float:
    """``value`` as a finite ``float`` within ``[minimum, maximum]`` (either bound optional).

    Accepts Python and NumPy reals and 0-d real arrays; refuses bools, strings and complex
    numbers (even with zero imaginary part: the caller asked for a real).
    """
    if hasattr(value, "ndim") and getattr(value, "ndim") == 0 and hasattr(value, "item"):
        value = value.item()
    if isinstance(value, bool) or not isinstance(value, numbers.Real):
        raise ArgumentTypeError(f"{name} must be a real number, got {value!r} ({type(value).__name__})")
    value = float(value)
    if not math.isfinite(value):
        raise ValueError(f"{name} must be finite, got {value!r}")
    if minimum is not None and value < minimum:
        raise ValueError(f"{name} must be >= {minimum}, got {value!r}")
    if maximum is not None and value > maximum:
        raise ValueError(f"{name} must be <= {maximum}, got {value!r}")
    return value


def positive_real(name: str, value: Any) -> float:
    """``value`` as a finite ``float`` > 0."""
    value = finite_real(name, value)
    if not value > 0:
        raise ValueError(f"{name} must be > 0, got {value!r}")
    return value


def finite_complex(name: str, value: Any) -> complex:
    """``value`` (real or complex, Python or NumPy, or a 0-d array) as a finite ``complex``."""
    if hasattr(value, "ndim") and getattr(value, "ndim") == 0 and hasattr(value, "item"):
        value = value.item()
    if isinstance(value, bool) or not isinstance(value, numbers.Number):
        raise ArgumentTypeError(f"{name} must be a number, got {value!r} ({type(value).__name__})")
    value = complex(cast(Any, value))  # a numbers.Number; typeshed gives Number no __complex__
    if not (math.isfinite(value.real) and math.isfinite(value.imag)):
        raise ValueError(f"{name} must be finite, got {value!r}")
    return value


def probability(name: str, value: Any, closed: bool = False) -> float:
    """``value`` as a ``float`` in the open interval (0, 1) (``[0, 1]`` when ``closed``)."""
    value = finite_real(name, value)
    inside = 0.0 <= value <= 1.0 if closed else 0.0 < value < 1.0
    if not inside:
        interval = "[0, 1]" if closed else "(0, 1)"
        raise ValueError(f"{name} must lie in {interval}, got {value!r}")
    return value


def boolean(name: str, value: Any, also: str | None = None) -> bool:
    """``value`` as a ``bool``: only ``True``/``False`` (Python or NumPy), never 0/1, strings or NaN.
    ``also`` names a further value the caller accepts itself (for the message, e.g. ``"'auto'"``)."""
    if hasattr(value, "ndim") and getattr(value, "ndim") == 0 and hasattr(value, "item") \
            and getattr(getattr(value, "dtype", None), "kind", None) == "b":
        value = value.item()
    if not isinstance(value, bool):
        allowed = "True or False" if also is None else f"True, False or {also}"
        raise ArgumentTypeError(f"{name} must be {allowed}, got {value!r} ({type(value).__name__})")
    return value


def one_of(name: str, value: Any, choices: Iterable[Any]) -> Any:
    """``value`` if it equals one of ``choices`` (compared with ``==``, same type family)."""
    choices = tuple(choices)
    for choice in choices:
        if type(value) is type(choice) and value == choice:
            return value
        if (isinstance(choice, numbers.Number) and isinstance(value, numbers.Number)
                and not isinstance(value, bool) and not isinstance(choice, bool) and value == choice):
            return value
    raise ValueError(f"{name} must be one of {', '.join(repr(c) for c in choices)}; got {value!r}")
