"""The number rules every sentence and table a reader sees follows, written once.

- No negative zero: a value that rounds to zero is written 0 (never "-0" or "-0.0").
- p-values below 0.001 are written "below 0.001", others with three decimals.
- Counts take the singular for one ("1 comparison") and thousands separators.
- A change in a sentence is the difference of the two values as printed beside it
  (:func:`shown_change`), so the words never contradict the figures; intervals are computed
  from the unrounded figures (the brief's method section says so).

The decimals of each metric kind live with the kind (tracker.kinds): the same everywhere.
"""

from __future__ import annotations

import math

__all__ = ["count", "fixed", "p_text", "plural", "shown_change"]


def fixed(x: float, decimals: int, signed: bool = False) -> str:
    """``x`` with ``decimals`` decimals; a value that rounds to zero is '0' (with its decimals,
    never signed). ``signed`` puts '+' before a positive value.

    >>> fixed(-0.04, 1), fixed(-0.4, 0), fixed(3.15, 1, signed=True), fixed(0.0, 1, signed=True)
    ('0.0', '0', '+3.1', '0.0')
    """
    if x is None or not math.isfinite(x):
        return "n/a"
    r = round(x, decimals)
    if r == 0:
        return f"{0:.{decimals}f}"
    return f"{r:+.{decimals}f}" if signed else f"{r:.{decimals}f}"


def p_text(p: float) -> str:
    """A p-value as a reader sees it: 'below 0.001', or three decimals.

    >>> p_text(0.00003), p_text(0.0432), p_text(1.0)
    ('below 0.001', '0.043', '1.000')
    """
    if p is None or not math.isfinite(p):
        return "n/a"
    return "below 0.001" if p < 0.001 else f"{p:.3f}"


def plural(n: int, one: str, many: str | None = None) -> str:
    """The word for ``n`` things: ``one`` for exactly one, else ``many`` (default: one + 's')."""
    return one if n == 1 else (many if many is not None else one + "s")


def count(n: int, one: str, many: str | None = None) -> str:
    """'1 comparison', '1,234 comparisons'.

    >>> count(1, "comparison"), count(1234, "comparison"), count(2, "series", "series")
    ('1 comparison', '1,234 comparisons', '2 series')
    """
    return f"{n:,} {plural(n, one, many)}"


def shown_change(v_from: float, v_to: float, scale: float, decimals: int) -> float:
    """The change between two values as printed (each rounded to ``decimals`` after
    ``scale``), in the printed units: what a reader gets by subtracting the printed figures.

    >>> shown_change(0.7349, 0.7664, 100, 1)   # 73.5% to 76.6%: 3.1 points
    3.1
    """
    return round(round(v_to * scale, decimals) - round(v_from * scale, decimals), decimals)
