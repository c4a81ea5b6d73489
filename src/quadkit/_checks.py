"""One place that checks options and argument values.

Every public function checks its arguments through these helpers so that messages read the
same everywhere: ``decimate: factor=0 must be a positive integer``.
"""

from __future__ import annotations

import math
import numbers
from collections.abc import Iterable
from typing import Any

__all__ = [
    "check_option",
    "check_positive",
    "check_positive_int",
    "check_finite",
    "check_fraction",
]


def check_option(func: str, name: str, value: Any, allowed: Iterable[Any]) -> Any:
    """Return ``value`` if it is one of ``allowed``, else raise a ``ValueError`` listing them."""
    allowed = list(allowed)
    if value not in allowed:
        choices = ", ".join(repr(a) for a in allowed)
        raise ValueError(f"{func}: {name}={value!r} is not one of {choices}")
    return value


def check_finite(func: str, name: str, value: Any) -> float:
    """Return ``value`` as a float if it is a finite real number."""
    if isinstance(value, bool) or not isinstance(value, numbers.Real):
        raise ValueError(f"{func}: {name}={value!r} must be a real number")
    value = float(value)
    if not math.isfinite(value):
        raise ValueError(f"{func}: {name}={value!r} must be finite")
    return value


def check_positive(func: str, name: str, value: Any, *, allow_zero: bool = False) -> float:
    """Return ``value`` as a float if it is finite and positive (or zero when allowed)."""
    value = check_finite(func, name, value)
    if value < 0 or (value == 0 and not allow_zero):
        need = "non-negative" if allow_zero else "positive"
        raise ValueError(f"{func}: {name}={value!r} must be {need}")
    return value


def check_positive_int(func: str, name: str, value: Any, *, minimum: int = 1) -> int:
    """Return ``value`` as an int if it is an integer (of any integer type) >= ``minimum``."""
    if isinstance(value, bool) or not isinstance(value, numbers.Integral):
        if isinstance(value, float) and value.is_integer():
            raise ValueError(
                f"{func}: {name}={value!r} must be an integer, not a float "
                f"(write {int(value)})"
            )
        raise ValueError(f"{func}: {name}={value!r} must be an integer >= {minimum}")
    value = int(value)
    if value < minimum:
        what = "a positive integer" if minimum == 1 else f"an integer >= {minimum}"
        raise ValueError(f"{func}: {name}={value} must be {what}")
    return value


def check_fraction(func: str, name: str, value: Any, *, closed: bool = False) -> float:
    """Return ``value`` if it lies in (0, 1) (or [0, 1] when ``closed``)."""
    value = check_finite(func, name, value)
    ok = 0 <= value <= 1 if closed else 0 < value < 1
    if not ok:
        span = "[0, 1]" if closed else "(0, 1)"
        raise ValueError(f"{func}: {name}={value!r} must lie in {span}")
    return value
