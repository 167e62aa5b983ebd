"""Batch runner of the DFT labeller: checkpointing, resume after kill -9, failures, timeouts.

No DFT here: a cheap fake calculation is injected through ``compute``. It logs each call
to the file named by ``$PRESCREEN_FAKE_LOG`` (one line per call, written by the worker
process), so the tests can count how often each structure was computed.
"""

from __future__ import annotations

import json
import os
import signal
import subprocess
import sys
import time
from dataclasses import replace
from pathlib import Path

import numpy as np
import pytest
from ase import Atoms

from prescreen.errors import InputError
from prescreen.physics.dft import LabelRecord, LabelSettings
from prescreen.physics.labeller import (
    RECORDS_FILE,
    load_records,
    records_frame,
    run_labelling,
)

SETTINGS = LabelSettings(kpts=(3, 3, 1))


def fake_compute(structure, settings, *, id=None):
    """Stand-in for label_structure: behaviour chosen by the id prefix."""
    with open(os.environ["PRESCREEN_FAKE_LOG"], "a") as fh:
        fh.write(f"{id}\n")
    if os.environ.get("PRESCREEN_FAKE_PIDS"):  # which process computed it
        with open(os.environ["PRESCREEN_FAKE_PIDS"], "a") as fh:
            fh.write(f"{os.getpid()}\n")
    time.sleep(float(os.environ.get("PRESCREEN_FAKE_SLEEP", "0")))
    if id.startswith("fail"):
        raise ValueError(f"cannot converge {id}")
    if id.startswith("slow"):
        time.sleep(60)
    if id.startswith("die"):
        os._exit(3)
    n = len(structure)
    gamma = np.linspace(0.0, 0.1 * n, 4)
    kpts = np.zeros((4, 3))
    kpts[:, 0] = np.arange(4) / 4
    return LabelRecord(id=id, formula=structure.get_chemical_formula(), spillage=gamma.max(),
                       k_max=kpts[-1], gap_nosoc_eV=1.0, gap_soc_eV=0.9, is_metal=False,
                       magmom=0.0, settings=settings.as_dict(), versions={}, wall_s=0.01,
                       core_hours=0.01 / 3600, gamma=gamma, kpts=kpts)


def _jobs(ids):
    return [(i, Atoms("H" * (k + 1), positions=np.zeros((k + 1, 3)))) for k, i in
            enumerate(ids)]


def _calls(log: Path) -> list[str]:
    return log.read_text().split() if log.exists() else []


@pytest.fixture
def log(tmp_path, monkeypatch):
    path = tmp_path / "calls.log"
    monkeypatch.setenv("PRESCREEN_FAKE_LOG", str(path))
    return path


def test_runs_records_and_resumes_without_repeating(tmp_path, log):
    out = tmp_path / "run"
    jobs = _jobs(["a", "b", "c", "fail-1"])
    s = run_labelling(jobs[:2], out, settings=SETTINGS, workers=2, compute=fake_compute,
                      progress=False)
    assert (s.n_ok, s.n_failed, s.n_skipped) == (2, 0, 0)
    s = run_labelling(jobs, out, settings=SETTINGS, workers=2, compute=fake_compute,
                      progress=False)
    assert (s.n_ok, s.n_failed, s.n_skipped) == (1, 1, 2)
    assert sorted(_calls(log)) == ["a", "b", "c", "fail-1"]  # each computed once
    recs = {r.id: r for r in load_records(out)}
    assert recs["b"].ok and np.allclose(recs["b"].gamma, np.linspace(0, 0.2, 4))
    assert recs["b"].kpts.shape == (4, 3)
    assert recs["fail-1"].status == "failed"
    assert "ValueError: cannot converge fail-1" in recs["fail-1"].error
    # a third run does nothing; with retry_failed only the failure is recomputed
    s = run_labelling(jobs, out, settings=SETTINGS, compute=fake_compute, progress=False)
    assert (s.n_ok, s.n_failed, s.n_skipped) == (0, 0, 4)
    s = run_labelling(jobs, out, settings=SETTINGS, compute=fake_compute, progress=False,
                      retry_failed=True)
    assert s.n_failed == 1 and _calls(log).count("fail-1") == 2
    assert len(load_records(out)) == 4  # newest record per id
    frame = records_frame(out)
    # two workers finish in either order; the frame holds each id once
    assert sorted(frame["id"]) == ["a", "b", "c", "fail-1"]
    assert frame.loc[frame["id"] == "c", "spillage"].item() == pytest.approx(0.3)


def test_timeout_and_dead_worker_are_failures_and_the_rest_completes(tmp_path, log):
    out = tmp_path / "run"
    s = run_labelling(_jobs(["slow-1", "ok-1", "die-1", "ok-2"]), out, settings=SETTINGS,
                      workers=2, timeout_s=3.0, compute=fake_compute, progress=False)
    assert (s.n_ok, s.n_failed) == (2, 2)
    recs = {r.id: r for r in load_records(out)}
    assert recs["slow-1"].error.startswith("Timeout: no result within 3 s")
    assert 3.0 <= recs["slow-1"].wall_s < 30.0
    assert recs["die-1"].error.startswith("WorkerDied") and "exit code 3" in recs["die-1"].error
    assert recs["ok-1"].ok and recs["ok-2"].ok


_KILL_SCRIPT = """
import sys
sys.path.insert(0, {tests!r})
from test_labeller import fake_compute, _jobs, SETTINGS
from prescreen.physics.labeller import run_labelling
run_labelling(_jobs([f"s{{i:02d}}" for i in range(12)]), {out!r}, settings=SETTINGS,
              workers=2, compute=fake_compute, progress=False)
"""


def test_resume_after_kill_9_neither_loses_nor_repeats(tmp_path, log, monkeypatch):
    out = tmp_path / "run"
    monkeypatch.setenv("PRESCREEN_FAKE_SLEEP", "0.4")
    script = _KILL_SCRIPT.format(tests=str(Path(__file__).parent), out=str(out))
    proc = subprocess.Popen([sys.executable, "-c", script], start_new_session=True)
    records = out / RECORDS_FILE
    deadline = time.time() + 60
    while time.time() < deadline:
        if records.exists() and len(records.read_text().splitlines()) >= 4:
            break
        time.sleep(0.05)
    os.killpg(proc.pid, signal.SIGKILL)  # the runner and its workers, mid-run
    proc.wait()
    first = [json.loads(x)["id"] for x in records.read_text().splitlines() if x.endswith("}")]
    assert 4 <= len(first) < 12
    calls_before = len(_calls(log))
    monkeypatch.setenv("PRESCREEN_FAKE_SLEEP", "0")
    ids = [f"s{i:02d}" for i in range(12)]
    s = run_labelling(_jobs(ids), out, settings=SETTINGS, workers=2, compute=fake_compute,
                      progress=False)
    assert s.n_skipped == len(first) and s.n_ok == 12 - len(first)
    second = _calls(log)[calls_before:]
    assert not set(second) & set(first)  # finished work is not repeated
    assert sorted(r.id for r in load_records(out)) == ids  # and none is lost
    lines = records.read_text().splitlines()
    assert len(lines) == 12 and len({json.loads(x)["id"] for x in lines}) == 12


_SLOW_SCRIPT = """
import sys
sys.path.insert(0, {tests!r})
from test_labeller import fake_compute, _jobs, SETTINGS
from prescreen.physics.labeller import run_labelling
run_labelling(_jobs(["slow-a"]), {out!r}, settings=SETTINGS, compute=fake_compute,
              progress=False)
"""


def _running(pid: int) -> bool:
    """Whether ``pid`` is a live process (a zombie waiting to be reaped is not)."""
    try:
        state = Path(f"/proc/{pid}/status").read_text()
    except FileNotFoundError:
        return False
    return "\nState:\tZ" not in state


@pytest.mark.skipif(not Path("/proc/self/status").exists(), reason="needs Linux /proc")
def test_a_second_run_is_refused_and_workers_die_with_a_killed_run(tmp_path, log, monkeypatch):
    out, pids = tmp_path / "run", tmp_path / "pids"
    monkeypatch.setenv("PRESCREEN_FAKE_PIDS", str(pids))
    script = _SLOW_SCRIPT.format(tests=str(Path(__file__).parent), out=str(out))
    proc = subprocess.Popen([sys.executable, "-c", script], start_new_session=True)
    try:
        deadline = time.time() + 60
        while time.time() < deadline and not (pids.exists() and pids.read_text().strip()):
            time.sleep(0.05)
        worker = int(pids.read_text().split()[0])  # computing "slow-a" (a 60 s job)
        with pytest.raises(InputError, match=r"another labelling run is using this folder"):
            run_labelling(_jobs(["b"]), out, settings=SETTINGS, compute=fake_compute,
                          progress=False)
        assert _calls(log) == ["slow-a"]  # the refused run computed nothing
        os.kill(proc.pid, signal.SIGKILL)  # the run only, not its worker
        proc.wait()
        deadline = time.time() + 10
        while time.time() < deadline and _running(worker):
            time.sleep(0.05)
        assert not _running(worker), "the worker outlived the killed run"
    finally:
        try:
            os.killpg(proc.pid, signal.SIGKILL)
        except ProcessLookupError:
            pass
    # the lock went with the killed run: the folder is free, and "slow-a" was never recorded
    s = run_labelling(_jobs(["b"]), out, settings=SETTINGS, compute=fake_compute,
                      progress=False)
    assert s.n_ok == 1 and [r.id for r in load_records(out)] == ["b"]


def test_torn_last_line_is_repaired(tmp_path, log):
    out = tmp_path / "run"
    run_labelling(_jobs(["a"]), out, settings=SETTINGS, compute=fake_compute, progress=False)
    with open(out / RECORDS_FILE, "a") as fh:
        fh.write('{"id": "b", "status": "o')  # died while appending b
    assert [r.id for r in load_records(out)] == ["a"]
    s = run_labelling(_jobs(["a", "b"]), out, settings=SETTINGS, compute=fake_compute,
                      progress=False)
    assert (s.n_skipped, s.n_ok) == (1, 1)
    assert [r.id for r in load_records(out)] == ["a", "b"]


def test_corrupt_middle_line_is_reported_with_its_line(tmp_path, log):
    out = tmp_path / "run"
    run_labelling(_jobs(["a"]), out, settings=SETTINGS, compute=fake_compute, progress=False)
    text = (out / RECORDS_FILE).read_text()
    (out / RECORDS_FILE).write_text("garbage\n" + text)
    with pytest.raises(InputError, match=r"records.jsonl:1: record line is not valid JSON"):
        load_records(out)


def test_other_settings_in_the_same_folder_are_refused(tmp_path, log):
    out = tmp_path / "run"
    run_labelling(_jobs(["a"]), out, settings=SETTINGS, compute=fake_compute, progress=False)
    with pytest.raises(InputError, match="labelled with other settings"):
        run_labelling(_jobs(["a"]), out, settings=LabelSettings(kpts=(6, 6, 1)),
                      compute=fake_compute, progress=False)


def test_a_settings_file_from_before_a_field_existed_is_completed_not_refused(tmp_path, log):
    out = tmp_path / "run"
    run_labelling(_jobs(["a"]), out, settings=SETTINGS, compute=fake_compute, progress=False)
    spath = out / "settings.json"
    older = json.loads(spath.read_text())
    del older["soc_scale"]  # as if written by a release without the field
    spath.write_text(json.dumps(older))
    run_labelling(_jobs(["a", "b"]), out, settings=SETTINGS, compute=fake_compute,
                  progress=False)
    assert json.loads(spath.read_text()) == SETTINGS.as_dict()
    # the default the field takes must still match what is asked
    spath.write_text(json.dumps(older))
    with pytest.raises(InputError, match="labelled with other settings"):
        run_labelling(_jobs(["a"]), out, settings=replace(SETTINGS, soc_scale=0.0),
                      compute=fake_compute, progress=False)


def test_a_settings_file_with_unknown_fields_is_named(tmp_path, log):
    out = tmp_path / "run"
    out.mkdir()
    (out / "settings.json").write_text(json.dumps({"basis": "dzp", "ecut": 500}))
    with pytest.raises(InputError, match=r"settings.json.*does not hold label settings"):
        run_labelling(_jobs(["a"]), out, settings=SETTINGS, compute=fake_compute,
                      progress=False)


def test_ids_to_redo_are_recomputed_whatever_their_record(tmp_path, log):
    out = tmp_path / "run"
    jobs = _jobs(["a", "b", "fail-1"])
    run_labelling(jobs, out, settings=SETTINGS, compute=fake_compute, progress=False)
    s = run_labelling(jobs, out, settings=SETTINGS, compute=fake_compute, progress=False,
                      redo=["b", "fail-1"])
    assert (s.n_ok, s.n_failed, s.n_skipped) == (1, 1, 1)
    assert sorted(_calls(log)) == ["a", "b", "b", "fail-1", "fail-1"]
    assert len(load_records(out)) == 3  # the newest record per id


@pytest.mark.parametrize(
    "jobs, kwargs, match",
    [
        ([("a", None), ("a", None)], {}, "duplicate job id"),
        ([("../x", None)], {}, "identifier"),
        ([("a", None)], {"workers": 0}, "workers must be a positive integer"),
        ([("a", None)], {"timeout_s": 0}, "timeout_s must be positive"),
        ([("a", None)], {"redo": ["b"]}, "not among the jobs"),
    ],
)
def test_bad_jobs_and_options_are_refused(tmp_path, jobs, kwargs, match):
    with pytest.raises(InputError, match=match):
        run_labelling(jobs, tmp_path / "run", settings=SETTINGS, compute=fake_compute,
                      progress=False, **kwargs)
