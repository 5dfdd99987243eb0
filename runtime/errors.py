"""The error types every room raises; the ground floor of the package (imports nothing of it)."""

from __future__ import annotations

import re

LONGEST_WORD = 200
"""A run of more characters without a space in an error message is cut (:func:`readable`)."""


def readable(message: str) -> str:
    """``message`` with every run of more than :data:`LONGEST_WORD` characters without a space cut to its first 80
    and a count, so a 100 kB value echoed in an error still reads as one line of sensible length."""
    return re.sub(rf"\S{{{LONGEST_WORD + 1},}}",
                  lambda m: f"{m.group(0)[:80]}… ({len(m.group(0)):,} characters)", message)


class JobError(ValueError):
    """A job (or command-line value) that cannot run; the message names the field, the value (cut to a readable
    length, :func:`readable`) and what is allowed."""

    def __init__(self, message: str = "", *args: object) -> None:
        super().__init__(readable(str(message)), *args)


class LocalJobError(JobError):
    """A user error that one rank found on its own, mid-step (a bad row in its shard): the other ranks cannot know,
    so the job must end on every rank (``run_guarded`` aborts) instead of returning as a start-up error does."""
