"""The error every user-facing mistake raises: printed as one line, exit code 2."""

from __future__ import annotations

__all__ = ["SweepctlError"]


class SweepctlError(Exception):
    """A problem with the user's input or files, with the way out in its message."""
