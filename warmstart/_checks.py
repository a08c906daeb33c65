"""One validator for counts, numbers in a range, fractions and choices.

Every message has the same shape::

    <name> must be <what is allowed>, got <value received>; <how to fix>

for instance ``n_candidates must be a whole number >= 1, got 0; use 1 or
more``. Each check returns the value in its plain Python type, so a caller
can write ``self.n = check_count("n", n, minimum=1)``. The error class is
the caller's (``error=SearchError`` in :mod:`warmstart.search`), so every
package keeps raising its own error type.
"""

from __future__ import annotations

import math
from typing import Any, Sequence

import numpy as np

from warmstart.errors import WarmstartError

__all__ = ["check_count", "check_number", "check_fraction", "check_choice", "invalid"]


def invalid(name: str, allowed: str, value: Any, fix: str,
            error: type[Exception] = WarmstartError) -> Exception:
    """The error for a bad argument, in the one text every check uses.

    Parameters
    ----------
    name : str
        The argument's name, as the caller wrote it.
    allowed : str
        What is allowed, e.g. ``"a whole number >= 1"``.
    value : object
        The value received (shown with ``repr``).
    fix : str
        How to fix it, e.g. ``"use 1 or more"``.
    error : exception class, default WarmstartError
        The class of the returned error.

    Returns
    -------
    Exception
        An instance of ``error``, to raise.
    """
    return error(f"{name} must be {allowed}, got {value!r}; {fix}")


def _is_number(value: Any) -> bool:
    return not isinstance(value, (bool, np.bool_)) and isinstance(value, (int, float, np.integer, np.floating))


def check_count(name: str, value: Any, minimum: int = 0, maximum: int | None = None, *,
                error: type[Exception] = WarmstartError) -> int:
    """``value`` as an ``int`` if it is a whole number in ``[minimum, maximum]``.

    Booleans and floats are refused, even ``3.0`` (a count written as a
    float is usually a mistake upstream).

    Parameters
    ----------
    name : str
    value : object
    minimum : int, default 0
    maximum : int, optional
        No upper bound when ``None``.
    error : exception class, default WarmstartError

    Returns
    -------
    int

    Examples
    --------
    >>> check_count("budget", 10, minimum=1)
    10
    """
    whole = not isinstance(value, (bool, np.bool_)) and isinstance(value, (int, np.integer))
    if whole and value >= minimum and (maximum is None or value <= maximum):
        return int(value)
    if maximum is None:
        allowed, fix = f"a whole number >= {minimum}", f"use {minimum} or more"
    else:
        allowed, fix = f"a whole number from {minimum} to {maximum}", f"use a value from {minimum} to {maximum}"
    top = math.inf if maximum is None else maximum
    if not whole and _is_number(value) and math.isfinite(value) and float(value).is_integer() \
            and minimum <= value <= top:
        fix = f"write it as an integer ({int(value)})"
    raise invalid(name, allowed, value, fix, error)


def _interval(low: float, high: float, low_open: bool, high_open: bool) -> str:
    return f"{'(' if low_open else '['}{low:g}, {high:g}{')' if high_open else ']'}"


def check_number(name: str, value: Any, low: float = -math.inf, high: float = math.inf, *,
                 low_open: bool = False, high_open: bool = False, fix: str | None = None,
                 error: type[Exception] = WarmstartError) -> float:
    """``value`` as a ``float`` if it is a finite number in the given interval.

    Parameters
    ----------
    name : str
    value : object
    low, high : float, default -inf and inf
        Bounds of the interval.
    low_open, high_open : bool, default False
        Whether a bound itself is excluded.
    fix : str, optional
        How to fix a bad value (what the number means, a usual value);
        default: the allowed interval again.
    error : exception class, default WarmstartError

    Returns
    -------
    float

    Examples
    --------
    >>> check_number("xi", 0.01, low=0.0)
    0.01
    """
    if _is_number(value) and math.isfinite(value):
        v = float(value)
        above = v > low if low_open else v >= low
        below = v < high if high_open else v <= high
        if above and below:
            return v
    if math.isinf(low) and math.isinf(high):
        allowed = "a finite number"
    elif math.isinf(high):
        allowed = f"a number {'>' if low_open else '>='} {low:g}"
    elif math.isinf(low):
        allowed = f"a number {'<' if high_open else '<='} {high:g}"
    else:
        allowed = f"a number in {_interval(low, high, low_open, high_open)}"
    raise invalid(name, allowed, value, fix or f"use {allowed}", error)


def check_fraction(name: str, value: Any, upper: float = 1.0, *, fix: str | None = None,
                   error: type[Exception] = WarmstartError) -> float:
    """``value`` as a ``float`` if it lies in ``(0, upper]`` (a share of something).

    Parameters
    ----------
    name : str
    value : object
    upper : float, default 1.0
    fix : str, optional
        How to fix a bad value; default names the interval.
    error : exception class, default WarmstartError

    Returns
    -------
    float

    Examples
    --------
    >>> check_fraction("gamma", 0.25)
    0.25
    """
    return check_number(name, value, 0.0, upper, low_open=True, error=error,
                        fix=fix or f"use a share above 0 and at most {upper:g}")


def check_choice(name: str, value: Any, choices: Sequence[Any], *,
                 error: type[Exception] = WarmstartError) -> Any:
    """``value`` if it is one of ``choices``.

    Parameters
    ----------
    name : str
    value : object
    choices : sequence
        The allowed values, in the order the message lists them.
    error : exception class, default WarmstartError

    Returns
    -------
    object
        ``value`` itself.

    Examples
    --------
    >>> check_choice("objective", "nearest", ("nearest", "surrogate"))
    'nearest'
    """
    try:
        if value in choices:
            return value
    except TypeError:  # an unhashable value against a set of choices
        pass
    listed = ", ".join(repr(c) for c in choices)
    raise invalid(name, f"one of {listed}", value, f"pick one of {listed}", error)
