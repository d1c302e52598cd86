"""The runner: cases in isolated worker processes, progress, and the results document."""

from .execute import execute_case, skip_reason
from .runner import RunOptions, run_check, select_cases

__all__ = ["RunOptions", "run_check", "select_cases", "execute_case", "skip_reason"]
