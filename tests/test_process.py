"""One writer per folder: the lock of prescreen.process, within and across processes."""

from __future__ import annotations

import multiprocessing as mp

import pytest

from prescreen.errors import InputError
from prescreen.process import LOCK_FILE, folder_lock


def _try_lock(folder, out):
    try:
        with folder_lock(folder, "test"):
            out.put("got it")
    except InputError:
        out.put("refused")


def _other_process_says(folder) -> str:
    ctx = mp.get_context("spawn")
    out = ctx.Queue()
    proc = ctx.Process(target=_try_lock, args=(str(folder), out))
    proc.start()
    answer = out.get(timeout=60)
    proc.join(60)
    return answer


def test_the_lock_refuses_other_processes_and_nesting_and_is_freed_on_exit(tmp_path):
    with folder_lock(tmp_path, "build") as path:
        assert path == tmp_path / LOCK_FILE
        assert _other_process_says(tmp_path) == "refused"
        with pytest.raises(InputError, match=r"another build is using this folder"):
            with folder_lock(tmp_path, "build"):  # nesting in one process is a bug
                pass
        open(path).close()  # another handle on the lock file does not release it
        assert _other_process_says(tmp_path) == "refused"
    assert _other_process_says(tmp_path) == "got it"
    with pytest.raises(RuntimeError):  # released on an exception too
        with folder_lock(tmp_path):
            raise RuntimeError("boom")
    assert _other_process_says(tmp_path) == "got it"
