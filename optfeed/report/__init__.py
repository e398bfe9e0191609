"""Reports: the text report, figures, and the run folder (written atomically)."""

from .files import write_check_run, write_optimize_run
from .text import CAUTION, check_text, optimize_text

__all__ = ["write_check_run", "write_optimize_run", "check_text", "optimize_text", "CAUTION"]
