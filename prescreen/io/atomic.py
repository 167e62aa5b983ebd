"""Writing a file so that a kill leaves either the old file or the new one, never half.

Every checkpoint and data file of prescreen is written this way: to a temporary
sibling first, then renamed over the target with :func:`os.replace` (atomic on POSIX
and Windows when both lie on one file system).
"""

from __future__ import annotations

import json
import os
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path
from typing import Any

__all__ = ["replacing", "write_bytes", "write_text", "write_json"]


@contextmanager
def replacing(path: str | Path) -> Iterator[Path]:
    """Yield a temporary path beside ``path``; on success it replaces ``path``.

    The temporary file is ``<name>.tmp`` in the same folder. If the body raises, the
    temporary file is removed and ``path`` is left as it was.

    Examples
    --------
    >>> with replacing(target) as tmp:          # doctest: +SKIP
    ...     frame.to_parquet(tmp)
    """
    path = Path(path)
    tmp = path.with_name(path.name + ".tmp")
    try:
        yield tmp
        os.replace(tmp, path)
    finally:
        tmp.unlink(missing_ok=True)


def write_bytes(path: str | Path, data: bytes) -> None:
    """Write ``data`` to ``path`` through a temporary file."""
    with replacing(path) as tmp:
        tmp.write_bytes(data)


def write_text(path: str | Path, text: str) -> None:
    """Write ``text`` (UTF-8) to ``path`` through a temporary file."""
    write_bytes(path, text.encode("utf-8"))


def write_json(path: str | Path, obj: Any, indent: int | None = None) -> None:
    """Write ``obj`` as JSON to ``path`` through a temporary file."""
    write_text(path, json.dumps(obj, indent=indent))
