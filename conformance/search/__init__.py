"""The worst-case search: drawn cases (space), the hypothesis driver, reproducers and their replay (docs/search.md)."""

from .driver import Finding, SearchOutcome, Worst, run_search

__all__ = ["run_search", "SearchOutcome", "Worst", "Finding"]
