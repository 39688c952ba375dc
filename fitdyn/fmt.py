"""Numbers for people: values rounded to their uncertainty, intervals, units.

One set of helpers shared by the text summary (:meth:`fitdyn.analysis.Fit.summary`),
the notebook view and the HTML report, so the three always print a number the same
way.  The JSON result keeps full precision; only what a person reads is rounded.

Rule (common practice, no source): a value with an interval is written to the
decimal place of the second significant digit of the interval's width, and so are
the interval's ends.  A value without an interval keeps four significant digits.
An unbounded side is written ``∞``.
"""

from __future__ import annotations

import math
from typing import Any

__all__ = [
    "INF",
    "decimals",
    "num",
    "interval",
    "value_interval",
    "complex_value",
    "prob",
    "rate_unit",
    "with_unit",
    "time_constant",
]

#: How an unbounded side is written.
INF = "∞"

#: Significant digits of a value that has no interval.
PLAIN_DIGITS = 4


def _finite(v: Any) -> bool:
    try:
        return v is not None and math.isfinite(float(v))
    except (TypeError, ValueError):
        return False


def decimals(lo: Any, hi: Any) -> int | None:
    """Decimal places that keep two significant digits of the width ``hi - lo``.

    Returns None when the width is not a positive finite number (then the value
    keeps :data:`PLAIN_DIGITS` significant digits).  May be negative (round to
    tens, hundreds...).

    Examples
    --------
    >>> decimals(-0.2324, -0.1795)   # width 0.0529 -> 0.053
    3
    >>> decimals(280.0, 330.0)       # width 50 -> 50
    0
    """
    if not (_finite(lo) and _finite(hi)):
        return None
    width = abs(float(hi) - float(lo))
    if width <= 0 or not math.isfinite(width):
        return None
    return 1 - int(math.floor(math.log10(width)))


def num(v: Any, dec: int | None = None, digits: int = PLAIN_DIGITS) -> str:
    """One number: to ``dec`` decimal places, else to ``digits`` significant digits.

    None and NaN are ``-``; infinities are ``∞`` / ``-∞``.
    """
    if v is None:
        return "-"
    try:
        x = float(v)
    except (TypeError, ValueError):
        return str(v)
    if math.isnan(x):
        return "-"
    if math.isinf(x):
        return INF if x > 0 else "-" + INF
    if dec is None or abs(x) >= 1e7 or dec > 9:
        if dec is not None and x != 0:
            # scientific notation with the same last digit
            sig = max(1, int(math.floor(math.log10(abs(x)))) + 1 + dec)
            return f"{x:.{sig}g}"
        return f"{x:.{digits}g}"
    if dec <= 0:
        r = round(x, dec)
        return f"{r:.0f}" if r != 0 else "0"
    out = f"{x:.{dec}f}"
    if out.startswith("-") and float(out) == 0:
        out = out[1:]
    return out


def interval(iv: Any, dec: int | None = None) -> str:
    """``[lo, hi]`` with both ends to ``dec`` places (default: from the width)."""
    if iv is None:
        return ""
    lo, hi = iv
    if not (_finite(lo) or _finite(hi)):
        return ""
    if dec is None:
        dec = decimals(lo, hi)
    return f"[{num(lo, dec)}, {num(hi, dec)}]"


def value_interval(v: Any, iv: Any = None, unit: str | None = None) -> str:
    """``value [lo, hi] unit``, the value rounded to its interval's width."""
    dec = None if iv is None else decimals(*iv)
    text = num(v, dec)
    ivs = interval(iv, dec) if iv is not None else ""
    if ivs:
        text += " " + ivs
    if unit:
        text += " " + unit
    return text


def complex_value(z: complex, re_iv: Any = None, im_iv: Any = None) -> str:
    """``re ± im i``, each part rounded to its own interval (or 4 digits)."""
    z = complex(z)
    dr = None if re_iv is None else decimals(*re_iv)
    re = num(z.real, dr)
    if z.imag == 0:
        return re
    di = None if im_iv is None else decimals(*im_iv)
    sign = "+" if z.imag > 0 else "-"
    return f"{re} {sign} {num(abs(z.imag), di)}i"


def prob(p: Any) -> str:
    """A probability with two decimals (``-`` when missing).

    Never rounds to certainty or to impossibility: a probability strictly between 0
    and 0.005 is ``< 0.01`` and one strictly between 0.995 and 1 is ``> 0.99``.
    """
    if not _finite(p):
        return "-"
    x = float(p)
    if 0 < x < 0.005:
        return "< 0.01"
    if 0.995 <= x < 1:
        return "> 0.99"
    return f"{x:.2f}"


def rate_unit(time_unit: str | None) -> str:
    """Unit of A and of the eigenvalues: ``1/<time unit>`` (empty when unknown)."""
    return f"1/{time_unit}" if time_unit else ""


def with_unit(text: str, unit: str | None) -> str:
    """``text unit`` (just ``text`` without a unit)."""
    return f"{text} {unit}" if unit else text


def time_constant(tc: float, tc_iv: Any = None, re_iv: Any = None, unit: str | None = None) -> str:
    """A time constant ``1/|Re λ|`` with its interval.

    When the real part's interval contains 0 the time constant is unbounded and is
    written ``∞`` (with the lower end that the data do support), never as the point
    value: a large finite number there would be a false precision.
    """
    unbounded = not _finite(tc) or (
        re_iv is not None
        and _finite(re_iv[0])
        and _finite(re_iv[1])
        and float(re_iv[0]) <= 0 <= float(re_iv[1])
    )
    if unbounded:
        lo = None if tc_iv is None else tc_iv[0]
        if re_iv is None:
            return f"{INF} (zero real part)"
        if _finite(lo) and float(lo) > 0:
            dec = 1 - int(math.floor(math.log10(float(lo))))
            return with_unit(f"{INF} (unbounded: at least {num(lo, dec)}", unit) + (
                "; the real part's interval contains 0)"
            )
        return f"{INF} (unbounded: the real part's interval contains 0)"
    if tc_iv is not None and _finite(tc_iv[0]) and _finite(tc_iv[1]):
        return value_interval(tc, tc_iv, unit)
    return with_unit(num(tc), unit)
