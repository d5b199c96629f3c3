"""What a verdict says about a detection's label: the note format, and one verdict from many.

The review page, `review import`, `estimate` and `review export-labels` all read verdicts;
they read them by these rules, in one place (docs/estimates.md §1, docs/formats.md §5).
"""

from __future__ import annotations

import re

__all__ = ["VERDICTS", "compose_note", "parse_note", "verdict_on_label", "consensus"]

VERDICTS = ("yes", "no", "unsure")
# A note that starts with "[type: CLASS]": the reviewer heard another call type there.
_CALL_TYPE = re.compile(r"^\[type: ([^\]]+)\](?: (.*))?$", re.DOTALL)


def compose_note(note: str | None, call_type: str | None) -> str | None:
    """The note stored with a verdict: ``[type: CLASS] free text`` when another call type is named.

    Parameters
    ----------
    note : str or None
        The reviewer's free text.
    call_type : str or None
        Another of the model's classes that the reviewer heard instead.

    Returns
    -------
    str or None
        None when both are empty.
    """
    note = (note or "").strip()
    if call_type:
        return f"[type: {call_type}]" + (f" {note}" if note else "")
    return note or None


def parse_note(stored: str | None) -> tuple[str, str | None]:
    """The free text and the other call type of a stored note (inverse of ``compose_note``)."""
    if not stored:
        return "", None
    m = _CALL_TYPE.match(stored)
    if m is None:
        return stored, None
    return (m.group(2) or ""), m.group(1).strip()


def verdict_on_label(verdict: str, note: str | None, label: str) -> tuple[str, str | None]:
    """A reviewer's verdict on a detection of ``label``, and the other call type heard.

    A note naming another call type makes the verdict ``no`` for this label whatever the
    button said: the detection is a false one of ``label``.
    """
    _, heard = parse_note(note)
    if heard is not None and heard != label:
        return "no", heard
    return verdict, None


def consensus(votes: list[str]) -> str:
    """One verdict from several reviewers' latest ones: the majority; a tie is unsure."""
    counts = {v: votes.count(v) for v in VERDICTS}
    top = max(counts.values())
    winners = [v for v, c in counts.items() if c == top]
    return winners[0] if len(winners) == 1 else "unsure"
