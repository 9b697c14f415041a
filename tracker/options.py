"""One check for each option value the library takes (the command line offers the same
choices through click): a confidence level, an adjustment, a fieldwork date."""

from __future__ import annotations

import datetime as dt

from .errors import TrackerError

__all__ = ["check_adjust", "check_level", "parse_date"]


def check_level(level: float) -> None:
    """Refuse a confidence level outside (0.5, 1)."""
    if not 0.5 < level < 1:
        raise TrackerError(f"level {level}: give a confidence level between 0.5 and 1, e.g. 0.95")


def check_adjust(adjust: str) -> None:
    """Refuse an adjustment the tool does not know (one list: tracker.names.ADJUST_METHODS)."""
    from .names import ADJUST_METHODS

    if adjust not in ADJUST_METHODS:
        raise TrackerError(f"adjust {adjust}: use one of {', '.join(ADJUST_METHODS)}")


def parse_date(text: str) -> str:
    try:
        return dt.date.fromisoformat(str(text).strip()).isoformat()
    except ValueError:
        raise TrackerError(f"fieldwork date {text!r} is not an ISO date (YYYY-MM-DD)") from None
