"""The arcs of a state scheme given by a user (``[[state]]`` tables): checked to cover the circle
exactly once."""

from __future__ import annotations

from ..errors import SchemeError
from ..units import wrap_deg


def checked_arcs(states, where="scheme"):
    """``(label, from_deg, to_deg, width_deg)`` of every ``[[state]]`` table (a mapping with
    ``label``, ``from_deg`` and ``to_deg``), wrapped to (-180, 180] and sorted by their start;
    :class:`~dihedra.errors.SchemeError` naming ``where`` for a missing or unknown key, a
    non-number, an arc of zero width, and a gap or an overlap between the arcs."""
    if not states:
        raise SchemeError(f"{where}: no [[state]] tables; each needs label, from_deg and to_deg.")
    arcs = []
    for k, st in enumerate(states, start=1):
        missing = [key for key in ("label", "from_deg", "to_deg") if key not in st]
        extra = sorted(set(st) - {"label", "from_deg", "to_deg"})
        if missing or extra:
            detail = (f"missing {', '.join(missing)}" if missing else "") + \
                     ("; " if missing and extra else "") + \
                     (f"unknown {', '.join(extra)}" if extra else "")
            raise SchemeError(f"{where}: state {k}: {detail}; each state needs label, from_deg, to_deg.")
        try:
            lo, hi = float(st["from_deg"]), float(st["to_deg"])
        except (TypeError, ValueError):
            raise SchemeError(f"{where}: state {st['label']!r}: from_deg and to_deg must be numbers.") from None
        if not (-360 <= lo <= 360 and -360 <= hi <= 360):
            raise SchemeError(f"{where}: state {st['label']!r}: angles must lie within -360..360 degrees.")
        lo, hi = float(wrap_deg(lo)), float(wrap_deg(hi))
        length = (hi - lo) % 360.0
        if length == 0:
            raise SchemeError(f"{where}: state {st['label']!r} has zero width ({lo} to {hi} deg); "
                              "a state covering the whole circle is not a scheme.")
        arcs.append((str(st["label"]), lo, hi, length))
    arcs.sort(key=lambda r: r[1])
    total = sum(r[3] for r in arcs)
    for (la, _, hi_a, _), (lb, lo_b, _, _) in zip(arcs, arcs[1:] + arcs[:1]):
        if abs(((hi_a - lo_b + 180.0) % 360.0) - 180.0) > 1e-9:
            gap = (lo_b - hi_a) % 360.0
            if abs(total - 360.0) < 1e-9 or gap < 180 and total < 360:
                raise SchemeError(f"{where}: the states do not cover the circle: a gap from {hi_a:g} to "
                                  f"{lo_b:g} deg (after {la!r}, before {lb!r}).")
            raise SchemeError(f"{where}: states {la!r} and {lb!r} overlap between {lo_b:g} and {hi_a:g} deg.")
    if abs(total - 360.0) > 1e-9:
        raise SchemeError(f"{where}: the states cover {total:g} degrees instead of 360; they overlap.")
    return arcs
