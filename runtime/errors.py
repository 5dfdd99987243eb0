"""The error types every room raises; the ground floor of the package (imports nothing of it)."""

from __future__ import annotations


class JobError(ValueError):
    """A job (or command-line value) that cannot run; the message names the field, the value and what is allowed."""


class LocalJobError(JobError):
    """A user error that one rank found on its own, mid-step (a bad row in its shard): the other ranks cannot know,
    so the job must end on every rank (``run_guarded`` aborts) instead of returning as a start-up error does."""
