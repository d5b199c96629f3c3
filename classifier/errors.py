"""The error a user can fix: bad input files or a wrong call. The CLI exits 2 on it."""

from __future__ import annotations

__all__ = ["InputError"]


class InputError(Exception):
    """Input that cannot be used as given; the message names the file, the field and the fix."""
