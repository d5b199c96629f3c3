"""The error a user can fix: bad input files or a wrong call. The CLI exits 2 on it."""

from __future__ import annotations

import tomllib
from pathlib import Path
from typing import Any

__all__ = ["InputError", "read_toml"]


class InputError(Exception):
    """Input that cannot be used as given; the message names the file, the field and the fix."""


def read_toml(path: Path, what: str) -> dict[str, Any]:
    """A user's TOML file (``what`` names it in messages: "manifest", "config"), or InputError."""
    try:
        with open(path, "rb") as fh:
            return tomllib.load(fh)
    except FileNotFoundError:
        raise InputError(f"{path}: no such {what} file") from None
    except OSError as exc:
        raise InputError(f"{path}: cannot read: {exc.strerror}") from None
    except tomllib.TOMLDecodeError as exc:
        raise InputError(f"{path}: not valid TOML ({' '.join(str(exc).split())})") from None
    except UnicodeDecodeError:
        raise InputError(f"{path}: not UTF-8 text; save the {what} as UTF-8") from None
