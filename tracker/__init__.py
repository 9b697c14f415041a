"""tracker: fold each new wave of a tracking study in, and tell what really moved."""

from .codebook import Codebook, load_codebook, parse_codebook
from .errors import TrackerError
from .study import AddReport, CheckReport, Study

__all__ = ["Codebook", "load_codebook", "parse_codebook", "TrackerError", "Study", "AddReport", "CheckReport"]
__version__ = "0.1.0"
