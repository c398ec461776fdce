"""Numbers as a scientist writes them: a value rounded to its uncertainty (pure, no dependencies)."""

from __future__ import annotations

import math


def with_error(value: float, error: float | None, sep: str = " +/- ") -> str:
    """``value`` and ``error`` rounded to two significant digits of the error.

    >>> with_error(121.70003, 0.0002629)
    '121.70003 +/- 0.00026'
    >>> with_error(0.2399921, 2.461e-06)
    '0.2399921 +/- 0.0000025'
    >>> with_error(12345.6, 1234.0)
    '12300 +/- 1200'
    >>> with_error(1.5, float("nan"))
    '1.5 +/- nan'
    """
    if error is None or not math.isfinite(error) or error <= 0 or not math.isfinite(value):
        e = "(no error)" if error is None else f"{error:g}"
        return f"{value:.6g}{sep}{e}" if error is not None else f"{value:.6g} {e}"
    exp = math.floor(math.log10(error))
    digits = 1 - exp  # decimals that keep two significant digits of the error
    if digits > 0:
        return f"{value:.{digits}f}{sep}{error:.{digits}f}"
    step = 10.0 ** (-digits)
    return f"{round(value / step) * step:.0f}{sep}{round(error / step) * step:.0f}"
