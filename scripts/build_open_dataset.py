"""Build data_open/: the candidate pool, relaxed and spillage-labelled monolayers, datasheet.

One command regenerates everything from scratch and resumes after an interruption::

    python scripts/build_open_dataset.py                    # all stages, whole subset
    python scripts/build_open_dataset.py --limit 20         # first 20 of the subset
    python scripts/build_open_dataset.py --stage pool       # only the pool
    python scripts/build_open_dataset.py --stage pack       # only tables + datasheet

Stages
------
pool
    Generate the candidate pool (:mod:`prescreen.prototypes`) and write
    ``pool.parquet`` and ``pool.extxyz.gz``. Reused when present with the same seed.
relax
    Walk the stratified subset (cells of at most ``--max-atoms`` atoms first, a round
    robin over prototypes weighted toward cheaper cells, rarest elements first; see
    :func:`stratified_order`) and relax
    each candidate: with ``--relax-with potential`` (the default) by the universal
    potential alone, falling back to plane waves where its geometry is refused (now, or
    later with ``--fallback later``); with ``--relax-with plane-waves`` by
    :func:`prescreen.physics.dft.relax_monolayer_pw` (PBE, plane waves with the stress
    tensor, positions and in-plane cell together; coarser k mesh than the labels), which
    also relaxes the potential's geometries again. Each outcome, with its residual force
    and in-plane virial, is appended to ``<work>/relax.jsonl``; structures that do not
    converge or that fall apart (:func:`prescreen.prototypes.check_intact_monolayer`) are
    recorded and left out. Failures of earlier protocols (``RELAX_GENERATION``) are relaxed again.
label
    Label the relaxed structures with :func:`prescreen.physics.labeller.run_labelling`
    (the ``all`` stage labels each one in a child process with
    :func:`prescreen.physics.dft.label_structure` and the same settings; resumable; JSONL
    records and one ``.npz`` per id in ``<work>/labels``).
pack
    Write ``labelled.parquet``, ``relaxation.parquet``, ``labelled.extxyz.gz``, the
    datasheet ``README.md`` (every number computed here) and ``MANIFEST.json`` (SHA-256
    of every shipped file).
all
    pool, then relaxations and labels as one stream (:func:`pipeline_stage`: a free
    worker labels a finished relaxation first, so no core waits for a batch), packing
    after every ``--batch`` labels (new ones and relabels), until ``--limit`` is reached.
    The Z2 invariant of each new positive with gapped bands is computed too, and
    structures of the subset relaxed by an earlier protocol are relaxed and labelled
    again, taking turns with new ones (``--upgrade-share``).

Everything is checkpointed per structure: killing the command (even ``kill -9``) loses
at most the structures in progress, and rerunning it skips what is done.
"""

from __future__ import annotations

import argparse
import gzip
import hashlib
import io
import json
import math
import multiprocessing as mp
import os
import platform
import re
import shutil
import signal
import sys
import time
import traceback
from collections import Counter
from pathlib import Path
from typing import TYPE_CHECKING, Any, Iterable, NamedTuple, Sequence

import numpy as np

ROOT = Path(__file__).resolve().parents[1]
if str(ROOT) not in sys.path:  # run as a plain script from a checkout
    sys.path.insert(0, str(ROOT))

from prescreen.errors import InputError  # noqa: E402
from prescreen.io.atomic import replacing, write_json, write_text  # noqa: E402
from prescreen.process import die_with_parent, folder_lock  # noqa: E402
from prescreen.physics.dft import (  # noqa: E402
    DEFAULT_PW_ECUT_EV,
    HARD_ELEMENTS,
    HARD_PW_ECUT_EV,
    DEFAULT_VIRIAL_TOL_EV,
    LAYER_CHECK_EVERY,
)
from prescreen.physics.parity import SYMPREC_A  # noqa: E402
from prescreen.physics.prerelax import PRERELAX_FMAX, PRERELAX_MAX_STRAIN  # noqa: E402
from prescreen.prototypes import (  # noqa: E402
    COVALENT_RADII_SOURCE,
    DEFAULT_SEED,
    PROTOTYPES,
    VACUUM_A,
    check_intact_monolayer,
    generate_pool,
    pool_table,
    structure_columns,
    structure_from_row,
)

if TYPE_CHECKING:  # pragma: no cover - typing only
    import pandas as pd
    from pymatgen.core import Structure

__all__ = [
    "POSITIVE_THRESHOLD",
    "RELAX_KPT_DENSITY",
    "RELAX_SMEARING_EV",
    "RELAX_ECUT_EV",
    "RELAX_GENERATION",
    "cell_cost_weight",
    "stratified_order",
    "build_pool",
    "relax_stage",
    "pipeline_stage",
    "label_stage",
    "pack_stage",
    "main",
]

#: Spillage at or above which a monolayer counts as positive (common practice).
POSITIVE_THRESHOLD = 0.5

#: k-point density (points per reciprocal angstrom, |b| with the 2 pi) of the
#: relaxations: coarser than the labels' default (5.0) to keep relaxations affordable;
#: common practice for geometry (forces converge faster in k than band inversions).
RELAX_KPT_DENSITY = 2.5

#: Fermi-Dirac width (eV) of the relaxations: wider than the labels' 0.01 eV so that the
#: self-consistency of metals and small-gap layers converges in fewer iterations
#: (common practice for geometry; the labels keep 0.01 eV).
RELAX_SMEARING_EV = 0.1

#: Plane-wave cutoff (eV), in-plane virial tolerance (eV per cell) and BFGS steps per
#: attempt of the relaxations (``relax_monolayer_pw``); the cutoff from the convergence
#: test in docs/labeller.md.
RELAX_ECUT_EV = DEFAULT_PW_ECUT_EV  # HARD_PW_ECUT_EV for layers with HARD_ELEMENTS
RELAX_VIRIAL_TOL_EV = DEFAULT_VIRIAL_TOL_EV
RELAX_PW_STEPS = 150

#: Residual-force tolerance of the relaxations (eV/angstrom); common practice.
RELAX_FMAX = 0.05
#: Relaxation protocol of new records (column ``generation``):
#:
#: 1. (records before 2026-12-03, which carry no ``generation``) LCAO; the lattice from
#:    energy scans with the positions held fractional, biased toward the lattice at
#:    which they were relaxed;
#: 2. (2026-12-03) LCAO; the same scans, then refined to zero in-plane stress by finite
#:    differences of the energy (``relax_monolayer``);
#: 3. (2026-12-03, a few hours) plane waves with the stress tensor, positions and
#:    in-plane cell in one BFGS run from the pool geometry, without a Pulay correction:
#:    at 500 eV the lattices of layers with N, O or F came out several per cent short;
#: 4. (since 2026-12-03) the same with GPAW's estimate of the Pulay stress added
#:    (``relax_monolayer_pw``, ``pulay_virial_eV``).
#:
#: A build relaxes the structures of older generations again, from their pool geometry,
#: taking turns with new relaxations, and labels them again.
RELAX_GENERATION = 4
#: Where a relaxation starts (``--start``, column ``start``): "potential" relaxes the
#: pool geometry with a universal interatomic potential (CHGNet, ``uip`` extra) within
#: its space group first, in seconds, and the plane-wave relaxation goes on from there
#: (``prescreen.physics.prerelax``; over twelve structures 26 % fewer BFGS steps, ten
#: ending in the same minimum, ``benchmarks/relax_start.py``, docs/labeller.md);
#: "generated" starts from the pool geometry, as every
#: relaxation did until 2026-12-03. The start changes the cost, not the level of theory,
#: so it is no new generation.
RELAX_START = "potential"
RELAX_STARTS = ("potential", "generated")
#: Generation (column ``generation``) of a geometry relaxed by the universal potential
#: alone, with no DFT relaxation after it (``--relax-with potential``).
POTENTIAL_GENERATION = 0
#: How a build relaxes a structure (``--relax-with``), and the generation it records:
#: "potential" keeps the potential's relaxation (the start above) as the geometry, in
#: seconds, and relaxes with plane waves what the start would refuse; "plane-waves"
#: relaxes with plane waves and the stress tensor (generation 4), in minutes, and
#: replaces the potential's geometries too. On the 87 labels of generation 4 the
#: potential kept 70; their labels at its geometry fell on the same side of 0.5 as at
#: the plane-wave geometry for 55 (79 %; 31 of 34 whose lattices agreed within 2 %), at an
#: eleventh of the cost (``benchmarks/potential_labels.py``, docs/labeller.md, 2026-12-03).
RELAX_WITH = {"potential": POTENTIAL_GENERATION, "plane-waves": RELAX_GENERATION}
DEFAULT_RELAX_WITH = "potential"
#: When the potential's route relaxes with plane waves a structure whose potential
#: relaxation it does not keep (``--fallback``): "now", in the same job; "later" records
#: the potential's refusal (generation 0, not ok) and leaves the plane-wave relaxation to
#: the next run with "now" or with ``--relax-with plane-waves``, which do these first.
#: The fallbacks took about half the build's time on 2026-12-03 (24 of them, 1.30
#: core-hours in 68 minutes); "later" labels more structures per hour at the price of a
#: labelled set that lacks, for a while, the layers the potential gets wrong.
FALLBACKS = ("now", "later")
DEFAULT_FALLBACK = "now"
#: What the ``lattice_scan`` column says of a relaxation of the current generation.
RELAX_TEXT = (f"stress tensor (plane waves, {RELAX_ECUT_EV:g} eV, {HARD_PW_ECUT_EV:g} eV with "
              f"{', '.join(sorted(HARD_ELEMENTS))}; Pulay stress estimate added): BFGS over "
              f"positions and "
              f"in-plane strain to {RELAX_FMAX} eV/A and an in-plane virial below "
              f"{RELAX_VIRIAL_TOL_EV} eV")

#: What the ``lattice_scan`` column says of a relaxation by the potential alone.
POTENTIAL_TEXT = (f"universal potential alone (FixSymmetry; FIRE over positions and in-plane "
                  f"strain to {PRERELAX_FMAX} eV/A; no DFT relaxation)")

#: Error text of the label record that stands in for a label of a geometry since
#: replaced (the structure was relaxed again and has no label of its new geometry yet,
#: or its new relaxation failed): the old label's compute counts as replaced, the id
#: leaves the labelled table, and a build labels it when its newest relaxation is ok.
RELABEL_PENDING = "superseded: the structure was relaxed again"
#: Share of the relaxations started that go to structures of an earlier protocol
#: (``upgrade``) while new structures wait too: 0.5 takes turns.
DEFAULT_UPGRADE_SHARE = 0.5

#: Relaxation attempts per structure (a second one continues from the first's result
#: when the first ran out of steps).
RELAX_ATTEMPTS = 2

#: Cells of at most this many atoms are relaxed and labelled first.
DEFAULT_MAX_ATOMS = 6
#: Structures relaxed before :func:`stratified_order` weighted the turns by cost: the
#: build chose them with equal turns per prototype.
EQUAL_TURNS_RELAXED = 183

#: Relaxation cost of a layer with N, O or F (700 eV cutoff) over one of the same size
#: without (500 eV): 1.73 from the 33 relaxations of generation 4 that ended ok, fitting
#: log(wall time) = c + 2 log(n_atoms) + log(factor) [N, O or F] (2026-12-03,
#: ``benchmarks/order_cost.py``).
HARD_COST_FACTOR = 1.7

#: Licence of everything in data_open/.
LICENCE = "CC-BY-4.0"

POOL_PARQUET = "pool.parquet"
POOL_XYZ = "pool.extxyz.gz"
LABELLED_PARQUET = "labelled.parquet"
LABELLED_XYZ = "labelled.extxyz.gz"
RELAX_PARQUET = "relaxation.parquet"
#: Checkpoint of the Z2 invariants (in the work folder), one JSON record per line.
Z2_LOG = "z2.jsonl"
#: A Z2 job may take this many times the labelling timeout: Wilson loops at up to 192 k
#: per loop and parities on an even mesh cost several labels (chosen here).
Z2_TIMEOUT_FACTOR = 3
MANIFEST = "MANIFEST.json"
DATASHEET = "README.md"


# --- small helpers ------------------------------------------------------------------
def _sha256(path: Path) -> str:
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        for chunk in iter(lambda: fh.read(1 << 20), b""):
            h.update(chunk)
    return h.hexdigest()


def _versions() -> dict[str, str]:
    import ase
    import pymatgen.core
    import spglib

    from prescreen import __version__

    out = {"prescreen": __version__, "python": platform.python_version(),
           "numpy": np.__version__, "pymatgen": pymatgen.core.__version__,
           "ase": ase.__version__, "spglib": spglib.__version__}
    try:
        import gpaw

        out["gpaw"] = gpaw.__version__
    except ImportError:
        pass
    from importlib.metadata import PackageNotFoundError, version

    for name in ("chgnet", "torch"):  # the relaxations' start (``uip`` extra)
        try:
            out[name] = version(name)
        except PackageNotFoundError:
            pass
    return out


def _write_parquet(df: "pd.DataFrame", path: Path) -> None:
    with replacing(path) as tmp:
        df.to_parquet(tmp, index=False, compression="zstd")


def _write_extxyz_gz(structures: Iterable[tuple["Structure", dict[str, Any]]], path: Path) -> None:
    """Compressed extended XYZ, byte-reproducible (gzip header without time or name)."""
    from ase.io import write
    from pymatgen.io.ase import AseAtomsAdaptor

    buf = io.StringIO()
    frames = []
    for structure, info in structures:
        atoms = AseAtomsAdaptor.get_atoms(structure)
        atoms.pbc = (True, True, False)
        atoms.info = dict(info)
        frames.append(atoms)
    write(buf, frames, format="extxyz")
    with replacing(path) as tmp, open(tmp, "wb") as raw, gzip.GzipFile(
            filename="", mode="wb", fileobj=raw, mtime=0, compresslevel=9) as gz:
        gz.write(buf.getvalue().encode())


def _read_jsonl(path: Path) -> list[dict[str, Any]]:
    """Records of a JSONL checkpoint; a torn last line (after kill -9) is ignored."""
    if not path.exists():
        return []
    out = []
    with open(path, encoding="utf-8") as fh:
        lines = fh.readlines()
    for n, line in enumerate(lines, start=1):
        if not line.strip():
            continue
        try:
            out.append(json.loads(line))
        except json.JSONDecodeError as exc:
            if n == len(lines):
                break
            raise InputError("damaged checkpoint line", path=path, line=n, value=line[:80],
                             expected="one JSON object per line") from exc
    return out


def _append_jsonl(path: Path, record: dict[str, Any]) -> None:
    """Append one record (fsync'ed); a torn last line left by a kill is cut off first
    (a last line that is whole JSON without its newline is completed instead, as
    :func:`_read_jsonl` counts it)."""
    if path.exists() and path.stat().st_size:
        with open(path, "rb") as fh:
            fh.seek(-1, os.SEEK_END)
            unterminated = fh.read(1) != b"\n"
        if unterminated:
            data = path.read_bytes()
            tail = data[data.rfind(b"\n") + 1:]
            try:  # a whole record that lost only its newline: keep it
                json.loads(tail)
                with open(path, "ab") as fh:
                    fh.write(b"\n")
            except ValueError:  # torn by a kill: cut it off
                with open(path, "r+b") as fh:
                    fh.truncate(len(data) - len(tail))
    with open(path, "a", encoding="utf-8") as fh:
        fh.write(json.dumps(record, sort_keys=True) + "\n")
        fh.flush()
        os.fsync(fh.fileno())


# --- pool ---------------------------------------------------------------------------
def build_pool(out: Path, seed: int, *, force: bool = False, progress: bool = True) -> "pd.DataFrame":
    """Generate (or reuse) the pool files in ``out``; returns the pool table."""
    import pandas as pd
    import pyarrow.parquet as pq

    path = out / POOL_PARQUET
    if path.exists() and not force:
        meta = pq.read_schema(path).metadata or {}
        if meta.get(b"prescreen.seed") == str(seed).encode():
            print(f"pool: reusing {path}")
            return pd.read_parquet(path)
        print(f"pool: {path} has another seed; regenerating")
    t0 = time.perf_counter()
    pool = generate_pool(seed, progress=progress)
    table = pool_table(pool)
    out.mkdir(parents=True, exist_ok=True)
    import pyarrow as pa

    arrow = pa.Table.from_pandas(table, preserve_index=False)
    arrow = arrow.replace_schema_metadata({**(arrow.schema.metadata or {}),
                                           b"prescreen.seed": str(seed).encode()})
    with replacing(path) as tmp:
        pq.write_table(arrow, tmp, compression="zstd")
    _write_extxyz_gz(((c.structure, {"id": c.id, "prototype": c.prototype}) for c in pool),
                     out / POOL_XYZ)
    print(f"pool: {len(table)} candidates, {table.groupby(['prototype', 'reduced_formula']).ngroups}"
          f" distinct (prototype, reduced formula) in {time.perf_counter() - t0:.0f} s")
    return table


def cell_cost_weight(n_atoms: int, elements: Iterable[str]) -> float:
    """How often a candidate's prototype waits for its next turn in
    :func:`stratified_order`: the square root of the relative cost of its relaxation,
    ``n_atoms`` times :data:`HARD_COST_FACTOR` ** 0.5 for layers with N, O or F.

    The cost model, n_atoms squared times the factor, is a fit to the plane-wave
    relaxations of generation 4 (``benchmarks/order_cost.py`` prints it).
    """
    hard = HARD_COST_FACTOR if HARD_ELEMENTS & set(elements) else 1.0
    return float(n_atoms) * math.sqrt(hard)


def stratified_order(pool: "pd.DataFrame", seed: int, max_atoms: int = DEFAULT_MAX_ATOMS,
                     weight: Any = None) -> list[str]:
    """Order in which candidates are relaxed and labelled.

    Cells with at most ``max_atoms`` atoms come first, then the rest, each tier
    ordered the same way. Prototypes take turns by a weighted round robin: each has a
    clock that a pick advances by the picked candidate's :func:`cell_cost_weight`, and
    the next turn goes to the prototype with the earliest clock (ties in table order).
    The first round so visits every prototype once; after that a prototype of 2-atom
    cells comes about three times as often as one of 6-atom cells. Turn frequencies
    inverse to the cost would give every prototype the same compute and the large cells
    very few labels; equal turns give every prototype the same count and spend most of
    the compute on the large cells; the square root of the cost sits between the two.
    Each turn picks, among the prototype's remaining candidates in a seeded random
    order, the first one whose rarest-so-far element count is smallest (looking ahead at
    most 64 candidates), so that elements are covered evenly.

    Parameters
    ----------
    pool
        Pool table with ``id``, ``prototype``, ``elements`` and ``n_atoms``.
    seed
        Seed of the random order.
    max_atoms
        Size of the cells in the first tier.
    weight
        ``weight(n_atoms, elements) -> float`` in place of :func:`cell_cost_weight`;
        a constant gives equal turns (how the build chose its first
        :data:`EQUAL_TURNS_RELAXED` structures).

    Returns
    -------
    list of str
        Every pool id exactly once.
    """
    weight = cell_cost_weight if weight is None else weight
    rng = np.random.default_rng(seed)
    names = [p.name for p in PROTOTYPES]
    order: list[str] = []
    for tier in (pool[pool["n_atoms"] <= max_atoms], pool[pool["n_atoms"] > max_atoms]):
        queues: dict[str, list[tuple[str, tuple[str, ...], float]]] = {}
        for name in names:
            sub = tier[tier["prototype"] == name]
            perm = rng.permutation(len(sub))
            queues[name] = []
            for i in perm:
                els = tuple(sub["elements"].iat[i].split())
                queues[name].append((sub["id"].iat[i], els,
                                     float(weight(int(sub["n_atoms"].iat[i]), els))))
        clock = {name: 0.0 for name in names}
        seen: Counter[str] = Counter()
        while any(queues.values()):
            name = min((n for n in names if queues[n]), key=lambda n: clock[n])
            q = queues[name]
            look = q[:64]
            scores = [max(seen[e] for e in els) * 1000 + sum(seen[e] for e in els)
                      for _, els, _ in look]
            k = int(np.argmin(scores))
            ident, els, step = q.pop(k)
            clock[name] += step
            seen.update(els)
            order.append(ident)
    return order


# --- relaxation ---------------------------------------------------------------------
def _relaxation(ident: str, row: dict[str, Any], kpt_density: float) -> tuple[dict[str, Any], Any]:
    """Relax one structure from ``row``'s geometry (``relax_monolayer_pw``); returns its
    record of the current generation (any status) and the relaxed structure (None if it
    failed)."""
    from pymatgen.io.ase import AseAtomsAdaptor

    from prescreen.physics.dft import LabelSettings, LayerBroke, relax_monolayer_pw

    t0 = time.perf_counter()
    rec: dict[str, Any] = {"id": ident, "attempts": 0, "smearing_eV": RELAX_SMEARING_EV,
                           "lattice_scan": RELAX_TEXT,
                           "generation": RELAX_GENERATION}
    structure = None
    try:
        settings = LabelSettings(kpt_density=kpt_density, smearing_eV=RELAX_SMEARING_EV)
        start = structure_from_row(row)
        converged, residual, broke, steps = False, math.nan, "", 0
        details: dict[str, Any] = {}

        def check(atoms: Any) -> str:
            return check_intact_monolayer(AseAtomsAdaptor.get_structure(atoms))[1]

        structure, start_fields = _start_geometry(start, str(row.get("start", RELAX_START)))
        rec.update(start_fields)

        for attempt in range(1, RELAX_ATTEMPTS + 1):
            rec["attempts"] = attempt
            details.clear()
            try:
                structure, residual, converged = relax_monolayer_pw(
                    structure, settings, fmax=RELAX_FMAX,
                    virial_tol_eV=RELAX_VIRIAL_TOL_EV, steps=RELAX_PW_STEPS,
                    check_layer=check, details=details)
            except LayerBroke as exc:
                structure, broke = exc.structure, f"during the relaxation: {exc.reason}"
                break
            steps += int(details.get("steps", 0))
            if converged:
                break
        intact, why = check_intact_monolayer(structure)
        why = broke or why
        intact = intact and not broke
        rec.update(residual_fmax_eV_per_A=float(residual), converged=bool(converged),
                   **structure_columns(structure))
        if "virial_eV" in details:
            rec.update(virial_eV=round(float(details["virial_eV"]), 5), bfgs_steps=steps,
                       ecut_eV=float(details["ecut_eV"]),
                       pulay_virial_eV=round(float(details["pulay_virial_eV"]), 4),
                       **({"energy_eV": round(float(details["energy_eV"]), 5),
                           "relax_kmesh": list(details["kmesh"])}
                          if "energy_eV" in details else {}),
                       lattice_strain=[round(float(x), 6) for x in np.log(
                           np.asarray(structure.lattice.abc[:2]) / start.lattice.abc[:2])])
        if not intact:
            rec.update(status="fell_apart", reason=why)
        elif not converged:
            virial = float(details.get("virial_eV", math.nan))
            over = [f"residual force {residual:.3f} eV/A (tolerance {RELAX_FMAX})"
                    if not residual < RELAX_FMAX else "",
                    f"in-plane virial {virial:.3f} eV (tolerance {RELAX_VIRIAL_TOL_EV})"
                    if not virial < RELAX_VIRIAL_TOL_EV else ""]
            rec.update(status="not_converged",
                       reason=f"{' and '.join(x for x in over if x) or 'not converged'} "
                              f"after {RELAX_ATTEMPTS} x {RELAX_PW_STEPS} steps")
        else:
            rec.update(status="ok", reason="")
    except Exception as exc:  # recorded, not raised: one failure must not stop the run
        rec.update(status="failed", reason=f"{type(exc).__name__}: {exc}",
                   traceback=traceback.format_exc(limit=3))
        structure = None
    rec["wall_s"] = round(time.perf_counter() - t0, 2)
    return rec, structure


def _potential_geometry(structure: "Structure") -> Any:
    """The universal potential's relaxation of ``structure`` within its space group, with
    the build's rules (a :class:`prescreen.physics.prerelax.StartGeometry`)."""
    from prescreen.physics import prerelax

    return prerelax.prerelax_monolayer(
        structure, prerelax.potential_calculator(), name=prerelax.potential_name(),
        check_layer=lambda s: check_intact_monolayer(s)[1])


def _start_geometry(structure: "Structure", start: str) -> tuple["Structure", dict[str, Any]]:
    """The geometry a relaxation starts from, by ``start`` (see :data:`RELAX_START`), and
    the record's fields that say so. A potential that fails leaves the pool geometry."""
    if start == "generated":
        return structure, {"start": "generated"}
    if start != "potential":
        raise InputError("unknown relaxation start", value=start, expected=" or ".join(RELAX_STARTS))
    from prescreen.physics import prerelax

    name = prerelax.potential_name()
    try:
        pre = _potential_geometry(structure)
    except prerelax.MissingPotential:
        raise
    except Exception as exc:  # recorded: the DFT relaxation still runs, from the pool
        return structure, {"start": f"generated; {name} failed: {type(exc).__name__}: {exc}"}
    return pre.structure, pre.record_fields()


def _potential_relaxation(ident: str, row: dict[str, Any]) -> tuple[dict[str, Any], Any]:
    """Relax one structure with the universal potential alone (generation
    :data:`POTENTIAL_GENERATION`); returns its record (any status) and the relaxed
    structure (None unless the status is ``ok``). What the plane-wave route would refuse
    as a start is refused here too: a layer that falls apart (``fell_apart``), or one
    strained past the cap (``not_converged``: the potential's minimum is too far from
    the generated geometry to trust without DFT); :func:`_relaxed` then relaxes it with
    plane waves."""
    t0 = time.perf_counter()
    rec: dict[str, Any] = {"id": ident, "attempts": 1, "lattice_scan": POTENTIAL_TEXT,
                           "generation": POTENTIAL_GENERATION, "start": "generated"}
    structure = None
    try:
        from prescreen.physics.prerelax import potential_name

        rec["potential"] = potential_name()
        pre = _potential_geometry(structure_from_row(row))
        rec.update(residual_fmax_eV_per_A=round(float(pre.residual), 5),
                   converged=bool(pre.converged and pre.used), potential_steps=pre.steps,
                   lattice_strain=pre.record_fields()["start_strain"],
                   # the geometry where it is the potential's; none for a refusal
                   **(structure_columns(pre.structure) if pre.used else {}))
        if pre.refusal == "fell_apart":
            rec.update(status="fell_apart", reason=pre.note)
        elif not pre.used:
            rec.update(status="not_converged", reason=pre.note)
        elif not pre.converged:
            rec.update(status="not_converged", reason=f"{pre.note}: residual force "
                                                      f"{pre.residual:.3f} eV/A")
        else:
            rec.update(status="ok", reason="")
            structure = pre.structure
    except Exception as exc:  # recorded, not raised: one failure must not stop the run
        rec.update(status="failed", reason=f"{type(exc).__name__}: {exc}",
                   traceback=traceback.format_exc(limit=3))
    rec["wall_s"] = round(time.perf_counter() - t0, 2)
    return rec, structure


#: File a child leaves in its scratch folder when the potential's route falls back to
#: plane waves, so that the parent records a child that leaves no result (a timeout in the
#: plane-wave relaxation) as the plane waves' failure, not the potential's.
FALLBACK_MARK = "plane-waves"


def _relaxed(ident: str, payload: dict[str, Any], kpt_density: float,
             marker: Path | None = None) -> tuple[dict[str, Any], Any]:
    """The relaxation that ``payload["relax_with"]`` asks for (:data:`RELAX_WITH`).

    With the potential, a structure whose potential relaxation is not kept (refused,
    not converged, failed) is relaxed with plane waves in the same job, from the pool
    geometry: the potential's refusals are often the heavy buckled and puckered layers
    with the largest spillage, which leaving out would bias the labels. With
    ``payload["fallback"] == "later"`` the potential's record is returned as it is, for
    a later run to relax with plane waves (:func:`_deferred`)."""
    if payload.get("relax_with", "plane-waves") != "potential":
        return _relaxation(ident, payload, kpt_density)
    rec, structure = _potential_relaxation(ident, payload)
    if rec["status"] == "ok":
        return rec, structure
    if payload.get("fallback", "now") == "later":  # (:data:`FALLBACKS`)
        return {**rec, "fallback": "later"}, None
    why = str(rec.get("reason", ""))
    if marker is not None:
        marker.parent.mkdir(parents=True, exist_ok=True)
        marker.touch()
    pw, structure = _relaxation(ident, {**payload, "start": "generated"}, kpt_density)
    pw.update(start=why if why.startswith("generated") else f"generated; not kept: {why}",
              start_strain=rec.get("lattice_strain", []), start_s=rec["wall_s"],
              wall_s=round(pw["wall_s"] + rec["wall_s"], 2))
    return pw, structure


def _relax_one(ident: str, row: dict[str, Any], kpt_density: float, result_path: str) -> None:
    """Child process: relax one structure and write a JSON result file."""
    os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")
    write_json(result_path, _relaxed(ident, row, kpt_density,
                                     _scratch(Path(result_path)) / FALLBACK_MARK)[0])


def _newest(records: Iterable[dict[str, Any]]) -> dict[str, dict[str, Any]]:
    """The newest record of each id, in the order the ids first appeared."""
    newest: dict[str, dict[str, Any]] = {}
    for r in records:
        newest[r["id"]] = r
    return newest


_TIMEOUT_REASON = re.compile(r"^Timeout: no result within ([0-9.]+) s")


def _timed_out_below(rec: dict[str, Any], timeout_s: float) -> bool:
    """A relaxation that failed on a timeout shorter than ``timeout_s``."""
    hit = _TIMEOUT_REASON.match(str(rec.get("reason", ""))) if rec.get("status") == "failed" \
        else None
    return hit is not None and float(hit.group(1)) < timeout_s


def _older_generation(rec: dict[str, Any], relax_with: str = "plane-waves") -> bool:
    """A relaxation record of a protocol that ``relax_with`` (:data:`RELAX_WITH`)
    replaces: a plane-wave build replaces every generation before
    :data:`RELAX_GENERATION`, the potential's among them; a build with the potential
    replaces the earlier DFT protocols (generations 1 to 3) and leaves the plane-wave
    ones."""
    generation = int(rec.get("generation", 1))
    if relax_with == "potential":
        return POTENTIAL_GENERATION < generation < RELAX_GENERATION
    return generation < RELAX_GENERATION


def _deferred(rec: dict[str, Any]) -> bool:
    """A structure whose relaxation by the potential alone was not kept by a run with
    ``--fallback later``, and that waits for its plane-wave relaxation. (A child of the
    potential's route that died or timed out before falling back leaves a record that the
    parent makes, which the rules for timeouts and failures govern.)"""
    return _by_potential(rec) and rec.get("status") != "ok" and rec.get("fallback") == "later"


def _by_potential(rec: dict[str, Any]) -> bool:
    """A relaxation record of the universal potential alone."""
    return int(rec.get("generation", 1)) == POTENTIAL_GENERATION


def _is_positive(label: Any) -> bool:
    """A successful label record at or above the positive threshold (None: no label)."""
    return label is not None and label.ok and label.spillage >= POSITIVE_THRESHOLD


def _upgrade_priority(label: Any) -> tuple[bool, float]:
    """Sort key of the structures to relax again: labelled positives first, whose geometry
    decides the rarer class and their Z2 jobs; then the labels nearest the threshold,
    the likeliest to cross it with the new geometry; unlabelled ones last."""
    near = (abs(float(label.spillage) - POSITIVE_THRESHOLD)
            if label is not None and label.ok else math.inf)
    return not _is_positive(label), near


def _needs_upgrade(rec: dict[str, Any], relax_with: str = "plane-waves") -> bool:
    """A successful relaxation of a protocol that ``relax_with`` replaces: relaxed and
    labelled again."""
    return rec.get("status") == "ok" and _older_generation(rec, relax_with)


def _parent_made_fields(relax_with: str = "plane-waves") -> dict[str, Any]:
    """Fields of a relaxation record that the parent writes for a child that left no
    result (timeout, crash): the protocol it ran."""
    if relax_with == "potential":
        return {"generation": POTENTIAL_GENERATION, "lattice_scan": POTENTIAL_TEXT}
    return {"generation": RELAX_GENERATION, "lattice_scan": RELAX_TEXT,
            "smearing_eV": RELAX_SMEARING_EV}


def _replaced_fields(old: dict[str, Any]) -> dict[str, Any]:
    """What a new relaxation record says of the record ``old`` of the same id it replaces:
    the wall time spent before and the generation replaced."""
    return {"earlier_wall_s": _earlier_wall_s(old),
            "replaced_generation": int(old.get("generation", 1))}


def _earlier_wall_s(old: dict[str, Any] | None) -> float:
    """Wall time of the relaxations that a new record of the same id replaces."""
    if not old:
        return 0.0
    return round(float(old.get("wall_s") or 0.0) + float(old.get("earlier_wall_s") or 0.0), 2)


def _upgrade_one(ident: str, payload: dict[str, Any], kpt_density: float,
                 result_path: str) -> None:
    """Child process: relax a structure of an earlier generation again, from its pool
    geometry, and label the result. Writes ``{"relax": ..., "label": ...}``; the label is
    None when the relaxation did not end in status ``ok``."""
    from prescreen.physics.dft import LabelRecord, LabelSettings, label_structure

    os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")
    rec, structure = _relaxed(ident, payload, kpt_density,
                              _scratch(Path(result_path)) / FALLBACK_MARK)
    label = None
    if rec["status"] == "ok":
        t1 = time.perf_counter()
        try:
            label = label_structure(structure, LabelSettings(), id=ident).as_dict()
        except Exception as exc:  # recorded, not raised
            label = LabelRecord.failed(ident, str(payload.get("formula", "?")),
                                       LabelSettings(), f"{type(exc).__name__}: {exc}",
                                       time.perf_counter() - t1).as_dict()
    write_json(result_path, {"relax": rec, "label": label})


class _Job(NamedTuple):
    """One child process: a relaxation or a labelling of one structure."""

    kind: str  # "relax", "upgrade", "label" or "z2"
    ident: str
    process: Any
    started: float
    result: Path


def _label_one(ident: str, payload: dict[str, Any], result_path: str) -> None:
    """Child process: label one relaxed structure and write its record as JSON."""
    from prescreen.physics.dft import LabelRecord, LabelSettings, label_structure

    os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")
    t0 = time.perf_counter()
    settings = LabelSettings()
    try:
        rec = label_structure(structure_from_row(payload), settings, id=ident)
    except Exception as exc:  # recorded, not raised: one failure must not stop the run
        rec = LabelRecord.failed(ident, str(payload.get("formula", "?")), settings,
                                 f"{type(exc).__name__}: {exc}", time.perf_counter() - t0)
    write_json(result_path, rec.as_dict())


def _scratch(result: Path) -> Path:
    """The child's folder for temporary files (GPAW's logs) next to its result file: a
    child killed on a timeout or a stop cannot clean up after itself, so the parent
    removes the folder once the child has ended."""
    return result.with_suffix(".scratch")


def _child(target: Any, parent: int, scratch: str, *args: Any) -> None:
    """Child process entry: die with the parent (no orphan runs on), then do the job
    with its temporary files in ``scratch``."""
    import tempfile

    die_with_parent(parent)
    # Ctrl-C and `kill` reach the parent, which stops the children itself; a child must not
    # run the parent's SIGTERM handler (it would unwind into the parent's loop)
    signal.signal(signal.SIGINT, signal.SIG_IGN)
    signal.signal(signal.SIGTERM, signal.SIG_DFL)
    Path(scratch).mkdir(parents=True, exist_ok=True)
    tempfile.tempdir = scratch
    target(*args)


def _z2_one(ident: str, payload: dict[str, Any], result_path: str) -> None:
    """Child process: the Z2 invariant of one labelled structure.

    From parities when the layer has an inversion centre, else from Wilson loops
    (:func:`prescreen.invariants.choose_method`).
    """
    from prescreen.errors import NoDirectGap
    from prescreen.invariants import choose_method
    from prescreen.physics.dft import LabelSettings
    from prescreen.physics.parity import z2_from_parities
    from prescreen.physics.wilson import z2_from_wilson_loops

    os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")
    t0 = time.perf_counter()
    rec: dict[str, Any] = {"id": ident}
    try:
        structure = structure_from_row(payload)
        rec["method"] = choose_method(structure)
        if rec["method"] == "parity":
            r = z2_from_parities(structure, LabelSettings(), id=ident)
            rec |= {"status": "ok", "z2": r.z2, "delta": list(r.delta),
                    "n_minus": list(r.n_minus), "parity_error": r.parity_error,
                    "direct_gap_soc_eV": r.direct_gap_soc_eV, "kmesh": list(r.kmesh)}
        else:
            w = z2_from_wilson_loops(structure, LabelSettings(), id=ident)
            rec |= {"status": "ok", "z2": w.z2, "wilson_loops": len(w.k2), "nk1": w.nk1,
                    "min_link": w.min_link, "direct_gap_soc_eV": w.direct_gap_soc_eV,
                    "kmesh": list(w.kmesh)}
    except NoDirectGap as exc:  # a metal after all: the invariant is not defined
        rec |= {"status": "no_direct_gap", "reason": str(exc),
                "direct_gap_soc_eV": exc.gap_eV, "odd_count": exc.odd_count}
    except Exception as exc:  # recorded, not raised: one failure must not stop the run
        rec |= {"status": "failed", "reason": f"{type(exc).__name__}: {exc}"}
    rec["wall_s"] = round(time.perf_counter() - t0, 2)
    write_json(result_path, rec)


#: Z2 records that say only why no invariant was computed then; a later run computes it
#: (runs before Wilson loops existed skipped layers without an inversion centre).
Z2_RETRY_STATUSES = frozenset({"no_inversion"})


#: Reason Wilson loops gave for an odd electron count before that was recorded as
#: touching bands (``no_direct_gap``); such records are rerun, a quick refusal, to say so.
_OLD_ODD_COUNT = re.compile(r"LabellingError: \S+: (\d+) valence electrons; a time-reversal-"
                            r"symmetric insulator needs an even number")


def _z2_rerun(rec: dict[str, Any]) -> bool:
    """Whether a Z2 record must be computed again: a status of
    :data:`Z2_RETRY_STATUSES`, a worker that died, an old odd-count failure, or coarse
    Wilson loops refused below the current cap on points per loop
    (:func:`prescreen.physics.wilson.refused_below_cap`)."""
    from prescreen.physics.wilson import refused_below_cap

    if rec.get("status") in Z2_RETRY_STATUSES:
        return True
    if rec.get("status") != "failed":
        return False
    reason = str(rec.get("reason", ""))
    if reason.startswith("WorkerDied:"):  # killed, out of memory, or a broken import
        return True
    old = _OLD_ODD_COUNT.fullmatch(reason)
    return (old is not None and int(old.group(1)) % 2 == 1) or refused_below_cap(reason)


def _z2_done(z2_log: Path) -> set[str]:
    """IDs whose Z2 job needs no rerun."""
    newest = {r["id"]: r for r in _read_jsonl(z2_log)}
    return {i for i, r in newest.items() if not _z2_rerun(r) and r.get("status") != "stale"}


def _z2_candidate(relax_rec: dict[str, Any], label: Any) -> dict[str, Any] | None:
    """Whether a label earns a Z2 job; a record when it cannot have one.

    Returns None when the structure is a positive whose occupied states with SOC are
    separated from the empty ones at every k of the labelling mesh (a direct gap, which
    a band-inverted semimetal has too), or whose label predates the stored direct gap (the
    Z2 job checks the gap itself): a Z2 job is due. ``{"status": "skipped"}`` for
    everything else (not positive, or the direct gap closes).
    """
    from prescreen.physics.dft import METAL_GAP_EV, prepare_monolayer

    direct = label.direct_gap_soc_eV  # NaN in labels recorded before it was stored
    if not (label.ok and label.spillage >= POSITIVE_THRESHOLD
            and (label.gap_soc_eV >= METAL_GAP_EV or not direct < METAL_GAP_EV)):
        return {"id": label.id, "status": "skipped"}
    try:
        prepare_monolayer(structure_from_row(relax_rec))
    except InputError as exc:
        return {"id": label.id, "status": "failed", "reason": f"InputError: {exc}"}
    return None


def _start(kind: str, ident: str, payload: dict[str, Any], tmpdir: Path,
           kpt_density: float) -> _Job:
    """Fork a child for one job; its result lands in ``<tmpdir>/<kind>-<id>.json``."""
    result = tmpdir / f"{kind}-{ident}.json"
    result.unlink(missing_ok=True)
    if kind == "relax":
        target, args = _relax_one, (ident, payload, kpt_density, str(result))
    elif kind == "upgrade":
        target, args = _upgrade_one, (ident, payload, kpt_density, str(result))
    elif kind == "z2":
        target, args = _z2_one, (ident, payload, str(result))
    else:
        target, args = _label_one, (ident, payload, str(result))
    proc = mp.get_context("fork").Process(
        target=_child, args=(target, os.getpid(), str(_scratch(result)), *args))
    proc.start()
    return _Job(kind, ident, proc, time.perf_counter(), result)


def _stop(jobs: Sequence[_Job]) -> None:
    """Kill and reap the children still running (the parent is stopping)."""
    for job in jobs:
        if job.process.is_alive():
            job.process.kill()
        job.process.join()
        shutil.rmtree(_scratch(job.result), ignore_errors=True)


def _work_lock(work: Path) -> Any:
    """Hold ``<work>/.lock`` for the duration: one writer of the checkpoints at a time."""
    return folder_lock(work, "build")


def _finished(job: _Job, timeout_s: float) -> dict[str, Any] | None:
    """The job's result once its process has ended (killed after ``timeout_s``), else None.

    A child that left no result (timeout, crash, out of memory) gives
    ``{"status": "failed", "reason": ...}``; one stopped by SIGINT, SIGTERM or SIGHUP gives
    ``{"status": "interrupted"}``, which is not recorded. The result file stays until the
    caller has recorded it.
    """
    elapsed = time.perf_counter() - job.started
    if job.process.is_alive() and elapsed < timeout_s:
        return None
    if job.process.is_alive():
        job.process.kill()
    job.process.join()
    fell_back = (_scratch(job.result) / FALLBACK_MARK).exists()
    shutil.rmtree(_scratch(job.result), ignore_errors=True)
    if job.result.exists():  # deleted by the caller once recorded
        return json.loads(job.result.read_text(encoding="utf-8"))
    if job.process.exitcode in (-signal.SIGINT, -signal.SIGTERM, -signal.SIGHUP):
        return {"id": job.ident, "status": "interrupted"}  # not a result: run it again later
    # the labeller's own wording, so that both kinds of failure read alike
    why = (f"Timeout: no result within {timeout_s:g} s" if elapsed >= timeout_s
           else f"WorkerDied: worker process ended (exit code {job.process.exitcode}), "
                "e.g. killed or out of memory")
    return {"id": job.ident, "status": "failed", "reason": why, "wall_s": round(elapsed, 2),
            **({"relax_with": "plane-waves"} if fell_back else {})}


def _relax_payload(rows: "pd.DataFrame", ident: str, start: str = RELAX_START,
                   relax_with: str = "plane-waves", fallback: str = "now") -> dict[str, Any]:
    row = rows.loc[ident]
    return {"id": ident, "lattice": list(row["lattice"]), "species": list(row["species"]),
            "frac_coords": list(row["frac_coords"]), "start": start, "relax_with": relax_with,
            "fallback": fallback}


def relax_stage(pool: "pd.DataFrame", ids: Sequence[str], work: Path, *, workers: int = 1,
                timeout_s: float = 3600.0, kpt_density: float = RELAX_KPT_DENSITY,
                progress: bool = True, retry_timeouts: bool = False,
                start: str = RELAX_START, relax_with: str = "plane-waves",
                fallback: str = "now") -> list[dict[str, Any]]:
    """Relax ``ids`` not yet in ``<work>/relax.jsonl``; returns all relaxation records.

    Each structure runs in its own process (``workers`` at a time) and is stopped after
    ``timeout_s`` seconds; the outcome is appended to the checkpoint as soon as it is
    known. ``start`` says where each relaxation starts (:data:`RELAX_START`),
    ``relax_with`` how it relaxes (:data:`RELAX_WITH`; the command line's default is
    :data:`DEFAULT_RELAX_WITH`), ``fallback`` when the potential's refusals get their
    plane-wave relaxation (:data:`FALLBACKS`).
    """
    with _work_lock(work):
        return _pipeline(pool, ids, work, None, 0, workers=workers, relax_timeout_s=timeout_s,
                         kpt_density=kpt_density, label=False, progress=progress,
                         retry_timeouts=retry_timeouts, start=start,
                         relax_with=relax_with, fallback=fallback)[1]


def pipeline_stage(pool: "pd.DataFrame", ids: Sequence[str], work: Path, out: Path, seed: int,
                   *, workers: int = 1, relax_timeout_s: float = 3600.0,
                   label_timeout_s: float = 1800.0, kpt_density: float = RELAX_KPT_DENSITY,
                   pack_every: int = 10, progress: bool = True,
                   retry_timeouts: bool = False,
                   upgrade_share: float = DEFAULT_UPGRADE_SHARE,
                   start: str = RELAX_START, relax_with: str = "plane-waves",
                   fallback: str = "now") -> int:
    """Relax and label ``ids`` as one stream; returns the number of new label records.

    A free worker takes the label of a finished relaxation first, else the next
    relaxation, so no core waits for a batch to finish (relaxations take from one minute
    to half an hour). The parent is the only writer of both checkpoints
    (``<work>/relax.jsonl`` and the labeller's ``<work>/labels``; a lock file keeps a
    second build out); ``data_open/`` is packed after every ``pack_every`` labels (new
    ones and labels of structures relaxed again) and at the end when anything changed.
    Resumes like the separate stages: results that
    children finished before an interruption are collected, and structures relaxed but
    not labelled are labelled first. Children die with the parent. A failed relaxation
    of the current generation is not tried again, except, with ``retry_timeouts``, one
    that hit a timeout shorter than ``relax_timeout_s``; failures of earlier generations
    are relaxed again like new structures. ``upgrade_share`` (0 to 1) is the share of
    the relaxations started that go to structures of earlier protocols while new ones
    wait too. ``start`` says where each relaxation starts (:data:`RELAX_START`),
    ``relax_with`` how it relaxes (:data:`RELAX_WITH`; the command line's default is
    :data:`DEFAULT_RELAX_WITH`), and so which earlier protocols it replaces;
    ``fallback`` when the potential's refusals get their plane-wave relaxation
    (:data:`FALLBACKS`; with "now", those left by an earlier run with "later" are
    relaxed again like failures of an earlier protocol).
    """
    if not 0.0 <= upgrade_share <= 1.0:
        raise InputError("bad upgrade share", value=upgrade_share, expected="0 to 1")
    with _work_lock(work):
        return _pipeline(pool, ids, work, out, seed, workers=workers,
                         relax_timeout_s=relax_timeout_s, label_timeout_s=label_timeout_s,
                         kpt_density=kpt_density, pack_every=pack_every, progress=progress,
                         retry_timeouts=retry_timeouts, upgrade_share=upgrade_share,
                         start=start, relax_with=relax_with, fallback=fallback)[0]


def _pipeline(pool: "pd.DataFrame", ids: Sequence[str], work: Path, out: Path | None,
              seed: int, *, label: bool = True, **options: Any) -> tuple[int, list[dict[str, Any]]]:
    """:func:`_pipeline_body`, holding the labeller's own lock on ``<work>/labels`` too.

    The caller holds ``<work>/.lock``; the labels folder has the lock that
    :func:`prescreen.physics.labeller.run_labelling` takes, so that no labelling run
    (e.g. ``benchmarks/label.py --out`` pointed there) writes it during a build.
    """
    if not label:
        return _pipeline_body(pool, ids, work, out, seed, label=False, **options)
    with folder_lock(work / "labels", "labelling run"):
        return _pipeline_body(pool, ids, work, out, seed, label=True, **options)


def _pipeline_body(pool: "pd.DataFrame", ids: Sequence[str], work: Path, out: Path | None,
                   seed: int, *, workers: int, relax_timeout_s: float = 3600.0,
                   label_timeout_s: float = 1800.0, kpt_density: float = RELAX_KPT_DENSITY,
                   pack_every: int = 10, label: bool = True, progress: bool = True,
                   retry_timeouts: bool = False,
                   upgrade_share: float = DEFAULT_UPGRADE_SHARE,
                   start: str = RELAX_START,
                   relax_with: str = "plane-waves",
                   fallback: str = "now") -> tuple[int, list[dict[str, Any]]]:
    """The scheduler behind both stages; returns (new labels, all relaxation records).

    Job kinds, in order of priority: the label of a finished relaxation, the Z2
    invariant of a new positive whose bands with SOC are apart at every k
    (``<work>/z2.jsonl``; parities or Wilson loops), then, taking turns in the ratio
    ``upgrade_share``, the relaxation and label anew of a structure relaxed by an earlier
    protocol (``upgrade``) and the next relaxation. ``label=False`` relaxes only (and upgrades nothing).
    """
    from tqdm.auto import tqdm

    from prescreen.physics.dft import LabelRecord, LabelSettings
    from prescreen.physics.labeller import RecordStore

    if start not in RELAX_STARTS:
        raise InputError("unknown relaxation start", value=start, expected=" or ".join(RELAX_STARTS))
    if relax_with not in RELAX_WITH:
        raise InputError("unknown relaxation method", value=relax_with,
                         expected=" or ".join(RELAX_WITH))
    if fallback not in FALLBACKS:
        raise InputError("unknown fallback", value=fallback, expected=" or ".join(FALLBACKS))
    if start == "potential" or relax_with == "potential":  # missing here, not in every child
        from prescreen.physics.prerelax import potential_calculator, potential_name

        potential_name()
        potential_calculator()  # loaded once (4 s); the forked children share it
    log, z2_log = work / "relax.jsonl", work / Z2_LOG
    rows = pool.set_index("id")
    settings = LabelSettings()
    store = RecordStore(work / "labels", settings) if label else None
    tmpdir = work / "relax_tmp"
    tmpdir.mkdir(parents=True, exist_ok=True)
    new_labels = changed = since_pack = 0
    label_queue: list[dict[str, Any]] = []
    z2_queue: list[dict[str, Any]] = []
    relax_by_id = {i: r for i, r in _newest(_read_jsonl(log)).items() if r.get("status") == "ok"}

    def consider_z2(done: Any) -> None:
        """Queue a Z2 job for a new label, or record why it gets none."""
        verdict = _z2_candidate(relax_by_id[done.id], done)
        if verdict is None:
            z2_queue.append(relax_by_id[done.id])
            bar.total += 1
        elif verdict["status"] != "skipped":
            _append_jsonl(z2_log, verdict)
            z2_ever.add(done.id)  # so that a new geometry marks it stale

    def record(kind: str, ident: str, rec: dict[str, Any]) -> str:
        """Write one finished job to its checkpoint; returns a short outcome. Packs
        ``data_open/`` after every ``pack_every`` labels (new ones and relabels)."""
        nonlocal since_pack
        outcome = record_one(kind, ident, rec)
        if out is not None and since_pack >= max(1, pack_every):
            pack_stage(out, work, seed)
            since_pack = 0
        return outcome

    def record_one(kind: str, ident: str, rec: dict[str, Any]) -> str:
        nonlocal new_labels, changed, since_pack
        changed += 1
        if kind == "relax":
            if "generation" not in rec:  # the child left no result: timeout or crash
                rec = {**rec, **_parent_made_fields(rec.pop("relax_with", relax_with))}
            before = newest_relax.get(ident)  # an older failure, or a timeout, redone
            if before and rec.get("generation") in RELAX_WITH.values():
                rec = {**rec, **_replaced_fields(before)}
            if store is not None and ident in labels_now and not pending_relabel(ident):
                supersede_label(ident)
            _append_jsonl(log, rec)
            newest_relax[ident] = rec
            if label and rec.get("status") == "ok":
                relax_by_id[ident] = rec
                label_queue.append(rec)
                bar.total += 1
            return f"relax {rec.get('status')}"
        if kind == "upgrade":
            return record_upgrade(ident, rec)
        if kind == "z2":
            _append_jsonl(z2_log, rec)
            z2_ever.add(ident)
            return {"ok": f"Z2 {rec.get('z2')}", "no_direct_gap": "Z2 undefined (no direct gap)"
                    }.get(rec.get("status"), "Z2 failed")
        if "settings" not in rec:  # the child left no record: timeout or crash
            rec = LabelRecord.failed(ident, str(rows.loc[ident, "reduced_formula"]), settings,
                                     rec["reason"], rec["wall_s"]).as_dict()
        done = LabelRecord.from_dict(rec)
        store_label(done)
        consider_z2(done)
        new_labels += 1
        since_pack += 1
        return f"spillage {done.spillage:.3f}" if done.ok else "label failed"

    def record_upgrade(ident: str, result: dict[str, Any]) -> str:
        """A structure of an earlier generation, relaxed again: its new label first, then
        the record (a crash between the two replays the result on the next run, which
        then finds the label stored already). The new record supersedes the old one
        whatever its status; the old label goes with the old geometry."""
        nonlocal since_pack, new_labels
        old = newest_relax.get(ident)
        if "relax" not in result:  # the child left no result
            result = {"relax": {"id": ident, "status": "failed", "attempts": 0,
                                "reason": str(result.get("reason", "no result")),
                                "wall_s": float(result.get("wall_s") or 0.0),
                                **_parent_made_fields(result.get("relax_with", relax_with))},
                      "label": None}
        rec = {**result["relax"], **_replaced_fields(old or {})}
        new_label = result.get("label")
        if rec.get("status") == "ok":
            relax_by_id[ident] = rec
        else:
            relax_by_id.pop(ident, None)
        if ident in z2_ever:  # its invariant belongs to the old geometry
            _append_jsonl(z2_log, {"id": ident, "status": "stale",
                                   "reason": "the structure was relaxed again"})
            z2_ever.discard(ident)
        said = "no label"
        if new_label is not None:
            done = LabelRecord.from_dict(new_label)
            replay = replaying and newest_label_line.get(ident) == done.as_dict(arrays=False)
            if not replay:  # (a replayed result whose label is the newest stored already)
                store_label(done)
                since_pack += 1
                if ident not in labels_now:  # its first label
                    new_labels += 1
            consider_z2(done)
            said = f"spillage {done.spillage:.3f}" if done.ok else "label failed"
        elif ident in labels_now and not pending_relabel(ident):  # failed: the old label goes
            supersede_label(ident)
            said = "old label dropped"
        _append_jsonl(log, rec)
        newest_relax[ident] = rec
        if rec.get("status") != "ok":
            return f"relaxed again: {rec.get('status')}: {rec.get('reason', '')}; {said}"
        strain = 100 * max((abs(u) for u in rec.get("lattice_strain", [0.0])), default=0.0)
        return f"relaxed again: ok ({strain:.2f} % from the start); {said}"

    def supersede_label(ident: str) -> None:
        """Store a stand-in for the label of a geometry since replaced."""
        store_label(LabelRecord.failed(ident, str(rows.loc[ident, "reduced_formula"]),
                                       settings, RELABEL_PENDING, 0.0))

    def store_label(done: Any) -> None:
        """Append a label record to the checkpoint and remember it as the id's newest."""
        store.append(done)
        newest_label_line[done.id] = done.as_dict(arrays=False)

    def pending_relabel(ident: str) -> bool:
        return str(newest_label_line.get(ident, {}).get("error", "")) == RELABEL_PENDING

    def redo(r: dict[str, Any]) -> bool:
        """A relaxation to run again as a new one: a failure of an earlier protocol, a
        refusal of the potential left for its plane-wave relaxation (unless this run
        leaves those for later too), or, when asked, one that hit a shorter timeout."""
        return ((r.get("status") != "ok" and _older_generation(r, relax_with))
                or (fallback == "now" and _deferred(r))
                or (retry_timeouts and _timed_out_below(r, relax_timeout_s)))

    bar = tqdm(total=0, desc="relax + label" if label else "relaxing", unit="job",
               disable=not progress)
    # results that children wrote before the last run stopped
    newest_relax = _newest(_read_jsonl(log))
    relaxed = set(newest_relax)
    labelled = store.status() if store is not None else {}
    with_z2 = _z2_done(z2_log)
    z2_ever = {r["id"] for r in _read_jsonl(z2_log)}
    newest_label_line: dict[str, dict[str, Any]] = {}
    labels_now: dict[str, Any] = {}
    if store is not None:
        from prescreen.physics.labeller import record_lines

        newest_label_line = {d["id"]: d for d in record_lines(work / "labels")}
        labels_now = {r.id: r for r in _label_records(work)}
    replaying = True  # results children left before the last run stopped
    for path in sorted(tmpdir.glob("*.json")):
        kind, _, ident = path.stem.partition("-")
        try:
            rec = json.loads(path.read_text(encoding="utf-8"))
        except (OSError, json.JSONDecodeError):
            rec = None
        if kind in ("label", "z2", "upgrade") and store is None:
            continue  # a relax-only run leaves them for a run that labels
        if rec is not None and (
                (kind == "relax" and (ident not in relaxed or redo(newest_relax[ident])
                                      # a fallback finished whatever this run's --fallback
                                      or (_deferred(newest_relax[ident])
                                          and not _deferred(rec))))
                # (an upgrade of either route: one left by a plane-wave run is kept too)
                or (kind == "upgrade" and _needs_upgrade(newest_relax.get(ident, {})))
                or (kind == "label" and (ident not in labelled or pending_relabel(ident)))
                or (kind == "z2" and ident not in with_z2)):
            record(kind, ident, rec)
        path.unlink()  # recorded now, or already in its checkpoint, or unreadable
    replaying = False
    for stale in tmpdir.glob("*.tmp"):
        stale.unlink()
    for stale in tmpdir.glob("*.scratch"):  # of children killed with an earlier run
        shutil.rmtree(stale, ignore_errors=True)
    relax = _read_jsonl(log)
    newest_relax = _newest(relax)
    if store is not None:  # a label whose structure's newest relaxation failed (recorded
        # before the stand-ins existed) belongs to a geometry that is gone
        for ident in list(labels_now):
            if (ident in newest_relax and newest_relax[ident].get("status") != "ok"
                    and not pending_relabel(ident)):
                supersede_label(ident)
    labelled = store.status() if store is not None else {}
    labelled = {i: v for i, v in labelled.items() if not pending_relabel(i)}
    labels_now = {r.id: r for r in _label_records(work)} if store is not None else {}
    # a relaxation of an earlier generation is redone before its label and Z2 job
    label_queue[:] = [r for r in newest_relax.values() if label and r.get("status") == "ok"
                      and r["id"] not in labelled and not _needs_upgrade(r, relax_with)]
    if label:  # labels from before the Z2 jobs existed, or from an interrupted run
        with_z2 = _z2_done(z2_log) | {r["id"] for r in z2_queue}
        for done in labels_now.values():
            if (done.id not in with_z2 and done.id in relax_by_id
                    and not _needs_upgrade(relax_by_id[done.id], relax_with)):
                consider_z2(done)
    done_ids = {i for i, r in _newest(relax).items() if not redo(r)}
    # refusals of the potential that waited for their plane waves go before new structures
    relax_queue = sorted((i for i in ids if i not in done_ids),
                         key=lambda i: not (i in newest_relax and _deferred(newest_relax[i])))
    # successful relaxations of an earlier generation among ``ids`` (so ``--limit`` bounds
    # them too), except one whose Z2 job is queued already from a label result collected
    # above (the next run relaxes it again), in the order of _upgrade_priority
    waiting = {r["id"] for r in z2_queue}
    wanted = set(ids)
    upgrade_queue = sorted(
        (r["id"] for r in newest_relax.values()
         if label and _needs_upgrade(r, relax_with) and r["id"] not in waiting
         and r["id"] in wanted),
        key=lambda i: _upgrade_priority(labels_now.get(i)))
    bar.total = len(label_queue) + len(z2_queue) + len(upgrade_queue) + len(relax_queue)
    bar.refresh()
    running: list[_Job] = []
    # old structures relaxed again and new relaxations take turns, so that neither the
    # dataset's growth nor its upgrade waits for the other
    started = {"upgrade": 0, "relax": 0}
    try:
        while label_queue or z2_queue or upgrade_queue or relax_queue or running:
            while len(running) < max(1, workers) and (label_queue or z2_queue or upgrade_queue
                                                       or relax_queue):
                if label_queue:
                    rec = label_queue.pop(0)
                    payload = {k: rec[k] for k in ("lattice", "species", "frac_coords")}
                    payload["formula"] = str(rows.loc[rec["id"], "reduced_formula"])
                    running.append(_start("label", rec["id"], payload, tmpdir, kpt_density))
                elif z2_queue:
                    rec = z2_queue.pop(0)
                    payload = {k: rec[k] for k in ("lattice", "species", "frac_coords")}
                    running.append(_start("z2", rec["id"], payload, tmpdir, kpt_density))
                elif upgrade_queue and (not relax_queue or started["upgrade"] < upgrade_share
                                        * (started["upgrade"] + started["relax"] + 1)):
                    started["upgrade"] += 1
                    ident = upgrade_queue.pop(0)
                    payload = {**_relax_payload(rows, ident, start, relax_with),
                               "formula": str(rows.loc[ident, "reduced_formula"])}
                    running.append(_start("upgrade", ident, payload, tmpdir, kpt_density))
                else:
                    started["relax"] += 1
                    ident = relax_queue.pop(0)
                    # (an upgrade falls back at once: it would drop an existing label)
                    running.append(_start("relax", ident,
                                          _relax_payload(rows, ident, start, relax_with,
                                                         fallback),
                                          tmpdir, kpt_density))
            time.sleep(0.2)
            for job in list(running):
                # an upgrade relaxes and labels
                limit = {"relax": relax_timeout_s,
                         "upgrade": relax_timeout_s + label_timeout_s,
                         "label": label_timeout_s,
                         "z2": Z2_TIMEOUT_FACTOR * label_timeout_s}[job.kind]
                rec = _finished(job, limit)
                if rec is None:
                    continue
                running.remove(job)
                bar.update(1)
                if rec.get("status") == "interrupted":
                    bar.set_postfix_str(f"{job.ident}: interrupted, left for the next run")
                    continue
                bar.set_postfix_str(f"{job.ident}: {record(job.kind, job.ident, rec)}")
                job.result.unlink(missing_ok=True)  # recorded: the checkpoint holds it now
    finally:
        _stop(running)
        bar.close()
    if out is not None and changed:
        pack_stage(out, work, seed)
    return new_labels, _read_jsonl(log)


# --- labelling ----------------------------------------------------------------------
def label_stage(relaxed: Sequence[dict[str, Any]], work: Path, *, workers: int = 1,
                timeout_s: float = 1800.0, progress: bool = True) -> Any:
    """Label the relaxed structures with status ``ok`` (resumable; see labeller). A
    structure whose label is a stand-in for one of an earlier geometry
    (``RELABEL_PENDING``) is labelled again."""
    from prescreen.physics.dft import LabelSettings
    from prescreen.physics.labeller import record_lines, run_labelling

    jobs = [(r["id"], structure_from_row(r)) for r in _newest(relaxed).values()
            if r.get("status") == "ok"]
    newest_line = {d["id"]: d for d in record_lines(work / "labels")}
    redo = [i for i, _ in jobs if newest_line.get(i, {}).get("error") == RELABEL_PENDING]
    with _work_lock(work):
        return run_labelling(jobs, work / "labels", settings=LabelSettings(), workers=workers,
                             timeout_s=timeout_s, progress=progress, redo=redo)


def _label_records(work: Path) -> list[Any]:
    label_dir = work / "labels"
    if not label_dir.exists():
        return []
    from prescreen.physics.labeller import load_records

    return list(load_records(label_dir))


def _superseded_label_hours(work: Path) -> float:
    """Core-hours of successful label records that a newer record of the same id replaced."""
    from prescreen.physics.labeller import record_lines

    lines = record_lines(work / "labels")
    newest = {d["id"]: i for i, d in enumerate(lines)}
    return float(sum(d.get("core_hours", 0.0) for i, d in enumerate(lines)
                     if d.get("status") == "ok" and newest[d["id"]] != i))


# --- pack ---------------------------------------------------------------------------
def _z2_columns(z2: dict[str, dict[str, Any]], label: Any) -> dict[str, Any]:
    """``z2`` (0, 1 or None), ``z2_method`` and ``z2_status`` of one labelled structure."""
    from prescreen.physics.dft import METAL_GAP_EV

    rec = z2.get(label.id)
    if rec is not None and rec.get("status") == "stale":  # computed for an earlier geometry
        rec = None
    if rec is None:
        if label.spillage < POSITIVE_THRESHOLD:
            why = "not computed (not a positive)"
        elif label.direct_gap_soc_eV < METAL_GAP_EV:
            why = (f"not defined (direct gap with SOC {label.direct_gap_soc_eV:.3f} eV on the "
                   "labelling mesh: the bands touch or nearly touch)")
        else:
            why = "pending (next run)"
        return {"z2": None, "z2_method": "", "z2_status": why}
    # records written before the flag existed say it only in their reason
    odd = rec.get("odd_count", "an odd number" in rec.get("reason", ""))
    if rec.get("status") == "no_direct_gap" and odd:
        return {"z2": None, "z2_method": rec.get("method", ""),
                "z2_status": "not defined (an odd electron count: the last occupied state "
                             "meets its Kramers partner at the TRIMs)"}
    if rec.get("status") == "no_direct_gap":
        return {"z2": None, "z2_method": rec.get("method", ""),
                "z2_status": f"not defined (direct gap with SOC {rec['direct_gap_soc_eV']:.3f} "
                             f"eV on the {rec.get('method', '')} mesh: the bands touch or nearly "
                             "touch)"}
    if rec.get("status") == "ok":
        # records from before the method was recorded all came from parities
        return {"z2": int(rec["z2"]), "z2_method": rec.get("method", "parity"),
                "z2_status": "computed"}
    if rec.get("status") == "no_inversion":
        return {"z2": None, "z2_method": "", "z2_status": "pending (no inversion centre: "
                "Wilson loops at the next run)"}
    if _z2_rerun(rec):  # e.g. a worker that died, or loops refused below today's cap
        return {"z2": None, "z2_method": rec.get("method", ""),
                "z2_status": f"pending (rerun at the next run after: {rec.get('reason', '')})"}
    return {"z2": None, "z2_method": rec.get("method", ""),
            "z2_status": f"failed: {rec.get('reason', '')}"}


def _labelled_table(pool: "pd.DataFrame", relax: Sequence[dict[str, Any]],
                    records: Sequence[Any],
                    z2: dict[str, dict[str, Any]] | None = None) -> "pd.DataFrame":
    import pandas as pd

    z2 = z2 or {}
    meta = pool.set_index("id")
    # the newest relaxation of each id (a relaxation anew supersedes the earlier one)
    relax_by_id = {i: r for i, r in _newest(relax).items() if r.get("status") == "ok"}
    rows = []
    for rec in records:
        if not rec.ok or rec.id not in relax_by_id:
            continue
        r = relax_by_id[rec.id]
        p = meta.loc[rec.id]
        rows.append({
            "id": rec.id, "prototype": p["prototype"], "family": p["family"],
            "reduced_formula": p["reduced_formula"], "elements": p["elements"],
            "n_atoms": int(p["n_atoms"]),
            "spillage": float(rec.spillage), "high_spillage": bool(rec.spillage >= POSITIVE_THRESHOLD),
            "k_max": [float(v) for v in rec.k_max],
            "gap_nosoc_eV": float(rec.gap_nosoc_eV), "gap_soc_eV": float(rec.gap_soc_eV),
            "is_metal": bool(rec.is_metal), "magmom_muB": float(rec.magmom),
            "kmesh": list(rec.settings.get("kmesh", [])),
            "wall_s": float(rec.wall_s), "core_hours": float(rec.core_hours),
            "relax_wall_s": float(r.get("wall_s", math.nan)),
            "relax_generation": int(r.get("generation", 1)),
            "residual_fmax_eV_per_A": float(r["residual_fmax_eV_per_A"]),
            "a_A": r["a_A"], "b_A": r["b_A"], "gamma_deg": r["gamma_deg"],
            "lattice": r["lattice"], "species": r["species"], "frac_coords": r["frac_coords"],
            "gamma_k": np.asarray(rec.gamma, dtype=np.float32).tolist(),
            "kpts": np.asarray(rec.kpts, dtype=np.float32).ravel().tolist(),
            "settings": json.dumps(rec.settings, sort_keys=True, default=str),
            "versions": json.dumps(rec.versions, sort_keys=True),
            "direct_gap_soc_eV": float(rec.direct_gap_soc_eV),
            **_z2_columns(z2, rec),
        })
    cols = ["id", "prototype", "family", "reduced_formula", "elements", "n_atoms", "spillage",
            "high_spillage", "k_max", "gap_nosoc_eV", "gap_soc_eV", "direct_gap_soc_eV",
            "is_metal", "magmom_muB", "kmesh", "wall_s", "core_hours", "relax_wall_s",
            "relax_generation", "residual_fmax_eV_per_A", "a_A",
            "b_A", "gamma_deg", "lattice", "species", "frac_coords", "gamma_k", "kpts",
            "settings", "versions", "z2", "z2_method", "z2_status"]
    df = pd.DataFrame(rows, columns=cols)
    df["z2"] = df["z2"].astype("Int8")
    return df.sort_values("id").reset_index(drop=True)


def _relax_table(relax: Sequence[dict[str, Any]], records: Sequence[Any]) -> "pd.DataFrame":
    import pandas as pd

    label_status = {rec.id: ("ok" if rec.ok else f"failed: {rec.error}") for rec in records}
    rows = [{"id": r["id"], "status": r.get("status", "failed"), "reason": r.get("reason", ""),
             "converged": bool(r.get("converged", False)),
             "residual_fmax_eV_per_A": float(r.get("residual_fmax_eV_per_A", math.nan)),
             "attempts": int(r.get("attempts", 0)), "wall_s": float(r.get("wall_s", math.nan)),
             # relaxations recorded before the width was stored used the labels' 0.01 eV;
             # the potential's have none
             "smearing_eV": (math.nan if _by_potential(r) else float(r.get("smearing_eV", 0.01))),
             # relaxations recorded before the fine scan existed used the coarse scan only
             "lattice_scan": str(r.get("lattice_scan", "coarse only")),
             # relaxations recorded before the coarse pre-relaxation used the scan's mesh;
             # those with the stress tensor (generation 3 on) have no pre-relaxation
             "pre_relax_kpt_density": (math.nan if int(r.get("generation", 1)) >= 3
                                       or _by_potential(r) else
                                       float(r.get("pre_relax_kpt_density", RELAX_KPT_DENSITY))),
             "generation": int(r.get("generation", 1)),
             "ecut_eV": float(r.get("ecut_eV", math.nan)),
             "virial_eV": float(r.get("virial_eV", math.nan)),
             "pulay_virial_eV": float(r.get("pulay_virial_eV", math.nan)),
             "bfgs_steps": int(r.get("bfgs_steps", 0)),
             "potential_steps": int(r.get("potential_steps", 0)),
             "earlier_wall_s": float(r.get("earlier_wall_s", 0.0)),
             # the generation of the record this one replaced (0: the potential's); -1
             # where it replaced none
             "replaced_generation": int(r.get("replaced_generation", -1)),
             "lattice_residual": float(r.get("lattice_residual", math.nan)),
             "lattice_cycles": int(r.get("lattice_cycles", 0)),
             # relaxations recorded before the potential's start began at the pool geometry
             "start": str(r.get("start", "generated")),
             "start_s": float(r.get("start_s", 0.0)),
             # "later": a refusal of the potential left for its plane-wave relaxation
             "fallback": str(r.get("fallback", "")) if _deferred(r) else "",
             "label_status": label_status.get(r["id"], "not labelled")}
            for r in _newest(relax).values()]
    cols = ["id", "status", "reason", "converged", "residual_fmax_eV_per_A", "attempts",
            "wall_s", "smearing_eV", "lattice_scan", "pre_relax_kpt_density", "generation",
            "ecut_eV", "virial_eV", "pulay_virial_eV", "bfgs_steps", "potential_steps",
            "earlier_wall_s",
            "replaced_generation",
            "lattice_residual",
            "lattice_cycles", "start", "start_s", "fallback", "label_status"]
    return pd.DataFrame(rows, columns=cols).sort_values("id").reset_index(drop=True)


def _generations_text(relax: "pd.DataFrame") -> str:
    """What the datasheet says of the relaxation protocols of the kept relaxations."""
    if not len(relax) or "generation" not in relax:
        return ""
    ok = relax[relax["status"] == "ok"]
    count = ok["generation"].value_counts().to_dict()
    old = sum(n for g, n in count.items() if POTENTIAL_GENERATION < g < RELAX_GENERATION)
    redone = relax[(relax["generation"] == RELAX_GENERATION)
                   & relax["replaced_generation"].between(1, RELAX_GENERATION - 1)]
    if not old and not len(redone):
        return ""
    good = int((redone["status"] == "ok").sum())
    text = (f"{len(redone)} structures relaxed by an earlier protocol have been relaxed again "
            f"this way (from the start described above): {good} successfully, and labelled (the "
            f"labels of their earlier geometry are replaced); "
            f"{len(redone) - good} now fail, fall apart or do not converge and are left out")
    if old:
        protocols = {3: "plane waves without the Pulay correction",
                     2: "LCAO, the lattice from energy scans with the positions held "
                        "fractional, then refined to zero in-plane stress by finite "
                        "differences of the energy",
                     1: "LCAO, the scans alone, biased toward the lattice at which the "
                        "positions were relaxed"}
        parts = [f"{count[g]} of generation {g} ({what})" for g, what in protocols.items()
                 if count.get(g, 0)]
        listed = parts[0] if len(parts) == 1 else ", ".join(parts[:-1]) + " and " + parts[-1]
        text += (f". {old} kept relaxations still come from an earlier DFT protocol and wait "
                 f"for a new geometry: {listed}")
    return text + "."


def _potential_text(relax: "pd.DataFrame") -> str:
    """What the datasheet says of the relaxations by the potential alone."""
    mine = relax[relax["generation"] == POTENTIAL_GENERATION] if len(relax) else relax
    if not len(mine):
        return "None so far."
    ok = mine[mine["status"] == "ok"]
    status = mine["status"].value_counts().to_dict()
    others = ", ".join(f"{k}: {v}" for k, v in sorted(status.items()) if k != "ok")
    replaced = int(ok["replaced_generation"].between(1, RELAX_GENERATION - 1).sum())
    waiting = mine[mine["fallback"] == "later"] if "fallback" in mine else mine.iloc[:0]
    wait_status = ", ".join(f"{k}: {v}" for k, v in
                            sorted(waiting["status"].value_counts().to_dict().items()))
    others = ", ".join(f"{k}: {v}" for k, v in sorted(
        (mine.drop(waiting.index)["status"].value_counts().to_dict()).items()) if k != "ok")
    return ((f"{len(ok)} geometries come from this route (median {_median(ok['wall_s'])} s "
             f"each); {replaced} of them replaced a geometry of an earlier DFT protocol "
             f"(generations 1 to 3), and their labels the earlier ones." if len(ok) else
             "No geometry comes from this route yet.")
            + (f" {len(waiting)} {'structure' if len(waiting) == 1 else 'structures'} whose "
               f"potential relaxation was not kept ({wait_status}) "
               f"{'waits' if len(waiting) == 1 else 'wait'} for the plane-wave relaxation, "
               f"left for later by a run with `--fallback later` to label more structures "
               f"per hour meanwhile; the next run with `--fallback now` (the default) or "
               f"`--relax-with plane-waves` relaxes them before any new structure."
               if len(waiting) else "")
            + (f" Other records of this route: {others}." if others else ""))


def _start_text(relax: "pd.DataFrame") -> str:
    """What the datasheet says of where the kept relaxations started."""
    ok = relax[(relax["status"] == "ok") & (relax["generation"] == RELAX_GENERATION)]
    if not len(ok) or "start" not in ok:
        return ""
    start = ok["start"].astype(str)
    potential = int((~start.str.startswith("generated")).sum())
    refused = int(start.str.startswith("generated;").sum())
    median = (f" (median {ok.loc[~start.str.startswith('generated'), 'start_s'].median():.1f} s "
              f"of the potential)" if potential else "")
    return (f"Of the {len(ok)} kept relaxations of generation {RELAX_GENERATION}, {potential} "
            f"started from the potential's geometry{median}, {refused} from the pool geometry "
            f"because the potential's was not used (the column says why), and "
            f"{len(ok) - potential - refused} from the pool geometry because they ran before "
            f"the potential's start (2026-12-03).")


def _md_table(header: Sequence[str], rows: Iterable[Sequence[Any]]) -> str:
    lines = ["| " + " | ".join(header) + " |", "|" + "---|" * len(header)]
    lines += ["| " + " | ".join(str(c) for c in row) + " |" for row in rows]
    return "\n".join(lines)


def _median(values: "pd.Series") -> str:
    """The median in seconds as printed: whole seconds, one decimal below 10 s."""
    v = values.dropna()
    if not len(v):
        return "n/a"
    m = float(v.median())
    return f"{m:.1f}" if m < 10 else f"{m:.0f}"


def _count(n: int, one: str, many: str) -> str:
    """``"1 has"``, ``"3 have"``: a count with the verb that agrees with it."""
    return f"{int(n)} {one if int(n) == 1 else many}"


def _rate(pos: int, n: int) -> str:
    return f"{pos / n:.3f}" if n else "n/a"


def datasheet(pool: "pd.DataFrame", labelled: "pd.DataFrame", relax: "pd.DataFrame",
              seed: int, versions: dict[str, str], superseded_h: float = 0.0) -> str:
    """The text of ``data_open/README.md``; every number is computed from the tables
    (``superseded_h``: core-hours of labels since replaced, by a label of a new geometry or
    because the structure was relaxed again and dropped, which the tables no longer
    hold)."""
    n_pool = len(pool)
    n_keys = pool.groupby(["prototype", "reduced_formula"]).ngroups
    n_lab = len(labelled)
    n_pos = int(labelled["high_spillage"].sum()) if n_lab else 0
    positive = labelled[labelled["high_spillage"]] if n_lab else labelled
    n_pos_gapped = int((~positive["is_metal"]).sum()) if n_lab else 0
    computed = positive[positive["z2_status"] == "computed"] if n_lab else positive
    by_method = computed["z2_method"].value_counts().to_dict() if n_lab else {}
    pending = int(positive["z2_status"].str.startswith("pending").sum()) if n_lab else 0
    undefined = int(positive["z2_status"].str.startswith("not defined").sum()) if n_lab else 0
    z2_failed = int(positive["z2_status"].str.startswith("failed").sum()) if n_lab else 0
    z2_semimetal = int((computed["is_metal"]).sum()) if n_lab else 0
    z2_text = (f"computed for {len(computed)} ({by_method.get('parity', 0)} from parities, "
               f"{by_method.get('wilson', 0)} from Wilson loops; {z2_semimetal} of them "
               f"semimetals with a direct gap), of which "
               f"{_count((computed['z2'] == 1).sum(), 'has', 'have')} Z2 = 1; not defined "
               f"for {undefined} (no direct gap with SOC: the bands touch or nearly touch); failed for {z2_failed} (reasons in "
               "`z2_status`)"
               + (f"; {pending} wait for the next run" if pending else "")
               if n_lab else "none yet")
    status = relax["status"].value_counts().to_dict() if len(relax) else {}
    core_h = float(labelled["core_hours"].sum()) if n_lab else 0.0
    relax_h = float(relax["wall_s"].fillna(0).sum()) / 3600.0 if len(relax) else 0.0
    earlier_h = (float(relax["earlier_wall_s"].fillna(0).sum()) / 3600.0
                 if len(relax) and "earlier_wall_s" in relax else 0.0)
    current = (relax[(relax["generation"] == RELAX_GENERATION) & (relax["status"] == "ok")]
               if len(relax) else relax)
    by_potential = (relax[(relax["generation"] == POTENTIAL_GENERATION)
                          & (relax["status"] == "ok")] if len(relax) else relax)
    potential_median = (f", {_median(by_potential['wall_s'])} s with the potential alone "
                        f"(generation {POTENTIAL_GENERATION})" if len(by_potential) else "")
    lab_by_proto = labelled.groupby("prototype") if n_lab else None
    proto_rows = []
    for p in PROTOTYPES:
        sub = pool[pool["prototype"] == p.name]
        if lab_by_proto is not None and p.name in lab_by_proto.groups:
            lab = lab_by_proto.get_group(p.name)
            n, pos = len(lab), int(lab["high_spillage"].sum())
            med = f"{lab['spillage'].median():.3f}"
        else:
            n, pos, med = 0, 0, "n/a"
        proto_rows.append((p.name, p.n_atoms, p.description, len(sub), n, pos, _rate(pos, n), med))
    el_pool: Counter[str] = Counter(e for s in pool["elements"] for e in s.split())
    el_lab: Counter[str] = Counter()
    el_pos: Counter[str] = Counter()
    for s, hi in zip(labelled["elements"], labelled["high_spillage"]):
        for e in s.split():
            el_lab[e] += 1
            el_pos[e] += int(hi)
    el_rows = [(e, el_pool[e], el_lab[e], el_pos[e], _rate(el_pos[e], el_lab[e]))
               for e in sorted(el_pool, key=lambda x: (-el_lab[x], -el_pool[x], x))]
    ver = ", ".join(f"{k} {v}" for k, v in sorted(versions.items()))
    status_text = ", ".join(f"{k}: {v}" for k, v in sorted(status.items())) or "none yet"
    by_dft = (relax[(relax["generation"] != POTENTIAL_GENERATION) & (relax["status"] == "ok")]
              if len(relax) else relax)
    resid = f"{by_dft['residual_fmax_eV_per_A'].max():.3f} eV/A" if len(by_dft) else "n/a"
    if len(by_potential):
        resid += (f" in DFT, {by_potential['residual_fmax_eV_per_A'].max():.3f} eV/A "
                  f"in the potential's own forces (the cell's included) for generation "
                  f"{POTENTIAL_GENERATION}")
    generations_text = _generations_text(relax)
    deferred = (relax[(relax["generation"] == POTENTIAL_GENERATION) & (relax["status"] != "ok")
                      & (relax["fallback"] == "later")]
                if len(relax) and "fallback" in relax else relax.iloc[:0])
    deferred_text = (f"; {_count(len(deferred), 'of the failures is a refusal', 'of the failures are refusals')} "
                     f"of the potential waiting for a plane-wave relaxation, step 3"
                     if len(deferred) else "")
    deferred_limit = (f"""
- **{_count(len(deferred), 'structure that the potential did not keep waits',
            'structures that the potential did not keep wait')} for the plane-wave
  relaxation** (step 3) and {'is' if len(deferred) == 1 else 'are'} not labelled yet. The potential's refusals are not a
  random draw of layers: of the 87 plane-wave labels of 2026-12-03 it refused 17, mostly
  buckled and puckered layers of heavy p-block elements (Bi, Sn, Pb, Tl, GaBi, BiSb), 8 of
  them positive, against 34 positives among the 70 it kept
  (`benchmarks/potential_labels.py`). Until they are labelled, those kinds of layer are
  under-represented in the labelled set."""
                      if len(deferred) else "")
    start_text = _start_text(relax)
    superseded_text = (f" (and {superseded_h:.2f} more for labels of geometries since "
                       "replaced)" if superseded_h > 0 else "")
    earlier_text = (f" (and {earlier_h:.2f} more for relaxations since done again)"
                    if earlier_h > 0 else "")
    return f"""# data_open: generated monolayers with spin-orbit spillage labels

Licence: **{LICENCE}** (Creative Commons Attribution 4.0 International,
https://creativecommons.org/licenses/by/4.0/). Every structure here was generated by
this project; nothing comes from any external materials database.

*This file is written by `scripts/build_open_dataset.py --stage pack`; do not edit the
numbers by hand (the integrity test checks the file's hash).*

## Contents

| file | what |
|---|---|
| `{POOL_PARQUET}` | the unlabelled pool, one row per candidate: `id`, `prototype`, `family`, `reduced_formula`, `formula`, `elements` (space-separated), `n_elements`, `n_atoms`, `decoration` (JSON, site role -> element), `a_A`, `b_A`, `gamma_deg`, `lattice` (9 floats, row vectors, angstrom), `species`, `frac_coords` (3 per atom) |
| `{POOL_XYZ}` | the same starting geometries as compressed extended XYZ (`id`, `prototype` per frame; positions printed to 8 decimals, the Parquet file keeps full double precision) |
| `{LABELLED_PARQUET}` | relaxed and labelled monolayers: `id`, `prototype`, `family`, `reduced_formula`, `elements`, `n_atoms` (as in the pool), `spillage` (max over k of gamma(k), electrons), `high_spillage` (spillage >= {POSITIVE_THRESHOLD}), `k_max`, `gap_nosoc_eV`, `gap_soc_eV`, `direct_gap_soc_eV` (smallest direct gap with SOC on the mesh; empty for labels from before it was stored), `is_metal`, `magmom_muB`, `kmesh`, `wall_s`, `core_hours`, `relax_wall_s`, `relax_generation` (how the geometry was relaxed, below), `residual_fmax_eV_per_A`, relaxed `lattice`/`species`/`frac_coords`, `gamma_k` and `kpts` (the whole gamma(k) on the mesh), `settings`, `versions`, `z2` (0 or 1, empty where not computed), `z2_method` (`parity` or `wilson`) and `z2_status` |
| `{LABELLED_XYZ}` | relaxed labelled structures as compressed extended XYZ (`id`, `spillage` per frame) |
| `{RELAX_PARQUET}` | the newest relaxation of every structure attempted (earlier ones are counted in `earlier_wall_s` and `replaced_generation`), with `status` (ok, not_converged, fell_apart, failed), `reason`, residual force, `fallback` ("later": a refusal of the potential waiting for its plane-wave relaxation) and the labelling outcome |
| `{MANIFEST}` | SHA-256 and size of every file above and of this datasheet |

## Counts

- Pool: **{n_pool}** candidates, {n_keys} distinct (prototype, reduced formula) pairs,
  {len(PROTOTYPES)} prototypes, {len(el_pool)} elements, seed {seed};
  {int((pool["n_atoms"] <= DEFAULT_MAX_ATOMS).sum())} cells of at most {DEFAULT_MAX_ATOMS} atoms;
  {int((pool["family"] == "polar-trilayer").sum())} of the Janus 1T layers are BiTeI-like polar trilayers
  (pnictogen metal, one chalcogen and one halogen side).
- Structures relaxed: {len(relax)} ({status_text}, the newest relaxation of each{deferred_text}); largest residual force among the
  kept ones: {resid}.
- Labelled: **{n_lab}**; positives at spillage >= {POSITIVE_THRESHOLD}: {n_pos}
  (positive rate {_rate(n_pos, n_lab)}); {n_pos_gapped} of the positives have a band gap
  with spin-orbit coupling, the others are metals.
- Z2 of the positives: {z2_text}.
- Compute: {core_h:.2f} core-hours of labelling{superseded_text} and {relax_h:.2f}
  core-hours of relaxation{earlier_text} (wall time of single-core jobs, on a shared
  machine); median per structure: {_median(current["wall_s"])} s to relax with plane waves
  (successful relaxations of generation {RELAX_GENERATION}){potential_median}, {_median(labelled["wall_s"])} s
  to label.

## How it was made

```
python scripts/build_open_dataset.py --seed {seed} --workers 2    # or: make dataset
python scripts/build_open_dataset.py --seed {seed} --workers 2 --relax-with plane-waves
```

(the second relaxes with DFT what the first, the default since 2026-12-03, relaxed with
the potential alone, positives first; see step 3).

1. **Pool** (`prescreen/prototypes.py`): {len(PROTOTYPES)} monolayer prototypes used in the
   2D-materials literature, decorated with elements by group and valence rules (ionic
   prototypes: a charge-balancing assignment of known oxidation states from
   `pymatgen.core.Element.oxidation_states`; covalent prototypes: the octet rule by
   group). Mirror-image decorations are generated once, and candidates sharing
   prototype and reduced formula are compared with pymatgen's `StructureMatcher`.
   Starting bond lengths are sums of covalent radii ({COVALENT_RADII_SOURCE}); ideal
   coordination polyhedra give lattice constants and heights; {VACUUM_A:.0f} A of vacuum.
   Identifiers `o2d-<prototype code>-<10 hex digits of BLAKE2b(seed, prototype,
   decoration)>` are this project's own.
2. **Subset**: cells of at most {DEFAULT_MAX_ATOMS} atoms first; prototypes take turns and each
   turn takes the candidate whose elements are least covered so far (seeded order). A
   prototype's next turn waits in proportion to the square root of its last pick's
   estimated relaxation cost (the cost model is the number of atoms squared, times
   {HARD_COST_FACTOR:.1f} with N, O or F; its square root the number of atoms, times
   {math.sqrt(HARD_COST_FACTOR):.2f}), so
   a prototype of 2-atom cells comes about three times as often as one of 6-atom cells.
   The first {EQUAL_TURNS_RELAXED} structures relaxed were chosen with equal turns.
3. **Relaxation**, by one of two routes (column `generation` in `{RELAX_PARQUET}`,
   `relax_generation` in `{LABELLED_PARQUET}`).
   **The potential alone** (generation {POTENTIAL_GENERATION}, `--relax-with potential`, the default since
   2026-12-03): the pool geometry relaxed by the universal interatomic potential CHGNet
   exactly as for the start described below. It must converge to {PRERELAX_FMAX} eV/A, stay one
   sheet, and change each in-plane length by at most {100 * PRERELAX_MAX_STRAIN:.0f} %; otherwise the same
   job relaxes the pool geometry with plane waves (generation {RELAX_GENERATION}, below; column `start` says
   why), so that the layers the potential gets wrong, often heavy buckled ones with a
   large spillage, are not left out; a run with `--fallback later` records the refusal
   instead (column `fallback`) and leaves the plane-wave relaxation to a later run. `--relax-with plane-waves` relaxes every geometry
   of this route again with plane waves. {_potential_text(relax)}
   **Plane waves** (`prescreen.physics.dft.relax_monolayer_pw`, generation
   {RELAX_GENERATION}): the labels' functional (PBE) and PAW setups in GPAW's
   plane-wave mode ({RELAX_ECUT_EV:g} eV cutoff, {HARD_PW_ECUT_EV:g} eV for layers with
   {', '.join(sorted(HARD_ELEMENTS))}), which has the stress tensor; k-point density
   {RELAX_KPT_DENSITY} per reciprocal angstrom, Fermi-Dirac width {RELAX_SMEARING_EV} eV.
   **Start** (column `start`): the pool geometry relaxed first by the universal
   interatomic potential CHGNet (weights from its PyPI wheel; trained by its authors on
   another project's relaxations, and used here for nothing but the start) within its
   space group (ASE's `FixSymmetry`; FIRE to {PRERELAX_FMAX} eV/A over the positions and
   the in-plane strain). A start that falls apart or moves an in-plane length by more
   than {100 * PRERELAX_MAX_STRAIN:.0f} % is not used: the relaxation then starts from the
   pool geometry. The potential decides where the DFT relaxation starts, not where it
   ends (`benchmarks/relax_start.py` compares both starts). {start_text}
   From there, one BFGS run over the positions and the in-plane strain
   (ASE's `FrechetCellFilter`, strains xx, yy and xy free, so the angle between the
   in-plane vectors can change; the out-of-plane vector and so the vacuum are kept) until
   every force is below {RELAX_FMAX} eV/A and each in-plane component of V sigma (the
   derivative of the energy with respect to that strain) below {RELAX_VIRIAL_TOL_EV} eV per cell, at
   most {RELAX_PW_STEPS} steps per attempt, up to {RELAX_ATTEMPTS} attempts (columns
   `virial_eV`, `bfgs_steps`, `ecut_eV`). GPAW's estimate of the Pulay stress of the
   finite cutoff, from the free atoms' kinetic-energy tails, is added to the stress
   (`pulay_virial_eV`; it is why layers with N, O or F use the higher cutoff). Structures that do not converge, or that are no
   longer one bonded, 2-periodic sheet with at least 8 A of vacuum (covalent radii x
   1.25 bond test, also run every {LAYER_CHECK_EVERY} steps), are recorded in `{RELAX_PARQUET}` and left
   out. {generations_text}
4. **Labels** (`prescreen.physics.dft.label_structure` with default
   `LabelSettings`; records in `labels/records.jsonl` of the work folder): LCAO PBE dzp
   ground state, Gamma-centred k mesh (hexagonal meshes contain K), Fermi-Dirac smearing,
   spin-orbit coupling added non-self-consistently, spillage of Liu and Vanderbilt, Phys. Rev. B 90, 125133 (2014), with occupations
   from the Fermi level at each k. Spin-paired (non-magnetic) ground states.
5. **Z2**, for positives whose occupied states with spin-orbit coupling are separated
   from the empty ones at every k (a direct gap: insulators, and band-inverted semimetals
   whose indirect gap is closed; before 2026-12-02 only those with an indirect gap were
   tried, and the Z2 job of a positive labelled before then checks the direct gap
   itself), at the same level of theory. With an inversion centre (within {SYMPREC_A} A, then made exact):
   `prescreen.physics.parity.z2_from_parities` (a symmetry-reduced ground state on an
   even mesh, then the states at the four TRIMs without symmetry; Z2 values recorded
   before 2026-12-02 came from one unreduced run on that mesh: the route changed, not the
   level of theory), the Fu-Kane product of parity eigenvalues of the occupied Kramers pairs at the
   four time-reversal-invariant momenta (Phys. Rev. B 76, 045302 (2007)). Without one:
   `prescreen.physics.wilson.z2_from_wilson_loops`, the winding of hybrid Wannier charge
   centres from Wilson loops of the SOC states over half the Brillouin zone
   (Soluyanov and Vanderbilt, Phys. Rev. B 83, 235401 (2011)), with point-orbital
   overlaps in the LCAO basis.

Versions: {ver}.

## Per prototype

{_md_table(("prototype", "atoms", "description", "pool", "labelled", "positives", "positive rate", "median spillage"), proto_rows)}

## Per element

{_md_table(("element", "in pool", "labelled", "positives", "positive rate"), el_rows)}

## Known limits

- All structures are **hypothetical**: decorated prototypes, not known compounds. They
  are **not screened for thermodynamic or dynamical stability**; many would not exist.
- Labels are **PBE with non-self-consistent spin-orbit coupling** in an **LCAO (dzp)
  basis**: band gaps are underestimated, and inversions close to the Fermi level can
  appear or vanish with a better functional or basis.
- The spillage of a structure that is a **metal without SOC** (`gap_nosoc_eV` 0) depends
  on where the Fermi level falls within tens of meV: of twelve layers labelled both in
  LCAO and in plane waves at the same geometry, two metals without SOC moved across 0.5
  (HgTe 0.20 against 1.02, MoIBr 0.36 against 0.62), while the five with a gap moved by
  0.11 at most (`benchmarks/label_basis.py`, `docs/labeller.md`). Read their labels, and
  the positives without a gap, as indicative.
- Spin-paired calculations: magnetic ground states are not sought; labels of magnetic
  compounds describe the non-magnetic state.
- Each relaxation finds the minimum nearest its start (the pool geometry, or the
  potential's relaxation of it within the same space group): symmetric starts keep
  their symmetry (hexagonal and square cells stay so), distorted phases (1T') keep their
  starting distortion pattern, and a layer with more than one minimum may end in one
  that is not the lowest.
- Geometries of generation {POTENTIAL_GENERATION} are the universal potential's, not DFT minima. Of the
  87 structures labelled at a plane-wave geometry on 2026-12-03, the potential's rules
  kept 70 (`benchmarks/potential_labels.py`, docs/labeller.md). Their in-plane lattices
  were a median 2.0 % from the plane-wave ones (90th percentile 8.8 %). Their labels at
  the two geometries differed by a median of 0.063 in spillage (90th percentile 0.61) and
  fell on the same side of {POSITIVE_THRESHOLD} for 55 of the 70 (79 %): for 31 of the 34 whose lattices
  agreed within 2 %, and 24 of the 36 beyond. Read a label of generation {POTENTIAL_GENERATION},
  above all one near {POSITIVE_THRESHOLD}, as provisional; filter on `relax_generation` where that matters.
- The geometries of generation {RELAX_GENERATION} are plane-wave PBE and the labels LCAO (dzp) PBE: at a relaxed geometry
  the LCAO forces are not zero (the dzp basis gives silicene a buckling of 0.53-0.54 A
  where plane waves give 0.46 A, `benchmarks/relax_pw.py`).
- Plane waves are periodic along z: a polar layer (Janus, BiTeI-like) feels a spurious
  field across the vacuum in its relaxation; no dipole correction is applied.
- Relaxations of generations 1 and 2 (column `generation`), where any remain, are LCAO
  relaxations without the stress tensor; those of generation 3 are plane-wave ones
  without the Pulay stress (lattices of layers with N, O or F several per cent short).
- A high spillage is a strong hint of a band inversion, not a proof of a topological
  phase; confirm with an invariant.
- The labelled subset is stratified over prototypes and elements but biased towards
  small cells (at most {DEFAULT_MAX_ATOMS} atoms first, and after the first
  {EQUAL_TURNS_RELAXED} structures more turns for prototypes of fewer atoms): per-prototype
  counts do not follow the pool's proportions; weigh by prototype where that matters.{deferred_limit}

## How to cite

> prescreen developers, *data_open: generated monolayers with spin-orbit spillage
> labels* (version {versions.get('prescreen', '?')}), part of the prescreen software, licensed {LICENCE}.

Please also cite the spillage method (S. Liu and D. Vanderbilt, Phys. Rev. B 90, 125133
(2014)), the DFT code (GPAW: J. J. Mortensen et al., J. Chem. Phys. 160, 092503 (2024))
and the covalent radii ({COVALENT_RADII_SOURCE}).
"""


def pack_stage(out: Path, work: Path, seed: int) -> dict[str, Any]:
    """Write the labelled tables, the datasheet and the manifest; returns the manifest."""
    import pandas as pd

    pool = pd.read_parquet(out / POOL_PARQUET)
    relax = _read_jsonl(work / "relax.jsonl")
    records = _label_records(work)
    z2 = {r["id"]: r for r in _read_jsonl(work / Z2_LOG)}
    labelled = _labelled_table(pool, relax, records, z2)
    relax_df = _relax_table(relax, records)
    _write_parquet(labelled, out / LABELLED_PARQUET)
    _write_parquet(relax_df, out / RELAX_PARQUET)
    _write_extxyz_gz(((structure_from_row(r), {"id": r["id"], "spillage": r["spillage"]})
                      for r in labelled.to_dict("records")), out / LABELLED_XYZ)
    versions = _versions()
    if len(labelled):
        versions.update(json.loads(labelled["versions"].iloc[0]))
    write_text(out / DATASHEET, datasheet(pool, labelled, relax_df, seed, versions,
                                          superseded_h=_superseded_label_hours(work)))
    files = [POOL_PARQUET, POOL_XYZ, LABELLED_PARQUET, LABELLED_XYZ, RELAX_PARQUET, DATASHEET]
    manifest = {
        "licence": LICENCE,
        "seed": seed,
        "positive_threshold": POSITIVE_THRESHOLD,
        "counts": {"pool": int(len(pool)), "labelled": int(len(labelled)),
                   "positives": int(labelled["high_spillage"].sum()) if len(labelled) else 0,
                   "relaxations": int(len(relax_df))},
        "files": {f: {"sha256": _sha256(out / f), "bytes": (out / f).stat().st_size} for f in files},
    }
    write_text(out / MANIFEST, json.dumps(manifest, indent=2, sort_keys=True) + "\n")
    print(f"pack: {len(pool)} pool, {len(relax_df)} relaxations, {len(labelled)} labelled, "
          f"{manifest['counts']['positives']} positive")
    return manifest


# --- command line -------------------------------------------------------------------
def _parser() -> argparse.ArgumentParser:
    p = argparse.ArgumentParser(description=(__doc__ or "").splitlines()[0])
    p.add_argument("--stage", choices=("all", "pool", "relax", "label", "pack"), default="all")
    p.add_argument("--limit", type=int, default=None,
                   help="relax and label only the first N of the stratified subset")
    p.add_argument("--workers", type=int, default=1, help="parallel single-core jobs")
    p.add_argument("--seed", type=int, default=DEFAULT_SEED)
    p.add_argument("--max-atoms", type=int, default=DEFAULT_MAX_ATOMS,
                   help="cells up to this size come first in the subset")
    p.add_argument("--batch", type=int, default=10,
                   help="new labels between two packs of data_open/ (stage all)")
    p.add_argument("--timeout", type=float, default=1800.0, help="seconds per labelling job")
    p.add_argument("--relax-timeout", type=float, default=3600.0, help="seconds per relaxation")
    p.add_argument("--retry-timeouts", action="store_true",
                   help="relax again the structures whose relaxation hit a timeout shorter "
                        "than --relax-timeout (other failures are never retried)")
    p.add_argument("--upgrade-share", type=float, default=DEFAULT_UPGRADE_SHARE,
                   help="share (0 to 1) of the relaxations started that relax again a "
                        "structure of an earlier protocol, while new ones wait too (default "
                        f"{DEFAULT_UPGRADE_SHARE})")
    p.add_argument("--relax-kpt-density", type=float, default=RELAX_KPT_DENSITY)
    p.add_argument("--start", choices=RELAX_STARTS, default=RELAX_START,
                   help="where each relaxation starts: the pool geometry relaxed first by a "
                        "universal potential within its space group (needs the 'uip' extra), "
                        "or the pool geometry itself")
    p.add_argument("--relax-with", choices=tuple(RELAX_WITH), default=DEFAULT_RELAX_WITH,
                   help="'potential' keeps the universal potential's relaxation as the "
                        "geometry (seconds; needs the 'uip' extra), 'plane-waves' relaxes with "
                        "DFT and the stress tensor (minutes) and relaxes the potential's "
                        f"geometries again (default {DEFAULT_RELAX_WITH})")
    p.add_argument("--fallback", choices=FALLBACKS, default=DEFAULT_FALLBACK,
                   help="with --relax-with potential, when a structure whose potential "
                        "relaxation is not kept is relaxed with plane waves: 'now', in the "
                        "same job, or 'later', by the next run with 'now', which does these "
                        f"first (default {DEFAULT_FALLBACK})")
    p.add_argument("--out", type=Path, default=ROOT / "data_open")
    p.add_argument("--work", type=Path, default=ROOT / "data_work" / "open_dataset",
                   help="checkpoints: relaxed structures and raw label records (committed, so "
                   "a later run on another machine resumes instead of starting over)")
    p.add_argument("--force-pool", action="store_true", help="regenerate the pool even if present")
    p.add_argument("--no-progress", action="store_true")
    p.add_argument("--traceback", action="store_true", help="show full tracebacks on error")
    return p


def run(args: argparse.Namespace) -> int:
    progress = not args.no_progress
    os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")
    if args.stage in ("all", "pool"):
        pool = build_pool(args.out, args.seed, force=args.force_pool, progress=progress)
        if args.stage == "pool":
            return 0
    else:
        import pandas as pd

        if not (args.out / POOL_PARQUET).exists():
            raise InputError("no pool yet", path=args.out / POOL_PARQUET,
                             expected="run with --stage pool first")
        pool = pd.read_parquet(args.out / POOL_PARQUET)
    order = stratified_order(pool, args.seed, args.max_atoms)
    if args.limit is not None:
        order = order[: max(0, args.limit)]
    relax_kw = dict(workers=args.workers, timeout_s=args.relax_timeout,
                    kpt_density=args.relax_kpt_density, progress=progress,
                    retry_timeouts=args.retry_timeouts, start=args.start,
                    relax_with=args.relax_with, fallback=args.fallback)
    if args.stage == "relax":
        relax_stage(pool, order, args.work, **relax_kw)
    elif args.stage == "label":
        label_stage(_read_jsonl(args.work / "relax.jsonl"), args.work, workers=args.workers,
                    timeout_s=args.timeout, progress=progress)
    elif args.stage == "pack":
        with _work_lock(args.work):  # not while a build writes the same files
            pack_stage(args.out, args.work, args.seed)
    else:
        pipeline_stage(pool, order, args.work, args.out, args.seed, workers=args.workers,
                       relax_timeout_s=args.relax_timeout, label_timeout_s=args.timeout,
                       kpt_density=args.relax_kpt_density, pack_every=args.batch,
                       progress=progress, retry_timeouts=args.retry_timeouts,
                       upgrade_share=args.upgrade_share, start=args.start,
                       relax_with=args.relax_with, fallback=args.fallback)
    return 0


def main(argv: Sequence[str] | None = None) -> int:
    """Command-line entry point; returns the exit code."""
    args = _parser().parse_args(argv)
    # `kill` (SIGTERM) unwinds like Ctrl-C: the running children are stopped, nothing torn
    signal.signal(signal.SIGTERM, lambda signum, frame: sys.exit(128 + signum))
    try:
        return run(args)
    except Exception as exc:
        if args.traceback:
            raise
        print(f"{type(exc).__name__}: {exc}", file=sys.stderr)
        return 1


if __name__ == "__main__":
    sys.exit(main())
