"""Shared printing helpers for the commands (plain text, no colour codes)."""

from __future__ import annotations

import sys
from collections.abc import Sequence
from typing import TextIO

from prescreen.errors import Rejection

__all__ = ["print_rejections", "print_table"]

#: How many rejections a command prints before pointing at `prescreen status --rejections`.
SHOWN_REJECTIONS = 20


def print_rejections(rejections: Sequence[Rejection], *, stream: TextIO | None = None,
                     campaign: str | None = None) -> None:
    """List rejections in file and line order (``stream``: standard error when None)."""
    if not rejections:
        return
    # sys.stderr is looked up per call: a default bound at import would keep a stream
    # that a caller (a notebook, a test's capture) has since replaced or closed
    stream = sys.stderr if stream is None else stream

    def where(rej: Rejection) -> tuple:
        line = rej.line
        return (rej.path, 0 if isinstance(line, int) else 1,
                line if isinstance(line, int) else str(line))

    rejections = sorted(rejections, key=where)
    print(f"rejected {len(rejections)} entr{'y' if len(rejections) == 1 else 'ies'}:",
          file=stream)
    for rej in rejections[:SHOWN_REJECTIONS]:
        print(f"  {rej}", file=stream)
    if len(rejections) > SHOWN_REJECTIONS:
        more = len(rejections) - SHOWN_REJECTIONS
        hint = f" (all: prescreen status {campaign} --rejections)" if campaign else ""
        print(f"  ... and {more} more{hint}", file=stream)


def print_table(rows: Sequence[tuple[str, object]], *, stream: TextIO | None = None) -> None:
    """Two aligned columns (``stream``: standard output when None, looked up per call)."""
    stream = sys.stdout if stream is None else stream
    width = max((len(k) for k, _ in rows), default=0)
    for key, value in rows:
        print(f"  {key:<{width}}  {value}", file=stream)
