"""The one exception type that refnorm raises for bad input."""

from __future__ import annotations

__all__ = ["RefnormError"]


class RefnormError(ValueError):
    """Bad input to a refnorm function.

    The message names the argument, what was expected, what was received and,
    where there is one, how to fix it.
    """
