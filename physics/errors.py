"""The one error family for bad input.

Every check on user input in ``physics`` raises :class:`InputError` (a
``ValueError``), whose message says what was wrong, what is allowed and how
to fix it. Callers (the page, the command line) catch ``InputError`` and show
the message as it is.
"""

from __future__ import annotations

import numpy as np

__all__ = ["InputError", "WavelengthRangeError", "require_finite"]


class InputError(ValueError):
    """Bad input: the message says what, the allowed range, and how to fix it."""


class WavelengthRangeError(InputError):
    """A wavelength lies outside the data range of a material or a spectrum."""


def require_finite(name: str, value, *, minimum=None, maximum=None,
                   min_inclusive: bool = True, max_inclusive: bool = True,
                   unit: str = "") -> np.ndarray:
    """Return ``value`` as a float array after checking it is finite and in range.

    Parameters
    ----------
    name : str
        The argument's name, quoted in the message.
    value : array_like
        Number or array of numbers.
    minimum, maximum : float, optional
        Allowed bounds.
    min_inclusive, max_inclusive : bool
        Whether each bound itself is allowed.
    unit : str
        Unit quoted in the message (e.g. ``"nm"``).

    Returns
    -------
    numpy.ndarray
        ``value`` as float64.

    Raises
    ------
    InputError
        When a value is not a real number, is NaN or infinite, or is out of range.
    """
    try:
        arr = np.asarray(value, dtype=float)
    except (TypeError, ValueError):
        raise InputError(
            f"{name} must be a real number or an array of real numbers, got {value!r}."
        ) from None
    u = f" {unit}" if unit else ""
    if arr.size and not np.all(np.isfinite(arr)):
        bad = arr[~np.isfinite(arr)].ravel()[0]
        raise InputError(f"{name} contains {bad}; give finite numbers{u}.")
    if minimum is not None and arr.size:
        low = arr.min()
        if low < minimum or (not min_inclusive and low == minimum):
            op = ">=" if min_inclusive else ">"
            raise InputError(f"{name} = {low:g}{u} is not allowed; it must be {op} {minimum:g}{u}.")
    if maximum is not None and arr.size:
        high = arr.max()
        if high > maximum or (not max_inclusive and high == maximum):
            op = "<=" if max_inclusive else "<"
            raise InputError(f"{name} = {high:g}{u} is not allowed; it must be {op} {maximum:g}{u}.")
    return arr
