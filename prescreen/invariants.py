"""Z2 invariants of a campaign's candidates, kept in ``<campaign>/z2.csv``.

:func:`compute_invariants` computes the Z2 invariant of chosen candidates at the built-in
labeller's level of theory and records each outcome, a refusal with its reason included,
in one CSV that the allocation report reads (with the flow of Wannier centres of each
Wilson-loop result in :data:`FLOWS_DIR` beside it, which the report plots). The method (column ``method``) is the
Fu–Kane parity criterion (:func:`prescreen.physics.parity.z2_from_parities`) for a layer
with an inversion centre, and the flow of Wannier charge centres from Wilson loops
(:func:`prescreen.physics.wilson.z2_from_wilson_loops`) for one without; either can be
asked for. The file is rewritten after every candidate through a
temporary file, so an interruption loses at most the calculation in progress; a refusal
never replaces an earlier computed invariant of the same candidate.
"""

from __future__ import annotations

import csv
import importlib.util
import json
from collections.abc import Iterable
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING, Any

from prescreen.errors import InputError, LabellingError
from prescreen.io.atomic import replacing, write_json

if TYPE_CHECKING:  # pragma: no cover
    from prescreen.campaign import Campaign

__all__ = ["INVARIANTS_FILE", "FLOWS_DIR", "COLUMNS", "METHODS", "InvariantOutcome",
           "choose_method", "compute_invariants", "gapped_hits", "method_words", "read_flow",
           "read_invariants"]

#: File in a campaign folder that holds the invariants.
INVARIANTS_FILE = "z2.csv"
#: Folder beside the invariants file with the Wannier-centre flow of each Wilson-loop
#: result, ``<id>.json`` (:meth:`prescreen.physics.wilson.WilsonZ2.as_dict`).
FLOWS_DIR = "z2_flows"

#: Columns of the file, in order.
COLUMNS: tuple[str, ...] = ("id", "formula", "z2", "delta", "direct_gap_soc_eV", "kmesh",
                            "inversion_centre", "parity_error", "wall_s", "status", "reason",
                            "method", "wilson_loops", "min_link")

#: Methods :func:`compute_invariants` knows; ``auto`` takes parities when the layer has
#: an inversion centre (one ground state, an exact criterion) and Wilson loops otherwise.
METHODS: tuple[str, ...] = ("auto", "parity", "wilson")


@dataclass(frozen=True)
class InvariantOutcome:
    """What one candidate's calculation gave.

    Attributes
    ----------
    id
        Candidate identifier.
    row
        The row as written (strings, :data:`COLUMNS`).
    kept_earlier
        True when the calculation was refused but an earlier computed invariant of the
        candidate stays in the file.
    """

    id: str
    row: dict[str, str]
    kept_earlier: bool = False

    def describe(self) -> str:
        """One line for a terminal."""
        r = self.row
        if self.kept_earlier:
            return f"{self.id}: no invariant this time ({r['reason']}); the earlier result is kept"
        if r["status"] == "ok":
            how = method_words(r)
            return f"{self.id}: Z2 = {r['z2']} ({how}, direct gap {r['direct_gap_soc_eV']} eV)"
        return f"{self.id}: no invariant: {r['reason']}"


def method_words(row: dict[str, str]) -> str:
    """How a computed row was found, in words: ``"parities -1 +1 +1 +1"`` or ``"Wilson
    loops, 10 lines of 24 k points"`` (rows from before the ``method`` column are
    parities); the method's name alone for a refusal."""
    if row.get("status") != "ok":
        return row.get("method", "")
    if row.get("method") == "wilson":
        lines, _, nk1 = row.get("wilson_loops", "").partition("x")
        return f"Wilson loops, {lines} lines of {nk1} k points"
    return f"parities {row.get('delta', '')}"


def read_invariants(path: str | Path) -> dict[str, dict[str, str]]:
    """Rows of an invariants file by ID (empty when the file does not exist).

    Raises
    ------
    InputError
        If the file has no ``id`` column or cannot be read as CSV.
    """
    path = Path(path)
    if not path.is_file():
        return {}
    rows: dict[str, dict[str, str]] = {}
    try:
        with open(path, newline="", encoding="utf-8") as fh:
            reader = csv.DictReader(fh)
            if reader.fieldnames is None or "id" not in reader.fieldnames:
                raise InputError("not a Z2 results file", path=path, line=1,
                                 value=",".join(reader.fieldnames or []),
                                 expected="the columns " + ",".join(COLUMNS))
            for row in reader:
                rows[row["id"]] = {c: row.get(c) or "" for c in COLUMNS}
    except (OSError, UnicodeDecodeError, csv.Error) as exc:
        raise InputError(f"cannot read the invariants file: {exc}", path=path,
                         expected="the CSV written by `prescreen z2`") from exc
    return rows


def read_flow(invariants_path: str | Path, cid: str) -> Any:
    """The Wilson-loop flow stored beside an invariants file for ``cid``, or None.

    Raises
    ------
    InputError
        If the flow file exists but is not a flow written by :func:`compute_invariants`.
    """
    from prescreen.physics.wilson import WilsonZ2

    path = Path(invariants_path).parent / FLOWS_DIR / f"{cid}.json"
    if not path.is_file():
        return None
    try:
        return WilsonZ2.from_dict(json.loads(path.read_text(encoding="utf-8")))
    except (OSError, ValueError, KeyError, TypeError) as exc:
        raise InputError(f"cannot read the Wannier-centre flow: {exc}", path=path,
                         expected="the JSON written by `prescreen z2`") from exc


def _write_flow(invariants_path: Path, cid: str, result: Any) -> None:
    folder = invariants_path.parent / FLOWS_DIR
    folder.mkdir(parents=True, exist_ok=True)
    write_json(folder / f"{cid}.json", result.as_dict(), indent=1)


def _write(path: Path, rows: dict[str, dict[str, str]]) -> None:
    """Write all rows through a temporary file (a kill leaves the old file or the new)."""
    path.parent.mkdir(parents=True, exist_ok=True)
    with replacing(path) as tmp, open(tmp, "w", newline="", encoding="utf-8") as fh:
        writer = csv.DictWriter(fh, fieldnames=list(COLUMNS), lineterminator="\n")
        writer.writeheader()
        writer.writerows(rows.values())


def gapped_hits(campaign: "Campaign", ids: Iterable[str] | None = None) -> list[str]:
    """Results at or above the campaign's threshold whose Z2 invariant is defined.

    That is, whose occupied states with SOC are apart from the empty ones at every k: a
    band gap (``gap_soc_eV``) of at least :data:`prescreen.physics.dft.METAL_GAP_EV`, or a
    direct gap (``direct_gap_soc_eV``, which the built-in labeller fills) of at least that
    much, which a band-inverted semimetal has too (the direct gap is never the smaller, so
    either suffices). ``ids`` restricts the search (default: every result).
    """
    import pandas as pd

    from prescreen.physics.dft import METAL_GAP_EV

    labels = campaign.labels()
    if ids is not None:
        labels = labels.loc[labels.index.intersection(list(ids))]
    gap = pd.to_numeric(labels["gap_soc_eV"], errors="coerce")
    direct = pd.to_numeric(labels["direct_gap_soc_eV"], errors="coerce")
    apart = (gap >= METAL_GAP_EV) | (direct >= METAL_GAP_EV)
    keep = (labels["spillage"] >= campaign.threshold) & apart
    return list(labels.index[keep])


def choose_method(structure: Any, method: str = "auto", settings: Any = None) -> str:
    """``parity`` or ``wilson`` for a structure (``auto``: parity if it has an inversion centre).

    Raises
    ------
    InputError
        An unknown method, or a structure that is not a monolayer slab.
    """
    if method not in METHODS:
        raise InputError("unknown Z2 method", value=method, expected=" or ".join(METHODS))
    if method != "auto":
        return method
    from prescreen.physics.dft import LabelSettings, prepare_monolayer
    from prescreen.physics.parity import inversion_map

    settings = settings or LabelSettings()
    layer = prepare_monolayer(structure, settings.vacuum_A)  # a bad input is refused as such
    try:
        inversion_map(layer)
    except InputError:  # no inversion centre
        return "wilson"
    return "parity"


def compute_invariants(campaign: "Campaign", ids: Iterable[str], *, out: str | Path | None = None,
                       settings: Any = None, method: str = "auto",
                       progress: bool = True) -> list[InvariantOutcome]:
    """Compute the Z2 invariant of each candidate and record it in the invariants file.

    Parameters
    ----------
    campaign
        An open campaign.
    ids
        Candidate IDs (each computed once, in the order given).
    out
        The file to update (default ``<campaign>/z2.csv``); rows of other IDs are kept.
    settings
        :class:`prescreen.physics.dft.LabelSettings`; None takes the campaign's
        (:meth:`~prescreen.campaign.Campaign.label_settings`), so the invariant is at the
        level of theory of the spillage it checks.
    method
        One of :data:`METHODS`.
    progress
        Show a progress bar.

    Raises
    ------
    InputError
        GPAW is not importable, an ID is not a candidate of the campaign, or the method
        is unknown. A candidate the method cannot handle (no structure, no inversion
        centre for ``parity``, no gap with SOC) is recorded as refused with the reason,
        not raised.
    """
    from tqdm.auto import tqdm

    from prescreen.physics.parity import z2_from_parities
    from prescreen.physics.wilson import z2_from_wilson_loops

    if method not in METHODS:
        raise InputError("unknown Z2 method", value=method, expected=" or ".join(METHODS))
    if importlib.util.find_spec("gpaw") is None:
        raise InputError("GPAW is not importable", value="gpaw",
                         expected="the DFT extra: `make dft-env` or "
                         "`bash scripts/install_gpaw.sh .venv`")
    ids = list(dict.fromkeys(ids))
    known = set(campaign.candidate_ids())
    for cid in ids:
        if cid not in known:
            raise InputError("unknown candidate ID", path=campaign.path, value=cid,
                             expected=f"an ID of campaign {campaign.name!r}")
    path = Path(out) if out is not None else campaign.path / INVARIANTS_FILE
    table = read_invariants(path)
    settings = (campaign.check_label_settings(settings) if settings is not None
                else campaign.label_settings())
    outcomes = []
    for cid in tqdm(ids, desc="Z2 invariants", unit="structure", disable=not progress):
        structure = campaign.structure(cid)
        row = dict.fromkeys(COLUMNS, "") | {"id": cid}
        try:
            if structure is None:
                raise InputError("no structure (a formula-only candidate)", value=cid,
                                 expected="a candidate read from a structure file")
            how = choose_method(structure, method, settings)
            row["method"] = how
            if how == "parity":
                r = z2_from_parities(structure, settings, id=cid)
            else:
                w = z2_from_wilson_loops(structure, settings, id=cid)
        except (InputError, LabellingError) as exc:
            row |= {"formula": "" if structure is None else structure.composition.reduced_formula,
                    "status": "refused", "reason": str(exc)}
            if table.get(cid, {}).get("status") == "ok":
                outcomes.append(InvariantOutcome(cid, row, kept_earlier=True))
                continue
        else:
            if how == "parity":
                row |= {"formula": r.formula, "z2": str(r.z2),
                        "delta": " ".join(f"{d:+d}" for d in r.delta),
                        "direct_gap_soc_eV": f"{r.direct_gap_soc_eV:.4f}",
                        "kmesh": "x".join(map(str, r.kmesh)),
                        "inversion_centre": " ".join(f"{v:.6f}" for v in r.inversion_centre),
                        "parity_error": f"{r.parity_error:.2e}", "wall_s": f"{r.wall_s:.1f}",
                        "status": "ok"}
            else:
                row |= {"formula": w.formula, "z2": str(w.z2),
                        "direct_gap_soc_eV": f"{w.direct_gap_soc_eV:.4f}",
                        "kmesh": "x".join(map(str, w.kmesh)), "wall_s": f"{w.wall_s:.1f}",
                        "wilson_loops": f"{len(w.k2)}x{w.nk1}", "min_link": f"{w.min_link:.3f}",
                        "status": "ok"}
                _write_flow(path, cid, w)
        table[cid] = row
        _write(path, table)  # after every candidate: a kill loses at most the one running
        outcomes.append(InvariantOutcome(cid, row))
    return outcomes
