"""`callsieve review serve`: a local web page where reviewers give verdicts on a sample."""

from __future__ import annotations

import argparse

__all__ = ["add_serve_verb"]


def add_serve_verb(sub: argparse._SubParsersAction, common: argparse.ArgumentParser) -> None:
    """Add ``review serve`` to the review sub-verbs."""
    p = sub.add_parser("serve", parents=[common], help="serve the review page on this machine")
    p.add_argument("db", metavar="DB", help="detection store holding a verification sample")
