"""Batch DFT labelling: worker processes, per-structure timeouts, checkpoint and resume.

Layout of an output folder::

    out_dir/
      settings.json       the LabelSettings of the run (a rerun must use the same)
      records.jsonl       one JSON record per finished structure, appended and fsync'ed
      arrays/<id>.npz     gamma(k) and kpts of each successful structure

A structure counts as finished once its line is in ``records.jsonl``; its arrays are
written (atomically) before that line. After a crash or ``kill -9`` a rerun with the
same jobs skips every finished structure and recomputes only those in flight, so work
is neither lost nor repeated. A torn last line (the process died while writing it) is
removed on the next run. Failures (exceptions, timeouts, crashed workers) are records
too, with ``status = "failed"`` and the reason; ``retry_failed=True`` tries them again
(the newest record of an id wins in :func:`load_records`).

Each worker is a separate process (``spawn``) running one calculation at a time with
single-threaded BLAS; a worker that exceeds the timeout is killed and replaced, and
every worker dies with the run that started it. One run at a time writes an output
folder: a second is refused while the first holds the folder's lock
(:func:`prescreen.process.folder_lock`).
"""

from __future__ import annotations

import json
import multiprocessing as mp
import os
import time
import traceback
from dataclasses import dataclass
from multiprocessing.connection import Connection, wait
from pathlib import Path
from typing import TYPE_CHECKING, Any, Callable, Collection, Iterable

import numpy as np

from prescreen.errors import InputError
from prescreen.io.atomic import replacing, write_json
from prescreen.io.ids import validate_id
from prescreen.process import die_with_parent, folder_lock
from prescreen.physics.dft import LabelRecord, LabelSettings, label_structure

if TYPE_CHECKING:  # pragma: no cover - typing only
    import pandas as pd
    from ase import Atoms
    from pymatgen.core import Structure

__all__ = [
    "RECORDS_FILE",
    "SETTINGS_FILE",
    "write_settings",
    "ARRAYS_DIR",
    "LabelSummary",
    "RecordStore",
    "run_labelling",
    "load_records",
    "record_lines",
    "records_frame",
]

RECORDS_FILE = "records.jsonl"
SETTINGS_FILE = "settings.json"
ARRAYS_DIR = "arrays"

#: Environment given to worker processes: one BLAS/OpenMP thread each, since
#: independent single-threaded jobs beat threaded ones on a small machine.
WORKER_ENV = {"OPENBLAS_NUM_THREADS": "1", "OMP_NUM_THREADS": "1", "MKL_NUM_THREADS": "1"}

#: How often (s) the runner wakes up to check timeouts.
POLL_S: float = 0.2

#: Extra time (s) a new worker gets to start its interpreter and imports before the
#: timeout of its first job starts counting: the timeout measures the calculation, not
#: the start-up, which takes seconds on a busy machine.
STARTUP_GRACE_S: float = 120.0

Compute = Callable[..., LabelRecord]


def write_settings(out_dir: str | Path, settings: LabelSettings) -> None:
    """Write ``<out_dir>/settings.json`` atomically, as every labeller folder holds it."""
    write_json(Path(out_dir) / SETTINGS_FILE, settings.as_dict(), indent=1)


@dataclass(frozen=True)
class LabelSummary:
    """What one call of :func:`run_labelling` did.

    Attributes
    ----------
    out_dir
        The output folder.
    n_jobs
        Distinct structures asked for.
    n_skipped
        Already finished before this call (resumed), not recomputed.
    n_ok, n_failed
        Finished in this call, successfully or not.
    wall_s
        Wall time of this call (s).
    core_hours
        Sum of the core-hours of the calculations finished in this call.
    """

    out_dir: Path
    n_jobs: int
    n_skipped: int
    n_ok: int
    n_failed: int
    wall_s: float
    core_hours: float


def _formula_of(structure: Any) -> str:
    try:
        if hasattr(structure, "composition"):
            return structure.composition.reduced_formula
        from pymatgen.core import Composition

        return Composition(structure.get_chemical_formula()).reduced_formula
    except Exception:  # noqa: BLE001 - only used for the failure record
        return "?"


def _worker(conn: Connection, compute: Compute, settings: LabelSettings,
            parent_pid: int | None = None) -> None:
    """Worker loop: receive (id, structure), compute, send the record back.

    With ``parent_pid`` the worker dies with that parent (a killed ``label`` run leaves
    no calculation running on).
    """
    if parent_pid is not None:
        die_with_parent(parent_pid)
    while True:
        try:
            job = conn.recv()
        except (EOFError, OSError):
            return  # parent gone
        if job is None:
            return
        ident, structure = job
        t0 = time.perf_counter()
        try:
            conn.send(("started",))  # the job's timeout counts from here
        except (BrokenPipeError, OSError):
            return
        try:
            rec = compute(structure, settings, id=ident)
            if not isinstance(rec, LabelRecord):
                raise TypeError(f"compute returned {type(rec).__name__}, not LabelRecord")
            msg = ("ok", rec.as_dict())
        except Exception as exc:  # noqa: BLE001 - reported as a failed record
            tb = traceback.format_exception_only(type(exc), exc)[-1].strip()
            msg = ("failed", tb, time.perf_counter() - t0)
        try:
            conn.send(msg)
        except (BrokenPipeError, OSError):
            return


@dataclass
class _Slot:
    process: mp.process.BaseProcess
    conn: Connection
    job: tuple[str, Any] | None = None
    started: float = 0.0
    running: bool = False  # the worker has said it started the job


class RecordStore:
    """The append-only checkpoint of one output folder (one writer process at a time).

    Opening checks that the folder was made with the same ``settings`` (or records
    them; a file written before a field existed is read with that field's default and
    completed) and removes a line torn by a crash; :meth:`append` writes a record's arrays,
    then its line, fsync'ed; :meth:`status` gives the newest status of every id.
    """

    def __init__(self, out_dir: Path, settings: LabelSettings) -> None:
        self.dir = Path(out_dir)
        self.dir.mkdir(parents=True, exist_ok=True)
        (self.dir / ARRAYS_DIR).mkdir(exist_ok=True)
        self.records = self.dir / RECORDS_FILE
        spath = self.dir / SETTINGS_FILE
        wanted = settings.as_dict()
        if spath.exists():
            try:
                have = json.loads(spath.read_text())
            except json.JSONDecodeError as exc:
                raise InputError("settings file is not valid JSON", path=spath,
                                 line=exc.lineno, expected="JSON written by prescreen") from exc
            try:  # a file from before a field existed reads with that field's default
                same = LabelSettings.from_dict(have) == settings
            except (InputError, TypeError, AttributeError) as exc:
                raise InputError(f"settings file does not hold label settings: {exc}",
                                 path=spath, value=have,
                                 expected=f"the settings written by prescreen, {wanted}") from exc
            if not same:
                raise InputError(
                    "output folder was labelled with other settings; use a new folder",
                    path=spath, value=have, expected=f"the same settings {wanted}")
            if have != wanted:
                write_settings(self.dir, settings)  # complete it with the fields it lacks
        else:
            write_settings(self.dir, settings)
        self._repair_tail()

    def _repair_tail(self) -> None:
        """Drop a torn last line left by a process killed while appending."""
        if not self.records.exists():
            return
        data = self.records.read_bytes()
        if data and not data.endswith(b"\n"):
            keep = data.rfind(b"\n") + 1
            with open(self.records, "r+b") as fh:
                fh.truncate(keep)

    def status(self) -> dict[str, str]:
        """Newest status ("ok"/"failed") of every id in the checkpoint."""
        return {r["id"]: r["status"] for r in _read_lines(self.dir / RECORDS_FILE)}

    def append(self, rec: LabelRecord) -> None:
        if rec.ok:
            with replacing(self.dir / ARRAYS_DIR / f"{rec.id}.npz") as tmp, \
                    open(tmp, "wb") as fh:  # a file object: savez adds no ".npz" to it
                np.savez(fh, gamma=rec.gamma, kpts=rec.kpts)
        line = json.dumps(rec.as_dict(arrays=False)) + "\n"
        with open(self.records, "a", encoding="utf-8") as fh:
            fh.write(line)
            fh.flush()
            os.fsync(fh.fileno())


def _read_lines(path: Path) -> list[dict[str, Any]]:
    """Parse ``records.jsonl``; a torn last line is ignored, any other bad line raises."""
    if not path.exists():
        return []
    lines = path.read_text(encoding="utf-8").split("\n")
    out = []
    for i, text in enumerate(lines, start=1):
        if not text.strip():
            continue
        try:
            d = json.loads(text)
        except json.JSONDecodeError as exc:
            if i == len(lines):  # no newline after it: torn by a crash
                continue
            raise InputError("record line is not valid JSON", path=path, line=i,
                             value=text[:80], expected="one JSON object per line") from exc
        if not isinstance(d, dict) or "id" not in d or "status" not in d:
            raise InputError("record line lacks id/status", path=path, line=i,
                             value=text[:80], expected="a label record")
        out.append(d)
    return out


def _validate_jobs(jobs: Iterable[tuple[str, Any]]) -> list[tuple[str, Any]]:
    seen: dict[str, int] = {}
    out = []
    for i, job in enumerate(jobs):
        try:
            ident, structure = job
        except (TypeError, ValueError) as exc:
            raise InputError("a job must be an (id, structure) pair", line=i,
                             value=job, expected="(str, Structure or Atoms)") from exc
        ident = validate_id(ident, line=i)
        if ident in seen:
            raise InputError("duplicate job id", line=i, value=ident,
                             expected=f"ids unique (first seen at entry {seen[ident]})")
        seen[ident] = i
        out.append((ident, structure))
    return out


def run_labelling(jobs: Iterable[tuple[str, "Structure | Atoms"]], out_dir: Path, *,
                  settings: LabelSettings = LabelSettings(), workers: int = 1,
                  timeout_s: float = 1800.0, compute: Compute = label_structure,
                  progress: bool = True, retry_failed: bool = False,
                  redo: Collection[str] = ()) -> LabelSummary:
    """Label structures in parallel with checkpointing; safe to rerun after a crash.

    Parameters
    ----------
    jobs
        ``(id, structure)`` pairs; ids must be unique safe file-name components.
    out_dir
        Output folder (created); see the module notes for its layout.
    settings
        Level of theory, the same for every structure and every rerun into ``out_dir``.
    workers
        Worker processes run at once (one core each).
    timeout_s
        Wall-time limit per structure (s); the worker is killed and the structure
        recorded as failed.
    compute
        ``compute(structure, settings, id=...) -> LabelRecord``; a picklable top-level
        function. :func:`~prescreen.physics.dft.label_structure` by default.
    progress
        Show a tqdm progress bar.
    retry_failed
        Recompute structures whose newest record is a failure.
    redo
        Ids to recompute whatever their newest record says (a structure whose geometry
        changed, say); an id in ``redo`` but not in ``jobs`` is an error.

    Returns
    -------
    LabelSummary

    Raises
    ------
    InputError
        On malformed or duplicate ids, bad ``workers``/``timeout_s``, an output
        folder made with other settings, or one that another labelling run (another
        process) is writing to.
    """
    if not (isinstance(workers, int) and workers >= 1):
        raise InputError("workers must be a positive integer", value=workers,
                         expected="an integer >= 1")
    if not (timeout_s > 0):
        raise InputError("timeout_s must be positive", value=timeout_s, expected="> 0 s")
    t0 = time.perf_counter()
    all_jobs = _validate_jobs(jobs)
    unknown = sorted(set(redo) - {i for i, _ in all_jobs})
    if unknown:
        raise InputError("ids to recompute that are not among the jobs", value=unknown[:5],
                         expected="every id in redo also in jobs")
    with folder_lock(out_dir, "labelling run"):  # a second run would compute the same ids
        return _run_locked(all_jobs, Path(out_dir), settings, workers, timeout_s, compute,
                           progress, retry_failed, frozenset(redo), t0)


def _run_locked(all_jobs: list[tuple[str, Any]], out_dir: Path, settings: LabelSettings,
                workers: int, timeout_s: float, compute: Compute, progress: bool,
                retry_failed: bool, redo: frozenset[str], t0: float) -> LabelSummary:
    """The body of :func:`run_labelling`, run while holding the folder's lock."""
    from tqdm.auto import tqdm

    store = RecordStore(out_dir, settings)
    done = store.status()
    pending = [(i, s) for i, s in all_jobs
               if i not in done or i in redo or (retry_failed and done[i] == "failed")]
    n_skipped = len(all_jobs) - len(pending)
    n_ok = n_failed = 0
    core_hours = 0.0

    ctx = mp.get_context("spawn")
    slots: list[_Slot] = []
    saved_env = {k: os.environ.get(k) for k in WORKER_ENV}
    os.environ.update(WORKER_ENV)

    def start_slot() -> _Slot:
        parent, child = ctx.Pipe()
        proc = ctx.Process(target=_worker, args=(child, compute, settings, os.getpid()),
                           daemon=True)
        proc.start()
        child.close()
        return _Slot(proc, parent)

    def finish(slot: _Slot, rec: LabelRecord) -> None:
        nonlocal n_ok, n_failed, core_hours
        store.append(rec)
        core_hours += rec.core_hours if np.isfinite(rec.core_hours) else 0.0
        if rec.ok:
            n_ok += 1
        else:
            n_failed += 1
        slot.job = None
        bar.update(1)
        bar.set_postfix_str(f"{rec.id}: " + (f"{rec.spillage:.3f}" if rec.ok else "failed"))

    def fail(slot: _Slot, reason: str) -> None:
        assert slot.job is not None
        ident, structure = slot.job
        wall = time.perf_counter() - slot.started
        finish(slot, LabelRecord.failed(ident, _formula_of(structure), settings, reason, wall))

    queue = list(reversed(pending))
    bar = tqdm(total=len(pending), disable=not progress, desc="labelling", unit="structure")
    try:
        for _ in range(min(workers, len(pending))):
            slots.append(start_slot())
        while queue or any(s.job is not None for s in slots):
            for slot in slots:
                if slot.job is None and queue:
                    slot.job = queue.pop()
                    slot.started, slot.running = time.perf_counter(), False
                    slot.conn.send(slot.job)
            busy = [s for s in slots if s.job is not None]
            ready = wait([s.conn for s in busy], timeout=POLL_S)
            now = time.perf_counter()
            for i, slot in enumerate(slots):
                if slot.job is None:
                    continue
                if slot.conn in ready:
                    try:
                        msg = slot.conn.recv()
                    except (EOFError, OSError):
                        slot.process.join(1.0)
                        fail(slot, f"WorkerDied: worker process ended (exit code "
                                   f"{slot.process.exitcode}), e.g. killed or out of memory")
                        slots[i] = start_slot()
                        continue
                    if msg[0] == "started":
                        slot.started, slot.running = time.perf_counter(), True
                    elif msg[0] == "ok":
                        finish(slot, LabelRecord.from_dict(msg[1]))
                    else:
                        ident, structure = slot.job
                        finish(slot, LabelRecord.failed(ident, _formula_of(structure),
                                                        settings, msg[1], msg[2]))
                elif now - slot.started > timeout_s + (0.0 if slot.running
                                                       else STARTUP_GRACE_S):
                    slot.process.kill()
                    slot.process.join()
                    fail(slot, f"Timeout: no result within {timeout_s:g} s" if slot.running
                         else f"WorkerDidNotStart: the worker did not start the job within "
                              f"{timeout_s + STARTUP_GRACE_S:g} s")
                    slots[i] = start_slot()
                elif not slot.process.is_alive():
                    fail(slot, f"WorkerDied: worker process ended (exit code "
                               f"{slot.process.exitcode}), e.g. killed or out of memory")
                    slots[i] = start_slot()
    finally:
        bar.close()
        for slot in slots:
            try:
                slot.conn.send(None)
            except (BrokenPipeError, OSError):
                pass
        for slot in slots:
            slot.process.join(2.0)
            if slot.process.is_alive():
                slot.process.kill()
                slot.process.join()
            slot.conn.close()
        for k, v in saved_env.items():
            if v is None:
                os.environ.pop(k, None)
            else:
                os.environ[k] = v
    return LabelSummary(out_dir=Path(out_dir), n_jobs=len(all_jobs), n_skipped=n_skipped,
                        n_ok=n_ok, n_failed=n_failed, wall_s=time.perf_counter() - t0,
                        core_hours=core_hours)


def record_lines(out_dir: Path) -> list[dict[str, Any]]:
    """Every record of an output folder as written, oldest first, superseded ones too
    (without arrays); see :func:`load_records` for the newest per id."""
    return _read_lines(Path(out_dir) / RECORDS_FILE)


def load_records(out_dir: Path) -> list[LabelRecord]:
    """Records of an output folder, the newest per id, with gamma(k) and kpts attached.

    Raises
    ------
    InputError
        If a record line (other than a torn last one) is not valid, or the arrays of a
        successful record are missing.
    """
    out_dir = Path(out_dir)
    newest: dict[str, dict[str, Any]] = {}
    path = out_dir / RECORDS_FILE
    for d in _read_lines(path):
        newest.pop(d["id"], None)  # keep insertion order of the newest record
        newest[d["id"]] = d
    records = []
    for ident, d in newest.items():
        if d["status"] == "ok":
            npz = out_dir / ARRAYS_DIR / f"{ident}.npz"
            try:
                with np.load(npz) as arrays:
                    d = {**d, "gamma": arrays["gamma"], "kpts": arrays["kpts"]}
            except (OSError, KeyError, ValueError) as exc:
                raise InputError("arrays of a finished record are missing or damaged",
                                 path=npz, line=ident, expected="gamma and kpts") from exc
        records.append(LabelRecord.from_dict(d))
    return records


def records_frame(out_dir: Path) -> "pd.DataFrame":
    """One row per structure (newest record), without the gamma(k) arrays.

    Columns: the scalar fields of :class:`~prescreen.physics.dft.LabelRecord`, with
    ``k_max`` split into ``k_max_1..3`` and the mesh as ``kmesh``.
    """
    import pandas as pd

    rows = []
    for rec in load_records(out_dir):
        d = rec.as_dict(arrays=False)
        k = d.pop("k_max") or [np.nan] * 3
        d.update({f"k_max_{i + 1}": k[i] for i in range(3)})
        d["kmesh"] = "x".join(map(str, d["settings"].get("kmesh", []))) or None
        d.pop("settings")
        d.update({f"{name}_version": v for name, v in d.pop("versions").items()})
        rows.append(d)
    return pd.DataFrame(rows)
