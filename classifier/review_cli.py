"""The `callsieve review` verbs: draw a verification sample, serve it, move verdicts in and out."""

from __future__ import annotations

import argparse

__all__ = ["add_review_verbs"]


def add_review_verbs(verbs: argparse._SubParsersAction, common: argparse.ArgumentParser) -> None:
    """Add ``review`` and its sub-verbs (sample, serve, import, export) to the verb parsers."""
    p = verbs.add_parser("review", parents=[common], help="verify a sample of detections by eye and ear")
    sub = p.add_subparsers(dest="review_verb", metavar="REVIEW_VERB", parser_class=type(p))
    sub.required = True
    # `review serve` lives with its web server.
    from .review_server import add_serve_verb

    add_serve_verb(sub, common)
