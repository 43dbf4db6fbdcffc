"""Exceptions of the tracker package.

Every exception raised on purpose derives from :class:`TrackerError`. The two branches say whose
fault it is:

* :class:`InputError` -- something that came from outside (a file, a message, a flag) is wrong. The
  message names the field and says what is allowed, so the person who sent it can fix it.
* :class:`SolveError` -- the input was accepted but we could not produce an answer (a numerical
  failure or a bug of ours). These should never happen; when they do, they carry enough context
  to reproduce.
"""

from __future__ import annotations


class TrackerError(Exception):
    """Base class of every exception the package raises on purpose."""


class InputError(TrackerError, ValueError):
    """Bad input from outside: a file, a message, a command-line flag or a configuration value.

    Attributes:
        field: Name of the offending field (dotted path for nested fields), or ``None``.
    """

    def __init__(self, message: str, *, field: str | None = None) -> None:
        super().__init__(f"{field}: {message}" if field else message)
        self.field = field
        self.reason = message


class ProblemError(InputError):
    """An execution problem is malformed, out of range or not convex."""


class SolveError(TrackerError, RuntimeError):
    """A valid problem could not be solved (a numerical failure or a bug of ours)."""
