"""The open-dataset build script as a module, for the benchmarks that reuse its settings."""

from __future__ import annotations

import importlib.util
from pathlib import Path
from types import ModuleType

ROOT = Path(__file__).resolve().parents[1]


def build_module() -> ModuleType:
    """``scripts/build_open_dataset.py``, imported (its relaxation constants, etc.)."""
    spec = importlib.util.spec_from_file_location("build_open_dataset",
                                                  ROOT / "scripts" / "build_open_dataset.py")
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)  # type: ignore[union-attr]
    return module


def plane_wave_relaxations(work: Path, ids: list[str], caller: str) -> dict[str, dict] | None:
    """The newest relaxation record of each of ``ids`` in ``<work>/relax.jsonl`` (the
    build's own reader), or None after saying which ids have no successful plane-wave
    relaxation as their newest record."""
    build = build_module()
    newest = build._newest(build._read_jsonl(work / "relax.jsonl"))
    bad = [i for i in ids
           if newest.get(i, {}).get("status") != "ok" or "ecut_eV" not in newest[i]]
    if bad:
        print(f"{caller}: no successful plane-wave relaxation as the newest record of "
              f"{bad} in {work / 'relax.jsonl'}")
        return None
    return {i: newest[i] for i in ids}


def checkpoint_arguments(description: str) -> tuple[Path, list[dict]]:
    """Parse ``--work`` (the build's checkpoint folder) and read its ``relax.jsonl``:
    returns the folder and the relaxation records, oldest first."""
    import argparse
    import json

    p = argparse.ArgumentParser(description=description)
    p.add_argument("--work", type=Path, default=ROOT / "data_work" / "open_dataset")
    work = p.parse_args().work
    relax = [json.loads(line) for line in
             (work / "relax.jsonl").read_text(encoding="utf-8").splitlines() if line]
    return work, relax
