"""Process helpers for long calculations: one writer per folder, workers that die with their parent.

Both the campaign labeller (:func:`prescreen.physics.labeller.run_labelling`) and the open
dataset build (``scripts/build_open_dataset.py``) run DFT in child processes and append
results to checkpoint files. Two runs writing the same checkpoint would compute the same
structures twice and interleave their records; a child left running after its parent was
killed (``kill -9``, an out-of-memory kill, a closed terminal) keeps a core busy for up to
a calculation's timeout with nobody to collect its result.
"""

from __future__ import annotations

import os
import signal
from contextlib import contextmanager
from pathlib import Path
from typing import Iterator

from prescreen.errors import InputError

__all__ = ["LOCK_FILE", "folder_lock", "die_with_parent"]

#: Name of the lock file created in a locked folder (empty; its lock is what counts).
LOCK_FILE = ".lock"


@contextmanager
def folder_lock(folder: str | Path, what: str = "run") -> Iterator[Path]:
    """Hold ``<folder>/.lock`` exclusively for the duration of the block.

    A BSD ``flock`` on an open file of its own: the kernel releases it when the holder
    closes it or its process ends, however it ends (a stale lock file is harmless). A
    second holder is refused even in the same process (nesting is a bug, not a no-op), and
    closing some other handle on the lock file does not release it. Forked children share
    the open file and so the lock until they end (ours die with their parent); spawned
    workers start a new program and do not hold it.

    Parameters
    ----------
    folder
        The folder to lock (created if missing).
    what
        What holds the lock, for the message ("build", "labelling run").

    Yields
    ------
    Path
        The lock file.

    Raises
    ------
    InputError
        When another process holds the lock.
    """
    import fcntl

    folder = Path(folder)
    folder.mkdir(parents=True, exist_ok=True)
    path = folder / LOCK_FILE
    fh = open(path, "w")
    try:
        fcntl.flock(fh, fcntl.LOCK_EX | fcntl.LOCK_NB)
    except OSError:
        fh.close()
        raise InputError(f"another {what} is using this folder", path=folder,
                         expected=f"one {what} per folder at a time: wait for the other to "
                                  "finish or stop it") from None
    try:
        yield path
    finally:
        fh.close()


def die_with_parent(parent_pid: int) -> None:
    """Ask the kernel to kill this process when its parent dies (Linux).

    Call first thing in a child process, with the parent's pid as the parent saw it.
    If the parent is already gone (it died before the request took effect) the child
    exits at once. Elsewhere than Linux this does nothing, and only the parent's own
    clean-up stops its children.
    """
    try:
        import ctypes

        libc = ctypes.CDLL(None, use_errno=True)
        libc.prctl(1, signal.SIGKILL)  # 1: PR_SET_PDEATHSIG
    except (OSError, AttributeError):  # not Linux
        return
    if os.getppid() != parent_pid:
        os._exit(1)
