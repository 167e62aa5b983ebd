"""The featuriser protocol, the schema version and the one batch runner.

A featuriser is a small object with

* ``name`` and ``version``: the definition version string, bumped whenever what a
  feature means (or how it is computed) changes;
* ``feature_names()``: the output columns, in order;
* ``citations()``: the sources it implements;
* ``compute(batch) -> FeatureBlock``: a pure function of the batch and the
  featuriser's settings, vectorised over the whole batch.

Parsing formulas, error columns, chunking, progress and optional process parallelism
are written once, here, in :func:`featurise`.
"""

from __future__ import annotations

import hashlib
import json
from concurrent.futures import ProcessPoolExecutor
from dataclasses import dataclass
from typing import TYPE_CHECKING, Any, Protocol, Sequence, runtime_checkable

import numpy as np
import pandas as pd

from prescreen.errors import InputError
from prescreen.featurise.formula import ParsedFormulas, parse_formulas

if TYPE_CHECKING:  # pragma: no cover - typing only
    from pymatgen.core import Structure

__all__ = [
    "FeatureBatch",
    "FeatureBlock",
    "Featuriser",
    "SCHEMA_FORMAT",
    "ERROR_COLUMN",
    "CHUNK_ROWS",
    "default_featurisers",
    "schema_version",
    "featurise",
]

#: Version of the way the schema hash itself is formed (bump if the hashing changes).
SCHEMA_FORMAT = "prescreen-features/1"
#: Name of the per-row error column of :func:`featurise` (``None`` for a good row).
ERROR_COLUMN = "error"
#: Rows per work unit of the batch runner (progress granularity and parallel chunk).
CHUNK_ROWS = 8192


@dataclass(frozen=True)
class FeatureBatch:
    """The rows one featuriser call sees.

    Attributes
    ----------
    formulas
        ``(n,)`` formulas as given (after filling blanks from the structure).
    parsed
        The parsed formulas (padded ``z`` and ``amount`` arrays, per-row errors).
    structures
        ``(n,)`` pymatgen structures or ``None`` for formula-only rows.
    first_row
        Index of the first row in the whole table (for error messages).
    """

    formulas: Sequence[str]
    parsed: ParsedFormulas
    structures: Sequence["Structure | None"]
    first_row: int = 0


@dataclass(frozen=True)
class FeatureBlock:
    """Output of one featuriser on one batch.

    Attributes
    ----------
    values
        ``(n, m)`` float array, one column per ``feature_names()``; NaN marks a value that
        is missing (explicitly: no structure, or the row failed).
    errors
        ``(n,)`` object array of ``None`` or a message for rows this featuriser could
        not compute (rows whose formula failed to parse need no message here).
    """

    values: np.ndarray
    errors: np.ndarray


@runtime_checkable
class Featuriser(Protocol):
    """What every featuriser provides (see the module docstring)."""

    name: str
    version: str

    def feature_names(self) -> list[str]:  # pragma: no cover - protocol
        ...

    def citations(self) -> list[str]:  # pragma: no cover - protocol
        ...

    def compute(self, batch: FeatureBatch) -> FeatureBlock:  # pragma: no cover - protocol
        ...


def default_featurisers() -> list[Featuriser]:
    """The featurisers used when none are given, in output-column order."""
    from prescreen.featurise.composition import (
        IonicCharacterFeaturiser,
        MagpieFeaturiser,
        StoichiometryFeaturiser,
        ValenceOrbitalFeaturiser,
    )
    from prescreen.featurise.spinorbit import SpinOrbitFeaturiser
    from prescreen.featurise.structure import MonolayerStructureFeaturiser

    return [
        MagpieFeaturiser(),
        StoichiometryFeaturiser(),
        ValenceOrbitalFeaturiser(),
        IonicCharacterFeaturiser(),
        SpinOrbitFeaturiser(),
        MonolayerStructureFeaturiser(),
    ]


def schema_version(featurisers: Sequence[Featuriser] | None = None) -> str:
    """SHA-256 (hex) of the feature schema: names, order and definition versions.

    It changes whenever a featuriser is added, removed, reordered, renamed, or its
    ``version`` (definition) or any feature name changes.

    Parameters
    ----------
    featurisers
        Defaults to :func:`default_featurisers`.

    Returns
    -------
    str
        64 hex digits.
    """
    featurisers = default_featurisers() if featurisers is None else list(featurisers)
    doc = {
        "format": SCHEMA_FORMAT,
        "featurisers": [
            {"name": f.name, "version": f.version, "features": list(f.feature_names())}
            for f in featurisers
        ],
    }
    return hashlib.sha256(json.dumps(doc, sort_keys=True).encode()).hexdigest()


def _check_names(featurisers: Sequence[Featuriser]) -> list[str]:
    names: list[str] = []
    for f in featurisers:
        if not isinstance(f, Featuriser):
            raise InputError("not a featuriser", value=f,
                             expected="an object with name, version, feature_names, citations, compute")
        names.extend(f.feature_names())
    dup = sorted({n for n in names if names.count(n) > 1})
    if dup or ERROR_COLUMN in names:
        raise InputError("feature names clash", value=dup or [ERROR_COLUMN],
                         expected="unique feature names across featurisers")
    return names


def _as_structure(item: Any) -> Any:
    """A row's structure as featurisers want it: None for missing (None, NaN, pd.NA), a
    pymatgen Structure for an ``ase.Atoms``; anything else as given (reported later)."""
    from prescreen.candidate import atoms_to_structure

    if item is None or (not hasattr(item, "__len__") and pd.isna(item)):
        return None
    return atoms_to_structure(item)


def _as_formula(item: Any) -> Any:
    """A pymatgen Composition as its formula text; anything else as given."""
    if hasattr(item, "reduced_formula") and hasattr(item, "formula"):
        return str(item.formula).replace(" ", "")
    return item


def _fill_formulas(formulas: Sequence[str], structures: Sequence["Structure | None"]) -> list:
    """Take a missing (None, NaN) or blank formula from the row's structure, if it has one."""
    out = []
    for f, s in zip(formulas, structures):
        blank = f is None or (isinstance(f, float) and f != f) or (isinstance(f, str) and not f.strip())
        if blank and s is not None:
            try:
                f = s.composition.formula.replace(" ", "")
            except AttributeError:  # not a Structure: the structure featuriser reports it
                pass
        out.append(f)
    return out


def _run_chunk(args: tuple) -> tuple[np.ndarray, np.ndarray]:
    featurisers, formulas, structures, first_row = args
    parsed = parse_formulas(formulas, first_line=first_row)
    batch = FeatureBatch(formulas=formulas, parsed=parsed, structures=structures,
                         first_row=first_row)
    n = len(formulas)
    errors: list[list[str]] = [[] for _ in range(n)]
    for i in np.flatnonzero(~parsed.ok):
        errors[i].append(str(parsed.errors[i]))
    blocks = []
    for f in featurisers:
        try:
            block = f.compute(batch)
        except InputError as exc:  # a featuriser refusing the whole chunk: report per row
            block = FeatureBlock(values=np.full((n, len(f.feature_names())), np.nan),
                                 errors=np.array([f"{f.name}: {exc}"] * n, dtype=object))
        if block.values.shape != (n, len(f.feature_names())):
            raise RuntimeError(f"featuriser {f.name} returned shape {block.values.shape}, "
                               f"expected {(n, len(f.feature_names()))}")
        for i in np.flatnonzero(pd.notna(block.errors)):
            errors[i].append(f"{f.name}: {block.errors[i]}")
        blocks.append(block.values)
    values = np.hstack(blocks) if blocks else np.zeros((n, 0))
    err = np.array(["; ".join(e) if e else None for e in errors] + [None], dtype=object)[:n]
    return values, err


def featurise(
    formulas: Sequence[str],
    structures: Sequence["Structure | None"] | None = None,
    *,
    featurisers: Sequence[Featuriser] | None = None,
    progress: bool = True,
    n_jobs: int = 1,
) -> pd.DataFrame:
    """Featurise a table of candidates; one output row per input row, never dropped.

    Parameters
    ----------
    formulas
        ``(n,)`` formulas (text or pymatgen ``Composition``). A blank formula is taken
        from the structure of that row.
    structures
        ``(n,)`` pymatgen ``Structure`` or ``ase.Atoms`` (monolayers), or a missing value
        (``None``, NaN) for formula-only rows; ``None`` for the whole argument means every
        row is formula-only. Structure features of formula-only rows are NaN (explicitly
        missing).
    featurisers
        Defaults to :func:`default_featurisers`.
    progress
        Show a tqdm progress bar over rows.
    n_jobs
        Worker processes; 1 (default) runs in this process.

    Returns
    -------
    pandas.DataFrame
        ``n`` rows in input order (the index of ``formulas`` when it is a pandas Series,
        else ``0..n-1``), one float column per feature name
        in featuriser order, then the ``error`` column (``None`` or a message naming the
        entry, the bad value and what was expected).

    Raises
    ------
    InputError
        If ``structures`` and ``formulas`` differ in length, ``n_jobs < 1`` or feature
        names clash.
    """
    from tqdm.auto import tqdm

    featurisers = default_featurisers() if featurisers is None else list(featurisers)
    names = _check_names(featurisers)
    index = formulas.index if isinstance(formulas, pd.Series) else None
    formulas = [_as_formula(f) for f in formulas]
    n = len(formulas)
    if structures is None:
        structures = [None] * n
    structures = [_as_structure(st) for st in structures]
    if len(structures) != n:
        raise InputError("structures and formulas differ in length", value=len(structures),
                         expected=f"{n} structures (None for formula-only rows)")
    if not isinstance(n_jobs, int) or n_jobs < 1:
        raise InputError("n_jobs must be a positive integer", value=n_jobs, expected=">= 1")
    formulas = _fill_formulas(formulas, structures)
    chunks = [(featurisers, formulas[i:i + CHUNK_ROWS], structures[i:i + CHUNK_ROWS], i)
              for i in range(0, n, CHUNK_ROWS)]
    results: list[tuple[np.ndarray, np.ndarray]] = []
    with tqdm(total=n, disable=not progress, unit="row", desc="featurise") as bar:
        if n_jobs == 1 or len(chunks) <= 1:
            for c in chunks:
                results.append(_run_chunk(c))
                bar.update(len(c[1]))
        else:
            with ProcessPoolExecutor(max_workers=n_jobs) as pool:
                for c, res in zip(chunks, pool.map(_run_chunk, chunks)):
                    results.append(res)
                    bar.update(len(c[1]))
    if results:
        values = np.vstack([r[0] for r in results])
        errors = np.concatenate([r[1] for r in results])
    else:
        values = np.zeros((0, len(names)))
        errors = np.zeros(0, dtype=object)
    frame = pd.DataFrame(values, columns=names)
    frame[ERROR_COLUMN] = pd.Series(errors, dtype=object)
    if index is not None:
        frame.index = index
    return frame
