"""Where commands write: never over a file the command did not write itself.

A user's label table, a detection store or a model must not be replaced by a CSV or a
model because of a typo in ``--out``. Each writer says which files it may replace (an
earlier output of its own kind), and everything else is refused unless ``--force``.
"""

from __future__ import annotations

from collections.abc import Callable
from pathlib import Path

from .errors import InputError

__all__ = ["check_output", "is_sqlite_file", "is_zip_file"]

_SQLITE_MAGIC = b"SQLite format 3\x00"
_ZIP_MAGIC = b"PK\x03\x04"


def _head(path: Path, n: int) -> bytes:
    try:
        with open(path, "rb") as fh:
            return fh.read(n)
    except OSError:
        return b""


def is_sqlite_file(path: str | Path) -> bool:
    """True when the file starts with SQLite's header (a detection store, or another database)."""
    return _head(Path(path), len(_SQLITE_MAGIC)) == _SQLITE_MAGIC


def is_zip_file(path: str | Path) -> bool:
    """True when the file is a zip archive (a model file is one)."""
    return _head(Path(path), len(_ZIP_MAGIC)) == _ZIP_MAGIC


def check_output(
    out: str | Path,
    *,
    option: str,
    suffixes: tuple[str, ...] | None = None,
    inputs: tuple[str | Path, ...] = (),
    ours: Callable[[Path], bool] | None = None,
    what: str,
    force: bool = False,
) -> Path:
    """Refuse an output path that would destroy something; return it as a Path.

    Parameters
    ----------
    out : the path the user gave
    option : the option's name, for messages (``--out``)
    suffixes : file name endings this writer can write (lower case, with the dot); None: any
    inputs : paths the same command reads; writing over one of them is always refused
    ours : callable, optional; True for an existing file this writer made earlier, which
        may be replaced
    what : what the writer writes, for messages ("a detection table")
    force : replace any other existing file too (never an input)

    Raises
    ------
    InputError
        One line naming the file, what it is, and what to do.
    """
    path = Path(out)
    resolved = path.resolve()
    for source in inputs:
        if Path(source).resolve() == resolved:
            raise InputError(f"{path}: is also an input of this command; choose another {option}")
    if suffixes is not None and not path.name.lower().endswith(suffixes):
        raise InputError(f"{path}: {option} writes {what}; give a name ending in {' or '.join(suffixes)}")
    if not path.parent.is_dir():
        raise InputError(f"{path}: the folder {path.parent} does not exist; create it or choose another {option}")
    if not path.exists():
        return path
    if path.is_dir():
        raise InputError(f"{path}: is a folder; {option} needs a file name")
    if path.stat().st_size == 0 or force or (ours is not None and ours(path)):
        return path  # nothing to lose, an earlier output of this writer, or the user said so
    if is_sqlite_file(path):
        kind = "a detection store (or another database)"
    elif is_zip_file(path):
        kind = "a model file (or another archive)"
    else:
        kind = "a file this command did not write"
    raise InputError(f"{path}: exists and is {kind}; choose another {option}, or add --force to replace it")
