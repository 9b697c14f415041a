"""tracker: fold each new wave of a tracking study in, and tell what really moved."""

from .errors import TrackerError

__all__ = ["AddReport", "CheckReport", "Codebook", "Study", "TrackerError", "load_codebook", "parse_codebook", "show"]
__version__ = "0.1.0"

_LAZY = {"Codebook": "codebook", "load_codebook": "codebook", "parse_codebook": "codebook",
         "Study": "study", "AddReport": "study", "CheckReport": "study", "show": "notebook"}


def __getattr__(name):
    # PEP 562: the heavy modules load on first use, so the command line starts at once
    if name in _LAZY:
        from importlib import import_module

        return getattr(import_module(f".{_LAZY[name]}", __name__), name)
    raise AttributeError(f"module 'tracker' has no attribute {name!r}")
