r"""Numbers as a paper prints them: a value rounded to its error, upper limits, plain values.

A value with a standard error is printed to the decimal place of the error, and the error to one or
two significant digits by the rule of the Particle Data Group: of the error's three leading digits,
100 to 354 keep two significant digits, 355 to 949 keep one, and 950 to 999 are rounded up to 1000
and keep two (Particle Data Group, Review of Particle Physics, Introduction, section "Rounding";
the same rule in every table, the figures and the report). An error that could not be estimated
(NaN) is ``n/a``, never 0; an error of exactly 0 (a torsion that never left its state) is printed
as ``± 0`` beside the value to four significant digits. A rate with no observed event is an upper
limit: ``< 13 (95 %)``.

Examples
--------
>>> format_value_error(0.43217, 0.0234)
'0.432 ± 0.023'
>>> format_value_error(0.43217, 0.0634)
'0.43 ± 0.06'
>>> format_value_error(152.3, 0.97)
'152.3 ± 1.0'
>>> format_value_error(12345.0, 432.0)
'12300 ± 400'
>>> format_value_error(0.5, float("nan"))
'0.5 ± n/a'
>>> format_upper_limit(12.64)
'< 13 (95 %)'
"""

from __future__ import annotations

import math

import numpy as np


def _finite(x):
    try:
        x = float(x)
    except (TypeError, ValueError):
        return None
    return x if math.isfinite(x) else None


def error_digits(err):
    """``(decimals, rounded error)``: the decimal place to round to (negative: tens, hundreds)
    and the error rounded to one or two significant digits (the PDG rule of the module notes)."""
    err = abs(float(err))
    exponent = math.floor(math.log10(err))
    leading = int(round(err / 10 ** (exponent - 2)))   # the three leading digits, 100..1000
    if leading >= 1000:
        leading, exponent = 100, exponent + 1
    if leading < 355:
        decimals, digits = 1 - exponent, int(round(leading / 10.0))            # two significant digits
    elif leading < 950:
        decimals, digits = -exponent, int(round(leading / 100.0))              # one
    else:
        decimals, digits = -exponent, 10                # 950..999 -> 1000, two significant digits
    return decimals, digits * 10.0 ** (-decimals) if decimals <= 0 else digits / 10.0 ** decimals


def _fixed(value, decimals):
    """``value`` rounded to ``decimals`` places (negative: to tens, hundreds), without "-0"."""
    v = round(float(value), decimals) + 0.0
    if v == 0:
        v = 0.0
    return f"{v:.{max(decimals, 0)}f}"


def format_value_error(value, err, sep=" ± "):
    """``value ± error``, the value rounded to the error (see the module notes); "–" for a
    missing value, ``value ± n/a`` where the error is unknown, ``value ± 0`` where it is 0."""
    v = _finite(value)
    if v is None:
        return "–"
    e = _finite(err)
    if e is None:
        return f"{format_plain(v, 3)}{sep}n/a"
    if e == 0:
        return f"{format_plain(v, 4)}{sep}0"
    decimals, rounded = error_digits(e)
    if abs(e) < 1e-4 or abs(v) >= 1e7:  # far from 1: a shared power of ten
        power = int(math.floor(math.log10(abs(v)))) if v else int(math.floor(math.log10(abs(e))))
        scale = 10.0 ** power
        d, _ = error_digits(e / scale)
        return f"({_fixed(v / scale, d)}{sep}{_fixed(e / scale, d)})e{power}"
    return f"{_fixed(v, decimals)}{sep}{_fixed(rounded, decimals)}"


def format_upper_limit(limit, level_percent=95):
    """An upper limit to two significant digits: ``< 13 (95 %)``; "–" when it is unknown."""
    x = _finite(limit)
    if x is None:
        return "–"
    return f"< {format_plain(x, 2)} ({level_percent:g} %)"


def format_plain(value, significant=3):
    """A value to ``significant`` digits, without exponent between 1e-4 and 1e7 and without
    trailing zeros ("–" for a missing value)."""
    v = _finite(value)
    if v is None:
        return "–"
    if v == 0:
        return "0"
    a = abs(v)
    if a < 1e-4 or a >= 1e7:
        return f"{v:.{max(significant - 1, 0)}e}"
    decimals = max(0, significant - 1 - int(math.floor(math.log10(a))))
    text = f"{round(v, decimals) + 0.0:.{decimals}f}"
    if "." in text:
        text = text.rstrip("0").rstrip(".")
    digits = significant - 1 - int(math.floor(math.log10(a)))
    if digits < 0:   # 12345 to 2 digits: 12000
        text = f"{round(v, digits) + 0.0:.0f}"
    return text


def format_rate(rate, err, count, ci_high, scale=1.0):
    """A rate constant as a table shows it: ``value ± error`` rounded to the error, or, with no
    observed event, its upper limit ``< x (95 %)``; ``scale`` converts the unit (1000: per ps to
    per ns)."""
    if count is not None and _finite(count) is not None and float(count) == 0:
        return format_upper_limit(_finite(ci_high) * scale if _finite(ci_high) is not None else None)
    r, e = _finite(rate), _finite(err)
    return format_value_error(None if r is None else r * scale, None if e is None else e * scale)


def column_decimals(errors):
    """One decimal place for a whole column: that of its smallest finite, non-zero error (so a
    column of values with errors lines up); None when no error is usable."""
    e = np.asarray([_finite(x) for x in errors if _finite(x)], dtype=float)
    e = e[e > 0]
    if not len(e):
        return None
    return error_digits(float(e.min()))[0]
