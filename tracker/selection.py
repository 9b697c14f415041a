"""What a call asks for, checked against the codebook: metrics and subgroup splits by name."""

from __future__ import annotations

from .codebook import Codebook
from .errors import TrackerError

__all__ = ["pick_groups", "pick_metrics"]


def pick_metrics(book: Codebook, names=None) -> list:
    """The metrics named (all when none), refusing a name the codebook does not know."""
    names = [names] if isinstance(names, str) else names
    if not names:
        return list(book.metrics.values())
    unknown = [n for n in names if n not in book.metrics]
    if unknown:
        raise TrackerError(f"metric {unknown[0]}: not a metric of this study ({', '.join(book.metrics)})")
    return [book.metrics[n] for n in names]


def pick_groups(book: Codebook, names=None) -> list[str]:
    """The splits named (all when None; [] or total for totals only), refusing unknown ones."""
    names = [names] if isinstance(names, str) else names
    if names is None:
        return list(book.groups)
    names = [n for n in names if n not in ("total", "none")]
    unknown = [n for n in names if n not in book.groups]
    if unknown:
        raise TrackerError(f"by {unknown[0]}: not a group of this study "
                           f"({', '.join(book.groups) or 'none declared'})")
    return list(dict.fromkeys(names))
